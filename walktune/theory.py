"""Optimal-scaling theory of random-walk Metropolis, used to predict before running.

For a Gaussian target with covariance ``S`` and a Gaussian proposal with
covariance ``P``, write ``mu_k`` for the eigenvalues of ``P^{-1} S`` (the target's
variances along the proposal's whitened principal directions). In the
diffusion limit (Roberts, Gelman and Gilks 1997; Roberts and Rosenthal 2001)
the acceptance rate is ``a = 2 Phi(-sqrt(sum_k 1/mu_k) / 2)`` and the chain
along direction ``k`` is an Ornstein-Uhlenbeck process whose integrated
autocorrelation time is ``tau_k = 4 mu_k / a``. With ``P = (2.38^2 / d) S`` this
gives ``a = 0.234`` and ``tau = 3.0 d`` (efficiency ``0.33 / d``).

A parameter is a sum of independent direction processes, ``theta_j = sum_k
c_jk z_k`` with ``sum_k c_jk^2 = S_jj``, so its autocovariance is the
variance-weighted sum of theirs and its IACT is (derived here from the same
limit) ``tau_j = sum_k c_jk^2 tau_k / S_jj``.

A proposal of the wrong shape, rescaled to its best acceptance, is slower than
the matched one

- in the parameter it mixes worst by ``max_j sum_k c_jk^2 mu_k / S_jj * mean(1/mu)``
  (what the smallest ESS over parameters measures),
- in its slowest principal direction by ``mu_max * mean(1 / mu)``,
- on average over directions by ``mean(mu) * mean(1 / mu)``;

:func:`slowdown` returns all three. The predictions are asymptotic in ``d``:
simulation in tests/test_predictions.py (d = 10 to 40) finds them 3% to 16%
above the measured slow-downs (docs/method.md).

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

#: Optimal proposal scale (times the target sd), acceptance and efficiency
#: (``1 / IACT`` of one coordinate) for a standard normal target in d = 1..4
#: dimensions, as simulated for walktune (200 chains x 20,000 steps, Geyer IACT of
#: the first coordinate; shared REFERENCES). Only d = 1 (scale 2.4, acceptance
#: 0.44) is as published by Gelman, Roberts and Gilks (1996); their table's
#: other small-d values differ a little (recalled: efficiency 0.12 at d = 2 and
#: 0.08 at d = 3; scale 1.2, acceptance 0.25, efficiency 0.07 at d = 4).
SMALL_D_OPTIMA = {
    1: (2.4, 0.44, 0.23),
    2: (1.7, 0.35, 0.13),
    3: (1.4, 0.32, 0.10),
    4: (1.15, 0.30, 0.075),
}

#: ``d * efficiency`` at the optimal scale from the same simulation, at d = 1, 2, 3,
#: 4, 6, 10, 20, and its limit 0.33 as d grows (Roberts, Gelman and Gilks 1997).
_SIMULATED_DIMS = np.array([1, 2, 3, 4, 6, 10, 20])
_SIMULATED_EFFICIENCY = np.array([0.23, 0.13, 0.10, 0.075, 0.051, 0.032, 0.017])
ASYMPTOTIC_EFFICIENCY_TIMES_D = 0.33

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
    """Efficiency ``1 / IACT`` of the optimally scaled matched proposal (per coordinate).

    ``d * efficiency`` interpolated linearly in ``1 / d`` between the simulated
    values (d = 1..20, see ``_SIMULATED_EFFICIENCY``) and the limit 0.33 at
    ``1 / d = 0`` (Roberts, Gelman and Gilks 1997): 0.061 at d = 5, where
    simulation gives 0.060.
    """
    inverse = 1.0 / np.append(_SIMULATED_DIMS, np.inf)
    times_d = np.append(_SIMULATED_DIMS * _SIMULATED_EFFICIENCY, ASYMPTOTIC_EFFICIENCY_TIMES_D)
    return float(np.interp(1.0 / dim, inverse[::-1], times_d[::-1]) / dim)


def optimal_proposal(covariance: np.ndarray) -> np.ndarray:
    """The recommended proposal covariance ``scale(d)^2 * covariance``."""
    covariance = np.atleast_2d(covariance)
    return optimal_scale(covariance.shape[0]) ** 2 * covariance


def relative_variances(proposal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Eigenvalues ``mu`` of ``P^{-1} S``: target variances in proposal-whitened directions."""
    return linalg.eigh(np.atleast_2d(covariance), np.atleast_2d(proposal), eigvals_only=True)


def direction_slowdown(proposal: np.ndarray, covariance: np.ndarray) -> float:
    """Slowest-direction slow-down of a proposal shape, rescaled: ``mu_max * mean(1/mu)``.

    The same as ``slowdown(proposal, covariance).slowest_direction``, from the
    eigenvalues alone (cheap enough to repeat many times).
    """
    mu = relative_variances(proposal, covariance)
    return float(mu.max() * np.mean(1.0 / mu))


