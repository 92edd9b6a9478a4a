"""Inspection of existing chains against closed forms and the engine's own counts.

Sources:
- AR(1) x_t = phi x_{t-1} + e_t: IACT (1 + phi) / (1 - phi) (textbook result).
- iid draws from scipy.stats distributions: ESS = number of draws, R-hat near 1
  (Vehtari et al. 2021, Bayesian Analysis 16(2), recommend R-hat < 1.01).
- Predicted slow-down of a proposal: diffusion-limit theory (Roberts, Gelman and
  Gilks 1997; Roberts and Rosenthal 2001) against a simulation of it.
"""

import json

import numpy as np
import pytest
from scipy import stats
from typer.testing import CliRunner

import walktune
from walktune import diagnostics as D
from walktune import theory as T
from walktune.chainfiles import read_chains
from walktune.cli import app
from walktune.errors import WalktuneError
from walktune.inspection import inspect

runner = CliRunner()


def write_csv(path, draws, names, chain_column=None):
    lines = [",".join(([chain_column] if chain_column else []) + names)]
    for c in range(draws.shape[0]):
        for row in draws[c]:
            cells = [repr(float(v)) for v in row]
            lines.append(",".join(([f"chain{c}"] if chain_column else []) + cells))
    path.write_text("\n".join(lines) + "\n")


def test_ar1_iact_from_npy_and_csv(tmp_path, ar1_factory):
    # Source: AR(1) closed form.
    phi = 0.8
    x = np.stack([ar1_factory(phi, 4, 50_000, seed=1), ar1_factory(0.0, 4, 50_000, seed=2)], axis=-1)
    np.save(tmp_path / "d.npy", x)
    write_csv(tmp_path / "d.csv", x, ["slow", "fast"], chain_column="chain")
    for data in (read_chains(tmp_path / "d.npy"), read_chains(tmp_path / "d.csv", chain_column="chain")):
        result = inspect(data.draws, data.names)
        # Relative error of the Geyer estimate at this length is about 2%; 6% is three sigma.
        assert result.summary.iact[0] == pytest.approx((1 + phi) / (1 - phi), rel=0.06)
        assert result.summary.iact[1] == pytest.approx(1.0, rel=0.06)
    assert read_chains(tmp_path / "d.csv", chain_column="chain").names == ["slow", "fast"]


def test_iid_draws_have_ess_near_n(tmp_path):
    rng = np.random.default_rng(3)
    x = np.stack([stats.norm.rvs(size=(4, 4000), random_state=rng),
                  stats.lognorm(s=0.5).rvs(size=(4, 4000), random_state=rng)], axis=-1)
    result = inspect(x, ["a", "b"])
    assert np.all(np.abs(result.summary.bulk_ess / 16_000 - 1) < 0.15)
    assert np.all(result.summary.rhat < 1.01)
    assert [v.verdict for v in result.verdicts] == ["ok", "ok"]


def test_stuck_shifted_chain_is_not_converged():
    # Four chains, one stuck in a shifted region for parameters 0 and 1.
    rng = np.random.default_rng(5)
    x = rng.standard_normal((4, 3000, 3))
    x[2, :, :2] += 3.0
    result = inspect(x, ["a", "b", "c"])
    assert np.all(result.summary.rhat[:2] > 1.1)
    finding = next(f for f in result.findings if f.kind == "not-converged")
    assert finding.parameters == ["a", "b"]
    assert [v.verdict for v in result.verdicts[:2]] == ["not-converged", "not-converged"]


def test_a_chain_that_never_moves_is_called_stuck():
    rng = np.random.default_rng(6)
    x = rng.standard_normal((3, 2000, 2))
    x[1] = x[1, 0]
    result = inspect(x)
    assert {v.verdict for v in result.verdicts} == {"stuck-chain"}
    assert "stuck-chain" in {f.kind for f in result.findings}


