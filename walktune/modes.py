"""Modes weighted by their mass: which modes seed chains, and which chains the posterior table may pool.

The Laplace approximation of the mass near a mode ``m`` with log-density
``l`` and Hessian ``H`` (negative definite) is

    M = exp(l) sqrt(det(2 pi Sigma)),   Sigma = (-H)^{-1},
    log M = l + (d / 2) log(2 pi) - (1 / 2) log det(-H),

exact for a Gaussian, hence for a mixture of well-separated Gaussians
(Tierney and Kadane 1986). Normalised over the modes found, it estimates the
share of the posterior each holds. A mode whose relative mass is below
:data:`MINOR_MODE_MASS` is *minor*: it is reported with its log-density gap and
mass, and no chain is started in it (a random walk started there would stay and
its draws would enter the estimates with a weight it does not have).

The posterior table is never a pool of chains stuck in different regions
(:func:`table_scope`): when the chains of the run the table comes from sit in
different regions and none moved between them, only the chains in the region
of largest mass make the table; the others are named as left out, and the
table stands for the whole posterior only when what it leaves out holds less
than :data:`MINOR_MODE_MASS`.

References
----------
Tierney, L. and Kadane, J. B. (1986). Accurate approximations for posterior moments and
marginal densities. Journal of the American Statistical Association, 81(393), 82-86.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .findings import Finding
from .mode import ModeFit, finite_difference_hessian, laplace_covariance

#: A mode (or region) holding less than this share of the mass found is minor. Leaving out a
#: mode of relative mass w moves a posterior mean by at most w times the distance between the
#: modes; at w = 1e-3 and modes 10 sds apart that is 0.01 sd, the MCSE of an ESS of 10,000, more
#: than any proof run here reaches, so the omission is below the table's own error. It also lies
#: 6.9 nats below an equal share, well beyond the factor of 2 to 3 by which a Laplace mass of a
#: skewed mode may be off (a choice, from those two bounds; not a published threshold).
MINOR_MODE_MASS = 1e-3

#: A chain whose draws fall at least this share in each of two regions moved between them (as Region.chains counts).
VISIT_SHARE = 0.05


def laplace_log_mass(log_density: float, hessian: np.ndarray | None) -> float:
    """``log M = l + (d/2) log(2 pi) - (1/2) log det(-H)``; NaN unless ``-H`` is positive definite.

    Parameters
    ----------
    log_density : float
        The log-density at the mode.
    hessian : ndarray of shape (d, d) or None
        Of the log-density at the mode.
    """
    if hessian is None or not np.isfinite(log_density) or not np.all(np.isfinite(hessian)):
        return float("nan")
    precision = -0.5 * (hessian + hessian.T)
    try:
        chol = np.linalg.cholesky(precision)
    except np.linalg.LinAlgError:
        return float("nan")
    d = precision.shape[0]
    return float(log_density + 0.5 * d * np.log(2 * np.pi) - np.sum(np.log(np.diag(chol))))


def unknown_mass_gap(dim: int) -> float:
    """Log-density gap below the highest mode past which a mode of unknown Laplace mass is minor anyway.

    A mode ``G`` nats below the highest holds at least :data:`MINOR_MODE_MASS` of
    the mass only if its volume is ``exp(G) * MINOR_MODE_MASS`` times larger; at
    ``G = log(1 / MINOR_MODE_MASS) + d log(100)`` it would have to be more than 100
    times wider than the highest mode in every direction (a choice, for modes on
    a bound or at a saddle of the climb, whose curvature gives no Laplace mass).
    """
    return float(np.log(1.0 / MINOR_MODE_MASS) + dim * np.log(100.0))


def relative_masses(log_masses) -> np.ndarray:
    """Masses normalised to sum to one; all NaN when any is unknown (a share of an unknown total is unknown)."""
    log_masses = np.asarray(log_masses, dtype=float)
    if log_masses.size == 0 or not np.all(np.isfinite(log_masses)):
        return np.full(log_masses.shape, np.nan)
    weights = np.exp(log_masses - log_masses.max())
    return weights / weights.sum()


def weigh(log_densities, hessians) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Laplace log-masses, relative masses and which modes are minor, for modes with these log-densities and Hessians.

    A mode without a Laplace mass (its Hessian not negative definite) more than
    :func:`unknown_mass_gap` below the highest mode is minor and left out of the
    normalisation (its mass stays NaN); the others share the mass, all NaN when
    any of them has none.

    Returns
    -------
    log_masses, masses : ndarray of shape (modes,)
    minor : ndarray of bool, shape (modes,)
    """
    log_densities = np.asarray(log_densities, dtype=float)
    log_masses = np.array([laplace_log_mass(lp, h) for lp, h in zip(log_densities, hessians)])
    dim = next((h.shape[0] for h in hessians if h is not None), 1)
    far = ~np.isfinite(log_masses) & (log_densities < log_densities.max() - unknown_mass_gap(dim))
    masses = np.full(log_masses.shape, np.nan)
    masses[~far] = relative_masses(log_masses[~far])
    minor = far | np.array([is_minor(w) for w in masses], dtype=bool)
    return log_masses, masses, minor