def diffusion_acceptance(mu: np.ndarray) -> float:
    """Asymptotic acceptance ``2 Phi(-sqrt(sum 1/mu) / 2)``."""
    return float(2 * stats.norm.cdf(-0.5 * np.sqrt(np.sum(1.0 / mu))))


def principal_loadings(proposal: np.ndarray, covariance: np.ndarray) -> tuple:
    """Directions of ``S`` in the proposal's whitened frame and each parameter's loadings on them.

    Parameters
    ----------
    proposal, covariance : ndarray of shape (d, d)
        ``P`` and ``S``.

    Returns
    -------
    mu : ndarray of shape (d,)
        Eigenvalues of ``P^{-1} S``, ascending.
    loadings : ndarray of shape (d, d)
        ``c[j, k]``: parameter ``j`` is ``sum_k c[j, k] z_k`` with ``z_k``
        independent of unit variance along direction ``k``; ``sum_k c[j, k]^2 = S_jj``.
    """
    proposal, covariance = np.atleast_2d(proposal), np.atleast_2d(covariance)
    # eigh(S, P): V^T P V = I and V^T S V = diag(mu), so theta = P V (V^T theta)
    # with V^T theta of covariance diag(mu), and S = (P V) diag(mu) (P V)^T.
    mu, vectors = linalg.eigh(covariance, proposal)
    return mu, (proposal @ vectors) * np.sqrt(np.maximum(mu, 0.0))


def parameter_iact(loadings: np.ndarray, direction_iact: np.ndarray) -> np.ndarray:
    """Per-parameter IACT ``tau_j = sum_k c_jk^2 tau_k / S_jj``, shape (d,).

    The autocovariance of ``theta_j = sum_k c_jk z_k`` at any lag is
    ``sum_k c_jk^2 rho_k(t)`` for independent direction processes, so its
    IACT is their variance-weighted mean (derived here from the diffusion limit).
    """
    weights = loadings**2
    return weights @ direction_iact / weights.sum(axis=1)


def predicted_iact(proposal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Predicted IACT along each principal direction, for the proposal as given.

    ``tau_k = max(1, 4 mu_k / a)`` with ``a`` the diffusion-limit acceptance; shape (d,).
    """
    mu = relative_variances(proposal, covariance)
    return np.maximum(1.0, 4.0 * mu / diffusion_acceptance(mu))


def predicted_parameter_iact(proposal: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Predicted IACT of each parameter, for the proposal as given; shape (d,)."""
    mu, loadings = principal_loadings(proposal, covariance)
    return parameter_iact(loadings, np.maximum(1.0, 4.0 * mu / diffusion_acceptance(mu)))


@dataclass(frozen=True)
class Slowdown:
    """How much slower a proposal is than the matched, optimally scaled one.

    Attributes
    ----------
    slowest_parameter : float
        Ratio of the largest per-parameter IACTs: the predicted drop of the
        smallest ESS over parameters, which the proof runs measure.
    slowest_direction : float
        Ratio of IACTs in the slowest principal direction (``mu_max * mean(1/mu)``
        when rescaled); at least ``slowest_parameter``.
    mean_direction : float
        Ratio of IACTs averaged over principal directions.
    """

    slowest_parameter: float
    slowest_direction: float
    mean_direction: float


def slowdown(proposal: np.ndarray, covariance: np.ndarray, *, rescaled: bool = True) -> Slowdown:
    """Predicted slow-down of ``proposal`` against ``optimal_proposal(covariance)``.

    Parameters
    ----------
    proposal, covariance : ndarray of shape (d, d)
    rescaled : bool, default=True
        If true, the proposal's overall scale is assumed tuned for acceptance
        (only its shape counts): direction ``k`` is slower by ``mu_k * mean(1/mu)``.
        If false, the proposal is used as given and its scale counts too.
    """
    mu, loadings = principal_loadings(proposal, covariance)
    if rescaled:
        # At acceptance 0.234 both proposals have tau_k = 4 mu_k' / 0.234 with mu'
        # scaled so that sum 1/mu' = 2.38^2; the ratio to the matched d / 2.38^2 is:
        ratio = mu * np.mean(1.0 / mu)
        per_parameter = parameter_iact(loadings, ratio)
        return Slowdown(float(per_parameter.max()), float(ratio.max()), float(ratio.mean()))
    given = np.maximum(1.0, 4.0 * mu / diffusion_acceptance(mu))
    best_proposal = optimal_proposal(covariance)
    best = predicted_iact(best_proposal, covariance)
    best_parameter = predicted_parameter_iact(best_proposal, covariance)
    return Slowdown(float(parameter_iact(loadings, given).max() / best_parameter.max()),
                    float(given.max() / best.max()), float(given.mean() / best.mean()))


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
