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
  which heavy tails make larger; the sample value runs low, so it is reported
  as a lower indication beside Hill's tail index (Hill 1975), which says
  whether the variance or the fourth moment may be infinite.

Every detector says when it has too few draws to decide instead of guessing.

References
----------
Neal, R. M. (2003). Slice sampling. Annals of Statistics, 31(3), 705-767 (the funnel).
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
parametrization of hierarchical models. Statistical Science, 22(1), 59-73.
Schwarz, G. (1978). Estimating the dimension of a model. Annals of Statistics, 6(2), 461-464.
Hill, B. M. (1975). A simple general approach to inference about the tail of a distribution.
Annals of Statistics, 3(5), 1163-1174.
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
from .mode import LBFGSB_WORKERS, finite_difference_hessian, in_blocks
from .modes import MINOR_MODE_MASS, chain_visits, is_minor, moved_between, weigh
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
    """One separated region of the posterior.

    ``mass`` is its Laplace share of the mass of the regions found
    (:mod:`walktune.modes`; NaN when a Hessian was not negative definite or
    the budget ran out), ``free_share`` the share of the draws of chains that
    moved between regions that fell in it (NaN when no chain moved) and
    ``entries`` how many times those chains entered it.
    """

    mode: np.ndarray
    mean: np.ndarray
    covariance: np.ndarray
    share: float
    chains: list = field(default_factory=list)
    log_density: float = float("nan")
    mass: float = float("nan")
    free_share: float = float("nan")
    entries: int = 0
    negligible: bool = False

    @property
    def sd(self) -> np.ndarray:
        return np.sqrt(np.diag(self.covariance))

    @property
    def minor(self) -> bool:
        """Its Laplace mass is below walktune.modes.MINOR_MODE_MASS, or unknown and its log-density far too low."""
        return is_minor(self.mass) or self.negligible

    def to_dict(self) -> dict:
        return {"mode": self.mode.tolist(), "mean": self.mean.tolist(), "sd": self.sd.tolist(), "share": self.share,
                "chains": self.chains, "log_density": _number(self.log_density), "laplace_mass": _number(self.mass),
                "share_of_free_chains": _number(self.free_share)}


def _number(x: float):
    return float(x) if np.isfinite(x) else None


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


def climb(log_density, x0: np.ndarray, scale: np.ndarray, budget: int,
          log_density_batch=None) -> tuple[np.ndarray, float, bool]:
    """Local maximisation from ``x0`` (L-BFGS-B on x / scale).

    Returns the point, its log-density, and whether the optimizer converged:
    a climb that ran out of budget on a long ridge (as in a funnel's neck) has
    not found a mode and must not be taken for one. With ``log_density_batch``
    (the same log-density for points of shape (n, d)) each finite-difference
    gradient is evaluated in one batch (:mod:`walktune.mode`), the same points
    and values as one at a time.
    """

    def negative(z):
        value = log_density(z * scale)
        return -value if np.isfinite(value) else 1e300

    options = {"maxfun": budget}
    if log_density_batch is not None and LBFGSB_WORKERS:
        def all_points(fun, iterable):  # scipy's workers map; ``fun`` is ``negative`` wrapped, not called
            z = np.array([np.asarray(p, dtype=float) for p in iterable])
            if not z.size:
                return []
            values = in_blocks(log_density_batch, z.shape[0], z.shape[1], lambda lo, hi: z[lo:hi] * scale)
            return [np.atleast_1d(-value if np.isfinite(value) else 1e300) for value in values]

        options["workers"] = all_points
    result = optimize.minimize(negative, x0 / scale, method="L-BFGS-B", options=options)
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
        region = Region(flat.mean(axis=0), flat.mean(axis=0), np.atleast_2d(np.cov(flat.T)), 1.0,
                        sorted(set(chain_ids)), mass=1.0)
        return [region], note
    regions, labels = _regions_from_modes(modes, draws, scale, chain_ids)
    note = _weigh_regions(counter, regions, scale) or note
    _free_chain_shares(regions, labels)
    return regions, note


def _region_log_likelihoods(points, covs, draws: np.ndarray) -> np.ndarray:
    """Gaussian log-density of each draw (N, d) under each region's mode and covariance: shape (N, regions)."""
    return np.stack([stats.multivariate_normal(p, c, allow_singular=True).logpdf(draws) for p, c in zip(points, covs)],
                    axis=1).reshape(draws.shape[0], len(points))


