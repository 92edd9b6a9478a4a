"""The pilot's draws in memory: bounded by PILOT_DRAWS_MEMORY, thinned beyond it, and still a right covariance.

The bound is lowered here (monkeypatch) so that it bites at a small dimension;
at d = 300 with the default budget the default bound keeps every 22nd state
(docs/benchmarks.md, bench_dims).
"""

import json

import numpy as np
import pytest

from typer.testing import CliRunner

import walktune
from walktune import diagnostics, pilot, shrinkage
from walktune.engine import thinning_for
from walktune.cli import app
from walktune.stages import minimum_budget

from conftest import assert_one_line_error, correlated_gaussian


def kept_bytes(result) -> int:
    return sum(draws.nbytes for draws in result.all_draws)


def run(log_density, dim, budget, seed=5, **options):
    start = np.random.default_rng(seed).standard_normal((4, dim))
    return pilot.run_pilot(log_density, start, np.eye(dim), budget, np.random.SeedSequence(seed), vectorized=True,
                           **options)


def test_blocked_covariance_and_iact_are_numpy_and_the_unblocked_ones(monkeypatch):
    # Reference: numpy.cov of the pooled rows, and diagnostics.iact of all parameters at once.
    monkeypatch.setattr(shrinkage, "_BLOCK_BYTES", 8 * 7 * 3)  # blocks of 3 rows (d = 7), of 1 parameter in the IACT
    x = np.random.default_rng(1).standard_normal((3, 50, 7)).cumsum(axis=1)  # autocorrelated, as chains are
    np.testing.assert_allclose(shrinkage._blocked_covariance(x), np.cov(x.reshape(-1, 7), rowvar=False), rtol=1e-12)
    np.testing.assert_allclose(shrinkage._blocked_iact(x), np.asarray(diagnostics.iact(x)), rtol=1e-12)
    # Whitening in blocks of rows in place: L^{-1} (x - centre), as one solve of all rows gives.
    reference = np.cov(x.reshape(-1, 7), rowvar=False)
    chol = np.linalg.cholesky(reference)
    centre = x.reshape(-1, 7).mean(axis=0)
    white = x.copy()
    shrinkage._whiten_in_place(white, centre, chol)
    np.testing.assert_allclose(white.reshape(-1, 7), np.linalg.solve(chol, (x.reshape(-1, 7) - centre).T).T,
                               rtol=1e-10, atol=1e-12)
    # The whole estimate in blocks (as draws beyond _WHOLE_BYTES are) is the one in one piece, to rounding; without
    # overwrite, the caller's draws are left as they were.
    for within in (False, True):
        monkeypatch.setattr(shrinkage, "_WHOLE_BYTES", 0)
        before = x.copy()
        blocked = shrinkage.shrunk_covariance(x, reference, within_chains=within)
        np.testing.assert_array_equal(x, before)
        monkeypatch.setattr(shrinkage, "_WHOLE_BYTES", 2**25)
        whole = shrinkage.shrunk_covariance(x, reference, within_chains=within)
        np.testing.assert_allclose(blocked[0], whole[0], rtol=1e-10)
        assert blocked[1] == pytest.approx(whole[1], rel=1e-10) and blocked[2] == whole[2]


