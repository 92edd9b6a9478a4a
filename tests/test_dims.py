"""Many parameters: work skipped where it cannot matter, the budget said up front, stop requests between evaluations.

Speed and memory at d = 100, 300 and 1000, and Ctrl-C latency, are measured in
benchmarks/bench_dims.py (docs/benchmarks.md), not here.
"""

import numpy as np
import pytest
from typer.testing import CliRunner

import walktune
from walktune import reparam, theory
from walktune.checkpoint import Checkpoint, Interrupted
from walktune.cli import app
from walktune.diagnostics import IACTS_FOR_PRECISE_ESS, measure_chains
from walktune.engine import sample
from walktune.planning import budget_statement, optimal_iact
from walktune.stages import Budget, minimum_budget, proof_thinning
from conftest import correlated_gaussian, raised_in


# --------------------------------------------------------------------------- transform scoring


def test_no_transform_scoring_for_unbounded_parameters(monkeypatch):
    calls = []
    original = reparam.joint_score
    monkeypatch.setattr(reparam, "joint_score", lambda *a: calls.append(1) or original(*a))
    draws = np.random.default_rng(1).standard_normal((2000, 40))
    bounds = np.tile([-np.inf, np.inf], (40, 1))
    choices = reparam.choose_transforms(draws, [f"p{i}" for i in range(40)], bounds)
    assert calls == []
    assert all(c.kind == "identity" and c.scores == {} for c in choices)


def test_scoring_cost_does_not_grow_with_unbounded_parameters(monkeypatch):
    # One positive parameter among many unbounded ones: only it is scored, whatever d.
    counts = {}
    original = reparam.joint_score
    for dim in (3, 30):
        calls = []
        monkeypatch.setattr(reparam, "joint_score", lambda *a, calls=calls: calls.append(1) or original(*a))
        rng = np.random.default_rng(2)
        draws = rng.standard_normal((3000, dim))
        draws[:, 0] = np.exp(0.8 * draws[:, 0])  # log-normal: Gaussian in log (closed form)
        bounds = np.tile([-np.inf, np.inf], (dim, 1))
        bounds[0, 0] = 0.0
        choices = reparam.choose_transforms(draws, [f"p{i}" for i in range(dim)], bounds)
        assert choices[0].kind == "log" and set(choices[0].scores) == {"identity", "log"}
        assert all(c.scores == {} for c in choices[1:])
        counts[dim] = len(calls)
    assert counts[3] == counts[30]


# --------------------------------------------------------------------------- the budget said up front


def test_budget_statement_at_the_smallest_budget_says_it_is_too_small():
    dim, chains = 300, 4
    smallest = minimum_budget(dim, chains)
    statement = budget_statement(Budget.plan(smallest, dim, chains))
    assert not statement.trustworthy and statement.proof == 50 * 3 * chains
    assert "Too small for trustworthy figures" in statement.message and f"{statement.needed:,}" in statement.message
    # Roberts, Gelman and Gilks (1997): efficiency 0.33 / d, so the best possible IACT is about d / 0.33 = 909.
    assert optimal_iact(dim) == pytest.approx(dim / 0.33, rel=0.01)
    # The budget it names gives the recommended run IACTS_FOR_PRECISE_ESS of those IACTs (Sokal 1997: 20% ESS error),
    # and a budget 1% smaller does not.
    enough = budget_statement(Budget.plan(statement.needed, dim, chains))
    assert enough.trustworthy and enough.iacts >= IACTS_FOR_PRECISE_ESS
    fewer = budget_statement(Budget.plan(int(0.99 * statement.needed), dim, chains))
    assert not fewer.trustworthy


def test_default_budget_statement_is_trustworthy_and_adds_up():
    for dim in (2, 30, 300):
        statement = budget_statement(Budget.plan(None, dim, 4))
        assert statement.trustworthy and statement.needed is None
        assert statement.planned == statement.pilot + statement.proof + statement.reserve
        assert statement.recommended <= statement.proof


def test_tune_returns_the_statement_and_keeps_to_it():
    log_density, _ = correlated_gaussian(4)
    budget = minimum_budget(4, 4)
    result = walktune.tune(log_density, np.ones(4), vectorized=True, seed=3, budget=budget)
    found = [f for f in result.findings if f.kind == "budget"]
    assert len(found) == 1 and found[0].severity == "warn"
    evidence = found[0].evidence
    assert evidence["budget"] == budget and not evidence["trustworthy"] and evidence["trustworthy_budget"] > budget
    # The proof's runs together stay within the proof planned (the pilot may stop early, leaving it more); the cap holds.
    assert sum(run.evaluations for run in result.runs.values()) <= budget - result.pilot_evaluations
    assert result.total_evaluations <= budget
    plenty = walktune.tune(log_density, np.ones(4), vectorized=True, seed=3)
    assert [f.severity for f in plenty.findings if f.kind == "budget"] == ["info"]


def write_model(folder, dim):
    path = folder / "model.py"
    path.write_text(
        "import numpy as np\n"
        "VECTORIZED = True\n"
        f"PARAMETERS = {{f'x{{i}}': 0.5 for i in range({dim})}}\n"
        "def log_density(x):\n"
        "    x = np.atleast_2d(x)\n"
        "    return -0.5 * np.sum(x * x, axis=1)\n"
    )
    return f"{path}:log_density"


