"""Detectors for geometry a tuned Gaussian random walk handles badly.

* Separated modes: candidate centres from a Gaussian mixture fitted to the
  draws (scikit-learn, number of components by BIC; Schwarz 1978) and from
  optimizer runs started from overdispersed points; each candidate is climbed
  to its local mode, and two modes count as separate only when the
  log-density dips between them (a curved ridge has one mode, however a
  mixture splits it).
* Varying scale (funnels): every other parameter is regressed linearly on a
  candidate parameter ``v`` (which removes the trend of a correlated
  Gaussian); the robust sd of the residuals in the top fifth of ``v``,
  divided by that in the bottom fifth, measures the funnel.
* Boundary pile-up: the histogram of a bounded parameter peaks in the bin
  next to the bound, and draws come within a small share of the sd of it.
* Heavy tails: sample excess kurtosis well above 0, measured against
  ``sqrt(24 / n_eff)``, its large-sample standard error when the draws are
  Gaussian (the null). That is not the standard error of the estimate itself,
  which heavy tails make larger and which is not computed.

Every detector says when it has too few draws to decide instead of guessing.

References
----------
Neal, R. M. (2003). Slice sampling. Annals of Statistics, 31(3), 705-767 (the funnel).
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
parametrization of hierarchical models. Statistical Science, 22(1), 59-73.
Schwarz, G. (1978). Estimating the dimension of a model. Annals of Statistics, 6(2), 461-464.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats
from sklearn.mixture import GaussianMixture

from .checkpoint import stop_point
from .diagnostics import iact
from .findings import Finding
from .funnels import (  # noqa: F401  (the funnel detectors live in walktune.funnels)
    MIN_DRAWS_FOR_SPREAD,
    curvature_probe_cost,
    funnel_findings_from_curvature,
    local_spread_ratio,
    varying_scale_findings,
)

#: Fewer (roughly independent) draws than this and a detector declines to decide.
MIN_DRAWS_TO_DECIDE = 100

#: A log-density dip of this many nats between two modes separates them (common practice:
#: e^-3 ~ 0.05 of the lower peak's density).
SEPARATING_DIP = 3.0


@dataclass
class Region:
    """One separated region of the posterior."""

    mode: np.ndarray
    mean: np.ndarray
    covariance: np.ndarray
    share: float
    chains: list = field(default_factory=list)

    @property
    def sd(self) -> np.ndarray:
        return np.sqrt(np.diag(self.covariance))


def chain_iacts(draws: np.ndarray) -> np.ndarray:
    """Each chain's own IACT per parameter, shape (chains, d), from (chains, n, d) draws."""
    per_chain = []
    for chain in draws:
        stop_point()
        per_chain.append(np.asarray(iact(chain)))
    return np.array(per_chain)


def within_chain_iact(draws: np.ndarray, over_parameters=np.max, per_chain: np.ndarray | None = None) -> float:
    """The largest (or ``over_parameters``) over parameters of the median over chains of each chain's own IACT.

    Unlike the IACT combined over chains, this stays small when chains sit
    in different regions, which is what thinning for the detectors needs.
    ``per_chain`` (:func:`chain_iacts` of ``draws``) saves computing them again.
    """
    per_chain = chain_iacts(draws) if per_chain is None else per_chain
    # A chain that never moved has no autocorrelation time (NaN): it says nothing about thinning.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns
        per_parameter = np.nanmedian(per_chain, axis=0)
    per_parameter = per_parameter[np.isfinite(per_parameter)]
    return float(over_parameters(per_parameter)) if per_parameter.size else float(draws.shape[1])


def _thin_to_independent(draws: np.ndarray, tau: float, limit: int = 4000) -> np.ndarray:
    """Flatten (chains, n, d) draws, keeping about one per autocorrelation time (at most ``limit``)."""
    m, n, d = draws.shape
    tau = tau if np.isfinite(tau) else float(n)  # unknown: keep one draw per chain
    step = max(1, int(np.ceil(tau)), int(np.ceil(m * n / limit)))
    return draws[:, ::step].reshape(-1, d)


def climb(log_density, x0: np.ndarray, scale: np.ndarray, budget: int) -> tuple[np.ndarray, float, bool]:
    """Local maximisation from ``x0`` (L-BFGS-B on x / scale).

    Returns the point, its log-density, and whether the optimizer converged:
    a climb that ran out of budget on a long ridge (as in a funnel's neck) has
    not found a mode and must not be taken for one.
    """

    def negative(z):
        value = log_density(z * scale)
        return -value if np.isfinite(value) else 1e300

    result = optimize.minimize(negative, x0 / scale, method="L-BFGS-B", options={"maxfun": budget})
    return result.x * scale, -float(result.fun), bool(result.success)


