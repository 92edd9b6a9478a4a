"""Optimal-scaling theory of random-walk Metropolis, used to predict before running.

For a Gaussian target with covariance ``S`` and a Gaussian proposal with
covariance ``P``, write ``mu_i`` for the eigenvalues of ``P^{-1} S`` (the target's
variances along the proposal's whitened principal directions). In the
diffusion limit (Roberts, Gelman and Gilks 1997; Roberts and Rosenthal 2001)
the acceptance rate is ``a = 2 Phi(-sqrt(sum_i 1/mu_i) / 2)`` and the chain
along direction ``i`` is an Ornstein-Uhlenbeck process whose integrated
autocorrelation time is ``tau_i = 4 mu_i / a``. With ``P = (2.38^2 / d) S`` this
gives ``a = 0.234`` and ``tau = 3.0 d`` (efficiency ``0.33 / d``).

A proposal of the wrong shape, rescaled to its best acceptance, is slower in
its slowest direction by ``mu_max * mean(1 / mu)`` and on average by
``mean(mu) * mean(1 / mu)``; :func:`slowdown` returns both. The prediction is
asymptotic in ``d``; simulation here finds it within about 25% at d = 10.

References
----------
Gelman, A., Roberts, G. O. and Gilks, W. R. (1996). Efficient Metropolis jumping
rules. Bayesian Statistics 5, 599-607.
Roberts, G. O., Gelman, A. and Gilks, W. R. (1997). Weak convergence and optimal
scaling of random walk Metropolis algorithms. Annals of Applied Probability, 7(1), 110-120.
Roberts, G. O. and Rosenthal, J. S. (2001). Optimal scaling for various
Metropolis-Hastings algorithms. Statistical Science, 16(4), 351-367.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, stats

#: Optimal proposal scale (times the target sd), acceptance and efficiency for a
#: standard normal target in d = 1..4 dimensions (Gelman, Roberts and Gilks 1996,
#: values as recalled in shared REFERENCES and checked by simulation there).
SMALL_D_OPTIMA = {
    1: (2.4, 0.44, 0.23),
    2: (1.7, 0.35, 0.13),
    3: (1.4, 0.32, 0.10),
    4: (1.15, 0.30, 0.075),
}

#: Asymptotic optimum (Roberts, Gelman and Gilks 1997).
ASYMPTOTIC_SCALE = 2.38
ASYMPTOTIC_ACCEPTANCE = 0.234


def optimal_scale(dim: int) -> float:
    """Best proposal scale for a matched proposal: propose ``N(0, scale^2 S)``."""
    return SMALL_D_OPTIMA[dim][0] if dim in SMALL_D_OPTIMA else ASYMPTOTIC_SCALE / np.sqrt(dim)


def target_acceptance(dim: int) -> float:
    """Acceptance rate at the optimal scale: 0.44 for d = 1 down to 0.234."""
    return SMALL_D_OPTIMA[dim][1] if dim in SMALL_D_OPTIMA else ASYMPTOTIC_ACCEPTANCE


def optimal_efficiency(dim: int) -> float:
    """Efficiency ``1 / IACT`` of the optimally scaled matched proposal (per coordinate)."""
    return SMALL_D_OPTIMA[dim][2] if dim in SMALL_D_OPTIMA else 0.33 / dim


def optimal_proposal(covariance: np.ndarray) -> np.ndarray:
    """The recommended proposal covariance ``scale(d)^2 * covariance``."""
    covariance = np.atleast_2d(covariance)
    return optimal_scale(covariance.shape[0]) ** 2 * covariance


def relative_variances(proposal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Eigenvalues ``mu`` of ``P^{-1} S``: target variances in proposal-whitened directions."""
    return linalg.eigh(np.atleast_2d(covariance), np.atleast_2d(proposal), eigvals_only=True)


def diffusion_acceptance(mu: np.ndarray) -> float:
    """Asymptotic acceptance ``2 Phi(-sqrt(sum 1/mu) / 2)``."""
    return float(2 * stats.norm.cdf(-0.5 * np.sqrt(np.sum(1.0 / mu))))