def _regions_from_modes(modes: list, draws: np.ndarray, scale: np.ndarray, chain_ids: list) -> tuple[list, np.ndarray]:
    """Assign draws (chains, n, d) to the modes (nearest, then Gaussian likelihood); regions and labels (chains, n)."""
    m, n, d = draws.shape
    all_draws = draws.reshape(-1, d)
    points = np.array([mode[0] for mode in modes])
    # One mode at a time: an (n, modes, d) array would hold every proof draw once per mode.
    labels = np.argmin(np.stack([(((all_draws - point) / scale) ** 2).sum(axis=1) for point in points], axis=1), axis=1)
    for _ in range(2):
        covs = []
        for r in range(len(modes)):
            members = all_draws[labels == r]
            covs.append(np.cov(members.T) + 1e-9 * np.diag(scale**2) if members.shape[0] > d + 1 else np.diag(scale**2))
        labels = np.argmax(_region_log_likelihoods(points, covs, all_draws), axis=1)
    by_chain = labels.reshape(m, n)
    regions = []
    for r in range(len(modes)):
        members = all_draws[labels == r]
        if members.shape[0] == 0:
            # A mode no chain reached: report it with the optimizer's point only.
            regions.append(Region(points[r], points[r], np.diag((0.1 * scale) ** 2), 0.0, [], modes[r][1]))
            continue
        chains = sorted({chain_ids[c] for c in range(m) if np.mean(by_chain[c] == r) >= 0.05})
        cov = np.atleast_2d(np.cov(members.T)) if members.shape[0] > 1 else np.diag((0.1 * scale) ** 2)
        regions.append(Region(points[r], members.mean(axis=0), cov, members.shape[0] / all_draws.shape[0], chains,
                              modes[r][1]))
    return regions, by_chain


def _weigh_regions(counter, regions: list, scale: np.ndarray) -> str | None:
    """Laplace masses of the regions (walktune.modes), from a finite-difference Hessian at each mode (2 d^2 + 1 each)."""
    d = scale.shape[0]
    hessians = []
    for region in regions:
        if counter.left() < 2 * d * d + 1:
            return "the evaluation budget ran out before the mass of every region was estimated"
        hessians.append(finite_difference_hessian(counter, region.mode, scale))
    _, masses, minor = weigh([r.log_density for r in regions], hessians)
    for region, mass, negligible in zip(regions, masses, minor):
        region.mass, region.negligible = float(mass), bool(negligible and not np.isfinite(mass))
    return None


def _free_chain_shares(regions: list, labels: np.ndarray) -> None:
    """Each region's share of the draws of chains that moved between regions, and how often they entered it."""
    free = moved_between(chain_visits(labels, len(regions)))
    if not free.any():
        return
    moving = labels[free]
    entering = np.ones(moving.shape, dtype=bool)  # the first draw of a chain, and every change of region
    entering[:, 1:] = moving[:, 1:] != moving[:, :-1]
    entered = moving[entering]
    for r, region in enumerate(regions):
        region.free_share = float(np.mean(moving == r))
        region.entries = int(np.sum(entered == r))


def assign_draws(regions: list, draws: np.ndarray) -> np.ndarray:
    """Region of every draw (chains, n, d), shape (chains, n): the one whose mode and covariance make it most likely."""
    m, n, d = draws.shape
    if len(regions) < 2:
        return np.zeros((m, n), dtype=int)
    flat = draws.reshape(-1, d)
    return np.argmax(_region_log_likelihoods([r.mode for r in regions], [r.covariance for r in regions], flat),
                     axis=1).reshape(m, n)


#: The Laplace masses and the free chains' shares agree when they differ by less than this plus two
#: binomial standard errors of the share over the free chains' entries into regions (a rule of thumb:
#: a Laplace mass of a skewed mode may be off by a few tenths of its share).
MASS_AGREEMENT = 0.1


def masses_agree(regions: list) -> bool | None:
    """Whether the regions' Laplace masses agree with the free chains' shares; None when either is unknown."""
    masses = np.array([r.mass for r in regions])
    shares = np.array([r.free_share for r in regions])
    if not (np.all(np.isfinite(masses)) and np.all(np.isfinite(shares))):
        return None
    visits = max(1, sum(r.entries for r in regions))
    se = np.sqrt(masses * (1 - masses) / visits)
    return bool(np.all(np.abs(shares - masses) <= MASS_AGREEMENT + 2 * se))


