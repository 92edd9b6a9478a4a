"""A plain random-walk Metropolis sampler, written apart from walktune's engine.

Chains move in lockstep: at each step every chain proposes
``x' = x + L z`` with ``z ~ N(0, I)`` and ``L L^T`` the proposal covariance,
and accepts with probability ``min(1, p(x') / p(x))`` (Metropolis et al. 1953;
Hastings 1970). The log-density is called once per step on the batch of
proposals, so the evaluations are ``chains x steps``.

The benchmark of awkward targets uses it to run walktune's recommendations
independently of walktune, and the reference runs use it in log coordinates.
"""

from __future__ import annotations

import numpy as np


def proposal_factor(cov) -> np.ndarray:
    """A square root ``L`` with ``L L^T = cov`` for a (d, d) covariance, a (d,) diagonal or a scalar.

    Uses the symmetric eigen-decomposition so that a merely positive
    semi-definite covariance still works (negative rounding clipped to zero).
    """
    cov = np.asarray(cov, dtype=float)
    if cov.ndim == 0:
        return np.sqrt(cov) * np.eye(1)
    if cov.ndim == 1:
        return np.diag(np.sqrt(cov))
    values, vectors = np.linalg.eigh(0.5 * (cov + cov.T))
    return vectors * np.sqrt(np.clip(values, 0.0, None))


def run_chains(log_density, start, cov, steps: int, rng: np.random.Generator):
    """Run fixed-proposal random-walk Metropolis chains.

    Parameters
    ----------
    log_density : callable
        Batch log-density: (m, d) -> (m,).
    start : ndarray of shape (m, d)
        One start per chain; the log-density must be finite there.
    cov : ndarray of shape (d, d) or (d,)
        Proposal covariance (a vector is its diagonal).
    steps : int
    rng : numpy.random.Generator

    Returns
    -------
    draws : ndarray of shape (m, steps, d)
        The states after each step (the start is not included).
    acceptance : float
        Share of accepted proposals.
    """
    x = np.array(start, dtype=float)
    m, d = x.shape
    factor = proposal_factor(cov)
    lp = np.asarray(log_density(x), dtype=float)
    if not np.all(np.isfinite(lp)):
        raise ValueError("the log-density must be finite at every start")
    draws = np.empty((m, steps, d))
    accepted = 0
    for t in range(steps):
        proposal = x + rng.standard_normal((m, d)) @ factor.T
        lp_new = np.asarray(log_density(proposal), dtype=float)
        accept = np.log(rng.random(m)) < np.where(np.isnan(lp_new), -np.inf, lp_new) - lp
        x[accept], lp[accept] = proposal[accept], lp_new[accept]
        accepted += int(accept.sum())
        draws[:, t] = x
    return draws, accepted / (m * steps)
