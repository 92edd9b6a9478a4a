"""Reparameterisation: Jacobians, round trips, moments in new coordinates, the informed subspace.

Sources:
- Log-Jacobians against numerical derivatives (scipy.differentiate.derivative).
- Log-normal and beta targets: moments from scipy.stats (lognorm, beta).
- Linear-Gaussian inverse problem y = G theta + e, e ~ N(0, s^2 I), prior N(0, I):
  posterior covariance (I + G^T G / s^2)^-1 and mean S G^T y / s^2 in closed form;
  its likelihood-informed subspace is spanned by the leading eigenvectors of G^T G
  (Cui, Martin, Marzouk, Solonen and Spantini 2014, Inverse Problems 30).
"""

import json

import numpy as np
import pytest
from scipy import differentiate, linalg, stats

import walktune
from conftest import load_demo
from walktune import diagnostics as D
from walktune.errors import WalktuneError
from walktune.informed import PRIOR_DOMINATED, informed_threshold
from walktune.reparam import (
    KINDS,
    TransformChoice,
    fit_map,
    forward,
    inverse,
    load_sampling_map,
    log_jacobian,
)

BOUNDS = {"identity": (-np.inf, np.inf), "log": (2.0, np.inf), "neglog": (-np.inf, 5.0), "logit": (-1.0, 3.0)}


@pytest.mark.parametrize("kind", KINDS)
def test_log_jacobian_matches_numerical_derivative_and_round_trips(kind):
    low, high = BOUNDS[kind]
    u = np.random.default_rng(1).uniform(-3, 3, size=20)
    numeric = differentiate.derivative(lambda x: inverse(kind, x, low, high), u).df
    np.testing.assert_allclose(log_jacobian(kind, u, low, high), np.log(np.abs(numeric)), rtol=1e-8, atol=1e-8)
    theta = inverse(kind, u, low, high)
    np.testing.assert_allclose(forward(kind, theta, low, high), u, rtol=0, atol=1e-10)


def random_map(seed=0):
    rng = np.random.default_rng(seed)
    names = list(BOUNDS)
    choices = [TransformChoice(n, n, *BOUNDS[n], {}) for n in names]
    a = rng.standard_normal((4, 4))
    from walktune.reparam import fit_map

    reparam = fit_map(names, choices, rng.standard_normal(4), a @ a.T + np.eye(4), prior_covariance=np.eye(4) * 9)
    return reparam, rng


def test_full_map_round_trip_and_jacobian_determinant():
    reparam, rng = random_map()
    z = rng.standard_normal((10, 4))
    theta = reparam.from_sampler(z)
    np.testing.assert_allclose(reparam.to_sampler(theta), z, atol=1e-10)
    for point in z[:4]:
        # Numerical Jacobian d theta / d z, one entry at a time.
        jac = np.empty((4, 4))
        for i in range(4):
            for k in range(4):
                def entry(t, i=i, k=k):
                    shifted = point + np.multiply.outer(np.asarray(t), np.eye(4)[k])
                    return reparam.from_sampler(shifted)[..., i]
                jac[i, k] = differentiate.derivative(entry, 0.0).df
        assert reparam.log_jacobian(point) == pytest.approx(np.log(abs(np.linalg.det(jac))), abs=1e-7)


def test_reparam_json_round_trip(tmp_path):
    reparam, rng = random_map()
    (tmp_path / "sampling_map.json").write_text(json.dumps(reparam.to_dict()))
    loaded = load_sampling_map(tmp_path, names=reparam.parameter_names)
    z = rng.standard_normal((5, 4))
    np.testing.assert_allclose(loaded.from_sampler(z), reparam.from_sampler(z), atol=1e-12)