class _Budgeted:
    """Counts calls of a log-density against an optional budget."""

    def __init__(self, log_density, budget):
        self.log_density = log_density
        self.budget = budget
        self.calls = 0

    def __call__(self, theta):
        self.calls += 1
        return self.log_density(theta)

    def left(self) -> float:
        return np.inf if self.budget is None else self.budget - self.calls


def separated(log_density, a: np.ndarray, b: np.ndarray, lp_a: float, lp_b: float, points: int = 15) -> bool:
    """Whether the log-density dips by more than :data:`SEPARATING_DIP` nats between ``a`` and ``b``."""
    t = np.linspace(0.0, 1.0, points + 2)[1:-1]
    values = np.array([log_density(a + ti * (b - a)) for ti in t])
    values = np.where(np.isfinite(values), values, -np.inf)
    return bool(min(lp_a, lp_b) - np.min(values) > SEPARATING_DIP)


def find_regions(
    log_density,
    draws: np.ndarray,
    tau: float,
    extra_centres=(),
    max_components: int = 4,
    seed: int = 0,
    budget: int | None = None,
    chain_ids=None,
) -> tuple[list, str | None]:
    """Separated regions among ``draws`` (chains, n, d).

    Returns the regions (one when the posterior looks connected) and, when the
    draws are too few to decide or the evaluation ``budget`` ran out, a note
    saying so. ``chain_ids`` names the chain of each row of ``draws`` (default:
    its index), for runs that continue the same chains.
    """
    m, n, d = draws.shape
    chain_ids = list(range(m)) if chain_ids is None else list(chain_ids)
    counter = _Budgeted(log_density, budget)
    log_density = counter
    flat = _thin_to_independent(draws, tau)
    if flat.shape[0] < MIN_DRAWS_TO_DECIDE:
        return [], f"only {flat.shape[0]} roughly independent draws; too few to look for separate modes"
    centre, spread = flat.mean(axis=0), flat.std(axis=0)
    spread = np.where(spread > 0, spread, 1.0)
    standard = (flat - centre) / spread
    best, best_bic = None, np.inf
    for k in range(1, max_components + 1):
        if standard.shape[0] < 10 * k * (d + 1):
            break
        mixture = GaussianMixture(k, covariance_type="full", random_state=seed, n_init=2, reg_covar=1e-6).fit(standard)
        bic = mixture.bic(standard)
        if bic < best_bic:
            best, best_bic = mixture, bic
    candidates = [c for c in (best.means_ * spread + centre)] if best is not None else [centre]
    candidates += [np.asarray(c, dtype=float) for c in extra_centres]
    scale = np.maximum(spread, 1e-12)
    modes = []
    note = None
    for candidate in candidates:
        if counter.left() < 60 * (d + 1) + 20 * len(modes):
            note = "the evaluation budget ran out before every candidate mode was checked"
            break
        point, value, converged = climb(log_density, candidate, scale, budget=60 * (d + 1))
        if not (converged and np.isfinite(value)):
            continue
        for mode in modes:
            near = np.all(np.abs(point - mode[0]) < 0.05 * scale)
            if near or not separated(log_density, point, mode[0], value, mode[1]):
                if value > mode[1]:
                    mode[0], mode[1] = point, value
                break
        else:
            modes.append([point, value])
    if len(modes) < 2:
        return [Region(flat.mean(axis=0), flat.mean(axis=0), np.atleast_2d(np.cov(flat.T)), 1.0, sorted(set(chain_ids)))], note
    # Assign draws to regions: nearest mode, then by Mahalanobis distance under each region's covariance.
    all_draws = draws.reshape(-1, d)
    points = np.array([mode[0] for mode in modes])
    # One mode at a time: an (n, modes, d) array would hold every proof draw once per mode.
    labels = np.argmin(np.stack([(((all_draws - point) / scale) ** 2).sum(axis=1) for point in points], axis=1), axis=1)
    for _ in range(2):
        covs = []
        for r in range(len(modes)):
            members = all_draws[labels == r]
            covs.append(np.cov(members.T) + 1e-9 * np.diag(scale**2) if members.shape[0] > d + 1 else np.diag(scale**2))
        distance = np.stack(
            [
                stats.multivariate_normal(points[r], covs[r], allow_singular=True).logpdf(all_draws)
                for r in range(len(modes))
            ],
            axis=1,
        )
        labels = np.argmax(distance, axis=1)
    by_chain = labels.reshape(m, n)
    regions = []
    for r in range(len(modes)):
        members = all_draws[labels == r]
        if members.shape[0] == 0:
            # A mode no chain reached: report it with the optimizer's point only.
            regions.append(Region(points[r], points[r], np.diag((0.1 * scale) ** 2), 0.0, []))
            continue
        chains = sorted({chain_ids[c] for c in range(m) if np.mean(by_chain[c] == r) >= 0.05})
        cov = np.atleast_2d(np.cov(members.T)) if members.shape[0] > 1 else np.diag((0.1 * scale) ** 2)
        regions.append(Region(points[r], members.mean(axis=0), cov, members.shape[0] / all_draws.shape[0], chains))
    return regions, note