def is_minor(mass: float) -> bool:
    """Whether a relative mass is known and below :data:`MINOR_MODE_MASS`."""
    return bool(np.isfinite(mass) and mass < MINOR_MODE_MASS)


@dataclass(frozen=True)
class ModeMass:
    """A mode, its log-density, Laplace log-mass and share of the mass found (NaN when unknown); whether it is minor."""

    mode: np.ndarray
    log_density: float
    log_mass: float
    mass: float
    hessian: np.ndarray | None = field(default=None, repr=False)
    minor: bool = False


def weigh_modes(modes: list, log_densities: list, hessians: list) -> list:
    """:class:`ModeMass` of every mode, heaviest first (the given order where the masses are unknown; minor ones last).

    Parameters
    ----------
    modes : list of ndarray of shape (d,)
    log_densities : list of float
    hessians : list of ndarray of shape (d, d) or None
    """
    log_masses, masses, minor = weigh(log_densities, hessians)
    weighed = [ModeMass(np.asarray(m, dtype=float), float(lp), float(lm), float(w), h, bool(mi))
               for m, lp, lm, w, h, mi in zip(modes, log_densities, log_masses, masses, hessians, minor)]
    known = np.all(np.isfinite(masses[~minor]))
    weighed.sort(key=lambda mm: (mm.minor, -mm.mass if known and not mm.minor else 0.0))
    return weighed


def weigh_start_modes(log_density, fit: ModeFit, others: list, cov: np.ndarray, bounds: np.ndarray,
                      log_density_batch=None) -> tuple:
    """Laplace masses of the optimizer's mode and the other modes: the fit to start from, seeds and minor modes.

    A Hessian (2 d^2 + 1 evaluations, in batches through ``log_density_batch``
    when given) is taken at each other mode, only when there are any. When another mode outweighs the optimizer's by more than
    1 / MINOR_MODE_MASS, it becomes the mode the pilot starts from.
    Returns ``(fit, main, seeds, minor)``: the fit to start from, its
    :class:`~walktune.modes.ModeMass`, the modes to start chains in (heaviest
    first) and the minor ones.
    """
    if not others:
        return fit, None, [fit.mode], []
    scales = np.maximum(np.sqrt(np.diag(cov)), 1e-12)
    hessians = [fit.hessian] + [finite_difference_hessian(log_density, mode, scales, bounds,
                                                          evaluate_batch=log_density_batch) for mode, _ in others]
    weighed = weigh_modes([fit.mode] + [m for m, _ in others], [fit.log_density] + [lp for _, lp in others], hessians)
    main, seeds, minor = weighed[0], [m for m in weighed if not m.minor], [m for m in weighed if m.minor]
    is_fit = lambda m: np.array_equal(m.mode, fit.mode)  # noqa: E731
    if any(is_fit(m) for m in minor) and laplace_covariance(main.hessian) is not None:
        fit = ModeFit(main.mode, main.log_density, main.hessian, laplace_covariance(main.hessian), "climb",
                      f"{fit.message}; that mode holds a negligible share of the mass, and a climb from another point "
                      "found this one, which the chains start around")
    # The optimizer's mode (or the one that replaced it) first: the unconstrained start maps the others.
    seeds = [m for m in seeds if is_fit(m)] + [m for m in seeds if not is_fit(m)]
    return fit, main, [m.mode for m in seeds], minor


def _where(point: np.ndarray, names: list) -> str:
    shown = ", ".join(f"{names[j]}={point[j]:.3g}" for j in range(min(len(names), 4)))
    return shown + (", ..." if len(names) > 4 else "")


