"""An improper posterior that the mode search does not catch, found by the pilot: a spread that grows without limit.

A log-density flat along some direction (``-0.5 (a - b)^2`` is flat along
``a + b``) has a finite mode search, a singular Hessian, and infinite mass:
the pilot's chains diffuse along that direction, each stage's draws wider than
the last, and the adapted covariance grows with them. A proper posterior's
spread stops growing once it reaches the posterior's width, and its
log-density falls far from the centre; so the check is

1. the trigger: the pilot has not settled and its covariance ``C`` has grown
   at least :data:`GROWTH_TRIGGER`-fold over the start ``C0`` along some
   direction (the largest eigenvalue ``g`` of ``C0^{-1} C``, with eigenvector
   ``w``);
2. the confirmation: along the 1-sd move ``delta = C w / sqrt(w^T C w)`` (the
   regression of the parameters on the projection ``w^T theta``), from the
   mean of the pilot's last draws, the log-density is evaluated at
   ``1, 10^2, 10^4, 10^6`` times ``delta`` on each side. The mass along a ray
   ``int p(m + t delta) dt`` diverges when ``p`` falls more slowly than
   ``1 / t``; a side on which every 100-fold step lowers the log-density by
   less than ``log 100`` (and never to ``-inf``: a bound closes it) is taken
   as such. Any proper density falls faster far enough out: a Gaussian by
   ``t^2 / 2``, a Student-t with ``nu`` degrees of freedom in ``d`` dimensions
   by ``(nu + d) log 100`` per 100-fold step.

The job then stops with a one-line error naming the parameters that move along
that direction (at least a tenth as far as the one moving most) and saying
what to add, as for a flat parameter or a runaway mode search: an improper
posterior has no mean or spread to report, so a finding beside numbers would
invite using the numbers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize

#: Variance growth of the pilot's covariance over its start, along one direction, that calls for the ray check
#: (10-fold in sd: more than the component-wise probe's single rescaling of a poor start, ``PROBE_LIMIT``).
GROWTH_TRIGGER = 100.0
#: Distances along the ray, in units of the pilot's spread along it.
RAY_DISTANCES = (1.0, 1e2, 1e4, 1e6)
#: Evaluations of the profile's search at each distance, per parameter searched over.
PROFILE_EVALUATIONS_PER_PARAMETER = 20
#: A parameter is named when its move along the flat direction (in its own sd at the start) is at
#: least this share of the largest move.
NAMED_SHARE = 0.1


@dataclass(frozen=True)
class SpreadRunaway:
    """A direction along which the pilot's spread grew and the log-density stays flat.

    Attributes
    ----------
    growth : float
        Variance growth along the direction, ``w^T C w / w^T C0 w``.
    step : ndarray of shape (d,)
        The direction found flat: the 1-sd move ``delta`` plus the profile's offset across it.
    log_density : ndarray of shape (2, len(RAY_DISTANCES))
        The profile log-density at ``RAY_DISTANCES`` on each side, plus side first.
    share : ndarray of shape (d,)
        Each parameter's move along ``step`` in units of its sd at the start, over the largest such move.
    side : int
        +1 or -1, the side on which the log-density stays flat.
    """

    growth: float
    step: np.ndarray
    log_density: np.ndarray
    share: np.ndarray
    side: int


def growth_direction(start_covariance: np.ndarray, covariance: np.ndarray) -> tuple[float, np.ndarray]:
    """Largest eigenvalue of ``C0^{-1} C`` and its eigenvector ``w`` (shape (d,)): how far and where the spread grew."""
    values, vectors = linalg.eigh(covariance, start_covariance)
    return float(values[-1]), vectors[:, -1]


def _flat_side(values: np.ndarray) -> bool:
    """Every 100-fold step along the ray lowers the log-density by less than ``log 100``; all finite."""
    if not np.all(np.isfinite(values)):
        return False
    ratio = np.log(np.asarray(RAY_DISTANCES[1:]) / np.asarray(RAY_DISTANCES[:-1]))
    return bool(np.all(np.diff(values) > -ratio))


def _complement(step: np.ndarray, chol: np.ndarray) -> np.ndarray:
    """Columns ``L0 Q``: ``Q`` an orthonormal basis of the complement of ``L0^{-1} step``, shape (d, d - 1)."""
    white = np.linalg.solve(chol, step)
    basis = linalg.null_space(white[None, :])
    return chol @ basis


def _profile(evaluate, centre: np.ndarray, step: np.ndarray, across: np.ndarray, distances,
             budget: int) -> tuple[np.ndarray, np.ndarray]:
    """Largest log-density at ``centre + t (step + across z)`` over ``z``, for each ``t`` in ``distances``.

    L-BFGS-B from the previous distance's optimum, at most ``budget`` evaluations
    each: a ray that misses a flat ridge by a small angle finds it again.
    Returns the values and the direction ``step + across z`` found at the last distance.
    """
    def negative(z, t):
        # The offset across is per unit distance: a ridge that leaves the ray at an angle is at the same z at
        # every distance, and finite differences in z stay above the rounding of far points.
        value = float(np.asarray(evaluate((centre + t * (step + across @ z))[None, :]).values, dtype=float)[0])
        return -value if np.isfinite(value) else 1e300

    z, values = np.zeros(across.shape[1]), []
    for t in distances:
        if across.shape[1] == 0:
            value = negative(z, t)
            values.append(-value if value < 1e300 else -np.inf)
            continue
        found = optimize.minimize(negative, z, args=(t,), method="L-BFGS-B", options={"maxfun": budget})
        z = found.x
        # Nowhere finite across the ray at this distance (outside a bound): the side is closed.
        values.append(-float(found.fun) if found.fun < 1e300 else -np.inf)
    return np.array(values), step + across @ z


def find_spread_runaway(evaluate, centre: np.ndarray, start_covariance: np.ndarray,
                        covariance: np.ndarray) -> SpreadRunaway | None:
    """The ray check along the direction of largest growth; None when the growth is small or the density falls.

    Parameters
    ----------
    evaluate : callable
        Takes points of shape (n, d), returns a BatchResult (the counted evaluator).
    centre : ndarray of shape (d,)
        Mean of the pilot's last draws.
    start_covariance, covariance : ndarray of shape (d, d)
        ``C0`` (what the pilot started from) and ``C`` (where it ended).
    """
    try:
        growth, w = growth_direction(start_covariance, covariance)
        chol = np.linalg.cholesky(start_covariance)
    except (linalg.LinAlgError, ValueError):
        return None
    if not growth >= GROWTH_TRIGGER:
        return None
    step = covariance @ w / np.sqrt(float(w @ covariance @ w))
    across = _complement(step, chol)
    budget = PROFILE_EVALUATIONS_PER_PARAMETER * (across.shape[1] + 1)
    with np.errstate(all="ignore"):
        rays = [_profile(evaluate, centre, side * step, across, RAY_DISTANCES, budget) for side in (1, -1)]
    flat = [k for k, (values, _) in enumerate(rays) if _flat_side(values)]
    if not flat:
        return None
    direction = rays[flat[0]][1]
    # Each parameter's move along the flat direction, in units of its spread at the start.
    moves = np.abs(direction) / np.sqrt(np.diag(start_covariance))
    return SpreadRunaway(growth, direction, np.array([rays[0][0], rays[1][0]]), moves / moves.max(),
                         1 if flat[0] == 0 else -1)


def runaway_message(found: SpreadRunaway, names: list) -> str:
    """One line: the posterior is not proper, along which parameters, and what to add."""
    named = [names[i] for i in np.flatnonzero(found.share >= NAMED_SHARE)] or [names[int(np.argmax(found.share))]]
    row = found.log_density[0 if found.side > 0 else 1]
    return (
        f"the posterior is not proper: the pilot's spread grew {found.growth:.3g}-fold (in variance) along "
        f"a direction that moves {', '.join(named)}, and the log-density stays flat along it (it changes by "
        f"{row[-1] - row[0]:+.3g} from 1 to a million times the pilot's spread), so the chains diffuse without "
        f"limit; add a prior for {', '.join(named)} (PRIOR or LOG_PRIOR in the model file, prior= in Python) "
        "or bounds (--bound NAME=LOW:HIGH)."
    )
