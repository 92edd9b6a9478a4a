"""Proof runs in rounds sized by need (walktune.proof), checked against truths from outside the project.

Sources:
- Gaussian targets: optimal random-walk IACT about 3 d and the 2.38 / sqrt(d) scale (Roberts, Gelman and
  Gilks 1997, recalled); a single step size on a condition-1e4 Gaussian must crawl along the long axis.
- Reference efficiencies: benchmarks/plain_rwm.py, a plain random-walk Metropolis sampler written apart
  from walktune's engine, started from exact draws of the Gaussian (numpy), run long.
- R-hat below 1.01: Vehtari et al. (2021), Bayesian Analysis 16(2).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

import walktune
from walktune import diagnostics as D
from walktune import recommend as R
from walktune.diagnostics import IACTS_FOR_PRECISE_ESS

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
from plain_rwm import run_chains  # noqa: E402
from conftest import rotated_gaussian  # noqa: E402


@pytest.fixture(scope="module")
def stuck_baseline():
    log_density, cov, mean = rotated_gaussian(10, 1e4, seed=10)
    return walktune.tune(log_density, np.zeros(10), seed=1, vectorized=True), log_density, cov, mean


def test_a_stuck_single_step_is_stopped_early_and_the_speedup_over_it_is_a_lower_bound(stuck_baseline):
    result, _, _, _ = stuck_baseline
    rows = {row.proposal: row for row in result.comparison}
    baseline, tuned = rows["single-step"], rows["tuned-covariance"]
    # One step size on a condition-1e4 Gaussian has not mixed after its first round: stopped there, far
    # shorter than the recommended run, which the rounds extended.
    assert not baseline.mixed and baseline.proof_end == "slower"
    assert baseline.steps < tuned.steps / 4
    assert result.recommended.proposal == "tuned-covariance"
    assert tuned.speedup_kind == "lower-bound" and tuned.speedup > 1
    # The proof spent far less than three equal runs of the recommended run's length.
    assert sum(row.evaluations for row in result.comparison) < 1.5 * tuned.evaluations
    # Per-run lengths are in advice.json's rows.
    out = {row["proposal"]: row for row in result.to_dict()["comparison"]}
    assert out["single-step"]["steps"] == baseline.steps and out["tuned-covariance"]["steps"] == tuned.steps


@pytest.fixture(scope="module")
def slow_baselines():
    log_density, cov, mean = rotated_gaussian(10, 1e2, seed=10)
    return walktune.tune(log_density, np.zeros(10), seed=1, vectorized=True), log_density, cov, mean


@pytest.mark.parametrize("case", ["stuck_baseline", "slow_baselines"])
def test_stopped_rows_agree_with_a_plain_sampler_within_their_claimed_error(case, request):
    """A stopped run's efficiency is an upper bound where it has not mixed, else within its relative error."""
    result, log_density, cov, mean = request.getfixturevalue(case)
    rng = np.random.default_rng(3)
    # Runs stopped before the recommended one: measured slower, or left at their length (imprecise).
    longest = result.runs[result.recommended.proposal].n_steps
    stopped = [row for row in result.comparison if row.steps < longest]
    assert len(stopped) == 2
    if case == "slow_baselines":
        assert all(row.mixed for row in stopped)  # the mixed branch below is exercised
    for row in stopped:
        proposal = result.runs[row.proposal].proposal_cov
        # Reference: 16 chains from exact draws, 40 times the stopped run's length (plain sampler).
        start = rng.multivariate_normal(mean, cov, size=16)
        draws, _ = run_chains(log_density, start, proposal, 40 * row.steps, rng)
        reference = float(np.min(D.bulk_ess(draws))) / draws[:, :, 0].size * 1000
        if not row.mixed:
            assert row.ess_per_1000 > reference  # its ESS is too high: a bound, as labelled
        else:
            # 3 of the row's claimed relative errors (Sokal 1997), the reference's own error beside it.
            tau_reference = draws[:, :, 0].size / float(np.min(D.bulk_ess(draws)))
            reference_error = R.ess_relative_error(tau_reference, 16, draws.shape[1])
            assert abs(np.log(row.ess_per_1000 / reference)) < 3 * np.hypot(row.ess_relative_error, reference_error)