@pytest.mark.parametrize(
    "change, fragment",
    [
        (lambda p: p.update(schema="walktune.sampling-map/0"), "schema"),
        (lambda p: p.update(W=np.zeros((4, 4)).tolist()), "not invertible"),
        (lambda p: p.update(Q=(2 * np.eye(4)).tolist()), "orthogonal"),
    ],
)
def test_bad_reparam_files(tmp_path, change, fragment):
    reparam, _ = random_map()
    payload = reparam.to_dict()
    change(payload)
    (tmp_path / "sampling_map.json").write_text(json.dumps(payload))
    with pytest.raises(WalktuneError, match=fragment):
        load_sampling_map(tmp_path)


def test_reparam_names_must_match(tmp_path):
    reparam, _ = random_map()
    (tmp_path / "sampling_map.json").write_text(json.dumps(reparam.to_dict()))
    with pytest.raises(WalktuneError, match="not the model's"):
        load_sampling_map(tmp_path, names=["a", "b", "c", "d"])


def test_forced_transform_that_conflicts_with_bounds():
    with pytest.raises(WalktuneError, match="conflicts with its bounds"):
        walktune.tune(lambda x: -0.5 * x @ x, [0.5, 0.5], names=["a", "b"], bounds={"a": (0, np.inf)},
                      transforms={"b": "log"})


def test_start_on_a_bound_is_an_error():
    with pytest.raises(WalktuneError, match="outside its bounds"):
        walktune.tune(lambda x: -0.5 * x @ x, [0.0, 0.5], names=["a", "b"], bounds={"a": (0, np.inf)})


def moments_check(draws, dist):
    x = draws[..., 0]
    ess = float(np.asarray(D.ess(x[..., None]))[0])
    se_mean = dist.std() / np.sqrt(ess)
    assert x.mean() == pytest.approx(dist.mean(), abs=4 * se_mean)
    # Var of the sample variance ~ (mu4 - sigma^4) / n_eff.
    mu4 = dist.moment(4) - 4 * dist.mean() * dist.moment(3) + 6 * dist.mean() ** 2 * dist.moment(2) - 3 * dist.mean() ** 4
    se_var = np.sqrt((mu4 - dist.var() ** 2) / ess)
    assert x.var() == pytest.approx(dist.var(), abs=4 * se_var)


def lognormal_logpdf(x, s=0.6, scale=2.0):
    # Unnormalised log-density of scipy.stats.lognorm(s, scale) (closed form; faster per call).
    return -np.log(x) - 0.5 * (np.log(x / scale) / s) ** 2 if x > 0 else -np.inf


def beta_logpdf(x, a=2.0, b=5.0):
    # Unnormalised log-density of scipy.stats.beta(a, b).
    return (a - 1) * np.log(x) + (b - 1) * np.log1p(-x) if 0 < x < 1 else -np.inf


@pytest.mark.slow
@pytest.mark.parametrize(
    "dist, logpdf, bounds, kind",
    [
        (stats.lognorm(s=0.6, scale=2.0), lognormal_logpdf, (0.0, np.inf), "log"),
        (stats.beta(2.0, 5.0), beta_logpdf, (0.0, 1.0), "logit"),
    ],
)
def test_sampling_in_transformed_coordinates_keeps_the_posterior(dist, logpdf, bounds, kind):
    # Two parameters: the target and an independent N(0, 1) companion; moments from scipy.stats.
    def log_density(theta):
        return logpdf(theta[0]) - 0.5 * theta[1] ** 2

    result = walktune.tune(log_density, [dist.median(), 0.0], names=["x", "y"], bounds={"x": bounds}, seed=2,
                           transforms={"x": kind}, budget=120_000)
    assert result.reparam.transforms[0].kind == kind
    moments_check(result.runs["transformed-rotated"].draws, dist)
    # The original-coordinate run agrees too.
    moments_check(result.runs["tuned-covariance"].draws, dist)