def multimodal_finding(regions: list, names: list) -> Finding | None:
    if len(regions) < 2:
        return None
    parts = []
    for i, region in enumerate(regions):
        where = ", ".join(f"{names[j]}={region.mode[j]:.3g}" for j in range(min(len(names), 4)))
        chains = ", ".join(map(str, region.chains)) if region.chains else "none"
        parts.append(f"region {i + 1} near ({where}{', ...' if len(names) > 4 else ''}), {region.share:.0%} of draws, chains {chains}")
    return Finding(
        "multimodal",
        "critical",
        list(names),
        f"the posterior has {len(regions)} separated regions: " + "; ".join(parts) + ". A random walk will not move "
        "between them at a useful rate, so do not trust pooled estimates. Use tempering (e.g. parallel tempering), or "
        "run each region separately with its own proposal (regions in advice.json) and combine them; the relative "
        "weights of the regions then need other means (e.g. bridge sampling or marginal-likelihood estimates).",
        {
            "regions": [
                {"mode": r.mode.tolist(), "mean": r.mean.tolist(), "sd": r.sd.tolist(), "share": r.share, "chains": r.chains}
                for r in regions
            ]
        },
    )


def boundary_findings(draws: np.ndarray, bounds: np.ndarray, names: list) -> list:
    """``boundary-pileup``: the histogram peaks at a finite bound that the draws nearly touch."""
    flat = draws.reshape(-1, draws.shape[2])
    out = []
    for i, (lo, hi) in enumerate(bounds):
        x = flat[:, i]
        sd = x.std()
        if sd == 0 or x.shape[0] < MIN_DRAWS_TO_DECIDE:
            continue
        counts, edges = np.histogram(x, bins=20)
        for side, bound in (("lower", lo), ("upper", hi)):
            if not np.isfinite(bound):
                continue
            gap = (x.min() - bound) if side == "lower" else (bound - x.max())
            edge_bin = counts[0] if side == "lower" else counts[-1]
            if gap < 0.05 * sd and edge_bin == counts.max():
                out.append(
                    Finding(
                        "boundary-pileup",
                        "warn",
                        [names[i]],
                        f"draws of {names[i]} pile up against its {side} bound {bound:g} (the densest histogram bin "
                        "touches it): a Gaussian step proposes many points outside and is rejected. Sample in "
                        f"{'log(' + names[i] + ' - low)' if side == 'lower' and not np.isfinite(hi) else 'a logit/log transform of ' + names[i]}; "
                        "or, if the likelihood itself peaks there, the data push the parameter to the edge of its "
                        "allowed range, and the bound deserves a second look.",
                        {"bound": float(bound), "side": side, "gap_over_sd": float(gap / sd)},
                    )
                )
    return out


def heavy_tail_findings(draws: np.ndarray, ess: np.ndarray, names: list) -> list:
    """``heavy-tails``: excess kurtosis above 1 by more than four standard errors."""
    flat = draws.reshape(-1, draws.shape[2])
    kurtosis = stats.kurtosis(flat, axis=0, fisher=True, bias=False)
    out = []
    for i, k in enumerate(kurtosis):
        n_eff = float(ess[i]) if np.isfinite(ess[i]) else 0.0
        if n_eff < MIN_DRAWS_TO_DECIDE:
            continue
        se = np.sqrt(24.0 / n_eff)
        if k > 1.0 and k - 4 * se > 0:
            out.append(
                Finding(
                    "heavy-tails",
                    "warn",
                    [names[i]],
                    f"{names[i]} has excess kurtosis {k:.1f} (a Gaussian gives 0, with standard error {se:.2f} at this "
                    "ESS): its tails are much heavier than a Gaussian's, so a proposal scaled to the bulk explores them "
                    "slowly and tail quantiles converge last. A log or other transform may tame them; check tail ESS.",
                    {"excess_kurtosis": float(k), "standard_error": float(se)},
                )
            )
    return out