def test_pilot_keeps_at_most_the_bound_and_still_finds_the_covariance(monkeypatch):
    dim, budget, window = 6, 100_000, 1000
    log_density, cov = correlated_gaussian(dim)
    unbounded = run(log_density, dim, budget, first_window=window)
    bound = 2**18  # 256 KiB: about a nineteenth of what the budget's states would take (4.8 MB)
    monkeypatch.setattr(pilot, "PILOT_DRAWS_MEMORY", bound)
    monkeypatch.setattr(pilot, "MIN_KEPT_PER_STAGE", 50)
    bounded = run(log_density, dim, budget, first_window=window)
    k = thinning_for(4, budget // 4, dim, bound)
    assert k == 19
    # Every stage (at least 1000 steps: 50 kept per chain even thinned) keeps every k-th state.
    assert [stage.kept_every for stage in bounded.stages] == [k] * len(bounded.stages)
    for stage, draws in zip(bounded.stages, bounded.all_draws):
        assert draws.shape[1] == -(-stage.steps // k)
    # The bound is what limited it: the same pilot unbounded kept more than the bound; bounded, at most the bound
    # plus one state per chain a stage (rounding up).
    assert kept_bytes(unbounded) > bound
    assert kept_bytes(bounded) <= bound + 8 * 4 * dim * len(bounded.stages)
    # Thinning changes what is stored, not the chain: the first stage's states are every k-th of the unbounded one's.
    steps = bounded.stages[0].steps
    np.testing.assert_array_equal(bounded.all_draws[0], unbounded.all_draws[0][:, (steps - 1) % k :: k])
    assert bounded.stages[0].acceptance_rate == unbounded.stages[0].acceptance_rate
    # The covariance against the closed form S, in each parameter and each principal direction v of S: the
    # variance of a fixed projection of Gaussian draws has relative standard error sqrt(2 / n) from n independent
    # draws (chi-square); n: the smallest ESS (diagnostics.ess) of the pooled draws' projections. Within 5 of them.
    _, vectors = np.linalg.eigh(cov)
    directions = np.hstack([np.eye(dim), vectors])
    n_eff = float(np.min(diagnostics.ess(bounded.draws @ directions)))
    assert n_eff > 50
    estimated = np.einsum("ij,ik,kj->j", directions, bounded.covariance, directions)
    true = np.einsum("ij,ik,kj->j", directions, cov, directions)
    assert np.all(np.abs(estimated / true - 1) < 5 * np.sqrt(2 / n_eff)), (estimated / true, n_eff)


def test_pilot_is_unchanged_where_the_bound_does_not_bite():
    dim = 6
    log_density, _ = correlated_gaussian(dim)
    result = run(log_density, dim, 20_000)
    assert kept_bytes(result) <= pilot.PILOT_DRAWS_MEMORY
    assert all(stage.kept_every == 1 for stage in result.stages)
    assert sum(d.shape[1] for d in result.all_draws) == sum(stage.steps for stage in result.stages)


def test_export_says_which_states_the_pilot_kept(monkeypatch, tmp_path):
    dim = 4
    log_density, _ = correlated_gaussian(dim, seed=2)
    monkeypatch.setattr(pilot, "PILOT_DRAWS_MEMORY", 2**14)
    monkeypatch.setattr(pilot, "MIN_KEPT_PER_STAGE", 50)
    result = walktune.tune(log_density, np.ones(dim), vectorized=True, seed=3, budget=4 * minimum_budget(dim, 4))
    result.save(tmp_path)
    advice = json.loads((tmp_path / "advice.json").read_text())
    kept = advice["pilot_draws_kept_every"]
    assert kept == [stage.kept_every for stage in result.pilot.stages] and max(kept) > 1
    with np.load(tmp_path / "draws.npz") as archive:
        stored = archive["pilot"]
    assert stored.shape[1] == sum(-(-stage.steps // k) for stage, k in zip(result.pilot.stages, kept))
    np.testing.assert_array_equal(stored, np.concatenate(result.pilot.all_draws, axis=1))
    # Inspecting those draws would give an IACT in stored states of differing thinning: refused in one line.
    refused = CliRunner().invoke(app, ["inspect", str(tmp_path), "--run", "pilot"])
    assert_one_line_error(refused, "pilot_draws_kept_every", "--run tuned-covariance")


def test_budget_statement_counts_the_pilot_within_its_bound():
    from walktune.planning import budget_statement
    from walktune.stages import PROOF_DRAWS_MEMORY, Budget

    # d = 300 at the default budget: 3.6 million pilot evaluations would be 8.6 GB of draws; the pilot keeps at most
    # its bound, and the proof's three runs about PROOF_DRAWS_MEMORY each.
    big = budget_statement(Budget.plan(None, 300, 4))
    assert big.memory <= pilot.PILOT_DRAWS_MEMORY + 3 * PROOF_DRAWS_MEMORY + 8 * 300 * 4 * 3
    assert f"{big.memory / 1e9:.2g} GB" in big.message
    # d = 30: far below the bound, every pilot state counted (mode search's 2 d^2 Hessian points aside).
    small = budget_statement(Budget.plan(None, 30, 4))
    assert small.memory == 8 * 30 * (small.pilot - 2 * 30 * 30 + small.proof)


def test_proof_pools_thinned_runs_by_their_stored_draws():
    # A proof whose runs keep every 9th state (as at d = 300 with the default budget) and stopped at different
    # lengths: the pool cuts them in pieces of the shortest run's stored draws (it used to take steps for draws).
    from walktune.engine import sample
    from walktune.stages import Proof

    log_density, cov = correlated_gaussian(3)
    runs = {name: sample(log_density, np.zeros(3), cov, steps, seed=i, vectorized=True, chains=4, thin=9)
            for i, (name, steps) in enumerate([("step-sizes", 5000), ("tuned-covariance", 15000)])}
    proof = Proof(rows=[], runs=runs, stats={}, steps={})
    draws, log_density_pool, chains = proof.pooled()
    assert runs["step-sizes"].draws.shape[1] == 556 and runs["tuned-covariance"].draws.shape[1] == 1667
    assert draws.shape == (4 + 4 * 2, 556, 3)  # the longer run: its last two whole pieces of 556 stored draws
    np.testing.assert_array_equal(draws[:4], runs["step-sizes"].draws)
    np.testing.assert_array_equal(draws[4::2], runs["tuned-covariance"].draws[:, 555:1111])
    np.testing.assert_array_equal(draws[5::2], runs["tuned-covariance"].draws[:, 1111:])
    assert log_density_pool.shape == draws.shape[:2] and chains.tolist() == [0, 1, 2, 3, 0, 0, 1, 1, 2, 2, 3, 3]
