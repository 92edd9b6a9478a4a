"""Hard-geometry detectors on published test targets.

Sources (named beside each target):
- Neal (2003), Annals of Statistics 31(3), "Slice sampling": the funnel,
  v ~ N(0, 3^2), x_i | v ~ N(0, exp(v)), here with d = 10.
- Haario, Saksman and Tamminen (1999), Computational Statistics 14: the twisted
  ("banana") Gaussian, x2 shifted by b (x1^2 - 100) with x1 ~ N(0, 100), b = 0.03.
- Goodman and Weare (2010), CAMCoS 5(1): the Rosenbrock density
  exp(-(100 (x2 - x1^2)^2 + (1 - x1)^2) / 20).
- A two-component Gaussian mixture and a correlated Gaussian (closed forms) for
  the multimodal and false-alarm checks.
"""

import numpy as np
import pytest
from scipy import stats

import walktune
from conftest import load_demo
from walktune.geometry import boundary_findings, heavy_tail_findings, local_spread_ratio

HARD_KINDS = {"multimodal", "varying-scale", "boundary-pileup", "heavy-tails", "weakly-identified"}


def neal_funnel(theta):
    # Neal (2003): log N(v | 0, 9) + sum log N(x_i | 0, e^v), constants dropped.
    v, x = theta[0], theta[1:]
    return -v**2 / 18 - 0.5 * x.size * v - 0.5 * np.sum(x**2) * np.exp(-v)


def twisted_gaussian(theta, b=0.03):
    # Haario, Saksman and Tamminen (1999).
    x1, x2 = theta[0], theta[1] + b * (theta[0] ** 2 - 100)
    return -0.5 * (x1**2 / 100 + x2**2)


def rosenbrock(theta):
    # Goodman and Weare (2010).
    return -(100 * (theta[1] - theta[0] ** 2) ** 2 + (1 - theta[0]) ** 2) / 20


MODES = np.array([[-4.0, 0.0, 0.0, 0.0], [4.0, 0.0, 0.0, 0.0]])


def two_gaussians(theta):
    # Equal mixture of N(-4 e1, I) and N(4 e1, I) in 4 dimensions: 8 sd apart.
    return np.logaddexp(-0.5 * np.sum((theta - MODES[0]) ** 2), -0.5 * np.sum((theta - MODES[1]) ** 2))


def kinds(result):
    return {f.kind for f in result.findings}


@pytest.mark.slow
def test_neal_funnel_varying_scale_on_v():
    names = ["v"] + [f"x{i}" for i in range(1, 10)]
    result = walktune.tune(neal_funnel, np.r_[0.0, np.ones(9)], names=names, seed=1, budget=250_000)
    funnel = [f for f in result.findings if f.kind == "varying-scale"]
    assert len(funnel) == 1
    assert funnel[0].parameters[0] == "v"
    assert "non-centred" in funnel[0].message


@pytest.mark.slow
def test_two_separated_gaussians_are_multimodal():
    result = walktune.tune(two_gaussians, np.array([0.5, 0.0, 0.0, 0.0]), seed=1)
    assert "multimodal" in kinds(result)
    assert len(result.regions) == 2
    found = sorted(result.regions, key=lambda r: r.mode[0])
    for region, true_mode in zip(found, MODES):
        # Located within their spread (sd 1 per coordinate).
        assert np.all(np.abs(region.mode - true_mode) < 1.0)
        assert np.all(np.abs(region.mean - true_mode) < 1.0)
    payload = result.to_dict()
    assert len(payload["regions"]) == 2 and "proposal_covariance" in payload["regions"][0]


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2])
def test_twisted_gaussian_non_gaussian_and_not_multimodal(seed):
    result = walktune.tune(twisted_gaussian, np.zeros(2), seed=seed, budget=250_000)
    assert "multimodal" not in kinds(result)
    assert kinds(result) & {"heavy-tails", "varying-scale", "curved-ridge"}


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2])
def test_rosenbrock_not_multimodal(seed):
    result = walktune.tune(rosenbrock, np.zeros(2), seed=seed, budget=100_000)
    assert "multimodal" not in kinds(result)


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_correlated_gaussian_raises_no_hard_geometry_alarm(seed):
    # False alarms matter as much as misses: a unimodal correlated Gaussian.
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((5, 5))
    cov = a @ a.T + 0.5 * np.eye(5)
    precision = np.linalg.inv(cov)
    result = walktune.tune(lambda x: -0.5 * x @ precision @ x, np.ones(5), seed=seed)
    assert not kinds(result) & HARD_KINDS, [f.message for f in result.findings]


