"""Predicted slow-downs (walktune.theory.slowdown) against simulation with known truth.

The sampler and the IACT estimator are written here, independent of walktune's
engine and diagnostics: a plain random-walk Metropolis on ``N(0, S)``, started
from exact draws of the target (no warm-up needed), and Geyer's (1992) initial
monotone sequence estimator with the true mean and variance.

Sources:
- Roberts, Gelman and Gilks (1997), Annals of Applied Probability 7(1), and
  Roberts and Rosenthal (2001), Statistical Science 16(4): the diffusion limit
  behind the predictions (acceptance ``2 Phi(-sqrt(sum 1/mu)/2)``, direction
  IACT ``4 mu_k / a``). The per-parameter IACT is derived from it in walktune.theory.
- Geyer (1992), Statistical Science 7(4): the initial monotone sequence
  estimator of the IACT. Its Monte Carlo error is measured here from the
  spread over 10 groups of 10 chains.

The predictions are asymptotic in d. What was measured here (100 chains x
20,000 steps each) is recorded in docs/method.md; the allowance for the
finite-d error of the limit is stated beside each check, and the Monte Carlo
error is added to it.
"""

import numpy as np
import pytest
from scipy import fft, linalg
from threadpoolctl import threadpool_limits

from walktune import theory as T

CHAINS, STEPS = 100, 20_000


@pytest.fixture(autouse=True)
def one_blas_thread():
    # Matrices of (100, d) x (d, d): threads only add contention on a shared machine.
    with threadpool_limits(limits=1):
        yield


def random_walk(covariance, proposal, seed, chains=CHAINS, steps=STEPS):
    """Plain random-walk Metropolis on N(0, covariance); draws (steps, chains, d) as float32."""
    rng = np.random.default_rng(seed)
    d = covariance.shape[0]
    chol = np.linalg.cholesky(covariance)
    whiten = linalg.solve_triangular(chol, np.eye(d), lower=True).T  # x @ whiten = L^-1 x
    step = np.linalg.cholesky(proposal).T
    x = rng.standard_normal((chains, d)) @ chol.T  # exact draws: the chains start stationary
    log_p = -0.5 * np.sum((x @ whiten) ** 2, axis=1)
    draws = np.empty((steps, chains, d), dtype=np.float32)
    block = 1000
    for start in range(0, steps, block):
        increments = rng.standard_normal((block, chains, d)) @ step
        log_u = np.log(rng.random((block, chains)))
        for t in range(block):
            y = x + increments[t]
            log_y = -0.5 * np.sum((y @ whiten) ** 2, axis=1)
            accept = log_u[t] < log_y - log_p
            x[accept] = y[accept]
            log_p[accept] = log_y[accept]
            draws[start + t] = x
    return draws


