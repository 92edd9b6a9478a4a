"""Modes weighted by their mass (walktune.modes), against mixtures whose weights are known in closed form.

For a mixture of well-separated Gaussians ``sum_k w_k N(m_k, S_k)`` the
log-density near ``m_k`` is ``log w_k + log N(x | m_k, S_k)`` up to the other
components' share, which at the distances used here is below ``exp(-30)``; the
Laplace mass at ``m_k`` is then exactly ``w_k`` (the Laplace approximation is
exact for a Gaussian: Tierney and Kadane 1986).
"""

import numpy as np
import pytest
from scipy import stats

import walktune
from walktune.geometry import assign_draws, find_regions, multimodal_finding
from walktune.mode import finite_difference_hessian
from walktune.modes import MINOR_MODE_MASS, TableScope, table_scope, weigh_modes

MEANS = np.array([[-5.0, 1.0, 0.0], [6.0, -2.0, 1.0]])
COVS = [np.array([[1.0, 0.5, 0.0], [0.5, 2.0, 0.3], [0.0, 0.3, 0.5]]), np.diag([0.25, 4.0, 1.0])]


def mixture(weights):
    """Log-density of the mixture ``weights[0] N(MEANS[0], COVS[0]) + weights[1] N(MEANS[1], COVS[1])``."""
    components = [stats.multivariate_normal(m, c) for m, c in zip(MEANS, COVS)]

    def log_density(theta):
        theta = np.asarray(theta, dtype=float)
        return np.logaddexp(*[np.log(w) + comp.logpdf(theta) for w, comp in zip(weights, components)])

    return log_density


@pytest.mark.parametrize("weights", [(0.3, 0.7), (0.5, 0.5), (1e-5, 1 - 1e-5)])
def test_laplace_mass_of_a_gaussian_mixture_is_its_weight(weights):
    log_density = mixture(weights)
    hessians = [finite_difference_hessian(log_density, m, np.ones(3)) for m in MEANS]
    weighed = weigh_modes(list(MEANS), [log_density(m) for m in MEANS], hessians)
    found = {int(np.argmin(np.abs(w.mode[0] - MEANS[:, 0]))): w.mass for w in weighed}
    # Closed form: the weights. Finite differences (step 1e-4) are good to about 1e-7 relative.
    np.testing.assert_allclose([found[0], found[1]], weights, rtol=1e-5)
    assert weighed[0].mass >= weighed[1].mass  # heaviest first
    assert [w.minor for w in weighed] == [False, min(weights) < MINOR_MODE_MASS]


def test_unknown_curvature_gives_unknown_masses_and_no_minor_mode():
    # A Hessian that is not negative definite (a saddle) has no Laplace mass; then no share is known.
    weighed = weigh_modes([np.zeros(2), np.ones(2)], [0.0, -20.0], [np.diag([1.0, -1.0]), -np.eye(2)])
    assert all(np.isnan(w.mass) for w in weighed) and not any(w.minor for w in weighed)


def test_a_mode_without_laplace_mass_far_below_is_minor():
    # No Laplace mass, and more than log(1000) + d log(100) (16.1 nats at d = 2) below the highest mode: minor,
    # left out of the normalisation, so the others' shares stay known.
    hessians = [-np.eye(2), -4.0 * np.eye(2), np.diag([1.0, -1.0])]
    weighed = weigh_modes([np.zeros(2), np.ones(2), 5 * np.ones(2)], [0.0, 0.0, -16.2], hessians)
    assert [w.minor for w in weighed] == [False, False, True] and np.isnan(weighed[2].mass)
    # Equal heights: masses in the ratio of the volumes, det(Sigma)^(1/2): 1 against 1/4 (closed form).
    np.testing.assert_allclose([weighed[0].mass, weighed[1].mass], [0.8, 0.2], rtol=1e-12)
    # Within the gap the mode may yet hold a share: every mass unknown, nothing minor.
    weighed = weigh_modes([np.zeros(2), 5 * np.ones(2)], [0.0, -16.0], [-np.eye(2), np.diag([1.0, -1.0])])
    assert not any(w.minor for w in weighed) and all(np.isnan(w.mass) for w in weighed)


