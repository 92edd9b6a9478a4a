"""The engine samples the right distribution, reproducibly, and handles bad values.

Sources:
- Correlated Gaussian targets: moments and marginals against scipy.stats
  (multivariate_normal, norm, kstest).
- Optimal scaling: Gelman, Roberts and Gilks (1996), Bayesian Statistics 5, and
  Roberts, Gelman and Gilks (1997), Annals of Applied Probability 7(1). The
  numbers below are recalled from those papers (and the simulation table in
  shared REFERENCES), not re-derived here.
"""

import numpy as np
import pytest
from scipy import stats

import walktune
from walktune import diagnostics as D
from walktune.errors import SamplingError, TargetError, WalktuneError


def gaussian_target(cov):
    precision = np.linalg.inv(cov)

    def log_density(x):
        x = np.atleast_2d(x)
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    return log_density


def std_normal(x):
    x = np.asarray(x)
    return -0.5 * np.sum(x * x, axis=-1)


@pytest.mark.slow
def test_correlated_gaussian_moments_and_marginals():
    # Source: scipy.stats.multivariate_normal gives the target; means and
    # covariances must agree within Monte Carlo error, marginals pass KS tests.
    rng = np.random.default_rng(0)
    a = rng.standard_normal((3, 3))
    cov = a @ a.T + 0.5 * np.eye(3)
    target = stats.multivariate_normal(mean=np.zeros(3), cov=cov)
    chains = walktune.sample(
        lambda x: target.logpdf(x), np.zeros(3), cov * 2.38**2 / 3, 20_000,
        chains=8, seed=42, vectorized=True,
    )
    x = chains.draws[:, 1000:]
    ess = D.ess(x)
    flat = x.reshape(-1, 3)
    sd = np.sqrt(np.diag(cov))
    # Mean: 4 Monte Carlo standard errors.
    assert np.all(np.abs(flat.mean(axis=0)) < 4 * sd / np.sqrt(ess))
    # Covariance entries: Var(x_i x_j) = S_ii S_jj + S_ij^2 for a Gaussian, /ESS.
    se_cov = np.sqrt((np.outer(sd**2, sd**2) + cov**2) / ess.min())
    assert np.all(np.abs(np.cov(flat.T) - cov) < 4 * se_cov)
    # Marginals: thin to about independent draws and run KS tests.
    step = int(np.ceil(2 * D.iact(x).max()))
    thinned = x[:, ::step].reshape(-1, 3)
    for i in range(3):
        p = stats.kstest(thinned[:, i], stats.norm(scale=sd[i]).cdf).pvalue
        assert p > 0.001, (i, p)


def test_scalar_target_d1():
    chains = walktune.sample(lambda x: -0.5 * x[0] ** 2, 0.0, 1.0, 100, chains=2, seed=1)
    assert chains.draws.shape == (2, 100, 1)
    assert chains.evaluations == 2 + 200


@pytest.mark.slow
def test_optimal_scaling_one_dimension():
    # Source (recalled): Gelman, Roberts and Gilks (1996): for N(0, 1) the best
    # proposal sd is about 2.4, with acceptance about 0.44 and efficiency
    # 1/IACT about 0.23.
    chains = walktune.sample(std_normal, np.zeros((64, 1)), 2.4**2, 20_000, seed=7, vectorized=True)
    assert chains.acceptance_rate == pytest.approx(0.44, abs=0.01)
    efficiency = 1 / D.iact(chains.draws)[0]
    # IACT over 1.28e6 draws has relative error well under 3%; 0.23 is recalled to two digits.
    assert efficiency == pytest.approx(0.23, abs=0.015)


@pytest.mark.slow
def test_optimal_scaling_ten_dimensions():
    # Source (recalled): Roberts, Gelman and Gilks (1997): scale 2.38 / sqrt(d)
    # gives acceptance near 0.23 and efficiency near 0.3 / d for large d; the
    # simulation table for d = 10 gives about 0.032 (shared REFERENCES).
    d = 10
    chains = walktune.sample(std_normal, np.zeros((64, d)), 2.38**2 / d, 20_000, seed=8, vectorized=True)
    assert chains.acceptance_rate == pytest.approx(0.25, abs=0.03)
    efficiency = 1 / D.iact(chains.draws)
    assert np.mean(efficiency) == pytest.approx(0.032, rel=0.12)