def _geyer(rho):
    """Initial monotone sequence estimate (Geyer 1992) from autocorrelations ``rho`` (lag 0 first)."""
    pairs = rho[: 2 * (rho.size // 2)].reshape(-1, 2).sum(axis=1)
    negative = np.flatnonzero(pairs <= 0)
    pairs = np.minimum.accumulate(pairs[: negative[0] if negative.size else pairs.size])
    return -1.0 + 2.0 * pairs.sum()


def iact(series, variance, groups=10):
    """IACT from (steps, chains) draws of known mean 0 and variance, and its relative standard error.

    The autocovariance is pooled over all chains; the standard error is the
    spread of the same estimate over ``groups`` disjoint groups of chains,
    divided by ``sqrt(groups)``.
    """
    n, m = series.shape
    size = fft.next_fast_len(2 * n)
    spectrum = fft.rfft(series.T, size, axis=1)  # float32 in, complex64: ample for an autocorrelation
    autocov = fft.irfft(spectrum * np.conj(spectrum), size, axis=1)[:, :n].astype(float) / n
    tau = _geyer(autocov.mean(axis=0) / variance)
    by_group = [_geyer(part.mean(axis=0) / variance) for part in np.array_split(autocov, groups)]
    return tau, np.std(by_group, ddof=1) / np.sqrt(groups) / tau


def matched_iact(dim, seed):
    """IACT of the optimally scaled matched proposal, and its relative error.

    An affine map takes ``N(0, S)`` with proposal ``ell^2 S`` to ``N(0, I)`` with
    ``ell^2 I``, which is symmetric under rotations: every linear combination
    of the parameters has the same IACT, so the mean over coordinates is used.
    """
    draws = random_walk(np.eye(dim), T.optimal_proposal(np.eye(dim)), seed)
    estimates = [iact(draws[:, :, j], 1.0) for j in range(dim)]
    return np.mean([e[0] for e in estimates]), max(e[1] for e in estimates)


def measured_slowdowns(covariance, proposal_shape, groups, seed):
    """Simulated slow-downs of ``proposal_shape`` scaled as walktune's advice scales it.

    The scale puts the diffusion-limit acceptance at 0.234, as ``best_step_sizes``
    and ``best_isotropic_step`` do. ``groups`` lists parameters exchangeable
    under a symmetry of target and proposal; their IACTs are averaged. Returns
    the parameter ratio and the direction ratio, each with its relative
    standard error.
    """
    dim = covariance.shape[0]
    mu, vectors = linalg.eigh(covariance, proposal_shape)
    scale2 = T.ASYMPTOTIC_SCALE**2 / np.sum(1.0 / mu)
    draws = random_walk(covariance, scale2 * proposal_shape, seed)
    reference, reference_error = matched_iact(dim, seed + 1)
    per_parameter = [iact(draws[:, :, j], covariance[j, j]) for j in range(dim)]
    tau = np.array([p[0] for p in per_parameter])
    worst = max(groups, key=lambda g: tau[g].mean())
    # Members of a group are correlated: the error of their mean is taken as one member's.
    parameter_error = np.hypot(max(per_parameter[j][1] for j in worst), reference_error)
    # The slowest direction: v_k^T theta has variance mu_k (V^T S V = diag(mu)).
    direction, direction_error = iact(draws @ vectors[:, -1].astype(np.float32), mu[-1])
    return ((tau[worst].mean() / reference, parameter_error),
            (direction / reference, np.hypot(direction_error, reference_error)))


def equicorrelated(dim, rho):
    return (1 - rho) * np.eye(dim) + rho * np.ones((dim, dim))


def rotated_spread(dim, decades, seed):
    rng = np.random.default_rng(seed)
    rotation, _ = np.linalg.qr(rng.standard_normal((dim, dim)))
    return rotation @ np.diag(np.logspace(0, decades, dim)) @ rotation.T


def blocks():
    # Three blocks of 6: correlations 0.9, 0.5 and 0, with sds 1, 3 and 0.5.
    parts = [equicorrelated(6, 0.9), 9 * equicorrelated(6, 0.5), 0.25 * np.eye(6)]
    return linalg.block_diag(*parts)


CASES = {
    # name: (covariance, groups of exchangeable parameters, seed)
    "equicorrelated-0.5-d10": (equicorrelated(10, 0.5), [list(range(10))], 11),
    "equicorrelated-0.1-d40": (equicorrelated(40, 0.1), [list(range(40))], 12),
    "rotation-1-decade-d20": (rotated_spread(20, 1.0, 5), [[j] for j in range(20)], 13),
    "blocks-d18": (blocks(), [list(range(0, 6)), list(range(6, 12)), list(range(12, 18))], 14),
}

#: The diffusion limit overstates slow-downs at finite d. Measured here with the
#: seeds above, the measured/predicted ratio fell short of 1 by 3% to 16%
#: (docs/method.md has each case); ALLOWANCE rounds the largest up. The checks
#: allow that shortfall below the prediction, and Monte Carlo error (3 standard
#: errors) either side.
ALLOWANCE = 0.20


@pytest.mark.slow
@pytest.mark.parametrize("name", list(CASES))
def test_step_size_slowdown_matches_simulation(name):
    # The advice's per-parameter step sizes against its tuned covariance, as the proof runs compare them.
    covariance, groups, seed = CASES[name]
    steps = T.best_step_sizes(covariance)
    predicted = T.slowdown(np.diag(steps**2), covariance)
    (parameter, parameter_error), (direction, direction_error) = measured_slowdowns(
        covariance, np.diag(steps**2), groups, seed)
    for measured, error, expected in [(parameter, parameter_error, predicted.slowest_parameter),
                                      (direction, direction_error, predicted.slowest_direction)]:
        # The simulation must be precise enough for the check to mean something: 3 standard
        # errors below 45%, against a gap of 1.7x (d = 10) and 3.5x (d = 40) between the two
        # predictions in the equicorrelated cases.
        assert error < 0.15
        assert 1 - ALLOWANCE - 3 * error <= measured / expected <= 1 + 3 * error
    if predicted.slowest_direction > 1.5 * predicted.slowest_parameter:
        # The slowest-direction figure does not predict the smallest ESS over parameters.
        assert parameter < (1 - ALLOWANCE - 3 * parameter_error) * predicted.slowest_direction


@pytest.mark.slow
def test_single_step_slowdown_matches_simulation():
    # The default baseline of the proof runs: one step size for all parameters, on the rotated target.
    covariance, groups, seed = CASES["rotation-1-decade-d20"]
    dim = covariance.shape[0]
    predicted = T.slowdown(T.best_isotropic_step(covariance) ** 2 * np.eye(dim), covariance)
    (parameter, parameter_error), (direction, direction_error) = measured_slowdowns(
        covariance, np.eye(dim), groups, seed + 100)
    for measured, error, expected in [(parameter, parameter_error, predicted.slowest_parameter),
                                      (direction, direction_error, predicted.slowest_direction)]:
        assert error < 0.15
        assert 1 - ALLOWANCE - 3 * error <= measured / expected <= 1 + 3 * error
