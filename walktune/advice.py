"""Proposal advice from a posterior covariance, shared by tuning and inspection.

Given a posterior covariance ``S`` (and optionally the proposal a user runs
today), the advice is the proposal ``(c ell_d)^2 S``, per-parameter step
sizes, one step size, the expected acceptance of the proposal and the
predicted slow-downs of the alternatives (see :mod:`walktune.theory`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import theory
from .analysis import Structure


@dataclass(frozen=True)
class Advice:
    """What proposal to use, and what the alternatives cost.

    Attributes
    ----------
    proposal_covariance : ndarray of shape (d, d)
    step_sizes : ndarray of shape (d,)
    single_step : float
    expected_acceptance : float
    slowdowns : dict
        ``{"step_sizes", "single_step", and with a current proposal "current",
        "current_rescaled"}`` each ``{"slowest_parameter", "slowest_direction",
        "mean_direction"}`` (:class:`walktune.theory.Slowdown`).
    scale_factor : float
        Extra factor on the optimal scale (from the pilot's acceptance steering; 1 otherwise).
    """

    proposal_covariance: np.ndarray
    step_sizes: np.ndarray
    single_step: float
    expected_acceptance: float
    slowdowns: dict
    scale_factor: float


def advise(covariance: np.ndarray, *, scale_factor: float = 1.0, current: np.ndarray | None = None) -> Advice:
    """Advice for a posterior with covariance ``covariance`` (d, d)."""
    covariance = np.atleast_2d(covariance)
    dim = covariance.shape[0]
    proposal = (scale_factor * theory.optimal_scale(dim)) ** 2 * covariance
    step_sizes = theory.best_step_sizes(covariance) * scale_factor
    single = theory.best_isotropic_step(covariance) * scale_factor
    slowdowns = {
        "step_sizes": theory.slowdown(np.diag(step_sizes**2), covariance).__dict__,
        "single_step": theory.slowdown(single**2 * np.eye(dim), covariance).__dict__,
    }
    if current is not None:
        slowdowns["current"] = theory.slowdown(current, covariance, rescaled=False).__dict__
        slowdowns["current_rescaled"] = theory.slowdown(current, covariance).__dict__
    return Advice(
        proposal_covariance=proposal,
        step_sizes=step_sizes,
        single_step=single,
        expected_acceptance=theory.expected_acceptance(proposal, covariance),
        slowdowns=slowdowns,
        scale_factor=scale_factor,
    )


def advice_payload(advice: Advice, structure: Structure, names: list) -> dict:
    """The advice and geometry keys of advice.json (docs/advice-schema.md)."""
    return {
        "posterior_sd": structure.sd.tolist(),
        "posterior_covariance": structure.covariance.tolist(),
        "proposal_covariance": advice.proposal_covariance.tolist(),
        "step_sizes": advice.step_sizes.tolist(),
        "single_step": advice.single_step,
        "expected_acceptance": advice.expected_acceptance,
        "rotation": np.linalg.cholesky(structure.covariance).tolist(),
        "effective_dimension": structure.effective_dimension,
        "spectrum_decades": structure.decades,
        "correlation_eigenvalues": structure.eigenvalues.tolist(),
        "principal_directions": [
            {"combination": d.describe(names), "coefficients": d.coefficients.tolist(), "spread": d.spread}
            for d in structure.directions
        ],
        "variance_inflation": dict(zip(names, structure.vif.tolist())),
        "predicted_slowdown": advice.slowdowns,
    }


#: ESS a thinning interval may cost, as a share of the whole chain's.
THINNING_ESS_LOSS = 0.10


def ess_kept_by_thinning(iact: float, interval) -> np.ndarray:
    """Share of a chain's ESS kept when only every ``interval``-th draw is stored.

    The chain is taken as AR(1) with the same IACT ``tau``: lag-one
    autocorrelation ``rho = (tau - 1) / (tau + 1)``, so that
    ``tau = (1 + rho) / (1 - rho)``. Every ``k``-th draw of it is AR(1) with
    ``rho^k``, of IACT ``tau_k = (1 + rho^k) / (1 - rho^k)``; of ``N`` draws
    ``N / k`` are kept, with ESS ``N / (k tau_k)`` against ``N / tau``.

    Parameters
    ----------
    iact : float
        The chain's IACT, >= 1.
    interval : int or ndarray of int
        Thinning intervals ``k >= 1``.

    Returns
    -------
    ndarray of the shape of ``interval``
        ``tau / (k tau_k)``, in (0, 1].
    """
    k = np.asarray(interval, dtype=float)
    rho = (iact - 1.0) / (iact + 1.0)
    tau_k = (1.0 + rho**k) / (1.0 - rho**k) if rho > 0 else np.ones_like(k)
    return iact / (k * tau_k)


def warmup_and_thinning(iact_max: float) -> tuple:
    """Warm-up steps and a thinning interval from the slowest IACT.

    Warm-up: about ten of the slowest autocorrelation times from a start near
    the mode (common practice). Thinning never adds information; the interval
    is the largest that keeps at least ``1 - THINNING_ESS_LOSS`` of the ESS of
    the slowest parameter (:func:`ess_kept_by_thinning`; about ``0.56 tau``
    for a long IACT), for when storage matters. ``(None, 1)`` when the IACT is unknown.
    """
    if not np.isfinite(iact_max):
        return None, 1
    intervals = np.arange(1, int(np.ceil(iact_max)) + 2)
    kept = ess_kept_by_thinning(max(iact_max, 1.0), intervals)
    return int(np.ceil(10 * iact_max)), int(intervals[kept >= 1.0 - THINNING_ESS_LOSS].max())
