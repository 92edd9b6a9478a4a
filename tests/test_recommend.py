"""The recommendation and the honesty of the speed-ups, checked against chains with known truth.

Source of the truth: an AR(1) chain x_t = phi x_{t-1} + e_t has integrated
autocorrelation time (1 + phi) / (1 - phi) (textbook result), so the true ESS
of m chains of n draws is m n (1 - phi) / (1 + phi).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
import scipy.stats as st

from walktune import recommend as R
from walktune.diagnostics import IACTS_FOR_PRECISE_ESS, measure_chains


def ar1_chains(tau: float, chains: int, steps: int, rng) -> np.ndarray:
    """``chains`` AR(1) chains of IACT ``tau``, started from the stationary law; shape (chains, steps, 1)."""
    phi = (tau - 1) / (tau + 1)
    x = np.empty((chains, steps))
    x[:, 0] = rng.standard_normal(chains) / np.sqrt(1 - phi**2)
    noise = rng.standard_normal((chains, steps))
    for t in range(1, steps):
        x[:, t] = phi * x[:, t - 1] + noise[:, t]
    return x[:, :, None]


def _measure(tau, chains, steps, replicates, seed):
    """Per replicate: bulk ESS estimate / true ESS, and whether the run counts as not mixed at all."""
    rng = np.random.default_rng(seed)
    ratio, stuck = [], []
    for _ in range(replicates):
        s = measure_chains(ar1_chains(tau, chains, steps, rng))
        ratio.append(float(s.bulk_ess[0]) / (chains * steps / tau))
        stuck.append(R.not_mixed(float(s.iact[0]), steps, float(s.rhat[0])))
    return np.array(ratio), np.array(stuck)


@pytest.mark.slow
def test_chains_that_have_not_mixed_overestimate_ess_so_a_speedup_over_them_is_a_lower_bound():
    # tau = 10 x the chain length: each half-chain holds a twentieth of one autocorrelation time.
    ratio, stuck = _measure(tau=4000.0, chains=4, steps=400, replicates=100, seed=1)
    # Recognised as not mixed in most replicates (93% in a 300-replicate check simulation with seed 7);
    # allowed 3 binomial sds below that. The rest are called imprecise, which is true but less informative.
    assert stuck.mean() >= 0.93 - 3 * np.sqrt(0.93 * 0.07 / 100)
    # Where it is recognised, the ESS estimate is too high in every replicate: the speed-up over it is a lower bound.
    assert np.all(ratio[stuck] > 1.0)


@pytest.mark.slow
def test_short_mixing_chains_are_as_likely_under_as_over_estimated_so_the_speedup_is_imprecise():
    # tau = 20 with 4 x 400 steps: 80 IACTs in all, fewer than IACTS_FOR_PRECISE_ESS, so the ESS is flagged imprecise.
    replicates = 200
    ratio, stuck = _measure(tau=20.0, chains=4, steps=400, replicates=replicates, seed=2)
    assert 4 * 400 < IACTS_FOR_PRECISE_ESS * 20
    assert not stuck.any()  # never mistaken for chains that have not mixed
    share_over = np.mean(ratio > 1.0)
    # A coin: within 3 binomial sds of one half (a lower-bound claim would be wrong about half the time).
    assert abs(share_over - 0.5) < 3 * np.sqrt(0.25 / replicates)


@pytest.mark.slow
@pytest.mark.parametrize("tau, steps", [(3.0, 2000), (10.0, 2000), (20.0, 1000)])
def test_ess_relative_error_matches_the_spread_of_estimates_on_ar1(tau, steps):
    """The Sokal-style error used to resolve differences against the simulated spread of log ESS estimates."""
    replicates, chains = 150, 4
    ratio, _ = _measure(tau, chains, steps, replicates, seed=int(tau))
    simulated = np.std(np.log(ratio), ddof=1)
    predicted = R.ess_relative_error(tau, chains, steps)
    # The sd of a sample sd from `replicates` near-normal values has relative error 1/sqrt(2 (replicates - 1));
    # 3 of those either way, and the formula is meant to err on the safe (larger) side.
    slack = 3 / np.sqrt(2 * (replicates - 1))
    assert simulated * (1 - slack) <= predicted <= 1.6 * simulated * (1 + slack)


def _row(name, ess_per_1000, iact=5.0, steps=2000, chains=4, rhat=1.001, reliable=True, speedup=1.0, kind="measured"):
    return SimpleNamespace(
        proposal=name, ess_per_1000=ess_per_1000, iact_max=iact, max_rhat=rhat, ess_reliable=reliable,
        mixed=not R.not_mixed(iact, steps, rhat), ess_relative_error=R.ess_relative_error(iact, chains, steps),
        speedup=speedup, speedup_kind=kind, settle_evaluations=0, evaluations=chains * steps, acceptance=0.25,
    )


def test_a_row_measured_slower_is_never_recommended():
    rows = [_row("single-step", 10.0), _row("step-sizes", 60.0, speedup=6.0), _row("tuned-covariance", 12.0, speedup=1.2)]
    chosen = R.recommend(rows)
    assert chosen.proposal == "step-sizes" and chosen.resolved
    assert "6x" in chosen.message


def test_within_error_the_tuned_covariance_is_preferred_and_the_difference_is_said_unresolved():
    # IACT 40 over 4 x 400 draws: a relative error near 0.5, so 1.3x apart is not resolved.
    rows = [_row("single-step", 10.0, iact=40, steps=400, reliable=False),
            _row("tuned-covariance", 12.0, iact=40, steps=400, reliable=False, speedup=1.2, kind="imprecise"),
            _row("transformed-rotated", 15.6, iact=40, steps=400, reliable=False, speedup=1.56, kind="imprecise")]
    chosen = R.recommend(rows)
    assert chosen.proposal == "tuned-covariance" and not chosen.resolved
    assert "Not resolved" in chosen.message and chosen.evaluations_to_resolve > 0


def test_no_speed_up_is_stated_between_runs_whose_chains_disagree():
    # R-hat 1.18 (the twisted Gaussian's runs in docs/benchmarks.md): not stuck, but the chains have not
    # crossed the posterior, so an ESS ratio between the runs is not a speed-up.
    rows = [_row("single-step", 10.0, rhat=1.18), _row("step-sizes", 11.0, rhat=1.18, speedup=1.1),
            _row("tuned-covariance", 24.0, rhat=1.18, speedup=2.4)]
    chosen = R.recommend(rows)
    assert chosen.proposal == "tuned-covariance"
    assert "2.4x" not in chosen.message and "x of its efficiency" not in chosen.message, chosen.message
    assert "disagree (R-hat up to 1.18)" in chosen.message and "run longer" in chosen.message
    # The same rows with agreeing chains state the measured factor.
    agreeing = R.recommend([_row("single-step", 10.0), _row("step-sizes", 11.0, speedup=1.1),
                            _row("tuned-covariance", 24.0, speedup=2.4)])
    assert "measured at 2.4x that of single-step" in agreeing.message


def test_keep_the_current_proposal_when_nothing_beats_it():
    rows = [_row("current", 50.0), _row("step-sizes", 20.0, speedup=0.4), _row("tuned-covariance", 48.0, speedup=0.96)]
    chosen = R.recommend(rows)
    assert chosen.proposal == "current" and chosen.keep_current
    assert chosen.message.startswith("Keep your current proposal")


def test_a_run_that_has_not_mixed_is_not_recommended_however_high_its_estimate():
    stuck = _row("transformed-rotated", 90.0, iact=3000, steps=400, rhat=3.5, reliable=False, speedup=9.0)
    rows = [_row("single-step", 10.0), _row("tuned-covariance", 40.0, speedup=4.0), stuck]
    assert not stuck.mixed
    assert R.recommend(rows).proposal == "tuned-covariance"


def test_speedup_kinds():
    stuck = _row("single-step", 2.0, iact=3000, steps=400, rhat=3.0, reliable=False)
    good = _row("tuned-covariance", 40.0)
    rough = _row("step-sizes", 30.0, iact=40, steps=400, reliable=False)
    rough.settle_evaluations = R.evaluations_to_settle(40, 4, 400, False)
    assert R.speedup_kind(good, stuck)[0] == "lower-bound"
    assert R.speedup_kind(stuck, good)[0] == "upper-bound"
    kind, settle = R.speedup_kind(rough, good)
    assert kind == "imprecise" and settle == IACTS_FOR_PRECISE_ESS * 40
    assert R.speedup_kind(good, _row("current", 5.0))[0] == "measured"


def test_factors_beyond_any_plausible_range_print_as_a_bound():
    assert R.format_factor(7e60) == "> 1e6x"
    assert R.format_factor(float("inf")) == "> 1e6x"
    assert R.format_factor(2.345) == "2.35x"
    assert R.format_factor(float("nan")) == "n/a"


@pytest.mark.slow
def test_gamma_shape_below_one_beside_correlated_gaussians_completes_and_reports_sensibly(tmp_path):
    """A density unbounded at its bound (gamma shape 0.5) used to crash the job with a NaN IACT.

    Exact answers: the gamma marginal's mean k theta and sd sqrt(k) theta (scipy.stats.gamma).
    """
    import walktune

    shape, scale = 0.5, 2.0
    gaussian = st.multivariate_normal(np.zeros(2), [[1.0, 0.9], [0.9, 1.0]])

    def log_density(theta):
        g, x, y = theta
        return st.gamma.logpdf(g, shape, scale=scale) + gaussian.logpdf([x, y]) if g > 0 else -np.inf

    result = walktune.tune(log_density, [1.0, 0.0, 0.0], names=["g", "x", "y"], bounds={"g": (0, None)}, seed=0)
    result.save(tmp_path)
    exact = st.gamma(shape, scale=scale)
    row = next(r for r in result.comparison if r.proposal == result.recommended.proposal)
    # The table comes from the recommended run, which must have mixed for the comparison to be meaningful.
    assert result.posterior_run == result.recommended.proposal and row.mixed
    # Close to converged (R-hat within 1.05; 1.01 is the strict bar), and the table's flag says which side it is on.
    assert np.all(result.posterior_rhat < 1.05)
    assert result.converged == bool(np.all(result.posterior_rhat <= 1.01))
    mean, mcse, sd = result.posterior_mean[0], result.posterior_mean_mcse[0], result.posterior_sd[0]
    assert abs(mean - exact.mean()) < 4 * mcse
    # Relative error of a sample sd from ESS draws: about sqrt((excess kurtosis + 2) / (4 ESS)); excess kurtosis 6 / k.
    ess = row.ess_per_1000 * row.evaluations / 1000
    assert abs(sd / exact.std() - 1) < 4 * np.sqrt((6 / shape + 2) / (4 * ess))
    # No option measured faster than the recommended one beyond the error.
    assert not any(R.measured_faster(other, row) for other in result.comparison)
    assert (tmp_path / "recommended_proposal.npy").exists()
    # pilot_converged, the findings and the table agree.
    kinds = {f.kind for f in result.findings}
    assert ("not-converged" in kinds) == (not result.converged)
    assert result.pilot_converged == (("pilot-unsettled" not in kinds) and ("not-converged" not in kinds))

    # The terminal leads with the recommendation, takes the posterior table from that run and says so,
    # and prints an absurd predicted slow-down as a bound.
    from rich.console import Console

    from walktune.console import render

    result.advice.slowdowns["step_sizes"]["slowest_parameter"] = 7e60
    console = Console(width=200, record=True)
    render(console, result, "gamma", str(tmp_path))
    text = " ".join(console.export_text().split())  # titles wrap at the table's width
    assert text.index("RECOMMENDED") < text.index("Measured") < text.index("Posterior")
    assert f"from the {result.recommended.proposal} fixed-proposal run" in text
    assert "> 1e6x" in text and "e+60" not in text


def test_a_direction_no_chain_moved_in_does_not_break_the_pilot_shrinkage_or_the_thinning():
    """NaN autocorrelation times (no chain moved in a coordinate) used to crash int(ceil(tau))."""
    from walktune.geometry import _thin_to_independent, within_chain_iact
    from walktune.pilot import shrunk_covariance

    rng = np.random.default_rng(0)
    draws = rng.standard_normal((4, 200, 2))
    draws[:, :, 1] = 0.5  # every chain stuck in the second coordinate
    try:
        shrunk_covariance(draws, np.eye(2))
    except np.linalg.LinAlgError:
        pass  # a singular estimate is the pilot's to reject (it keeps its current covariance)
    draws[1] = draws[1, 0]  # and one chain stuck altogether
    tau = within_chain_iact(draws)
    assert np.isfinite(tau)
    assert _thin_to_independent(draws, float("nan")).shape == (4, 2)


def test_a_numerical_failure_inside_the_job_is_a_one_line_error(monkeypatch):
    import sys

    import walktune
    from walktune.errors import NumericalFailure, WalktuneError

    job = sys.modules["walktune.tune"]

    def failing_analysis(covariance):
        raise FloatingPointError("overflow encountered in multiply")

    monkeypatch.setattr(job, "analyse", failing_analysis)
    with pytest.raises(NumericalFailure) as caught:
        walktune.tune(lambda x: -0.5 * float(x @ x), [0.1, 0.2], seed=0, budget=8000)
    assert isinstance(caught.value, WalktuneError)
    message = str(caught.value)
    assert "\n" not in message and "numerical failure" in message and "FloatingPointError" in message


@pytest.mark.slow
def test_a_current_proposal_at_the_optimum_is_kept():
    """On a Gaussian, the optimal random-walk proposal is (2.38^2 / d) times the covariance (Roberts, Gelman and
    Gilks 1997): a user already using it cannot be measured slower than walktune's tuned covariance, beyond the error,
    and is told to keep it."""
    import walktune

    covariance = np.array([[4.0, 1.8], [1.8, 1.0]])
    precision = np.linalg.inv(covariance)
    optimal = 2.38**2 / 2 * covariance
    result = walktune.tune(lambda x: -0.5 * x @ precision @ x, [0.3, -0.2], current_proposal=optimal, seed=4)
    rows = {row.proposal: row for row in result.comparison}
    assert not any(R.measured_faster(other, rows["current"]) for other in result.comparison)
    assert result.recommended.proposal == "current" and result.recommended.keep_current
    assert result.recommended.message.startswith("Keep your current proposal")
    np.testing.assert_allclose(result.recommended_proposal, optimal)


def test_poor_acceptance_is_one_finding_that_explains_the_recommended_run():
    # Thresholds 0.1 / 0.7 are common practice; 0.234 is Roberts, Gelman and Gilks (1997).
    from walktune.findings import acceptance_findings

    rows = [SimpleNamespace(proposal=name, acceptance=rate)
            for name, rate in (("single-step", 0.065), ("step-sizes", 0.059), ("tuned-covariance", 0.3))]
    found = acceptance_findings(rows, recommended="step-sizes")
    assert len(found) == 1 and found[0].kind == "poor-acceptance"
    assert found[0].evidence["proposals"] == {"single-step": 0.065, "step-sizes": 0.059}
    assert "step-sizes is still recommended" in found[0].message and "scaled by 0.5" in found[0].message
    # A recommended run with a good rate is not explained away in a finding about the others.
    assert "still recommended" not in acceptance_findings(rows, recommended="tuned-covariance")[0].message


def test_a_lower_bound_over_a_stuck_baseline_is_stated_as_such():
    # Issue 12 item 3: where the baseline's chains have not mixed at all its ESS is too high, so the speed-up over
    # it is a lower bound and is said as one (not withheld as between two unmixed runs).
    baseline = SimpleNamespace(proposal="single-step", speedup=1.0, speedup_kind="baseline", max_rhat=3.5,
                               ess_per_1000=5.5)
    tuned = SimpleNamespace(proposal="tuned-covariance", speedup=19.6, speedup_kind="lower-bound", max_rhat=1.006,
                            ess_per_1000=108.0)
    text = R._message(tuned, [], baseline, None, None)
    assert "at least 19.6x that of single-step (a lower bound" in text and "no speed-up" not in text


def test_within_error_a_row_measured_faster_with_a_reliable_ess_is_recommended_and_said_unresolved():
    # Issue 12, item 2: never recommend a row that a measured row shows slower. inspection_line's proof (seed 1)
    # ended with both runs at 2,799 steps, reliable: tuned-covariance 29.96, transformed-rotated 31.10 per 1000.
    rows = [_row("single-step", 5.45, iact=199, steps=200, rhat=3.6, reliable=False),
            _row("tuned-covariance", 29.96, iact=37.1, steps=2799, rhat=1.015, speedup=5.5),
            _row("transformed-rotated", 31.10, iact=18.5, steps=2799, rhat=1.011, speedup=5.7)]
    chosen = R.recommend(rows)
    assert chosen.proposal == "transformed-rotated" and not chosen.resolved and chosen.close == ["tuned-covariance"]
    assert "Not resolved: tuned-covariance measured within the error of it" in chosen.message
    # An imprecise figure above the preferred row's is what the proof extends, not what it recommends.
    imprecise = rows[:2] + [_row("transformed-rotated", 40.0, iact=31.7, steps=200, rhat=1.12, reliable=False)]
    assert R.recommend(imprecise).proposal == "tuned-covariance"
    # The user's current proposal is kept while nothing is measured faster beyond the error.
    assert R.recommend([_row("current", 29.96), rows[2]]).proposal == "current"


def test_a_contender_goes_along_while_its_upper_end_lies_above_the_leader():
    # Relative errors from Sokal (1997) through ess_relative_error: IACT 31.7 over 4 x 200 draws gives 0.63.
    leader = _row("tuned-covariance", 35.99, iact=42, steps=200, rhat=1.10, reliable=False)
    close = _row("transformed-rotated", 33.91, iact=31.7, steps=200, rhat=1.12, reliable=False)
    assert abs(close.ess_relative_error - 0.63) < 0.01
    assert R.could_beat(close, leader)  # 33.91 exp(0.63) is above 35.99
    # A run measured ten times slower after a first round is not taken along: 3.6 exp(0.63) is far below.
    assert not R.could_beat(_row("step-sizes", 3.6, iact=31.7, steps=200, reliable=False), leader)
    # Nor while the leader's chains disagree (its figure cannot be compared yet), nor a run that has not mixed.
    assert not R.could_beat(close, _row("tuned-covariance", 35.99, iact=42, steps=200, rhat=1.6, reliable=False))
    stuck = _row("single-step", 90.0, iact=3000, steps=200, rhat=3.5, reliable=False)
    assert not stuck.mixed and not R.could_beat(stuck, leader)
    assert not R.could_beat(leader, leader)