def minor_mode_finding(minor: list, main: ModeMass, names: list) -> Finding | None:
    """``minor-mode`` (info): modes of negligible Laplace mass that no chain was started in."""
    if not minor:
        return None
    parts = [f"near ({_where(m.mode, names)}), {main.log_density - m.log_density:.1f} below the main mode in "
             "log-density, " + (f"Laplace mass {m.mass:.2g} of the total" if np.isfinite(m.mass) else
                                "no Laplace mass (the curvature there is not a mode's: a bound or a saddle), far too "
                                "low to hold a share") for m in minor]
    return Finding(
        "minor-mode", "info", list(names),
        f"{'a separate local mode' if len(minor) == 1 else f'{len(minor)} separate local modes'} of negligible mass: "
        + "; ".join(parts) + f". Below {MINOR_MODE_MASS:g} of the mass (Laplace approximation at each mode) a mode "
        "changes no estimate beyond its Monte Carlo error, so no chain was started there and the estimates leave it "
        "out. If that mode matters to you (a tail probability, a sign), estimate its mass by other means.",
        {"minor_modes": [{"mode": m.mode.tolist(), "log_density": m.log_density,
                          "log_density_gap": main.log_density - m.log_density,
                          "laplace_mass": float(m.mass) if np.isfinite(m.mass) else None}
                         for m in minor],
         "main_mode": main.mode.tolist(), "threshold": MINOR_MODE_MASS},
    )


# --------------------------------------------------------------------------- which chains the table pools


@dataclass(frozen=True)
class TableScope:
    """Which chains of a run the posterior table comes from, and what it stands for.

    Attributes
    ----------
    chains : list of int
        The chains whose draws make the table.
    excluded : list of int
        Chains left out: stuck in other regions than ``region``.
    region : int or None
        The region (index into the regions) the table describes; None when it pools every chain.
    region_mass : float
        That region's Laplace share of the mass (1 with one region; NaN when unknown).
    other_mass : float
        The Laplace mass of the regions the table leaves out (NaN when unknown).
    whole : bool
        The table stands for the whole posterior: it pools every region the
        chains found, or what it leaves out holds less than :data:`MINOR_MODE_MASS`.
    """

    chains: list
    excluded: list = field(default_factory=list)
    region: int | None = None
    region_mass: float = 1.0
    other_mass: float = 0.0
    whole: bool = True

    def to_dict(self) -> dict:
        def number(x):
            return float(x) if np.isfinite(x) else None

        return {"chains": list(self.chains), "excluded_chains": list(self.excluded),
                "region": None if self.region is None else self.region + 1, "region_mass": number(self.region_mass),
                "other_mass": number(self.other_mass), "whole_posterior": self.whole}

    def describe(self) -> str:
        """One line for people; empty when the table pools every chain."""
        if self.region is None:
            return ""
        mass = f"Laplace mass {self.region_mass:.2g}" if np.isfinite(self.region_mass) else "mass unknown"
        text = (f"from chains {', '.join(map(str, self.chains))} in region {self.region + 1} ({mass}) only")
        if self.excluded:
            text += f"; chains {', '.join(map(str, self.excluded))} sat in other regions and are left out"
        if self.whole:
            other = self.other_mass
            return text + f" (the regions left out hold {other:.1g} of the mass: negligible)"
        return text + "; NOT the whole posterior (multimodal: see the findings)"


def chain_visits(labels: np.ndarray, n_regions: int) -> np.ndarray:
    """Share of each chain's draws in each region, shape (chains, regions), from region labels (chains, n)."""
    return np.stack([np.mean(labels == r, axis=1) for r in range(n_regions)], axis=1)


def moved_between(shares: np.ndarray) -> np.ndarray:
    """Chains with at least :data:`VISIT_SHARE` of their draws in each of two regions (bool, shape (chains,))."""
    return (shares >= VISIT_SHARE).sum(axis=1) >= 2


def table_scope(labels: np.ndarray, masses) -> TableScope:
    """The chains the posterior table may pool, given each draw's region and the regions' Laplace masses.

    Parameters
    ----------
    labels : ndarray of int, shape (chains, n)
        Region of every draw of the run the table comes from.
    masses : array-like of shape (regions,)
        Relative Laplace masses (NaN when unknown).

    With one region, or when some chain moved between regions (R-hat then judges
    the pool), every chain. Otherwise the chains in the region of largest mass
    among those holding chains (by number of chains where the masses are unknown).
    """
    masses = np.asarray(masses, dtype=float)
    m = labels.shape[0]
    every = list(range(m))
    if masses.size < 2:
        return TableScope(every)
    shares = chain_visits(labels, masses.size)
    home = np.argmax(shares, axis=1)
    held = sorted(set(home.tolist()))
    if moved_between(shares).any():
        return TableScope(every)
    if np.all(np.isfinite(masses)):
        region = max(held, key=lambda r: (masses[r], np.sum(home == r)))
    else:
        region = max(held, key=lambda r: (np.sum(home == r), -r))
    chains = [c for c in every if home[c] == region]
    excluded = [c for c in every if home[c] != region]
    other = float(np.sum(np.delete(masses, region)))
    whole = bool(np.isfinite(other) and other < MINOR_MODE_MASS)
    if whole and not excluded:
        return TableScope(every)
    return TableScope(chains, excluded, region, float(masses[region]), other, whole)