def linear_gaussian(d=20, informed=5, seed=0):
    rng = np.random.default_rng(seed)
    basis = np.linalg.qr(rng.standard_normal((d, informed)))[0]
    G = rng.standard_normal((30, informed)) @ basis.T * 3.0
    noise = 0.5
    truth = rng.standard_normal(d)
    y = G @ truth + noise * rng.standard_normal(30)
    precision = np.eye(d) + G.T @ G / noise**2
    cov = np.linalg.inv(precision)
    mean = cov @ G.T @ y / noise**2

    def log_likelihood(theta):
        theta = np.atleast_2d(theta)
        return -0.5 * np.sum((y - theta @ G.T) ** 2, axis=1) / noise**2

    return log_likelihood, G, mean, cov


@pytest.mark.slow
def test_informed_subspace_of_a_linear_gaussian_inverse_problem():
    d = 20
    log_likelihood, G, mean, cov = linear_gaussian(d)
    prior = {f"t{i}": ("normal", 0.0, 1.0) for i in range(d)}
    result = walktune.tune(log_likelihood, np.zeros(d), names=list(prior), prior=prior, seed=1, vectorized=True)
    reparam = result.reparam
    assert reparam.informed == 5
    found = (reparam.chol @ reparam.rotation)[:, :5]
    true = np.linalg.eigh(G.T @ G)[1][:, -5:]
    assert np.max(linalg.subspace_angles(found, true)) < 0.1
    # The reduced-basis sampler samples the closed-form posterior.
    draws = result.runs["reduced-basis"].draws
    flat = draws.reshape(-1, d)
    ess = np.asarray(D.ess(draws))
    assert np.all(np.abs(flat.mean(axis=0) - mean) < 4 * np.sqrt(np.diag(cov) / ess))
    sd = np.sqrt(np.diag(cov))
    se_cov = np.sqrt((np.outer(sd**2, sd**2) + cov**2) / ess.min())
    assert np.all(np.abs(np.cov(flat.T) - cov) < 4 * se_cov + 1e-12)


@pytest.mark.slow
def test_curved_ridge_demo_gains_three_times():
    model = load_demo("source_activity")
    for seed in (1, 2):
        result = walktune.tune(model.log_posterior, list(model.PARAMETERS.values()), names=list(model.PARAMETERS),
                               bounds=model.BOUNDS, seed=seed)
        rows = {row.proposal: row for row in result.comparison}
        assert rows["transformed-rotated"].ess_per_1000 >= 3 * rows["tuned-covariance"].ess_per_1000
        ridge = [f for f in result.findings if f.kind == "curved-ridge"]
        assert ridge and set(ridge[0].parameters) == {"activity_kbq", "efficiency"}


def test_user_sampler_in_three_lines(tmp_path):
    # The documented recipe: load sampling_map.json, sample z with any sampler, map back.
    def log_density(theta):
        return lognormal_logpdf(theta[0], s=0.5, scale=1.0) - 0.5 * ((theta[1] - 1.0) / 0.2) ** 2

    result = walktune.tune(log_density, [1.0, 1.0], names=["a", "b"], bounds={"a": (0, np.inf)}, seed=3, budget=40_000)
    result.save(tmp_path / "out")
    reparam = walktune.load_sampling_map(tmp_path / "out", names=["a", "b"])
    log_z = reparam.log_density_in_sampler_space(log_density)
    chains = walktune.sample(log_z, np.zeros(2), (2.38**2 / 2) * np.eye(2), 20_000, chains=4, seed=5)
    theta = reparam.from_sampler(chains.draws)
    moments_check(theta[..., :1], stats.lognorm(s=0.5))


def test_prior_dominated_parameters_are_weakly_identified():
    # c is absent from the likelihood: its posterior is its N(0, 2^2) prior.
    def log_likelihood(theta):
        return -0.5 * ((theta[0] - 1.0) / 0.1) ** 2 - 0.5 * ((theta[1] + theta[0]) / 0.2) ** 2

    prior = {"a": ("normal", 0.0, 2.0), "b": ("normal", 0.0, 2.0), "c": ("normal", 0.0, 2.0)}
    result = walktune.tune(log_likelihood, [1.0, -1.0, 0.0], names=list(prior), prior=prior, seed=1, budget=60_000)
    weak = [f for f in result.findings if f.kind == "weakly-identified" and f.severity == "warn"]
    assert weak and weak[0].parameters == ["c"]
    assert result.reparam.informed == 2


