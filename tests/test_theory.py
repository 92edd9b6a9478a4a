"""Optimal-scaling predictions against simulation and published values.

Sources:
- Roberts, Gelman and Gilks (1997), Annals of Applied Probability 7(1): the
  diffusion limit, acceptance 0.234 at scale 2.38/sqrt(d).
- Roberts and Rosenthal (2001), Statistical Science 16(4): proposals of the
  wrong shape are slower; the per-parameter and slowest-direction factors are
  derived in walktune.theory, checked here in closed form and against
  simulation in tests/test_predictions.py.
- Gelman, Roberts and Gilks (1996), Bayesian Statistics 5: acceptance 0.44 at
  proposal sd 2.4 for N(0, 1) (recalled value).
- Shared REFERENCES: optimal efficiencies simulated at d = 1..20 (200 chains x
  20,000 steps), checked again here at d = 5.
"""

import numpy as np
import pytest

import walktune
from walktune import diagnostics as D
from walktune import theory as T


def diagonal_gaussian(variances):
    variances = np.asarray(variances)

    def log_density(x):
        return -0.5 * np.sum(x * x / variances, axis=-1)

    return log_density


def test_matched_proposal_has_no_slowdown_and_asymptotic_acceptance():
    # Source: Roberts, Gelman and Gilks (1997): 2 Phi(-2.38/2) = 0.234.
    cov = np.diag([1.0, 4.0, 9.0, 0.25, 2.0, 5.0])
    predicted = T.slowdown(T.optimal_proposal(cov), cov)
    assert predicted.slowest_parameter == pytest.approx(1.0)
    assert predicted.slowest_direction == pytest.approx(1.0)
    mu = T.relative_variances(T.optimal_proposal(cov), cov)
    assert T.diffusion_acceptance(mu) == pytest.approx(0.234, abs=0.001)


def test_expected_acceptance_one_dimension():
    # Source (recalled): Gelman, Roberts and Gilks (1996): sd 2.4 on N(0, 1) accepts about 0.44.
    assert T.expected_acceptance(np.array([[2.4**2]]), np.array([[1.0]])) == pytest.approx(0.44, abs=0.01)


def test_expected_acceptance_matches_engine_in_five_dimensions():
    # The Monte Carlo formula against the engine's own count on the same Gaussian.
    cov = np.diag([1.0, 2.0, 0.5, 3.0, 1.5])
    proposal = T.optimal_proposal(cov)
    chains = walktune.sample(diagonal_gaussian(np.diag(cov)), np.zeros((32, 5)), proposal, 4000, seed=3, vectorized=True)
    # Acceptance over 128,000 correlated steps has sd below 0.005.
    assert chains.acceptance_rate == pytest.approx(T.expected_acceptance(proposal, cov), abs=0.015)


def test_step_sizes_for_uncorrelated_target_equal_matched_proposal():
    # With no correlation, the best diagonal proposal is the matched one (R = I, trace(R^-1) = d).
    cov = np.diag([1.0, 4.0, 9.0, 0.25, 2.0, 5.0])
    np.testing.assert_allclose(np.diag(T.best_step_sizes(cov) ** 2), T.optimal_proposal(cov))


def test_parameter_slowdown_closed_form_equicorrelated():
    # Equicorrelation rho: eigenvalues 1 + (d-1) rho (once) and 1 - rho, each parameter loading
    # 1/d of its variance on the first; worked by hand from the formula in walktune.theory:
    # direction mu_max mean(1/mu), parameter (sum_k c_jk^2 mu_k / S_jj) mean(1/mu).
    dim, rho = 10, 0.5
    cov = (1 - rho) * np.eye(dim) + rho
    big, small = 1 + (dim - 1) * rho, 1 - rho
    inverse_mean = (1 / big + (dim - 1) / small) / dim
    predicted = T.slowdown(np.eye(dim), cov)
    assert predicted.slowest_direction == pytest.approx(big * inverse_mean)
    assert predicted.slowest_parameter == pytest.approx((big**2 / dim + small**2 * (dim - 1) / dim) * inverse_mean)


def test_parameter_slowdown_of_a_diagonal_target_is_the_direction_slowdown():
    # Uncorrelated target, diagonal proposal: parameters are the principal directions.
    variances = np.array([9.0] * 5 + [1.0] * 5)
    predicted = T.slowdown(np.eye(10), np.diag(variances))
    assert predicted.slowest_parameter == pytest.approx(predicted.slowest_direction)
    # mu_max mean(1/mu) = 9 * (5/9 + 5) / 10 = 5.0 (shared REFERENCES, the d = 10 example).
    assert predicted.slowest_direction == pytest.approx(5.0)


def test_optimal_efficiency_follows_the_simulated_table():
    # Simulated values in shared REFERENCES (200 chains x 20,000 steps): d = 6: 0.051, d = 10: 0.032,
    # d = 20: 0.017; the limit 0.33 / d is Roberts, Gelman and Gilks (1997).
    assert T.optimal_efficiency(6) == pytest.approx(0.051)
    assert T.optimal_efficiency(10) == pytest.approx(0.032)
    assert T.optimal_efficiency(20) == pytest.approx(0.017)
    assert T.optimal_efficiency(1000) * 1000 == pytest.approx(0.33, abs=0.001)
    assert 0.051 < T.optimal_efficiency(5) < 0.075


def test_optimal_efficiency_at_d5_against_simulation():
    # Simulation with known truth: isotropic N(0, I_5), the matched proposal at walktune's scale
    # 2.38/sqrt(5), chains started from exact draws; efficiency = 1/IACT, averaged over the 5
    # exchangeable coordinates. Shared REFERENCES has 0.060 at d = 5 from a simulation at the optimum.
    draws = walktune.sample(diagonal_gaussian(np.ones(5)), np.random.default_rng(0).standard_normal((50, 5)),
                            T.optimal_proposal(np.eye(5)), 8000, seed=7, vectorized=True).draws
    efficiency = np.mean(1.0 / D.iact(draws))
    # Monte Carlo error from the spread over 10 groups of 5 chains.
    groups = [np.mean(1.0 / D.iact(part)) for part in np.array_split(draws, 10)]
    error = np.std(groups, ddof=1) / np.sqrt(10)
    # The optimum is flat (shared REFERENCES): the scale used loses little; 3% allowed for it.
    assert abs(efficiency - T.optimal_efficiency(5)) <= 3 * error + 0.03 * T.optimal_efficiency(5)
    # The former asymptotic value 0.33 / 5 = 0.066 is outside.
    assert abs(efficiency - 0.066) > 3 * error


def test_loadings_rebuild_the_covariance():
    # Linear algebra: theta = sum_k c_k z_k with independent unit z_k has covariance c c^T = S.
    rng = np.random.default_rng(4)
    a, b = rng.standard_normal((2, 6, 6))
    cov, proposal = a @ a.T + np.eye(6), b @ b.T + np.eye(6)
    mu, loadings = T.principal_loadings(proposal, cov)
    np.testing.assert_allclose(loadings @ loadings.T, cov, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(mu, np.sort(np.linalg.eigvals(np.linalg.solve(proposal, cov)).real), rtol=1e-10)
    # Equal direction IACTs give every parameter that IACT.
    np.testing.assert_allclose(T.parameter_iact(loadings, np.full(6, 7.0)), 7.0)
