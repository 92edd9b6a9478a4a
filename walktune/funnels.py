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

A candidate is named as the scale of a funnel only with the structure of one
(several parameters whose spread shrinks together toward one end; the
candidate positive, or a log-scale with no positive parameter among those it
affects); otherwise the finding is a varying scale without a non-centred rewrite.

From the model (:func:`funnel_findings_from_curvature`): the local spread
``(-d^2 log p / d theta_i^2)^{-1/2}`` is compared at two points along each
candidate, on the line of the others' conditional mean; every candidate that
changes most of the others is then moved alone (does it set their spread, or
only move with the parameter that does?) and checked in the draws; what the
curvature suggests is a hypothesis until the draws confirm it.

The fix (:mod:`walktune.funnel_advice`): the non-centred parameterisation,
effect_j = location + scale * z_j, where a group of effects shares the scale;
otherwise a log transform of the positive parameters, or walktune's coordinates.

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
from .funnel_advice import draws_finding, effect_group, fix_text, listed, narrow_end, positive_type, severity, times, wider
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

    Every candidate changing at least half of the others is a varying scale;
    it is reported as a funnel (``evidence["funnel_structure"]``, with the fix
    that fits) only with the structure of one (:func:`_funnel_structure`).
    The funnels are returned ranked by the size of the change; without any,
    the strongest varying scale alone, without a non-centred rewrite.
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
    bounds = np.tile([-np.inf, np.inf], (d, 1)) if bounds is None else np.asarray(bounds, dtype=float)
    found = []
    for j in range(d):
        stop_point()
        if n_independent[j] < MIN_DRAWS_FOR_SPREAD:
            continue
        n_fifth = n_independent[j] / 5
        needed = max(np.log(threshold), significance_level(d, n_fifth) * log_spread_ratio_se(n_fifth))
        with np.errstate(divide="ignore"):
            log_ratio = np.log(local_spread_ratio(flat, j))
        log_ratio[j] = 0.0
        affected = [i for i in range(d) if abs(log_ratio[i]) >= needed]
        # A funnel parameter changes the spread of most of the others, not of one partner.
        if affected and len(affected) >= (d - 1) / 2:
            sign = 1.0 if np.median(log_ratio[affected]) >= 0 else -1.0
            factor = float(np.exp(sign * np.median(np.abs(log_ratio[affected]))))
            found.append((j, factor, affected, log_ratio))
    found.sort(key=lambda item: -wider(item[1]))
    funnels, others = [], []
    for j, factor, affected, log_ratio in found:
        structural, hint = _funnel_structure(flat, bounds, j, affected, log_ratio)
        finding = draws_finding(j, factor, affected, log_ratio, names, bounds, flat, structural, hint)
        (funnels if structural else others).append(finding)
    return (funnels or others[:1]), None


def _funnel_structure(flat: np.ndarray, bounds: np.ndarray, j: int, affected: list, log_ratio: np.ndarray):
    """Whether the draws show a funnel along ``j`` (not a parameter merely correlated with the scale); and a hint.

    A funnel needs several parameters (two or more; the only other one when
    d = 2) whose spread shrinks together toward one end of ``j``, and ``j`` a
    scale by type: positive (:func:`walktune.funnel_advice.positive_type`) with
    the spread shrinking toward 0, or unbounded (a log-scale) with no positive
    parameter among those it affects: where a positive parameter's own spread
    changes along ``j``, that parameter is the likelier scale and ``j`` one
    that moves with it (a group effect far from its location needs a wide
    scale). Returns ``(structural, index of that positive parameter or None)``.
    """
    sign = 1.0 if np.median(log_ratio[affected]) >= 0 else -1.0
    together = [i for i in affected if np.sign(log_ratio[i]) == sign]
    if len(together) < min(2, flat.shape[1] - 1):
        return False, None
    if positive_type(flat, bounds, j):
        return bool(sign > 0), None
    if np.isfinite(bounds[j]).any():
        return False, None
    positive = [i for i in affected if positive_type(flat, bounds, i)]
    return (not positive), (positive[0] if positive else None)


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


def curvature_probe_cost(d: int, candidates: int = 1) -> int:
    """Evaluations :func:`funnel_findings_from_curvature` makes to screen every parameter and examine ``candidates``.

    ``(2 d + 1)`` per point: the centre and two points per parameter to
    screen, then two points along the candidate's axis and two at the medians
    of the draws' fifths per candidate examined.
    """
    return (2 * d + 1) * (2 * d + 1 + 4 * candidates)