def test_table_scope_rules():
    stuck = np.array([[0] * 100, [1] * 100, [0] * 100, [1] * 100])
    # Chains stuck in two regions of comparable mass: the heavier region's chains, not the whole posterior.
    scope = table_scope(stuck, [0.3, 0.7])
    assert (scope.chains, scope.excluded, scope.region, scope.whole) == ([1, 3], [0, 2], 1, False)
    # The other region negligible: its chains left out, and the table stands for the posterior.
    scope = table_scope(stuck, [1 - 1e-6, 1e-6])
    assert (scope.chains, scope.excluded, scope.whole) == ([0, 2], [1, 3], True)
    # A chain that moved between the regions: every chain pooled (R-hat judges the pool).
    moving = stuck.copy()
    moving[1, :50] = 0
    assert table_scope(moving, [0.3, 0.7]) == TableScope([0, 1, 2, 3])
    # Masses unknown: the region holding most chains, never the whole posterior.
    scope = table_scope(np.array([[0] * 10, [1] * 10, [1] * 10]), [np.nan, np.nan])
    assert (scope.chains, scope.whole) == ([1, 2], False)
    # One region: everything.
    assert table_scope(np.zeros((4, 10), int), [1.0]) == TableScope([0, 1, 2, 3])


def test_chain_stuck_in_a_minor_region_is_left_out_of_the_table():
    """Three chains drawn exactly from the main component, one from the minor one (weight 1e-5):
    the regions' Laplace masses are the weights, and the stuck chain is left out."""
    weights = (1e-5, 1 - 1e-5)
    log_density = mixture(weights)
    rng = np.random.default_rng(3)
    draws = np.stack([rng.multivariate_normal(MEANS[1 if c < 3 else 0], COVS[1 if c < 3 else 0], size=2000)
                      for c in range(4)])
    regions, note = find_regions(log_density, draws, tau=1.0, seed=0)
    assert note is None and len(regions) == 2
    by_place = sorted(regions, key=lambda r: r.mode[0])
    np.testing.assert_allclose([r.mass for r in by_place], weights, rtol=1e-4)
    assert by_place[0].minor and by_place[0].chains == [3]
    scope = table_scope(assign_draws(regions, draws), [r.mass for r in regions])
    assert scope.chains == [0, 1, 2] and scope.excluded == [3] and scope.whole
    finding = multimodal_finding(regions, ["a", "b", "c"])
    assert (finding.kind, finding.severity) == ("minor-mode", "warn") and "chains 3" in finding.message


def test_masses_checked_against_chains_that_move():
    """Independent draws from a 0.3/0.7 mixture in every chain: each chain moves between the regions, and the
    share of their draws agrees with the Laplace masses (binomial error of 8000 draws: 0.005)."""
    log_density = mixture((0.3, 0.7))
    rng = np.random.default_rng(4)
    pick = rng.random((4, 2000)) < 0.3
    draws = np.where(pick[..., None], rng.multivariate_normal(MEANS[0], COVS[0], (4, 2000)),
                     rng.multivariate_normal(MEANS[1], COVS[1], (4, 2000)))
    regions, _ = find_regions(log_density, draws, tau=1.0, seed=0)
    by_place = sorted(regions, key=lambda r: r.mode[0])
    np.testing.assert_allclose([r.free_share for r in by_place], [pick.mean(), 1 - pick.mean()], atol=0.01)
    np.testing.assert_allclose([r.mass for r in by_place], [0.3, 0.7], rtol=1e-4)
    assert abs(pick.mean() - 0.3) < 4 * np.sqrt(0.21 / pick.size)


MIX_MODES = np.array([[-4.0, 0.0, 0.0, 0.0], [4.0, 0.0, 0.0, 0.0]])


def separated_mixture(theta, w=0.3):
    # w N(-4 e1, I) + (1 - w) N(4 e1, I) in 4 dimensions: 8 sd apart, normalising constants equal.
    return np.logaddexp(np.log(w) - 0.5 * np.sum((theta - MIX_MODES[0]) ** 2),
                        np.log(1 - w) - 0.5 * np.sum((theta - MIX_MODES[1]) ** 2))


@pytest.mark.slow
def test_two_modes_of_comparable_mass_stay_critical_with_their_masses():
    result = walktune.tune(separated_mixture, np.array([0.5, 0.0, 0.0, 0.0]), seed=1)
    multimodal = [f for f in result.findings if f.kind == "multimodal"]
    assert multimodal and multimodal[0].severity == "critical"
    by_place = sorted(result.regions, key=lambda r: r.mode[0])
    # Closed form: the weights 0.3 and 0.7 (the Laplace approximation is exact for each Gaussian component).
    np.testing.assert_allclose([r.mass for r in by_place], [0.3, 0.7], atol=0.01)
    assert not result.converged
    payload = result.to_dict()
    assert [round(r["laplace_mass"], 2) for r in sorted(payload["regions"], key=lambda r: r["mode"][0])] == [0.3, 0.7]
    assert payload["posterior_table"]["converged"] is False


