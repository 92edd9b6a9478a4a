"""Funnels: how the spread of the other parameters changes along one parameter.

From the draws (:func:`varying_scale_findings`): every other parameter is
regressed linearly on the candidate ``v`` and the robust sd of the residuals
(1.4826 x MAD) is compared between the top and bottom fifth of ``v``:

    ratio_i = sd_i(top fifth of v) / sd_i(bottom fifth of v),

1 for a correlated Gaussian. A parameter counts as affected when the ratio
is 4-fold or more and its log is significant (standard error from the
asymptotic variance of log MAD, tails calibrated by simulation, a Markov
bound over the candidates keeping false alarms on Gaussians below
:data:`FUNNEL_FALSE_ALARM`).

From the model (:func:`funnel_findings_from_curvature`): the local spread
``(-d^2 log p / d theta_i^2)^{-1/2}`` is compared at two points along the
candidate, on the line of the others' conditional mean; what it suggests is a
hypothesis until the draws confirm it.

The fix for a funnel is the non-centred parameterisation, spelled out for the
model's parameters: effect_j = location + scale * z_j.

References
----------
Neal, R. M. (2003). Slice sampling. Annals of Statistics, 31(3), 705-767 (the funnel).
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
parametrization of hierarchical models. Statistical Science, 22(1), 59-73.
Betancourt, M. and Girolami, M. (2015). Hamiltonian Monte Carlo for hierarchical models.
In Current Trends in Bayesian Methodology with Applications, 79-101 (the centred form fails
when the data are weak).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from .checkpoint import stop_point
from .diagnostics import rhat
from .findings import Finding
from .reparam import candidates, forward, inverse, log_jacobian

#: The funnel detector compares spreads that differ 4-fold or more, and only
#: where the difference is also significant (see :func:`log_spread_ratio_se`);
#: below 50 independent draws (10 per fifth) it declines to decide.
MIN_DRAWS_FOR_SPREAD = 50

#: Family-wise false-alarm rate the funnel detector allows on a Gaussian (all
#: candidate parameters together); a calibration target of this project, checked
#: by simulation in tests/test_funnels.py.
FUNNEL_FALSE_ALARM = 0.005

#: One-sided level at which the draws confirm a funnel the curvature suggests: the
#: curvature has already named the candidate and the direction, so this is one
#: test, not a search (common practice: 5%).
CONFIRMATION_LEVEL = 0.05

#: Asymptotic variance of log(MAD) per draw for a Gaussian: ``1 / (16 phi(q)^2 q^2)``
#: with ``q = Phi^-1(0.75)`` (the sample median's variance ``p (1 - p) / (n f^2)``
#: applied to ``|X|``, whose density at its median q is ``2 phi(q)``); about 1.36.
_LOG_MAD_VARIANCE = 1.0 / (16.0 * stats.norm.pdf(stats.norm.ppf(0.75)) ** 2 * stats.norm.ppf(0.75) ** 2)


def local_spread_ratio(draws: np.ndarray, index: int, bins: int = 5) -> np.ndarray:
    """How much the conditional spread of each parameter changes along parameter ``index``.

    ``draws`` is (n, d). Every other parameter is regressed linearly on
    parameter ``index`` (which removes the trend of a correlated Gaussian,
    whose conditional spread is constant); the robust sd (1.4826 x median
    absolute deviation) of the residuals is compared between the top and the
    bottom ``1/bins`` of the draws sorted by parameter ``index``. Returns the
    ratio top / bottom per parameter (1 for ``index`` itself).
    """
    n, d = draws.shape
    v = draws[:, index]
    centred = draws - draws.mean(axis=0)
    vc = centred[:, index]
    slope = vc @ centred / max(vc @ vc, np.finfo(float).tiny)  # least squares on v, closed form
    residual = centred - np.outer(vc, slope)
    order = np.argsort(v, kind="stable")
    size = n // bins

    def robust_sd(rows):
        part = residual[rows]
        return 1.4826 * np.median(np.abs(part - np.median(part, axis=0)), axis=0)

    low, high = robust_sd(order[:size]), robust_sd(order[-size:])
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(low > 0, high / low, np.inf)
    ratio[index] = 1.0
    return ratio


def log_spread_ratio_se(n_per_fifth: float) -> float:
    """Standard error of ``log(top / bottom)`` robust sds on a Gaussian, each from ``n_per_fifth`` independent draws.

    ``sqrt(2 v / (n - 1.5))`` with ``v`` the asymptotic variance of log(MAD)
    per draw (:data:`_LOG_MAD_VARIANCE`, about 1.36); the ``- 1.5`` is a
    small-sample correction calibrated here by simulation (20,000 Gaussian
    samples each of n = 10, 20, 50 and 200 draws: variance of log(MAD) times n
    was 1.56, 1.46, 1.41, 1.36). About 0.56 with 10 draws per fifth.
    """
    return float(np.sqrt(2.0 * _LOG_MAD_VARIANCE / max(n_per_fifth - 1.5, 1.0)))


def significance_level(d: int, n_per_fifth: float, family: float = FUNNEL_FALSE_ALARM) -> float:
    """How many standard errors a log spread ratio must exceed so that a Gaussian raises a finding with probability <= ``family``.

    A finding needs, for one of the ``d`` candidate parameters, at least
    ``k = ceil((d - 1) / 2)`` of the other ``d - 1`` ratios significant. By
    Markov's inequality on the count of significant ratios (which holds
    however correlated they are), P(count >= k) <= (d - 1) p / k <= 2 p, so
    a per-ratio level ``p = family / (2 d)`` keeps the chance over all ``d``
    candidates below ``family`` (for d = 2, one ratio per candidate: p = family / d).

    The log ratio of two MADs from few draws has heavier tails than a normal:
    its two-sided quantiles at p = 0.0025, 0.001 and 0.0002 (400,000 simulated
    pairs per size, calibrated here) lie inside those of a Student-t with
    ``2 n`` degrees of freedom for n = 10 to 100 draws per fifth, so the
    critical value is taken from that t.
    """
    m = max(d - 1, 1)
    k = int(np.ceil(m / 2))
    p = family * k / (m * d)
    return float(stats.t.isf(p / 2, df=max(2.0 * n_per_fifth, 1.0)))


def independent_draws(draws: np.ndarray, tau: float, ess=None) -> np.ndarray:
    """Roughly independent draws behind each parameter's bins, shape (d,).

    ``draws.size / d / tau`` (``tau`` a typical within-chain IACT), capped by
    each parameter's multi-chain bulk ESS ``ess`` when given: where chains
    disagree (R-hat far above 1) the fifths of a parameter are filled by
    different chains, and their spreads compare chains, not regions.
    """
    m, n, d = draws.shape
    pooled = np.full(d, m * n / max(tau, 1.0))
    if ess is None:
        return pooled
    ess = np.asarray(ess, dtype=float)
    return np.minimum(pooled, np.where(np.isfinite(ess), ess, 0.0))


def varying_scale_findings(draws: np.ndarray, tau: float, names: list, threshold: float = 4.0, bounds=None, ess=None):
    """``varying-scale`` findings from (chains, n, d) draws; and a note when undecidable.

    ``tau`` is a typical within-chain IACT and ``ess`` (d,) the multi-chain
    bulk ESS (optional; see :func:`independent_draws`); a candidate needs at
    least :data:`MIN_DRAWS_FOR_SPREAD` independent draws. A parameter counts
    as affected along a candidate when its spread ratio is at least
    ``threshold``-fold and its log is significant at
    :func:`significance_level` standard errors (:func:`log_spread_ratio_se`,
    from the candidate's independent draws per fifth).
    """
    m, n, d = draws.shape
    if d < 2:
        return [], None
    flat = draws.reshape(-1, d)
    n_independent = independent_draws(draws, tau, ess)
    flat = flat[:: max(1, flat.shape[0] // 20_000)]  # 20,000 rows are plenty for five bins
    if np.max(n_independent) < MIN_DRAWS_FOR_SPREAD:
        return [], (f"only about {np.max(n_independent):.0f} roughly independent draws; too few to measure how "
                    "local spread changes")
    strongest = {}
    for j in range(d):
        stop_point()
        if n_independent[j] < MIN_DRAWS_FOR_SPREAD:
            continue
        n_fifth = n_independent[j] / 5
        needed = max(np.log(threshold), significance_level(d, n_fifth) * log_spread_ratio_se(n_fifth))
        with np.errstate(divide="ignore"):
            size = np.abs(np.log(local_spread_ratio(flat, j)))
        size[j] = 0.0
        affected = [i for i in range(d) if size[i] >= needed]
        # A funnel parameter changes the spread of most of the others, not of one partner.
        if affected and len(affected) >= (d - 1) / 2:
            strongest[j] = (float(np.exp(np.median(size[affected]))), affected)
    bounds = np.tile([-np.inf, np.inf], (d, 1)) if bounds is None else np.asarray(bounds, dtype=float)
    return _varying_scale(strongest, names, bounds, flat), None


def _probe_values(column: np.ndarray, low: float, high: float, reach: float, floor: float = 0.0) -> np.ndarray:
    """Values ``reach`` spreads either side of the draws' centre of one parameter, (2,).

    A bounded parameter is probed in the coordinate that opens its range to
    the whole line (log, or logit between two bounds; :mod:`walktune.reparam`),
    where a scale parameter's funnel is as wide as in its logarithm. ``floor``
    is a lower limit on the spread there (from the curvature, so that chains
    stuck in a funnel's neck do not hide the funnel).
    """
    kind = candidates(low, high)[-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        u = forward(kind, column, low, high)
    u = u[np.isfinite(u)]
    spread = max(float(np.std(u)), floor)
    return inverse(kind, float(np.mean(u)) + np.array([-reach, reach]) * spread, low, high)


def _on_ridge(centre: np.ndarray, covariance: np.ndarray, index: int, values: np.ndarray, lowest: np.ndarray,
             highest: np.ndarray) -> np.ndarray:
    """Points (len(values), d) where parameter ``index`` takes ``values`` and the others their linear conditional mean.

    Probing along the regression line of the others on the candidate keeps the
    probe inside the posterior: a correlated posterior (a regression with an
    uncentred covariate) moved along one axis alone leaves it, and its
    curvature there says nothing about the draws. The others are kept within
    the range of their draws (``lowest``, ``highest``, shape (d,)), inside any bound.
    """
    slope = covariance[:, index] / covariance[index, index]
    points = np.clip(centre + np.outer(np.asarray(values) - centre[index], slope), lowest, highest)
    points[:, index] = values
    return points


def _local_sd(log_density, point: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """``(-d^2 log p / d theta_i^2)^{-1/2}`` per parameter by central differences (step 1e-3 sd_i); NaN where not concave."""
    d = point.shape[0]
    f0 = log_density(point)
    out = np.full(d, np.nan)
    for i in range(d):
        h = 1e-3 * sd[i]
        step = np.zeros(d)
        step[i] = h
        second = (log_density(point + step) - 2 * f0 + log_density(point - step)) / h**2
        if np.isfinite(second) and second < 0:
            out[i] = 1.0 / np.sqrt(-second)
    return out


def curvature_probe_cost(d: int) -> int:
    """Evaluations :func:`funnel_findings_from_curvature` makes: ``(2 d + 1) (2 d + 3)``."""
    return (2 * d + 1) * (2 * d + 3)


def funnel_findings_from_curvature(log_density, draws: np.ndarray, tau: float, names: list, bounds=None,
                                   threshold: float = 4.0, reach: float = 3.0, spread=None,
                                   log_densities=None) -> list:
    """``varying-scale`` suspected from the model's curvature, and whether the draws confirm it.

    For each candidate parameter j, the local spread of every other parameter,
    ``(-d^2 log p / d theta_i^2)^{-1/2}``, is compared between two points
    ``reach`` spreads either side of the draws' centre along j (past the
    draws' own 1% points: the draws of a funnel under-represent its neck; in log or
    logit coordinates for a bounded j; see :func:`_probe_values`), the others
    at their conditional mean given j (:func:`_on_ridge`). For a Gaussian every
    ratio is 1; in Neal's funnel it is ``exp(reach sd_v)``.

    The strongest candidate changing at least half of the others
    ``threshold``-fold is a hypothesis until the draws confirm it: the median
    over the affected parameters of the draws' log spread ratio
    (:func:`local_spread_ratio`) must point the same way, be significant
    (one-sided, :data:`CONFIRMATION_LEVEL`, :func:`log_spread_ratio_se` from
    the within-chain independent draws) and
    reach half the log ratio the curvature predicts between the medians of
    the draws' bottom and top fifths. Confirmed: warn (critical at 10-fold).
    Not confirmed: info, saying what would settle it. Nothing at all when
    the curvature predicts less than ``sqrt(threshold)``-fold (half the
    threshold's log) between the medians of the draws' fifths: the change it
    sees lies in tails the draws hardly reach.

    Parameters
    ----------
    log_density : callable
        ``log p(theta)`` for theta of shape (d,).
    draws : ndarray of shape (chains, n, d)
        Fixed-proposal draws; ``tau`` a typical within-chain IACT of them.
    spread : ndarray of shape (d,), optional
        Another estimate of each parameter's sd (e.g. the pilot's): the probe
        reaches at least that far, so chains stuck in a neck do not hide it.
    log_densities : ndarray of shape (chains, n), optional
        ``log p`` of the draws: chains stranded apart (:func:`chains_apart`)
        take no part in the confirmation.
    names : list of str
    bounds : ndarray of shape (d, 2), optional

    Returns
    -------
    list of Finding
        At most one; :func:`curvature_probe_cost` evaluations of ``log_density``.
    """
    d = draws.shape[2]
    if d < 2:
        return []
    flat = draws.reshape(-1, d)
    bounds = np.tile([-np.inf, np.inf], (d, 1)) if bounds is None else np.asarray(bounds, dtype=float)
    centre, covariance = flat.mean(axis=0), np.atleast_2d(np.cov(flat.T))
    sd = np.sqrt(np.maximum(np.diag(covariance), 1e-300))
    local = np.nan_to_num(_local_sd(log_density, centre, sd), nan=0.0)
    strongest = None
    for j in range(d):
        low, high = bounds[j]
        kind = candidates(low, high)[-1]
        with np.errstate(divide="ignore", invalid="ignore"):
            opening = np.exp(-log_jacobian(kind, forward(kind, centre[j], low, high), low, high))  # du/dtheta
        widest = max(local[j], 0.0 if spread is None else float(spread[j]))
        floor = float(np.nan_to_num(widest * opening, nan=0.0, posinf=0.0))
        values = _probe_values(flat[:, j], low, high, reach, floor=floor)
        points = _on_ridge(centre, covariance, j, values, flat.min(axis=0), flat.max(axis=0))
        with np.errstate(divide="ignore", invalid="ignore"):
            log_ratio = np.log(_local_sd(log_density, points[1], sd) / _local_sd(log_density, points[0], sd))
        log_ratio[j] = 0.0
        affected = [i for i in range(d) if np.isfinite(log_ratio[i]) and abs(log_ratio[i]) >= np.log(threshold)]
        if affected and len(affected) >= (d - 1) / 2:
            size = float(np.median(np.abs(log_ratio[affected])))
            if strongest is None or size > strongest[1]:
                strongest = (j, size, affected, values, np.sign(np.median(log_ratio[affected])))
    if strongest is None:
        return []
    j, size, affected, values, sign = strongest
    # The within-chain count, not the multi-chain ESS: the curvature has predicted the change at the very
    # fifths the draws fill, so chains that disagree (stuck in a neck) cannot fake the agreement.
    n_independent = float(independent_draws(draws, tau)[j])
    kept = draws if log_densities is None else draws[~chains_apart(np.asarray(log_densities))]
    confirmation = _confirm_in_draws(log_density, kept, n_independent * kept.shape[0] / draws.shape[0], centre,
                                     covariance, sd, j, affected, sign)
    confirmation["rhat"] = float(rhat(draws[:, :, j : j + 1])[0])
    small = abs(np.log(confirmation["predicted_factor_between_fifths"])) < 0.5 * np.log(threshold)
    if small and confirmation["chains_fill_fifths"]:
        # Within the draws' range the curvature predicts little change: the funnel it sees lies in tails the
        # draws (and a random walk) hardly reach, as a non-centred model's does where the data would pin the effects.
        return []
    return [_funnel_finding(j, float(np.exp(size)), affected, names, bounds, flat, values, confirmation)]


#: Above this R-hat of the candidate parameter the chains have plainly not mixed along it (the
#: critical level of the not-converged finding; common practice): the draws cannot rule a funnel out.
UNMIXED_RHAT = 1.1

#: Each fifth of the candidate's draws must hold at least this many chains (each with 5% of
#: it or more) for the draws to confirm or rule out a funnel: otherwise the fifths compare
#: chains that sit in different places, not regions of one posterior (common practice).
MIN_CHAINS_PER_FIFTH = 3


def chains_per_fifth(draws: np.ndarray, index: int) -> int:
    """Chains holding at least 5% of the bottom and of the top fifth of parameter ``index`` (the smaller count).

    ``draws`` is (chains, n, d).
    """
    m, n, _ = draws.shape
    order = np.argsort(draws[:, :, index].ravel(), kind="stable")
    chain = np.repeat(np.arange(m), n)
    size = max(order.shape[0] // 5, 1)
    counts = [np.bincount(chain[rows], minlength=m) for rows in (order[:size], order[-size:])]
    return int(min(np.sum(c >= 0.05 * size) for c in counts))


def chains_apart(log_densities: np.ndarray) -> np.ndarray:
    """Chains whose log-density never reaches the bulk of the best chain's, shape (chains,), bool.

    A chain whose 95th percentile of log p lies below the 5th percentile of the
    chain with the highest median sits in a region the others do not visit
    (stranded far out in a tail); its draws say nothing about how the spread
    changes inside the posterior. ``log_densities`` is (chains, n).
    """
    best = int(np.argmax(np.median(log_densities, axis=1)))
    floor = np.quantile(log_densities[best], 0.05)
    return np.quantile(log_densities, 0.95, axis=1) < floor


def _confirm_in_draws(log_density, draws, n_independent, centre, covariance, sd, j, affected, sign) -> dict:
    """What the draws say about a funnel along ``j`` the curvature suggested (see :func:`funnel_findings_from_curvature`)."""
    flat = draws.reshape(-1, draws.shape[2])
    n_fifth = n_independent / 5
    order = np.sort(flat[:, j])
    size = flat.shape[0] // 5
    medians = np.array([np.median(order[:size]), np.median(order[-size:])])
    points = _on_ridge(centre, covariance, j, medians, flat.min(axis=0), flat.max(axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        predicted = np.log(_local_sd(log_density, points[1], sd) / _local_sd(log_density, points[0], sd))
        measured = sign * np.log(local_spread_ratio(flat[:: max(1, flat.shape[0] // 20_000)], j))
    predicted = float(sign * np.nanmedian(predicted[affected])) if np.any(np.isfinite(predicted[affected])) else 0.0
    measured = float(np.median(measured[affected]))
    se = log_spread_ratio_se(n_fifth)
    critical = float(stats.t.isf(CONFIRMATION_LEVEL, df=max(2.0 * n_fifth, 1.0)))
    mixed = chains_per_fifth(draws, j) >= MIN_CHAINS_PER_FIFTH
    confirmed = bool(mixed and n_independent >= MIN_DRAWS_FOR_SPREAD and measured >= critical * se
                     and measured >= 0.5 * predicted)
    # Independent draws at which half the predicted log ratio would be `critical` standard errors.
    needed = np.inf if predicted <= 0.05 else 5 * (2 * _LOG_MAD_VARIANCE * (2 * critical / predicted) ** 2 + 1.5)
    return {"confirmed": confirmed, "chains_fill_fifths": bool(mixed), "measured_factor": float(np.exp(sign * measured)), "standard_error": se,
            "predicted_factor_between_fifths": float(np.exp(sign * predicted)), "independent_draws": n_independent,
            "independent_draws_needed": float(needed),
            "draws_per_independent": flat.shape[0] / max(n_independent, 1.0)}


def _location_parameter(flat: np.ndarray, scale: int, affected: list) -> int | None:
    """The parameter the affected ones are centred on, if one stands out; else None.

    In a centred hierarchical model the group effects are conditionally
    independent given their location and scale, and each is tied to the
    location: in the partial correlations (from the inverse of the draws'
    correlation matrix) the location links to every effect, an effect only to
    the location. The candidate with the largest sum of absolute partial
    correlations with the affected parameters counts when that sum is at
    least twice the runner-up's.
    """
    d = flat.shape[1]
    if d < 4:
        return None
    precision = np.linalg.pinv(np.atleast_2d(np.corrcoef(flat.T)))
    scale_of = np.sqrt(np.abs(np.diag(precision)))
    partial = np.abs(precision / np.outer(scale_of, scale_of))
    scores = np.array([sum(partial[k, i] for i in affected if i != k) if k != scale else -np.inf for k in range(d)])
    first, second = np.argsort(-scores)[:2]
    return int(first) if scores[first] >= 2 * scores[second] and len(affected) - (first in affected) >= 2 else None


def _noncentred_rewrite(scale: int, affected: list, names: list, bounds: np.ndarray, flat: np.ndarray) -> str:
    """The non-centred parameterisation spelled out for this model's parameters (Papaspiliopoulos et al. 2007)."""
    low, high = bounds[scale]
    name = names[scale]
    if not np.isfinite(low) and not np.isfinite(high):
        expr = f"exp({name})"
    elif np.isfinite(low) and not np.isfinite(high):
        expr = name if low == 0 else f"({name} - {low:g})"
    else:
        expr = f"s({name})"
    location = _location_parameter(flat, scale, affected)
    effects = [i for i in affected if i != location]
    centre = names[location] if location is not None else "m"
    shown = [names[i] for i in effects]
    lines = [f"{e} = {centre} + {expr} * z_{e}" for e in shown]
    if len(lines) > 3:
        lines = lines[:2] + ["...", lines[-1]]
    where = "" if location is not None else " (m: their common mean, a location parameter if the model has one, else 0)"
    bounded = "" if expr != f"s({name})" else f" (s({name}): the spread that {name} sets)"
    return (f"If {name} is the scale of the group effects {', '.join(shown[:5])}{' ...' if len(shown) > 5 else ''}"
            f"{'' if location is None else ' around ' + names[location]}, use the non-centred parameterisation "
            "(Papaspiliopoulos, Roberts and Sköld 2007): sample standardised effects z ~ N(0, 1) in their place and "
            f"set {'; '.join(lines)}{where}{bounded} inside the log-density, whose prior on the effects becomes "
            "N(0, 1) on each z.")


def _fold(factor: float) -> str:
    """'about 21-fold', or a bound where a central-difference ratio is past any useful precision."""
    return f"about {factor:.0f}-fold" if factor < 1000 else "over 1000-fold"


def _funnel_finding(j, factor, affected, names, bounds, flat, values, confirmation) -> Finding:
    listed = f"{', '.join(names[i] for i in affected[:5])}{' ...' if len(affected) > 5 else ''}"
    rewrite = _noncentred_rewrite(j, affected, names, bounds, flat)
    evidence = {"parameter": names[j], "spread_factor": factor, "affected": [names[i] for i in affected],
                "probed_at": [float(v) for v in values], **confirmation}
    if confirmation["confirmed"]:
        return Finding(
            "varying-scale", "critical" if factor >= 10 else "warn", [names[j]] + [names[i] for i in affected],
            f"the spread of {listed} changes {_fold(factor)} along {names[j]} (a funnel; from the model's "
            f"curvature between {names[j]} = {values[0]:.3g} and {values[1]:.3g}, and the draws confirm it: "
            f"{confirmation['measured_factor']:.2g}-fold between their bottom and top fifths of {names[j]}). No single "
            f"step size fits both ends, and a fixed proposal under-samples the narrow end. {rewrite}",
            {**evidence, "status": "confirmed"},
        )
    n, needed = confirmation["independent_draws"], confirmation["independent_draws_needed"]
    tau = confirmation["draws_per_independent"]
    if not confirmation["chains_fill_fifths"]:
        settle = (f"the chains sit in different places along {names[j]} (fewer than {MIN_CHAINS_PER_FIFTH} fill each "
                  "fifth of its draws), so the draws compare chains, not regions; runs that mix (or a run of the "
                  "non-centred form beside this one) would settle it")
    elif not np.isfinite(needed):
        settle = (f"the change lies outside the range of the draws of {names[j]}, so more draws of this posterior "
                  "will not settle it; a run of the non-centred form beside this one would")
    elif not confirmation["rhat"] <= UNMIXED_RHAT:
        settle = (f"the chains have not mixed along {names[j]} (R-hat {confirmation['rhat']:.2f}), as chains kept out "
                  "of a funnel's neck do, so the draws cannot rule it out; run the non-centred form beside this one. "
                  f"{rewrite}")
    elif needed > n:
        settle = (f"a run with about {needed:.0f} roughly independent draws (now {n:.0f}; about "
                  f"{needed * max(tau, 1.0):.2g} evaluations of the tuned proposal) would settle it")
    else:
        settle = ("the draws are enough to have shown it, so the curvature changes where the posterior has little "
                  "mass (as a badly scaled regression's does); no action is needed unless a run of the non-centred "
                  "form says otherwise")
    return Finding(
        "varying-scale", "info", [names[j]] + [names[i] for i in affected],
        f"suspected, not confirmed: the model's curvature changes the local spread of {listed} "
        f"{_fold(factor)} between {names[j]} = {values[0]:.3g} and {values[1]:.3g}, but the draws change it "
        f"{confirmation['measured_factor']:.2g}-fold between their bottom and top fifths of {names[j]} (standard "
        f"error of the log {confirmation['standard_error']:.2f}; the curvature predicts "
        f"{confirmation['predicted_factor_between_fifths']:.2g}-fold there). To settle it: {settle}.",
        {**evidence, "status": "suspected"},
    )


def _varying_scale(strongest: dict, names: list, bounds, flat) -> list:
    """The draws' funnel finding for the strongest candidate in ``strongest`` ({j: (factor, affected)})."""
    out = []
    for j, (factor, affected) in sorted(strongest.items(), key=lambda kv: -kv[1][0])[:1]:
        out.append(
            Finding(
                "varying-scale",
                "critical" if factor >= 10 else "warn",
                [names[j]] + [names[i] for i in affected],
                f"the spread of {', '.join(names[i] for i in affected[:5])}{' ...' if len(affected) > 5 else ''} changes "
                f"about {factor:.0f}-fold along {names[j]} (a funnel; from the spread of the draws): no single step "
                f"size fits both ends. {_noncentred_rewrite(j, affected, names, bounds, flat)}",
                {"parameter": names[j], "spread_factor": factor, "affected": [names[i] for i in affected],
                 "status": "confirmed"},
            )
        )
    return out