def test_cli_says_the_budget_before_running(tmp_path):
    target = write_model(tmp_path, 3)
    small = minimum_budget(3, 4)
    result = CliRunner().invoke(app, ["tune", target, "--seed", "1", "--budget", str(small), "--quiet",
                                      "--out", str(tmp_path / "a")])
    assert result.exit_code == 0, result.output
    assert "warning: a budget of" in result.stderr and "Too small for trustworthy figures" in result.stderr
    result = CliRunner().invoke(app, ["tune", target, "--seed", "1", "--out", str(tmp_path / "b")])
    assert result.exit_code == 0, result.output
    assert "budget: the default budget for 3 parameters" in result.stderr
    assert "Too small" not in result.stderr


# --------------------------------------------------------------------------- stop requests without evaluations


@pytest.mark.parametrize("stage", ["pilot", "proof"])
def test_stop_request_is_honoured_in_a_long_step_between_evaluations(tmp_path, stage):
    # Asked for as the stage ends: what follows (new coordinates after the pilot; the run's diagnostics and the
    # geometry checks after the last proof run) computes before any evaluation, and must stop there.
    log_density, _ = correlated_gaussian(6)
    checkpoint = Checkpoint(tmp_path, {"test": stage}, every=0)
    asked = {}

    def progress(name, done, total):
        if name == stage and done >= total and not asked:
            asked["count"] = checkpoint.evaluations
            checkpoint.request_stop()

    with pytest.raises(Interrupted) as stop:
        walktune.tune(log_density, np.ones(6), vectorized=True, seed=1, progress=progress, checkpoint=checkpoint)
    assert checkpoint.evaluations == asked["count"]  # no evaluation after the request
    frames = raised_in(stop.value)
    assert "stop_point" in frames and "evaluate" not in frames
    assert stop.value.partial is not None and stop.value.partial["partial"]


# --------------------------------------------------------------------------- thinned proof runs


def test_thinned_run_keeps_every_kth_state_of_the_same_chain():
    log_density, cov = correlated_gaussian(5)
    proposal = theory.optimal_proposal(cov)
    full = sample(log_density, np.zeros((4, 5)), proposal, 1003, seed=7, vectorized=True)
    thinned = sample(log_density, np.zeros((4, 5)), proposal, 1003, seed=7, vectorized=True, thin=4)
    assert thinned.thin == 4 and thinned.n_steps == 1003 and thinned.draws.shape == (4, 251, 5)
    np.testing.assert_array_equal(thinned.draws, full.draws[:, 1002 % 4 :: 4])
    np.testing.assert_array_equal(thinned.last, full.last)
    np.testing.assert_array_equal(thinned.accepted, full.accepted)


def test_thinning_well_below_the_iact_keeps_the_ess():
    # A thinned chain's ESS is the full chain's when the thinning is far below the IACT (AR(1) closed form:
    # IACT (1 + phi) / (1 - phi) = 199 at phi = 0.99); 8 chains x 200,000 steps, ESS error about 20% / sqrt(32).
    rng = np.random.default_rng(11)
    phi, n = 0.99, 200_000
    noise = rng.standard_normal((8, n, 1)) * np.sqrt(1 - phi**2)
    x = np.empty_like(noise)
    x[:, 0] = rng.standard_normal((8, 1))
    for t in range(1, n):
        x[:, t] = phi * x[:, t - 1] + noise[:, t]
    full, thin = measure_chains(x), measure_chains(x[:, 9::10])
    assert thin.ess[0] == pytest.approx(full.ess[0], rel=0.1)
    assert 10 * thin.iact[0] == pytest.approx((1 + phi) / (1 - phi), rel=0.15)


def test_proof_thinning_only_beyond_the_memory_bound():
    assert proof_thinning(4, 40_000, 100) == 1  # d = 100 at the default length: every state kept
    assert proof_thinning(4, 120_000, 300) == 9


def test_proof_pools_runs_thinned_differently_in_pieces_of_draws_kept():
    # A run stopped early keeps every state, a long one every k-th: the pool cuts both into pieces of the
    # shorter run's draws (before, pieces were counted in steps and the reshape failed at d = 300).
    from walktune.stages import Proof

    log_density, cov = correlated_gaussian(3)
    proposal = theory.optimal_proposal(cov)
    short = sample(log_density, np.zeros((4, 3)), proposal, 200, seed=1, vectorized=True)
    long = sample(log_density, np.zeros((4, 3)), proposal, 1200, seed=2, vectorized=True, thin=3)
    proof = Proof(rows=[], runs={"short": short, "long": long}, stats={}, steps={})
    draws, log_density_pool, chain_ids = proof.pooled()
    assert draws.shape == (4 + 8, 200, 3) and log_density_pool.shape == (12, 200)
    np.testing.assert_array_equal(draws[:4], short.draws)
    np.testing.assert_array_equal(draws[4:].reshape(4, 400, 3), long.draws)  # its last 2 whole pieces per chain
    np.testing.assert_array_equal(chain_ids, [0, 1, 2, 3, 0, 0, 1, 1, 2, 2, 3, 3])
