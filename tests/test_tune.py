"""The tuning job against closed forms, scikit-learn reference fits and theory.

Sources:
- Optimal efficiency of random-walk Metropolis about 0.3/d with a matched
  proposal: Roberts, Gelman and Gilks (1997), Annals of Applied Probability 7(1)
  (recalled value; walktune.theory uses 0.33/d for d > 4 and the Gelman,
  Roberts and Gilks 1996 table below that).
- Conjugate Bayesian linear regression with known noise: posterior covariance
  (X^T X / sigma^2 + Lambda0^-1)^-1 and mean Sigma X^T y / sigma^2 (any Bayesian
  text, e.g. Gelman et al., Bayesian Data Analysis, ch. 14), on scikit-learn's
  diabetes data (Efron, Hastie, Johnstone and Tibshirani 2004, Annals of Statistics 32(2)).
- Gaussian-prior logistic regression: its mode is scikit-learn's L2-penalised
  LogisticRegression with C equal to the prior variance, on the breast cancer
  data scikit-learn ships (Wolberg, Street and Mangasarian, UCI).
"""

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LogisticRegression

import walktune
from walktune import diagnostics as D
from walktune import theory as T
from walktune.errors import WalktuneError
from conftest import rotated_gaussian  # noqa: E402


@pytest.mark.slow
@pytest.mark.parametrize("dim, condition", [(2, 1e4), (5, 1e2), (10, 1e4), (20, 1e4)])
def test_recommended_covariance_on_known_gaussians(dim, condition):
    log_density, cov, mean = rotated_gaussian(dim, condition, seed=dim)
    result = walktune.tune(log_density, np.zeros(dim), seed=1, vectorized=True)
    # Predicted slow-down of the recommendation against the true covariance, slowest direction.
    assert T.slowdown(result.proposal_covariance, cov).slowest_direction <= 1.1
    # An independent fixed-proposal run reaches at least 0.8 of the optimal efficiency.
    check = walktune.sample(log_density, np.tile(mean, (32, 1)), result.proposal_covariance, 10_000, seed=99, vectorized=True)
    efficiency = np.mean(1.0 / D.iact(check.draws))
    assert efficiency >= 0.8 * T.optimal_efficiency(dim)
    # The default pilot (mode search included) keeps to 20 d^2 + 2000 evaluations.
    assert result.pilot_evaluations <= 20 * dim * dim + 2000


@pytest.mark.slow
def test_conjugate_linear_regression_on_diabetes():
    data = load_diabetes()
    X = data.data
    y = data.target - data.target.mean()
    sigma = 55.0  # known noise sd (about the OLS residual sd)
    prior_sd = 500.0
    dim = X.shape[1]
    precision = X.T @ X / sigma**2 + np.eye(dim) / prior_sd**2
    true_cov = np.linalg.inv(precision)
    true_mean = true_cov @ X.T @ y / sigma**2

    def log_posterior(beta):
        beta = np.atleast_2d(beta)
        residual = y[None, :] - beta @ X.T
        return -0.5 * np.sum(residual**2, axis=1) / sigma**2 - 0.5 * np.sum(beta**2, axis=1) / prior_sd**2

    names = list(data.feature_names)
    result = walktune.tune(log_posterior, np.zeros(dim), names=names, seed=3, vectorized=True)
    est = result.posterior_covariance
    sd = np.sqrt(np.diag(true_cov))
    # Monte Carlo error of a covariance entry from n_eff draws: sqrt((S_ii S_jj + S_ij^2) / n_eff);
    # take n_eff as the tuned run's smallest ESS, a conservative count for the pilot.
    n_eff = min(row.ess_per_1000 * row.evaluations / 1000 for row in result.comparison[-1:])
    tolerance = 4 * np.sqrt((np.outer(sd**2, sd**2) + true_cov**2) / n_eff)
    assert np.all(np.abs(est - true_cov) < tolerance)
    # Posterior mean within 4 Monte Carlo standard errors.
    assert np.all(np.abs(result.posterior_mean - true_mean) < 4 * result.posterior_mean_mcse)
    assert result.parameter_names == names


def test_logistic_regression_mode_matches_scikit_learn():
    data = load_breast_cancer()
    X = data.data[:, :6]
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    y = data.target
    prior_var = 2.0

    def log_posterior(theta):
        intercept, w = theta[0], theta[1:]
        eta = intercept + X @ w
        # Bernoulli log-likelihood, flat prior on the intercept, N(0, prior_var) on the weights.
        return np.sum(y * eta - np.logaddexp(0.0, eta)) - 0.5 * np.sum(w**2) / prior_var

    result = walktune.tune(log_posterior, np.zeros(7), seed=2, budget=40_000)
    reference = LogisticRegression(C=prior_var, tol=1e-10, max_iter=10_000).fit(X, y)
    expected = np.concatenate([reference.intercept_, reference.coef_[0]])
    np.testing.assert_allclose(result.mode_fit.mode, expected, rtol=1e-4, atol=1e-4)