def predicted_iact(proposal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Predicted IACT along each principal direction, for the proposal as given.

    ``tau_i = max(1, 4 mu_i / a)`` with ``a`` the diffusion-limit acceptance.
    """
    mu = relative_variances(proposal, covariance)
    return np.maximum(1.0, 4.0 * mu / diffusion_acceptance(mu))


@dataclass(frozen=True)
class Slowdown:
    """How much slower a proposal is than the matched, optimally scaled one.

    Attributes
    ----------
    slowest : float
        Ratio of IACTs in the slowest direction (it sets the minimum ESS).
    mean : float
        Ratio of IACTs averaged over principal directions.
    """

    slowest: float
    mean: float


def slowdown(proposal: np.ndarray, covariance: np.ndarray, *, rescaled: bool = True) -> Slowdown:
    """Predicted slow-down of ``proposal`` against ``optimal_proposal(covariance)``.

    Parameters
    ----------
    proposal, covariance : ndarray of shape (d, d)
    rescaled : bool, default=True
        If true, the proposal's overall scale is assumed tuned for acceptance
        (only its shape counts): ``mu_max * mean(1/mu)``. If false, the proposal
        is used as given and its scale counts too.
    """
    mu = relative_variances(proposal, covariance)
    if rescaled:
        inv_mean = np.mean(1.0 / mu)
        return Slowdown(float(mu.max() * inv_mean), float(mu.mean() * inv_mean))
    given = np.maximum(1.0, 4.0 * mu / diffusion_acceptance(mu))
    best = predicted_iact(optimal_proposal(covariance), covariance)
    return Slowdown(float(given.max() / best.max()), float(given.mean() / best.mean()))


def expected_acceptance(proposal: np.ndarray, covariance: np.ndarray, *, draws: int = 20_000, seed: int = 0) -> float:
    """Acceptance of ``N(0, proposal)`` increments on the Gaussian ``N(0, covariance)``.

    Computed exactly for the Gaussian, by Monte Carlo over ``draws`` pairs
    (standard error below 0.004), not from the asymptotic formula: it is
    accurate at small d too.
    """
    covariance = np.atleast_2d(covariance)
    proposal = np.atleast_2d(proposal)
    rng = np.random.default_rng(seed)
    chol_s = np.linalg.cholesky(covariance)
    chol_p = np.linalg.cholesky(proposal)
    x = rng.standard_normal((draws, covariance.shape[0])) @ chol_s.T
    y = x + rng.standard_normal((draws, covariance.shape[0])) @ chol_p.T
    # log N(y) - log N(x) with the precision applied through the Cholesky factor.
    wx = linalg.solve_triangular(chol_s, x.T, lower=True)
    wy = linalg.solve_triangular(chol_s, y.T, lower=True)
    delta = -0.5 * (np.sum(wy**2, axis=0) - np.sum(wx**2, axis=0))
    return float(np.mean(np.minimum(1.0, np.exp(np.minimum(delta, 0.0)))))


def best_isotropic_step(covariance: np.ndarray) -> float:
    """Best single step size ``s`` for ``N(0, s^2 I)``: ``scale(d) * sqrt(d / trace(S^{-1}))``."""
    covariance = np.atleast_2d(covariance)
    dim = covariance.shape[0]
    return float(optimal_scale(dim) * np.sqrt(dim / np.trace(np.linalg.inv(covariance))))


def best_step_sizes(covariance: np.ndarray) -> np.ndarray:
    """Per-parameter step sizes for a diagonal proposal, tuned for acceptance.

    In the diffusion limit the acceptance depends on ``sum_i 1/mu_i``, which
    for ``N(0, diag(step^2))`` with ``step_i = sigma sd_i`` is
    ``sigma^2 trace(R^{-1})`` (``R`` the correlation matrix; ``trace(R^{-1})``
    is the sum of variance inflation factors). Matching the optimum of the
    matched proposal gives ``step_i = scale(d) sd_i sqrt(d / trace(R^{-1}))``.
    """
    covariance = np.atleast_2d(covariance)
    dim = covariance.shape[0]
    sd = np.sqrt(np.diag(covariance))
    corr = covariance / np.outer(sd, sd)
    return optimal_scale(dim) * sd * np.sqrt(dim / np.trace(np.linalg.inv(corr)))