def _screen(log_density, flat, bounds, centre, covariance, sd, local, spread, reach, threshold) -> list:
    """Candidates ``(j, log size, affected, probe values, sign, log ratios)`` from the ridge probe, strongest first."""
    d = flat.shape[1]
    found = []
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
            sign = 1.0 if np.median(log_ratio[affected]) >= 0 else -1.0
            found.append((j, float(np.median(np.abs(log_ratio[affected]))), affected, values, sign, log_ratio))
    return sorted(found, key=lambda c: -c[1])


def _sets_the_spread(log_density, centre, sd, j, values, affected, sign, threshold) -> bool:
    """Whether moving parameter ``j`` alone (the others at the draws' centre) changes the affected spreads.

    The ridge probe moves the others with ``j``; a group effect far from its
    location drags the group scale along and seems to set every spread. The
    scale itself changes the others' curvature with nothing else moving: at
    least half of the affected spreads must change the same way, by at least
    ``sqrt(threshold)``-fold, between the two probe values of ``j``.
    """
    points = np.tile(centre, (2, 1))
    points[:, j] = values
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio = sign * np.log(_local_sd(log_density, points[1], sd) / _local_sd(log_density, points[0], sd))
    follows = [i for i in affected if np.isfinite(log_ratio[i]) and log_ratio[i] >= 0.5 * np.log(threshold)]
    return len(follows) >= max(1.0, len(affected) / 2)


def _neck_within_draws(log_density, flat, centre, covariance, sd, j, affected, sign, threshold, confirmation,
                       structural, log_ratio) -> bool:
    """Whether a confirmed funnel of a centred hierarchy changes the spreads ``sqrt(threshold)``-fold within the
    draws' 5% and 95% points of ``j``, though less between the medians of their fifths.

    A centred hierarchy's draws thin out towards its neck (Papaspiliopoulos, Roberts and Skold 2007), so the
    fifths' medians can sit inside the wide end: the farm hierarchy of tests/test_funnel_models.py, seed 2,
    predicts 1.97-fold between them and 2.36-fold between the 5% and 95% points, where the non-centred kiln demo
    (tests/test_geometry.py), whose data pin the effects, predicts 1.35 and 1.5-1.6.
    """
    if not (confirmation["confirmed"] and structural and effect_group(flat, j, affected, log_ratio) is not None):
        return False
    ends = np.quantile(flat[:, j], [0.05, 0.95])
    points = _on_ridge(centre, covariance, j, ends, flat.min(axis=0), flat.max(axis=0))
    with np.errstate(divide="ignore", invalid="ignore"):
        change = sign * np.log(_local_sd(log_density, points[1], sd) / _local_sd(log_density, points[0], sd))
    change = change[affected]
    return bool(np.any(np.isfinite(change)) and np.nanmedian(change) >= 0.5 * np.log(threshold))