def test_current_proposal_comparison_and_findings():
    # A strongly correlated 2-D Gaussian sampled today with a too-large isotropic step.
    cov = np.array([[1.0, 0.995], [0.995, 1.0]])
    precision = np.linalg.inv(cov)

    def log_density(x):
        return -0.5 * x @ precision @ x

    result = walktune.tune(
        log_density, [0.3, -0.2], names=["a", "b"], current_proposal=[3.0, 3.0], seed=5, budget=60_000
    )
    names = [row.proposal for row in result.comparison]
    assert names == ["current", "step-sizes", "tuned-covariance"]
    tuned = result.comparison[-1]
    assert tuned.speedup > 3
    kinds = {f.kind for f in result.findings}
    assert "strong-correlation" in kinds
    assert "poor-acceptance" in kinds  # steps of 3 sd on a ridge 0.07 wide
    # The prediction for the current proposal is in the result, and it is slower.
    assert result.slowdowns["current"]["slowest_parameter"] > 10


def test_weakly_identified_parameter_is_found():
    # b is not in the likelihood: its posterior is flat on its bounds (0, 1).
    def log_density(x):
        return -0.5 * (x[0] / 0.1) ** 2

    result = walktune.tune(log_density, [0.0, 0.5], names=["a", "b"], bounds={"b": (0.0, 1.0)}, seed=4, budget=40_000)
    weak = [f for f in result.findings if f.kind == "weakly-identified"]
    assert [f.parameters for f in weak] == [["b"]]
    assert np.all((result.runs["tuned-covariance"].draws[..., 1] > 0) & (result.runs["tuned-covariance"].draws[..., 1] < 1))


def test_same_seed_same_advice():
    log_density, _, _ = rotated_gaussian(3, 1e2, seed=0)
    a = walktune.tune(log_density, np.zeros(3), seed=11, vectorized=True, budget=30_000)
    b = walktune.tune(log_density, np.zeros(3), seed=11, vectorized=True, budget=30_000)
    np.testing.assert_array_equal(a.proposal_covariance, b.proposal_covariance)
    assert a.to_dict()["comparison"] == b.to_dict()["comparison"]


def test_budget_caps_all_evaluations():
    log_density, _, _ = rotated_gaussian(4, 10.0, seed=1)
    result = walktune.tune(log_density, np.zeros(4), seed=1, vectorized=True, budget=20_000)
    assert result.total_evaluations <= 20_000


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(names=["a"]), "names"),
        (dict(names=["a", "a"]), "unique"),
        (dict(bounds={"c": (0, 1)}, names=["a", "b"]), "unknown parameter"),
        (dict(bounds={"a": (1, 2)}, names=["a", "b"]), "outside its bounds"),
        (dict(bounds={"a": (2, 1)}, names=["a", "b"]), "low < high"),
        (dict(current_proposal=np.eye(3)), r"\(2, 2\)"),
        (dict(current_proposal=[[1.0, 2.0], [2.0, 1.0]]), "positive definite"),
        (dict(current_proposal=[1.0, -1.0]), "positive"),
        (dict(budget=100), "too small"),
        (dict(chains=1), "at least 2"),
    ],
)
def test_bad_input_is_a_clear_error(kwargs, message):
    with pytest.raises(WalktuneError, match=message):
        walktune.tune(lambda x: -0.5 * x @ x, [0.0, 0.0], **kwargs)


def test_start_outside_support_is_an_error():
    with pytest.raises(WalktuneError, match="start"):
        walktune.tune(lambda x: -np.inf, [0.0, 0.0])


def test_save_writes_every_file(tmp_path):
    import json

    log_density, _, _ = rotated_gaussian(3, 1e2, seed=0)
    result = walktune.tune(log_density, np.zeros(3), names=["x", "y", "z"], seed=1, vectorized=True, budget=30_000)
    folder = result.save(tmp_path / "out")
    advice = json.loads((folder / "advice.json").read_text())
    for key in [
        "parameter_names", "posterior_mean", "posterior_covariance", "proposal_covariance", "step_sizes",
        "expected_acceptance", "pilot_evaluations", "comparison", "findings", "effective_dimension",
    ]:
        assert key in advice
    for row in advice["comparison"]:
        assert {"proposal", "acceptance", "ess_per_1000", "evaluations", "speedup", "speedup_is_lower_bound"} <= set(row)
    np.testing.assert_array_equal(np.load(folder / "proposal_covariance.npy"), result.proposal_covariance)
    header = (folder / "proposal_covariance.csv").read_text().splitlines()[0]
    assert header == "x,y,z"
    np.testing.assert_allclose(np.loadtxt(folder / "proposal_covariance.csv", delimiter=",", skiprows=1), result.proposal_covariance)
    draws = np.load(folder / "draws.npz")
    assert draws["tuned_covariance"].shape[2] == 3
    assert not [p for p in folder.parent.iterdir() if p.name.startswith(".")]  # no staging left