@pytest.mark.slow
def test_acceptance_and_slowdown_of_a_known_proposal():
    # Gaussian target with correlation; chains run with a diagonal proposal.
    dim = 20
    rng = np.random.default_rng(0)
    cov = np.kron(np.eye(dim // 2), np.array([[1.0, 0.8], [0.8, 1.0]]))
    precision = np.linalg.inv(cov)

    def log_density(x):
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    mu = T.relative_variances(np.eye(dim), cov)
    proposal = T.ASYMPTOTIC_SCALE**2 / np.sum(1 / mu) * np.eye(dim)
    start = rng.multivariate_normal(np.zeros(dim), cov, size=32)
    chains = walktune.sample(log_density, start, proposal, 20_000, seed=1, vectorized=True)
    result = inspect(chains.draws, proposal=proposal)
    # The state changes exactly when a proposal is accepted (continuous proposals); the stored
    # draws show the transitions after the first step, so compare with the engine's count of those.
    assert result.move_rate == pytest.approx(chains.accepted[:, 1:].mean(), abs=1e-12)
    assert result.move_rate == pytest.approx(chains.acceptance_rate, abs=1e-3)
    # Reported slow-down against a simulation: optimal proposal on the same target.
    best = walktune.sample(log_density, start, T.optimal_proposal(cov), 20_000, seed=2, vectorized=True)
    _, vecs = np.linalg.eigh(cov)
    simulated = D.iact(chains.draws @ vecs).max() / D.iact(best.draws @ vecs).max()
    # Diffusion-limit prediction, asymptotic: within 25% at d = 20.
    assert result.advice.slowdowns["current"]["slowest_direction"] == pytest.approx(simulated, rel=0.25)
    # The smallest ESS over parameters: each parameter shares its variance equally between
    # a slow and a fast direction, so its slow-down is far below the slowest direction's.
    simulated_parameter = D.iact(chains.draws).max() / D.iact(best.draws).max()
    assert result.advice.slowdowns["current"]["slowest_parameter"] == pytest.approx(simulated_parameter, rel=0.25)


def test_more_draws_needed_follows_the_ess():
    rng = np.random.default_rng(8)
    x = rng.standard_normal((4, 1000, 1))  # ESS about 4000
    result = inspect(x, target_ess=8000)
    assert result.more_draws_observed[0] == pytest.approx(4000, rel=0.2)
    mcse_result = inspect(x, target_mcse=0.005)  # needs ESS (1 / 0.005)^2 = 40000
    assert mcse_result.needed_ess[0] == pytest.approx(40_000, rel=0.05)
    # At the observed ESS of the mean (split chains, behind the MCSE) per draw:
    s = mcse_result.summary
    expected = (s.sd[0] / 0.005) ** 2 / (s.ess[0] / 4000) - 4000
    assert mcse_result.more_draws_observed[0] == pytest.approx(expected, rel=1e-12)
    assert mcse_result.more_draws_observed[0] == pytest.approx(36_000, rel=0.2)  # iid: ESS about S


def test_npz_layouts_and_several_files(tmp_path):
    rng = np.random.default_rng(2)
    x = rng.standard_normal((2, 500, 2))
    np.savez(tmp_path / "per_param.npz", alpha=x[..., 0], beta=x[..., 1])
    np.savez(tmp_path / "named.npz", draws=x, names=np.array(["alpha", "beta"]))
    for name in ("per_param.npz", "named.npz"):
        data = read_chains(tmp_path / name)
        assert data.names == ["alpha", "beta"]
        np.testing.assert_array_equal(data.draws, x)
    np.save(tmp_path / "c0.npy", x[0])
    np.save(tmp_path / "c1.npy", x[1])
    np.testing.assert_array_equal(read_chains([tmp_path / "c0.npy", tmp_path / "c1.npy"]).draws, x)


def test_large_npy_is_memory_mapped(tmp_path):
    x = np.random.default_rng(1).standard_normal((2, 3000, 5))
    np.save(tmp_path / "big.npy", x)
    data = read_chains(tmp_path / "big.npy")
    assert isinstance(data.draws, np.memmap)


def test_cli_inspect_writes_advice(tmp_path):
    rng = np.random.default_rng(4)
    np.save(tmp_path / "d.npy", rng.standard_normal((4, 1000, 2)))
    result = runner.invoke(app, ["inspect", str(tmp_path / "d.npy"), "--out", str(tmp_path / "o"), "--json"])
    assert result.exit_code == 0, result.output
    payload = json.loads(result.output)
    assert payload["source"] == "inspection" and payload["schema"] == "walktune.advice/1"
    assert json.loads((tmp_path / "o" / "advice.json").read_text())["source"] == "inspection"
    table = runner.invoke(app, ["inspect", str(tmp_path / "d.npy"), "--warmup", "100", "--thin", "2", "--params", "theta[1]"])
    assert table.exit_code == 0 and "theta[1]" in table.output and "never prove" in table.output


BAD_FILES = {
    "empty.csv": "",
    "header.csv": "a,b\n",
    "text.csv": "a,b\n1,2\n3,x\n4,5\n6,7\n8,9\n",
    "ragged.csv": "a,b\n1,2\n3\n",
    "nan.csv": "a,b\n1,2\nnan,3\n4,5\n6,7\n8,9\n",
    "single.csv": "a,b\n1,2\n",
    "onechain.csv": "chain,a\n1,1\n1,2\n1,3\n1,4\n1,5\n",
    "unequal.csv": "chain,a\n1,1\n1,2\n1,3\n1,4\n1,5\n2,1\n2,2\n2,3\n2,4\n",
}


@pytest.mark.parametrize(
    "name, extra, fragment",
    [
        ("empty.csv", [], "empty"),
        ("header.csv", [], "no draws"),
        ("text.csv", [], "'x' in column 'b' is not a number"),
        ("ragged.csv", [], "1 cells where the header has 2"),
        ("nan.csv", [], "NaN or infinity"),
        ("single.csv", [], "at least 4 draws"),
        ("onechain.csv", ["--chain-column", "chain"], "only one chain"),
        ("unequal.csv", ["--chain-column", "chain"], "different lengths"),
        ("text.csv", ["--chain-column", "run"], "no column 'run'"),
        ("nan.csv", ["--params", "zeta"], None),
        ("wrongdim.npy", [], "expected (draws, params)"),
        ("truncated.npy", [], "truncated"),
        ("pickled.npy", [], "never unpickles"),
        ("missing.npy", [], "does not exist"),
    ],
)
def test_bad_files_give_one_line_errors(tmp_path, name, extra, fragment):
    for file, text in BAD_FILES.items():
        (tmp_path / file).write_text(text)
    np.save(tmp_path / "wrongdim.npy", np.zeros((2, 2, 2, 2)))
    np.save(tmp_path / "good.npy", np.zeros((10, 2)))
    (tmp_path / "truncated.npy").write_bytes((tmp_path / "good.npy").read_bytes()[:100])
    np.save(tmp_path / "pickled.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    if fragment is None:  # a parameter name not in the file
        (tmp_path / "ok.csv").write_text("a,b\n" + "".join(f"{i},{i * i % 7}\n" for i in range(20)))
        name, fragment = "ok.csv", "'zeta' is not in the draws"
    result = runner.invoke(app, ["inspect", str(tmp_path / name), *extra])
    assert result.exit_code == 2
    lines = [line for line in result.output.strip().splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:") and "Traceback" not in result.output
    assert fragment in result.output


def test_library_rejects_bad_arrays():
    with pytest.raises(WalktuneError, match="dimensions"):
        inspect(np.zeros((2, 2, 2, 2)))
    with pytest.raises(WalktuneError, match="names"):
        inspect(np.zeros((2, 10, 2)), names=["a"])