def funnel_findings_from_curvature(log_density, draws: np.ndarray, tau: float, names: list, bounds=None,
                                   threshold: float = 4.0, reach: float = 3.0, spread=None,
                                   log_densities=None, budget=None) -> list:
    """``varying-scale`` suspected from the model's curvature, and whether the draws confirm it.

    For each parameter j, the local spread of every other parameter,
    ``(-d^2 log p / d theta_i^2)^{-1/2}``, is compared between two points
    ``reach`` spreads either side of the draws' centre along j (past the
    draws' own 1% points: the draws of a funnel under-represent its neck; in log or
    logit coordinates for a bounded j; see :func:`_probe_values`), the others
    at their conditional mean given j (:func:`_on_ridge`). For a Gaussian every
    ratio is 1; in Neal's funnel it is ``exp(reach sd_v)``.

    Every candidate changing at least half of the others ``threshold``-fold is
    examined, strongest first, while ``budget`` evaluations last: whether it
    sets their spread on its own (:func:`_sets_the_spread`: a funnel, else a
    varying scale it only moves with), and whether the draws confirm it
    (:func:`_confirm_in_draws`). Reported: the confirmed ones, funnels first
    and by size (severity from the measured change,
    :func:`walktune.funnel_advice.severity`); none confirmed, the strongest
    funnel as a suspicion (info) saying what would settle it. Nothing for a
    candidate where the curvature predicts less than ``sqrt(threshold)``-fold
    between the medians of the draws' fifths and the draws fill them: the
    change it sees lies in tails the draws hardly reach (unless it is a
    confirmed centred hierarchy's funnel that reaches that change between the
    draws' 5% and 95% points, :func:`_neck_within_draws`).

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
    budget : int, optional
        Evaluations allowed; at least :func:`curvature_probe_cost` ``(d)``
        (one candidate), each further candidate ``4 (2 d + 1)``.
    names : list of str
    bounds : ndarray of shape (d, 2), optional

    Returns
    -------
    list of Finding
    """
    d = draws.shape[2]
    if d < 2:
        return []
    flat = draws.reshape(-1, d)
    bounds = np.tile([-np.inf, np.inf], (d, 1)) if bounds is None else np.asarray(bounds, dtype=float)
    centre, covariance = flat.mean(axis=0), np.atleast_2d(np.cov(flat.T))
    sd = np.sqrt(np.maximum(np.diag(covariance), 1e-300))
    local = np.nan_to_num(_local_sd(log_density, centre, sd), nan=0.0)
    screened = _screen(log_density, flat, bounds, centre, covariance, sd, local, spread, reach, threshold)
    examined = len(screened) if budget is None else max(1, (int(budget) - curvature_probe_cost(d, 0)) // (4 * (2 * d + 1)))
    # The within-chain count, not the multi-chain ESS: the curvature has predicted the change at the very
    # fifths the draws fill, so chains that disagree (stuck in a neck) cannot fake the agreement.
    kept = draws if log_densities is None else draws[~chains_apart(np.asarray(log_densities))]
    confirmed, suspected = [], []
    for j, size, affected, values, sign, log_ratio in screened[:examined]:
        structural = _sets_the_spread(log_density, centre, sd, j, values, affected, sign, threshold)
        n_independent = float(independent_draws(draws, tau)[j])
        confirmation = _confirm_in_draws(log_density, kept, n_independent * kept.shape[0] / draws.shape[0], centre,
                                         covariance, sd, j, affected, sign)
        confirmation["rhat"] = float(rhat(draws[:, :, j : j + 1])[0])
        small = abs(np.log(confirmation["predicted_factor_between_fifths"])) < 0.5 * np.log(threshold)
        if small and confirmation["chains_fill_fifths"] and not _neck_within_draws(
                log_density, flat, centre, covariance, sd, j, affected, sign, threshold, confirmation, structural,
                log_ratio):
            # Within the draws' range the curvature predicts little change: the funnel it sees lies in tails the
            # draws (and a random walk) hardly reach, as a non-centred model's does where the data would pin the effects.
            continue
        candidate = (j, float(np.exp(sign * size)), affected, log_ratio, values, confirmation, structural)
        (confirmed if confirmation["confirmed"] else suspected).append(candidate)
    # Every confirmed funnel, strongest first; else the strongest suspected funnel (info). A varying scale that
    # only moves with the others is explained by a funnel when there is one; without any, the strongest alone.
    funnels = [c for c in confirmed if c[6]]
    if funnels:
        return [curvature_finding(*c, names, bounds, flat) for c in funnels]
    suspected_funnels = [c for c in suspected if c[6]]
    chosen = suspected_funnels[:1] or confirmed[:1] or suspected[:1]
    return [curvature_finding(*c, names, bounds, flat) for c in chosen]


#: Share of the predicted log spread ratio the draws must reach to confirm it. Each fifth of the draws mixes
#: spreads over a range of the candidate, which pulls the measured ratio toward 1: exact draws of a centred
#: hierarchy (tests/test_funnel_models.py; 20,000 iid draws, standard error of the log 0.03) measure 0.47 of
#: the log the curvature predicts between the fifths' medians, and walktune's own runs of it 0.43-0.9 over 12
#: seeds; a regression whose curvature changes where it has little mass measures about none of it.
CONFIRMED_SHARE = 1.0 / 3.0

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
                     and measured >= CONFIRMED_SHARE * predicted)
    # Independent draws at which the confirmed share of the predicted log ratio would be `critical` standard errors.
    needed = np.inf if predicted <= 0.05 else 5 * (2 * _LOG_MAD_VARIANCE * (critical / (CONFIRMED_SHARE * predicted)) ** 2 + 1.5)
    return {"confirmed": confirmed, "chains_fill_fifths": bool(mixed), "measured_factor": float(np.exp(sign * measured)), "standard_error": se,
            "predicted_factor_between_fifths": float(np.exp(sign * predicted)), "independent_draws": n_independent,
            "independent_draws_needed": float(needed),
            "draws_per_independent": flat.shape[0] / max(n_independent, 1.0)}