def _mass_check_text(regions: list) -> str:
    agree = masses_agree(regions)
    if not np.all(np.isfinite([r.free_share for r in regions])):
        return ("No chain moved between regions, so the draws cannot check the masses; the Laplace masses assume each "
                "region is close to Gaussian.") if np.all(np.isfinite([r.mass for r in regions])) else ""
    shares = ", ".join(f"{r.free_share:.0%}" for r in regions)
    visits = sum(r.entries for r in regions)
    spent = f"Chains that moved between regions ({visits} visits in all) spent {shares} of their draws in them"
    if agree is None:
        return spent + "."
    verdict = "agrees with" if agree else "DISAGREES with"
    return (f"{spent}, which {verdict} the Laplace "
            "masses" + ("." if agree else ": a region is far from Gaussian, or those chains have not settled; "
                        "trust neither without a longer run or tempering."))


def multimodal_finding(regions: list, names: list) -> Finding | None:
    """``multimodal`` (critical) when two or more regions hold a share of the mass that is not negligible,
    else ``minor-mode`` for the regions of negligible Laplace mass (warn when chains sat in them)."""
    if len(regions) < 2:
        return None
    parts = []
    for i, region in enumerate(regions):
        where = ", ".join(f"{names[j]}={region.mode[j]:.3g}" for j in range(min(len(names), 4)))
        chains = ", ".join(map(str, region.chains)) if region.chains else "none"
        mass = f"Laplace mass {region.mass:.2g}" if np.isfinite(region.mass) else "mass unknown"
        parts.append(f"region {i + 1} near ({where}{', ...' if len(names) > 4 else ''}), {mass}, "
                     f"{region.share:.0%} of draws, chains {chains}")
    evidence = {"regions": [r.to_dict() for r in regions], "masses_agree": masses_agree(regions),
                "threshold": MINOR_MODE_MASS}
    check = _mass_check_text(regions)
    major = [r for r in regions if not r.minor]
    moved = bool(np.all(np.isfinite([r.free_share for r in regions])))
    if len(major) < 2:
        return _minor_region_finding(regions, parts, names, evidence)
    return Finding(
        "multimodal",
        "critical",
        list(names),
        f"the posterior has {len(major)} separated regions of non-negligible mass: " + "; ".join(parts) + ". "
        + (check + " " if check else "") + (
            "The posterior table pools chains that moved between the regions: its R-hat says whether they moved often "
            "enough. " if moved else
            "A random walk will not move between them at a useful rate, so no estimate may pool them: the posterior "
            "table comes from one region's chains and is marked NOT CONVERGED. ")
        + "Use tempering (e.g. parallel tempering), or run each region separately with its own proposal (regions in "
        "advice.json) and combine them with weights from the masses above, checked by other means (e.g. bridge "
        "sampling).",
        evidence,
    )


