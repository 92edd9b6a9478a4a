"""The pilot survives a poor Laplace start: mass or a mode at a bound, an unbounded density at a bound,
a Laplace covariance wrong by 100x in one direction.

Each target is an invented density with exact answers, beside three correlated
Gaussian parameters (mean and covariance below, exact):

(a) a positive parameter with a half-normal prior (sd 0.1) and a Gaussian
    likelihood centred below zero (mean -0.03, sd 0.04): the posterior is a
    normal truncated at 0 (conjugate normal-normal update, then truncation),
    with its mode on the bound; moments from scipy.stats.truncnorm;
(b) a Gamma(shape 0.6, scale 2) parameter, whose density is unbounded at 0;
    moments from scipy.stats.gamma;
(c) a "smoothed Laplace" parameter, log p(y) = -sqrt(eps^2 + y^2) with
    eps = 1e-4: the curvature at the mode is 1/eps, so the Laplace sd is 0.01,
    141 times narrower than the exact sd (1.414, by quadrature with
    scipy.integrate.quad);
(d) a quartic parameter, log p(y) = -(y / 3)^4 / 4: the curvature at the mode
    is 0 (a singular Hessian), so the finite-difference Laplace sd is hundreds
    of times the exact one (by quadrature).

Checks, as the issue asks: the tuned run's means within 4 of its reported MCSE
of the exact ones and its sds within 30%; the recommended proposal covariance,
run by a plain random-walk Metropolis sampler written here (not walktune's
engine), reaches at least 0.8x the efficiency (min ESS per evaluation) of
per-parameter steps set from the exact marginal sds x 2.38 / sqrt(d) (Roberts,
Gelman and Gilks 1997, Annals of Applied Probability 7(1)). The ESS here is
Geyer's (1992, Statistical Science 7(4)) initial positive sequence estimator,
written here with numpy.fft. Tolerance of the efficiency ratio: with 32 chains
x 20,000 steps and IACTs below 30, Sokal's variance formula (2(2M+1)/N tau^2,
M about 5 tau) gives each ESS a relative error under 3%, so 0.8 is far below
noise either way.
"""

import numpy as np
import pytest
from scipy import integrate, stats

import walktune
from walktune.pilot import RIGHT_SCALE_ACCEPTANCE, scale_ratio
from walktune.unconstrained import near_bound

MEAN3 = np.array([1.0, -2.0, 0.5])
SD3 = np.array([1.0, 5.0, 0.2])
CORR3 = np.array([[1.0, 0.8, -0.5], [0.8, 1.0, -0.3], [-0.5, -0.3, 1.0]])
PREC3 = np.linalg.inv(CORR3 * np.outer(SD3, SD3))


def _gauss3(x):
    z = x - MEAN3
    return -0.5 * np.einsum("ij,jk,ik->i", z, PREC3, z)


def _truncated(theta):
    theta = np.atleast_2d(theta)
    b = theta[:, 0]
    return -0.5 * (b / 0.1) ** 2 - 0.5 * ((b + 0.03) / 0.04) ** 2 + _gauss3(theta[:, 1:])


def _truncated_exact():
    # Normal prior x normal likelihood: precision adds, mean is precision-weighted; then truncation at 0.
    precision = 1 / 0.1**2 + 1 / 0.04**2
    s = precision**-0.5
    m = s**2 * (-0.03 / 0.04**2)
    marginal = stats.truncnorm(-m / s, np.inf, loc=m, scale=s)
    return marginal.mean(), marginal.std()


def _gamma(theta):
    theta = np.atleast_2d(theta)
    g = theta[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.where(g > 0, (0.6 - 1) * np.log(g) - g / 2.0, -np.inf)
    return value + _gauss3(theta[:, 1:])


def _gamma_exact():
    marginal = stats.gamma(0.6, scale=2.0)
    return marginal.mean(), marginal.std()


EPS = 1e-4


def _smoothed_laplace(theta):
    theta = np.atleast_2d(theta)
    return -np.sqrt(EPS**2 + theta[:, 0] ** 2) + _gauss3(theta[:, 1:])


def _smoothed_laplace_exact():
    density = lambda y: np.exp(-np.sqrt(EPS**2 + y * y))  # noqa: E731
    pieces = [(0, 10 * EPS), (10 * EPS, 1), (1, np.inf)]
    mass = sum(integrate.quad(density, lo, hi)[0] for lo, hi in pieces)
    second = sum(integrate.quad(lambda y: y * y * density(y), lo, hi)[0] for lo, hi in pieces)
    return 0.0, np.sqrt(second / mass)  # symmetric: mean 0


def _quartic(theta):
    theta = np.atleast_2d(theta)
    return -0.25 * (theta[:, 0] / 3.0) ** 4 + _gauss3(theta[:, 1:])


def _quartic_exact():
    density = lambda y: np.exp(-0.25 * (y / 3.0) ** 4)  # noqa: E731
    mass = integrate.quad(density, -np.inf, np.inf)[0]
    return 0.0, np.sqrt(integrate.quad(lambda y: y * y * density(y), -np.inf, np.inf)[0] / mass)


TARGETS = {
    "mode on the bound": (_truncated, [0.05, 0, 0, 0], {0: (0, None)}, _truncated_exact),
    "unbounded at the bound": (_gamma, [1.0, 0, 0, 0], {0: (0, None)}, _gamma_exact),
    "Laplace 141x too narrow": (_smoothed_laplace, [0.5, 0, 0, 0], None, _smoothed_laplace_exact),
    "singular Hessian": (_quartic, [0.5, 0, 0, 0], None, _quartic_exact),
}


def _exact(name):
    mean0, sd0 = TARGETS[name][3]()
    return np.r_[mean0, MEAN3], np.r_[sd0, SD3]


def _geyer_ess(chains):
    """ESS of each parameter, summed over chains: n / IACT with Geyer's initial positive sequence."""
    m, n, d = chains.shape
    x = chains - chains.mean(axis=1, keepdims=True)
    spectrum = np.fft.rfft(x, n=2 * n, axis=1)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), axis=1)[:, :n] / n
    rho = acov / acov[:, :1]
    ess = np.zeros(d)
    for c in range(m):
        for j in range(d):
            pairs = rho[c, : n - n % 2, j].reshape(-1, 2).sum(axis=1)
            stop = np.argmax(pairs <= 0) if np.any(pairs <= 0) else pairs.size
            tau = -1.0 + 2.0 * pairs[:stop].sum()
            ess[j] += n / max(tau, 1.0)
    return ess