def test_reflection_sign_minor_mode_is_reported_with_its_mass_and_seeds_no_chain():
    """benchmarks/awkward_targets.reflection_sign: the sign of F is seen only through the prior, leaving a mode at
    F = -2.9 whose mass by quadrature (a fine 1-d grid, the Wilson line integrated out in closed form) is 1.65e-6.
    Its Laplace mass must be within a factor of 1.5 of that (the Laplace error at a mode of six quartic terms is of
    order 1/6 relative: a rule of thumb), no draw of any proof run may sit there, and the table's mean of F must be
    within 4 reported MCSE of the exact one."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))
    import awkward_targets as A

    target = A.build("reflection_sign")
    result = walktune.tune(target.log_density, target.start, names=target.names, seed=1, vectorized=True)
    minor = [f for f in result.findings if f.kind == "minor-mode"]
    assert minor and minor[0].severity == "info", [f.kind for f in result.findings]
    (reported,) = minor[0].evidence["minor_modes"]
    exact = target.extra["minor_mode_mass"]
    assert reported["mode"][0] < 0 and exact / 1.5 < reported["laplace_mass"] < 1.5 * exact
    assert "multimodal" not in {f.kind for f in result.findings}
    assert all(np.all(run.draws[:, :, 0] > 0) for run in result.runs.values())
    assert result.posterior_scope.whole and result.converged
    assert abs(result.posterior_mean[0] - target.mean[0]) <= 4 * result.posterior_mean_mcse[0]


def test_start_at_the_minor_mode_moves_to_the_main_one():
    """reflection_sign started at F = -2.5, beside the minor mode: the optimizer finds the minor mode, the climb
    from its mirror image finds the main one, which outweighs it by 1 / 1.7e-6 and becomes the mode the chains
    start from; the table's mean of F is within 4 MCSE of the exact one (quadrature)."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "benchmarks"))
    import awkward_targets as A

    target = A.build("reflection_sign")
    result = walktune.tune(target.log_density, np.array([-2.5, 0.5, 11.0]), names=target.names, seed=1,
                           vectorized=True)
    assert result.mode_fit.mode[0] > 0 and "negligible share" in result.mode_fit.message
    assert "minor-mode" in {f.kind for f in result.findings}
    assert all(np.all(run.draws[:, :, 0] > 0) for run in result.runs.values())
    assert abs(result.posterior_mean[0] - target.mean[0]) <= 4 * result.posterior_mean_mcse[0]


FAR_MODES = np.array([[-10.0, 0.0, 0.0], [10.0, 0.0, 0.0]])


def far_mixture(theta):
    # 0.3 N(-10 e1, I) + 0.7 N(10 e1, I): 20 sds apart, no random walk crosses (the dip is 50 nats).
    return np.logaddexp(np.log(0.3) - 0.5 * np.sum((theta - FAR_MODES[0]) ** 2),
                        np.log(0.7) - 0.5 * np.sum((theta - FAR_MODES[1]) ** 2))


@pytest.mark.slow
def test_chains_stuck_in_regions_of_comparable_mass_are_not_pooled():
    """The table comes from the chains of the heavier region only, names the others, and is marked not converged
    in TuneResult, advice.json and the console alike; within that region the posterior is N(10 e1, I) (closed
    form, up to exp(-50)), so the table's means are within 4 MCSE of it and its sds within 4 standard errors of 1
    (sd(x^2) / 2 = 1/sqrt(2) per effective draw, delta method)."""
    from rich.console import Console

    from walktune.console import posterior_table

    result = walktune.tune(far_mixture, np.array([0.5, 0.0, 0.0]), seed=1)
    scope = result.posterior_scope
    assert scope.region is not None and scope.excluded and not scope.whole
    assert set(scope.chains) | set(scope.excluded) == {0, 1, 2, 3}
    assert result.regions[scope.region].mode[0] > 0 and scope.region_mass == pytest.approx(0.7, abs=0.01)
    assert np.all(np.abs(result.posterior_mean - FAR_MODES[1]) <= 4 * result.posterior_mean_mcse)
    ess = (result.posterior_sd / result.posterior_mean_mcse) ** 2
    assert np.all(np.abs(result.posterior_sd - 1.0) <= 4 * np.sqrt(0.5 / ess))
    assert not result.converged
    table = result.to_dict()["posterior_table"]
    assert table["excluded_chains"] == scope.excluded and table["whole_posterior"] is False
    assert table["converged"] is False and table["mean"] == result.posterior_mean.tolist()
    console = Console(width=200, record=True)
    console.print(posterior_table(result, 200))
    text = console.export_text()
    assert "NOT the whole posterior" in text and "NOT CONVERGED" in text
    assert [f.severity for f in result.findings if f.kind == "multimodal"] == ["critical"]