def curvature_finding(j, factor, affected, log_ratio, values, confirmation, structural, names, bounds, flat) -> Finding:
    """The finding for one candidate of :func:`funnel_findings_from_curvature`: confirmed (warn/critical) or suspected (info)."""
    name = names[j]
    sign = 1.0 if factor >= 1 else -1.0
    advice, fix = fix_text(j, affected, log_ratio, names, bounds, flat, sign, structural)
    evidence = {"parameter": name, "spread_factor": wider(factor), "model_factor": float(factor),
                "affected": [names[i] for i in affected], "probed_at": [float(v) for v in values],
                "funnel_structure": bool(structural), **fix, **confirmation}
    model = f"{times(factor)} in the model's curvature between {name} = {values[0]:.3g} and {values[1]:.3g}"
    alone = "" if structural else (
        f" {name} does not set it on its own: moved alone, the others held, it changes their curvature little, so "
        "the change comes with the parameters that move with it.")
    settle = _settle(name, confirmation, advice).rstrip(".")
    if confirmation["confirmed"]:
        measured = confirmation["measured_factor"]
        return Finding(
            "varying-scale", severity(measured), [name] + [names[i] for i in affected],
            f"the spread of {listed(names, affected)} is about {times(measured)} wider at one end of {name} than "
            f"the other in the draws (between their bottom and top fifths of {name}; {narrow_end(name, factor)}), "
            f"and {model} ({'a funnel' if structural else 'a varying scale'}): no single step size fits both "
            f"ends.{alone} {advice}",
            {**evidence, "status": "confirmed"},
        )
    return Finding(
        "varying-scale", "info", [name] + [names[i] for i in affected],
        f"suspected, not confirmed: the local spread of {listed(names, affected)} is {times(factor)} wider at one "
        f"end of {name} than the other in the model's curvature between {name} = {values[0]:.3g} and "
        f"{values[1]:.3g}, but {times(confirmation['measured_factor'])} in the draws between their bottom and top "
        f"fifths of {name} (standard error of the log {confirmation['standard_error']:.2f}; the curvature predicts "
        f"{times(confirmation['predicted_factor_between_fifths'])} there).{alone} To settle it: {settle}."
        + ("" if advice in settle else f" If it is confirmed: {advice}"),
        {**evidence, "status": "suspected"},
    )


def _settle(name: str, confirmation: dict, advice: str) -> str:
    """What would settle a suspected varying scale."""
    n, needed = confirmation["independent_draws"], confirmation["independent_draws_needed"]
    tau = confirmation["draws_per_independent"]
    if not confirmation["chains_fill_fifths"]:
        return (f"the chains sit in different places along {name} (fewer than {MIN_CHAINS_PER_FIFTH} fill each "
                "fifth of its draws), so the draws compare chains, not regions; runs that mix (or a run of the "
                "rewritten form beside this one) would settle it")
    if not np.isfinite(needed):
        return (f"the change lies outside the range of the draws of {name}, so more draws of this posterior "
                "will not settle it; a run of the rewritten form beside this one would")
    if not confirmation["rhat"] <= UNMIXED_RHAT:
        return (f"the chains have not mixed along {name} (R-hat {confirmation['rhat']:.2f}), as chains kept out "
                "of a funnel's neck do, so the draws cannot rule it out; run the rewritten form beside this one. "
                f"{advice}")
    if needed > n:
        return (f"a run with about {needed:.0f} roughly independent draws (now {n:.0f}; about "
                f"{needed * max(tau, 1.0):.2g} evaluations of the tuned proposal) would settle it")
    return ("the draws are enough to have shown it, so the curvature changes where the posterior has little "
            "mass (as a badly scaled regression's does); no action is needed unless a run of the rewritten "
            "form says otherwise")


def needs_curvature_probe(findings: list) -> bool:
    """Whether the draws' varying-scale findings leave the curvature probe something to settle (no funnel found)."""
    return not any(f.evidence.get("funnel_structure") for f in findings)


def merge_probe(from_draws: list, probed: list) -> list:
    """The draws' findings, replaced by the curvature probe's where it confirmed any (it names the scale).

    Otherwise the draws' varying scale stays, followed by a funnel the probe suspects (info), if any.
    """
    if any(f.severity != "info" for f in probed):
        return list(probed)
    if not from_draws:
        return list(probed)
    return list(from_draws) + [f for f in probed if f.evidence.get("funnel_structure")]