# --------------------------------------------------------------------------- the informed split against noise
#
# Sources:
# - When the posterior equals the prior, the ratios are the eigenvalues of the sample
#   covariance of n independent standard normal draws (posterior/prior variance 1 in
#   every direction): the truth is zero informed directions.
# - Linear-Gaussian model, prior N(0, P), log-likelihood Hessian -H: the posterior
#   covariance is (P^-1 + H)^-1 in closed form; the likelihood-informed subspace of Cui
#   et al. (2014) is spanned by P^(1/2) w_k with P^(1/2) H P^(1/2) w_k = lambda_k w_k, and
#   the posterior/prior variance ratio along it is 1 / (1 + lambda_k).
# - Wishart eigenvalues as those of a bidiagonal chi matrix: Dumitriu and Edelman (2002).
# - Lower edge (1 - sqrt(d/n))^2 of the Marchenko and Pastur (1967) law (recalled).


def _identity_choices(d):
    return [TransformChoice(f"t{i}", "identity", -np.inf, np.inf, {}) for i in range(d)]


def _random_prior(d, rng):
    a = rng.standard_normal((d, d))
    return a @ a.T / d + 0.5 * np.eye(d)


def _split_of_draws(draws, prior):
    d = draws.shape[1]
    return fit_map([f"t{i}" for i in range(d)], _identity_choices(d), draws.mean(axis=0), np.cov(draws.T), prior,
                   n_independent=draws.shape[0])


@pytest.mark.parametrize("d, n, seeds", [(5, 100, 1000), (20, 200, 1000), (50, 1000, 400)])
def test_pure_noise_gives_almost_no_informed_directions(d, n, seeds):
    # Truth: zero informed directions. The mean false count over seeds must stay below
    # 0.1 by two Monte Carlo SEs (its calibrated value is 0.05).
    counts = []
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        prior = _random_prior(d, rng)
        draws = 3.0 + rng.standard_normal((n, d)) @ np.linalg.cholesky(prior).T
        counts.append(_split_of_draws(draws, prior).informed)
    mean, se = np.mean(counts), np.std(counts, ddof=1) / np.sqrt(seeds)
    assert mean + 2 * se < 0.1, (mean, se)


def _linear_gaussian_posterior(prior, lambdas, rng):
    """Closed-form posterior covariance of a linear-Gaussian model whose likelihood
    Hessian H has prior-whitened eigenvalues ``lambdas`` along random directions."""
    d = prior.shape[0]
    root = linalg.sqrtm(prior).real
    w = np.linalg.qr(rng.standard_normal((d, len(lambdas))))[0]
    root_inv = np.linalg.inv(root)
    hessian = root_inv @ w @ np.diag(lambdas) @ w.T @ root_inv
    posterior = np.linalg.inv(np.linalg.inv(prior) + hessian)
    return 0.5 * (posterior + posterior.T), root @ w


def test_split_from_the_exact_posterior_is_the_likelihood_informed_subspace():
    # Closed form (linear-Gaussian): ratios 1 / (1 + lambda_k) along Cui et al.'s basis P^(1/2) w_k.
    rng = np.random.default_rng(3)
    d, lambdas = 12, np.array([50.0, 5.0, 1.0 / 0.3 - 1.0])
    prior = _random_prior(d, rng)
    posterior, basis = _linear_gaussian_posterior(prior, lambdas, rng)
    fitted = fit_map([f"t{i}" for i in range(d)], _identity_choices(d), np.zeros(d), posterior, prior)
    np.testing.assert_allclose(fitted.prior_variance_ratio[:3], 1 / (1 + lambdas), rtol=1e-8)
    np.testing.assert_allclose(fitted.prior_variance_ratio[3:], 1.0, rtol=1e-8)
    found = (fitted.chol @ fitted.rotation)[:, :3]
    assert np.max(linalg.subspace_angles(found, basis)) < 1e-6
    assert fitted.informed == 3