@pytest.mark.slow
def test_the_recommended_run_is_settled_by_default_on_a_correlated_gaussian():
    log_density, cov, mean = rotated_gaussian(3, 1e2, seed=3)
    result = walktune.tune(log_density, np.zeros(3), seed=1, vectorized=True)
    chosen = next(row for row in result.comparison if row.proposal == result.recommended.proposal)
    # ESS reliable: at least IACTS_FOR_PRECISE_ESS autocorrelation times over the chains; R-hat below 1.01.
    assert chosen.ess_reliable and chosen.ess_per_1000 * chosen.evaluations / 1000 >= IACTS_FOR_PRECISE_ESS
    assert chosen.max_rhat < 1.01 and result.converged and chosen.proof_end == "settled"
    assert "proof-unsettled" not in {f.kind for f in result.findings}
    # The posterior table from that run: means within 4 MCSE of the truth.
    assert np.all(np.abs(result.posterior_mean - mean) < 4 * result.posterior_mean_mcse)


def test_a_tight_budget_says_what_is_missing_and_how_many_evaluations_would_settle_it():
    log_density, _, _ = rotated_gaussian(10, 1e2, seed=10)
    result = walktune.tune(log_density, np.zeros(10), seed=1, vectorized=True, budget=12_000)
    assert result.total_evaluations <= 12_000
    chosen = next(row for row in result.comparison if row.proposal == result.recommended.proposal)
    assert chosen.proof_end == "budget"
    finding = next(f for f in result.findings if f.kind == "proof-unsettled")
    more = finding.evidence["evaluations_more"]
    # The number is the extrapolation from the run's own measures (250 IACTs; R-hat - 1 falling as 1 / n).
    needed = max(IACTS_FOR_PRECISE_ESS * chosen.iact_max,
                 chosen.evaluations * (chosen.max_rhat - 1) / 0.01 if chosen.max_rhat >= 1.01 else 0)
    assert more == int(np.ceil(needed - chosen.evaluations)) and more > 0
    assert f"{more:,} more evaluations" in finding.message
    assert ("ESS" in finding.message) == (not chosen.ess_reliable)
    assert ("R-hat" in finding.message) == (not chosen.max_rhat < 1.01)


def test_rounds_are_deterministic_given_the_seed():
    log_density, _, _ = rotated_gaussian(4, 1e3, seed=4)
    a = walktune.tune(log_density, np.zeros(4), seed=7, vectorized=True, budget=20_000)
    b = walktune.tune(log_density, np.zeros(4), seed=7, vectorized=True, budget=20_000)
    assert a.to_dict()["comparison"] == b.to_dict()["comparison"]
    for name in a.runs:
        np.testing.assert_array_equal(a.runs[name].draws, b.runs[name].draws)


def test_runs_in_new_coordinates_carry_the_users_log_density_at_their_draws():
    """Every run's log-densities are the user's at its draws, whatever coordinates it ran in.

    Reference: the closed-form Beta and Gamma log-densities of benchmarks/awkward_targets.py's inspection_line
    (scipy.stats.beta, scipy.stats.gamma). The detectors pool runs and compare their log-densities
    (walktune.funnels.chains_apart); a run in new coordinates evaluates log p(theta(z)) + log |det d theta / d z|.
    """
    import awkward_targets as A

    target = A.build("inspection_line")
    result = walktune.tune(target.log_density, target.start, names=target.names, bounds=target.bounds, seed=1,
                           vectorized=True)
    run = result.runs["transformed-rotated"]
    expected = target.log_density(run.draws.reshape(-1, target.dim)).reshape(run.log_density.shape)
    assert np.allclose(run.log_density, expected, rtol=1e-9, atol=1e-6)
    # The run in the user's parameters too, for comparison (the engine stores the evaluator's values).
    tuned = result.runs["tuned-covariance"]
    user = target.log_density(tuned.draws.reshape(-1, target.dim)).reshape(tuned.log_density.shape)
    assert np.allclose(tuned.log_density, user, rtol=1e-9, atol=1e-6)