def _plain_random_walk(log_density, start, proposal_cov, steps, seed):
    """Random-walk Metropolis with a fixed Gaussian proposal, all chains in one vectorized call per step."""
    rng = np.random.default_rng(seed)
    chol = np.linalg.cholesky(proposal_cov)
    current = np.array(start, dtype=float)
    current_lp = log_density(current)
    draws = np.empty((current.shape[0], steps, current.shape[1]))
    for t in range(steps):
        proposal = current + rng.standard_normal(current.shape) @ chol.T
        lp = log_density(proposal)
        accept = np.log(rng.random(current.shape[0])) < lp - current_lp
        current[accept], current_lp[accept] = proposal[accept], lp[accept]
        draws[:, t] = current
    return draws


def _min_ess_per_evaluation(log_density, start, proposal_cov, seed, steps=20_000, warmup=2_000):
    draws = _plain_random_walk(log_density, start, proposal_cov, steps + warmup, seed)[:, warmup:]
    return _geyer_ess(draws).min() / (draws.shape[0] * draws.shape[1])


def test_one_parameter_acceptance_formula_by_simulation():
    # a(sigma) = (2 / pi) arctan(2 / sigma) for a 1-d Gaussian target of sd 1 at stationarity
    # (derived in walktune.pilot); simulated with 400,000 stationary pairs, 4 binomial sds.
    rng = np.random.default_rng(0)
    for sigma in (0.3, 2.4, 10.0):
        x = rng.standard_normal(400_000)
        y = x + sigma * rng.standard_normal(x.size)
        simulated = np.mean(np.minimum(1.0, np.exp(-0.5 * (y**2 - x**2))))
        formula = 2 / np.pi * np.arctan(2 / sigma)
        assert abs(simulated - formula) < 4 * np.sqrt(formula * (1 - formula) / x.size)
    assert abs(RIGHT_SCALE_ACCEPTANCE - 2 / np.pi * np.arctan(2 / 2.4)) < 1e-15
    # The inverse: a step 2.4 / k of the true sd has the acceptance that scale_ratio maps back to k.
    for k in (0.2, 1.0, 5.0):
        assert scale_ratio(2 / np.pi * np.arctan(2 / (2.4 / k))) == pytest.approx(k, rel=1e-9)


def test_near_bound_finds_mass_at_the_bound_and_only_there():
    bounds = np.array([[0.0, np.inf], [-np.inf, np.inf]])
    # Mass at 0 (truncated normal above): near, whatever the sd says.
    piled = lambda t: -0.5 * ((t[0] + 0.03) / 0.04) ** 2 - 0.5 * t[1] ** 2  # noqa: E731
    assert near_bound(piled, np.array([1e-9, 0.0]), piled(np.array([1e-9, 0.0])), np.array([1e-6, 1.0]), bounds).tolist() == [True, False]
    # A Gamma(50, 1) mode (49) with sd 7 is 7 sds from 0 and its density drops by far more than 3 halfway: not near.
    far = lambda t: 49 * np.log(t[0]) - t[0] - 0.5 * t[1] ** 2 if t[0] > 0 else -np.inf  # noqa: E731
    mode = np.array([49.0, 0.0])
    assert not near_bound(far, mode, far(mode), np.array([7.0, 1.0]), bounds).any()


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(TARGETS))
def test_poor_start_still_finds_every_scale(name):
    log_density, start, bounds, _ = TARGETS[name]
    mean, sd = _exact(name)
    result = walktune.tune(log_density, np.array(start, dtype=float), bounds=bounds, vectorized=True, seed=1)
    # Means of the tuned run within 4 of its reported MCSE.
    assert np.all(np.abs(result.posterior_mean - mean) <= 4 * result.posterior_mean_mcse), name
    # Sds of the tuned run within 30%.
    tuned = result.runs["tuned-covariance"].draws.reshape(-1, 4)
    assert np.all(np.abs(tuned.std(axis=0) / sd - 1) <= 0.3), name
    # The pilot's own scale in every direction (the failure was a factor 60): within 30% too.
    pilot_sd = np.sqrt(np.diag(result.posterior_covariance))
    assert np.all(np.abs(pilot_sd / sd - 1) <= 0.3), (name, pilot_sd / sd)
    # The recommended covariance against oracle per-parameter steps, both run by the plain sampler here.
    states = result.runs["tuned-covariance"].last
    starts = states[np.arange(32) % states.shape[0]]
    recommended = _min_ess_per_evaluation(log_density, starts, result.proposal_covariance, seed=7)
    oracle = _min_ess_per_evaluation(log_density, starts, np.diag((sd * 2.38 / np.sqrt(4)) ** 2), seed=8)
    assert recommended >= 0.8 * oracle, (name, recommended, oracle)