def _minor_region_finding(regions: list, parts: list, names: list, evidence: dict) -> Finding:
    top = max(r.log_density for r in regions)
    minor = [i for i, r in enumerate(regions) if r.minor]
    stuck = sorted({c for i in minor for c in regions[i].chains})
    gaps = ", ".join(f"region {i + 1} {top - regions[i].log_density:.1f}" for i in minor)
    return Finding(
        "minor-mode",
        "warn" if stuck else "info",
        list(names),
        "separated regions, all but one of negligible mass: " + "; ".join(parts) + " (below the main mode in "
        f"log-density: {gaps}). Below {MINOR_MODE_MASS:g} of the mass a region changes no estimate beyond its Monte "
        "Carlo error" + (f"; chains {', '.join(map(str, stuck))} spent time in one, and a chain that stayed there is "
                         "left out of the posterior table." if stuck else "."),
        evidence,
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


#: Share of the draws in each tail behind the Hill estimate (common practice: 5-10%).
HILL_TAIL_SHARE = 0.05

#: Hill's estimate at :data:`HILL_TAIL_SHARE`, measured from the median, for Student-t tails with 2 and
#: with 4 degrees of freedom (scipy.stats.t; simulated here: 100 samples of 200,000 draws, sd of the mean
#: 0.003): the boundaries of a finite variance and a finite fourth moment. The estimate runs low for any
#: tail that is not an exact power law (a Student-t with 3 degrees of freedom gives about 2.47, with 5
#: about 3.16, a Gaussian 4.7), so tails are compared with these, not with 2 and 4.
HILL_AT_T2 = 1.85
HILL_AT_T4 = 2.87


def hill_tail_index(x: np.ndarray, ess: float, share: float = HILL_TAIL_SHARE) -> tuple[float, float, str]:
    """Hill's tail index of the heavier tail of ``x`` (n,), its standard error, and which tail ("upper"/"lower").

    ``alpha = 1 / mean(log(X_(i) / X_(k+1)), i <= k)`` over the ``k = share n``
    largest deviations from the median on each side (Hill 1975); moments of
    order below alpha are finite. Standard error ``alpha / sqrt(k ess / n)``
    (the asymptotic ``alpha / sqrt(k)`` with the tail's draws counted at the
    rate of independent ones).

    References
    ----------
    Hill, B. M. (1975). A simple general approach to inference about the tail of a
    distribution. Annals of Statistics, 3(5), 1163-1174.
    """
    x = np.asarray(x, dtype=float)
    n = x.shape[0]
    k = max(int(share * n), 10)
    centre = np.median(x)
    best = (np.inf, np.inf, "upper")
    for side, deviation in (("upper", x - centre), ("lower", centre - x)):
        tail = np.sort(deviation[deviation > 0])[::-1]
        if tail.shape[0] <= k or tail[k] <= 0:
            continue
        alpha = 1.0 / np.mean(np.log(tail[:k] / tail[k]))
        if alpha < best[0]:
            best = (float(alpha), float(alpha / np.sqrt(max(k * min(ess, n) / n, 1.0))), side)
    return best


def _moments_text(alpha: float, se: float) -> tuple[str, str]:
    """What the tail index says of the variance and the fourth moment, against :data:`HILL_AT_T2`, :data:`HILL_AT_T4`."""
    if alpha + 2 * se < HILL_AT_T2:
        return "infinite-variance", ("heavier than a Student-t with 2 degrees of freedom: the variance may be infinite, "
                                     "and means and sds from these draws may not settle")
    if alpha + 2 * se < HILL_AT_T4:
        return "infinite-fourth-moment", ("heavier than a Student-t with 4 degrees of freedom: the fourth moment is "
                                          "likely infinite, so the kurtosis has no finite value and its estimate "
                                          "only grows with more draws")
    if alpha - 2 * se < HILL_AT_T4:
        return "undecided", ("as heavy as a Student-t with about 4 degrees of freedom: whether the fourth moment is "
                             "finite these draws cannot tell")
    return "finite-fourth-moment", "lighter than a Student-t with 4 degrees of freedom: the fourth moment looks finite"


def heavy_tail_findings(draws: np.ndarray, ess: np.ndarray, names: list) -> list:
    """``heavy-tails``: excess kurtosis above 1 by more than four of its Gaussian-null standard errors.

    The sample excess kurtosis of a heavy-tailed variable is badly biased low
    (dominated by the few largest draws; it has no finite value when the
    fourth moment is infinite), so it is reported as a lower indication, with
    the Gaussian null ``0 +/- sqrt(24 / ESS)``, beside Hill's tail index
    (:func:`hill_tail_index`), which says whether the variance or the fourth
    moment may be infinite.
    """
    flat = draws.reshape(-1, draws.shape[2])
    kurtosis = stats.kurtosis(flat, axis=0, fisher=True, bias=False)
    out = []
    for i, k in enumerate(kurtosis):
        n_eff = float(ess[i]) if np.isfinite(ess[i]) else 0.0
        if n_eff < MIN_DRAWS_TO_DECIDE:
            continue
        se = np.sqrt(24.0 / n_eff)
        if k > 1.0 and k - 4 * se > 0:
            alpha, alpha_se, side = hill_tail_index(flat[:, i], n_eff)
            moments, said = _moments_text(alpha, alpha_se)
            out.append(
                Finding(
                    "heavy-tails",
                    "warn",
                    [names[i]],
                    f"{names[i]} has excess kurtosis at least about {k:.1f} in these draws (a Gaussian would give "
                    f"0 +/- {se:.2f} at this ESS; heavy tails make the sample value run low). Its {side} tail has "
                    f"tail index about {alpha:.2g} +/- {alpha_se:.1g} (Hill 1975, on the outer "
                    f"{HILL_TAIL_SHARE:.0%} of the draws), {said}. A proposal scaled to the bulk explores such "
                    "tails slowly and tail quantiles converge last: a log or other transform may tame them; check "
                    "tail ESS.",
                    {"excess_kurtosis_lower_indication": float(k), "gaussian_null_standard_error": float(se),
                     "tail_index": alpha, "tail_index_standard_error": alpha_se, "heavier_tail": side,
                     "moments": moments},
                )
            )
    return out