def test_local_spread_ratio_on_closed_forms():
    rng = np.random.default_rng(0)
    # Correlated Gaussian: conditional spread is constant (ratio 1 within noise).
    g = rng.multivariate_normal([0, 0, 0], [[1, 0.9, 0.5], [0.9, 1, 0.4], [0.5, 0.4, 1]], size=20_000)
    np.testing.assert_allclose(local_spread_ratio(g, 0), 1.0, atol=0.1)
    # Funnel drawn exactly: sd of x given v is exp(v/2); the top and bottom fifths of
    # v ~ N(0, 9) differ in median by about 2 x 3 x 1.28 = 7.7, a factor near exp(3.8) ~ 45.
    v = rng.normal(0, 3, 20_000)
    x = rng.standard_normal((20_000, 3)) * np.exp(v / 2)[:, None]
    ratio = local_spread_ratio(np.column_stack([v, x]), 0)
    assert np.all(ratio[1:] > 20)


def test_boundary_pileup_and_heavy_tails_detectors():
    rng = np.random.default_rng(1)
    # Exponential(1) draws against the bound 0: the densest bin touches it.
    pile = rng.exponential(1.0, size=(2, 5000, 1))
    found = boundary_findings(pile, np.array([[0.0, np.inf]]), ["rate"])
    assert [f.kind for f in found] == ["boundary-pileup"]
    # A normal well inside its bounds: nothing.
    inside = rng.normal(5.0, 1.0, size=(2, 5000, 1))
    assert boundary_findings(inside, np.array([[0.0, np.inf]]), ["m"]) == []
    # Student t with 5 degrees of freedom has excess kurtosis 6 (closed form); a normal has 0.
    t5 = stats.t(df=5).rvs(size=(2, 20_000, 1), random_state=rng)
    normal = rng.standard_normal((2, 20_000, 1))
    assert [f.kind for f in heavy_tail_findings(t5, np.array([40_000.0]), ["t"])] == ["heavy-tails"]
    assert heavy_tail_findings(normal, np.array([40_000.0]), ["z"]) == []


def test_too_few_draws_says_undecided():
    result = walktune.tune(two_gaussians, np.array([0.5, 0.0, 0.0, 0.0]), seed=1, budget=3_500)
    # With a tiny budget the detectors must say they could not decide, not guess.
    undecided = [f for f in result.findings if f.kind == "undecided"]
    assert undecided and all(("too few" in f.message or "budget ran out" in f.message) for f in undecided)
    assert "multimodal" not in kinds(result) or len(result.regions) == 2


@pytest.mark.slow
def test_kiln_demo_centred_funnel_and_what_non_centring_does():
    # The hierarchical demo in both forms (Papaspiliopoulos, Roberts and Sköld 2007): the
    # centred form is a funnel along log_tau, which the detector reports as a varying scale;
    # the non-centred form removes it, and its best proposal mixes faster per evaluation.
    kiln = load_demo("kiln_shrinkage")
    start = list(kiln.PARAMETERS.values())
    centred = walktune.tune(kiln.log_posterior_centred, start, names=kiln.NAMES, seed=1)
    funnel = [f for f in centred.findings if f.kind == "varying-scale"]
    assert funnel and funnel[0].parameters[0] == "log_tau"
    noncentred = walktune.tune(kiln.log_posterior_noncentred, start, names=kiln.NAMES, seed=1)
    assert "varying-scale" not in kinds(noncentred)
    best = max(row.ess_per_1000 for row in noncentred.comparison)
    assert best > 2 * max(row.ess_per_1000 for row in centred.comparison)


@pytest.mark.slow
def test_mirror_demo_is_multimodal():
    mirror = load_demo("mirror_sensor")
    result = walktune.tune(mirror.log_posterior, list(mirror.PARAMETERS.values()), seed=1)
    assert "multimodal" in kinds(result)
    offsets = sorted(region.mode[0] for region in result.regions)
    assert offsets[0] == pytest.approx(-offsets[1], abs=0.01)


def test_r_squared_on_others_agrees_with_scikit_learn_regressions():
    # Reference: scikit-learn's LinearRegression of each parameter on the others, in-sample R^2
    # (sklearn.metrics.r2_score); the closed form 1 - 1 / (S_ii (S^-1)_ii) is the same quantity.
    from sklearn.linear_model import LinearRegression

    from walktune.analysis import r_squared_on_others

    rng = np.random.default_rng(5)
    a = rng.standard_normal((4, 4))
    draws = rng.multivariate_normal(np.zeros(4), a @ a.T + 0.1 * np.eye(4), size=3000)
    ours = r_squared_on_others(draws.reshape(3, 1000, 4))
    for i in range(4):
        others = np.delete(draws, i, axis=1)
        expected = LinearRegression().fit(others, draws[:, i]).score(others, draws[:, i])
        assert ours[i] == pytest.approx(expected, abs=1e-10)
    # A parameter that never moved has no R^2.
    still = draws.copy()
    still[:, 2] = 1.0
    assert np.isnan(r_squared_on_others(still)[2])