def test_same_seed_same_result_and_prefix_property():
    first = walktune.sample(std_normal, np.zeros(2), 1.0, 600, chains=3, seed=5)
    again = walktune.sample(std_normal, np.zeros(2), 1.0, 600, chains=3, seed=first.seed)
    assert np.array_equal(first.draws, again.draws)
    shorter = walktune.sample(std_normal, np.zeros(2), 1.0, 300, chains=3, seed=5)
    assert np.array_equal(first.draws[:, :300], shorter.draws)


def test_vectorized_and_pointwise_give_identical_chains():
    # Random numbers are drawn on the driver only: how evaluations are batched cannot change the result.
    a = walktune.sample(std_normal, np.zeros(3), 0.5, 500, chains=4, seed=3, vectorized=True)
    b = walktune.sample(std_normal, np.zeros(3), 0.5, 500, chains=4, seed=3, vectorized=False)
    assert np.array_equal(a.draws, b.draws)
    assert a.evaluations == b.evaluations == 4 + 2000


def test_per_chain_start_points():
    start = np.arange(6.0).reshape(3, 2)
    chains = walktune.sample(std_normal, start, 0.1, 10, seed=1)
    assert chains.n_chains == 3
    np.testing.assert_array_equal(chains.start, start)


def test_minus_inf_is_rejected_and_support_respected():
    # A half-normal: -inf outside x > 0; no draw may leave the support.
    def half(x):
        return -0.5 * x[0] ** 2 if x[0] > 0 else -np.inf

    chains = walktune.sample(half, [1.0], 1.0, 2000, chains=2, seed=2)
    assert np.all(chains.draws > 0)
    assert chains.nan_count == 0 and chains.error_count == 0


def test_nan_and_exceptions_are_counted_rejected_and_kept():
    def flaky(x):
        if x[0] > 2:
            raise RuntimeError("solver diverged")
        if x[0] < -2:
            return float("nan")
        return -0.5 * x[0] ** 2

    chains = walktune.sample(flaky, [0.0], 1.0, 3000, chains=2, seed=4)
    assert chains.error_count > 0 and chains.nan_count > 0
    assert "solver diverged" in chains.first_error
    assert np.all(np.abs(chains.draws) <= 2)


def test_too_many_failures_stop_with_clear_error():
    def broken(x):
        if x[0] != 0.0:
            raise ValueError("bad model")
        return 0.0

    with pytest.raises(SamplingError, match=r"failed.*bad model") as info:
        walktune.sample(broken, [0.0], 1.0, 500, chains=2, seed=1)
    assert "Traceback" in info.value.first_failure


def test_plus_inf_is_an_error():
    with pytest.raises(SamplingError, match=r"\+inf"):
        walktune.sample(lambda x: np.inf if x[0] > 1 else 0.0, [0.0], 4.0, 100, seed=1)


def test_start_outside_support_is_an_error():
    with pytest.raises(TargetError, match="start"):
        walktune.sample(lambda x: -np.inf, [0.0], 1.0, 10)


@pytest.mark.parametrize(
    "cov, message",
    [
        (np.array([[1.0, 2.0], [2.0, 1.0]]), "positive definite"),
        (np.array([[1.0, 0.5], [0.0, 1.0]]), "symmetric"),
        (np.eye(3), r"\(2, 2\)"),
        ("wide", "numbers"),
        (np.array([1.0, 2.0, 3.0]), "length 2"),
    ],
)
def test_bad_proposal_covariance(cov, message):
    with pytest.raises(WalktuneError, match=message):
        walktune.sample(std_normal, np.zeros(2), cov, 10)


def test_bad_start_and_steps():
    with pytest.raises(WalktuneError, match="start"):
        walktune.sample(std_normal, np.zeros((2, 2, 2)), 1.0, 10)
    with pytest.raises(WalktuneError, match="steps"):
        walktune.sample(std_normal, np.zeros(2), 1.0, -1)
    with pytest.raises(WalktuneError, match="chains"):
        walktune.sample(std_normal, np.zeros((3, 2)), 1.0, 10, chains=2)