@pytest.mark.parametrize("d, n", [(5, 100), (20, 200), (50, 1000)])
def test_a_truly_informed_direction_is_still_found(d, n):
    # One direction with posterior/prior variance 0.3 (closed form). Its sample ratio
    # has sd about 0.3 sqrt(2 / n), at least 5 sds below the calibrated threshold at
    # these n, so it must be found in every one of 200 seeds, and nothing else on average
    # (the false count stays below 0.1 by two Monte Carlo SEs).
    # Its direction, in prior-whitened coordinates, has squared cosine with the truth
    # about (1 - g / (1 - l)^2) / (1 - g / (1 - l)) for g = d / n, l = 0.3 (Paul 2007,
    # Statistica Sinica 17, spiked covariance model; recalled, asymptotic: 0.02 allowed).
    seeds, extra, cos2 = 200, [], []
    g, spike = d / n, 0.3
    for seed in range(seeds):
        rng = np.random.default_rng(10_000 + seed)
        prior = _random_prior(d, rng)
        posterior, basis = _linear_gaussian_posterior(prior, [1.0 / spike - 1.0], rng)
        draws = rng.standard_normal((n, d)) @ np.linalg.cholesky(posterior).T
        fitted = _split_of_draws(draws, prior)
        assert fitted.informed >= 1
        assert fitted.prior_variance_ratio[0] == pytest.approx(spike, abs=6 * spike * np.sqrt(2 / n))
        root = linalg.sqrtm(prior).real
        found = np.linalg.solve(root, (fitted.chol @ fitted.rotation)[:, :1])
        cos2.append(np.cos(linalg.subspace_angles(found, np.linalg.solve(root, basis))[0]) ** 2)
        extra.append(fitted.informed - 1)
    assert np.mean(extra) + 2 * np.std(extra, ddof=1) / np.sqrt(seeds) < 0.1
    assert np.mean(cos2) == pytest.approx((1 - g / (1 - spike) ** 2) / (1 - g / (1 - spike)), abs=0.02)


def test_null_threshold_simulation_matches_direct_sample_covariances():
    # Dumitriu and Edelman (2002): the bidiagonal model has the Wishart eigenvalue law.
    # Direct check: the share of sample covariances (10 dims, 60 draws) with an
    # eigenvalue below the calibrated threshold, over 4000 direct simulations, is about
    # the calibrated expected count 0.05 (binomial SE 0.0034; 4 SE allowed, plus the
    # small difference between "expected count" and "at least one").
    d, n = 10, 60
    threshold = informed_threshold(d, n)
    rng = np.random.default_rng(7)
    counts = np.array([np.sum(np.linalg.eigvalsh(np.cov(rng.standard_normal((n, d)).T)) < threshold)
                       for _ in range(4000)])
    assert counts.mean() == pytest.approx(0.05, abs=4 * np.sqrt(0.05 * 0.95 / 4000))


def test_threshold_sits_at_the_lower_edge_of_the_noise_spectrum():
    # Marchenko-Pastur lower edge (1 - sqrt(d/n))^2 (recalled); the smallest eigenvalue
    # fluctuates about it on a scale of about n^(-2/3) (Tracy-Widom; recalled), so the
    # threshold lies just below the edge at large d. At d = 300 it also stays cheap (cached).
    for d, n in [(100, 1000), (300, 3000)]:
        edge = (1 - np.sqrt(d / n)) ** 2
        assert edge - 0.03 < informed_threshold(d, n) < edge
    assert informed_threshold(300, 20 * 300 * 300) == PRIOR_DOMINATED  # capped: common practice
    assert informed_threshold(20, 15) == 0.0  # fewer draws than dimensions: nothing can be told from noise
    assert informed_threshold(20, None) == PRIOR_DOMINATED
