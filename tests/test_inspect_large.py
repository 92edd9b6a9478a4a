"""Inspection of large files in bounded memory, and layouts that are probably wrong (issue 15, items 4 and 5).

Sources:
- The blockwise inspection must give what the whole-array functions of
  walktune.diagnostics give (each tested against published formulas in
  test_diagnostics.py); numpy's mean/std and np.cov are the reference for moments.
- iid draws (numpy's generator, fixed seed): the move rate of continuous draws is 1
  exactly (a repeat has probability 0), the ESS near the number of draws.
- Peak resident memory: VmHWM of a fresh process against a process that only
  imports walktune (no timing is asserted).
"""

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from scipy.signal import lfilter
from conftest import assert_one_line_error as one_line_error
from typer.testing import CliRunner

from walktune import diagnostics as D
from walktune import inspection
from walktune.chainfiles import read_chains, release_pages
from walktune.cli import app
from walktune.errors import WalktuneError
from walktune.inspection import inspect

runner = CliRunner()
ROOT = Path(__file__).resolve().parents[1]


def ar1(phi, shape, seed):
    rng = np.random.default_rng(seed)
    return lfilter([1.0], [1.0, -phi], rng.standard_normal(shape), axis=1)


@pytest.mark.parametrize("layout", [None, "draws,chains,params"])
def test_blockwise_inspection_matches_whole_array_diagnostics(tmp_path, monkeypatch, layout):
    """Tiny blocks force many reads, one parameter per slab and the temporary regrouping file."""
    x = ar1(0.8, (3, 4000, 7), seed=11)
    stored = x if layout is None else np.transpose(x, (1, 0, 2))
    np.save(tmp_path / "d.npy", stored.astype(np.float32))
    monkeypatch.setattr(inspection, "READ_BLOCK_BYTES", 3000)
    monkeypatch.setattr(inspection, "SLAB_BYTES", 1)
    result = inspect(read_chains(tmp_path / "d.npy", layout=layout), warmup=100, thin=3, params=[5, 0, 2, 3])
    chosen = x.astype(np.float32).astype(float)[:, 100::3][:, :, [5, 0, 2, 3]]
    whole = D.measure_chains(chosen)
    for field in ("mean", "sd", "mcse", "ess", "iact", "bulk_ess", "tail_ess", "rhat", "chain_sd"):
        np.testing.assert_allclose(getattr(result.summary, field), getattr(whole, field), rtol=1e-12, err_msg=field)
    assert np.array_equal(result.summary.bulk_too_short, whole.bulk_too_short)
    pooled = chosen.reshape(-1, 4)
    np.testing.assert_allclose(result.structure.covariance, np.cov(pooled.T), rtol=1e-10)
    np.testing.assert_array_equal(result.parameter_move_rate, np.ones(4))  # continuous draws: every step moves
    np.testing.assert_array_equal(result.chain_move_rate, np.ones(3))


def resident_file_pages_kb():
    status = dict(line.split(":", 1) for line in Path("/proc/self/status").read_text().splitlines())
    return int(status["RssFile"].split()[0])


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads RssFile from /proc (Linux)")
def test_release_pages_drops_mapped_pages(tmp_path):
    """A 32 MB mapped file, read whole: its pages count as resident until released."""
    np.save(tmp_path / "d.npy", np.ones((4, 125_000, 8)))
    mapped = np.load(tmp_path / "d.npy", mmap_mode="r")
    release_pages(np.array(mapped[:, :10]))  # an in-memory copy: nothing to release, no error
    before = resident_file_pages_kb()
    assert float(mapped.sum()) == 4 * 125_000 * 8  # touches every page
    assert resident_file_pages_kb() - before > 25_000
    release_pages(mapped[:, ::2])  # a view: the mapping is found through .base
    assert resident_file_pages_kb() - before < 5_000
    assert float(mapped[:, ::2].sum()) == 4 * 62_500 * 8  # the pages come back from the file
    private = np.load(tmp_path / "d.npy", mmap_mode="c")
    private[0, 0, 0] = 5.0  # a change held only in this process's copy-on-write pages
    release_pages(private[:, 1:])
    assert private[0, 0, 0] == 5.0  # not discarded


# The process's own peak (VmHWM): Linux carries a parent's peak into a child's ru_maxrss at exec,
# so ru_maxrss of a child of the test process would show the test process's peak.
PEAK = "int(dict(l.split(':', 1) for l in open('/proc/self/status'))['VmHWM'].split()[0]) * 1024"

BASELINE = f"""
import walktune.inspection, walktune.chainfiles, walktune.diagnostics
print({PEAK})
"""

INSPECT = f"""
import sys
from walktune import inspection
from walktune.chainfiles import read_chains
inspection.READ_BLOCK_BYTES = 2**20
inspection.SLAB_BYTES = 2**21
result = inspection.inspect(read_chains(sys.argv[1]), params=[0, 7, 50, 119], warmup=10)
assert result.summary.n_draws == int(sys.argv[2]) - 10
print({PEAK})
"""


def peak_of(code, *args):
    out = subprocess.run(
        [sys.executable, "-c", textwrap.dedent(code), *map(str, args)],
        capture_output=True, text=True, check=True, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    return int(out.stdout.split()[-1])


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads VmHWM from /proc (Linux)")
def test_peak_memory_stays_near_one_block_not_the_file(tmp_path):
    """A 192 MB memory-mapped file (2 chains, 100,000 draws, 120 parameters), four parameters inspected:
    every page of the file is read (rows hold all parameters), in 1 MiB blocks, and the four slabs of
    1.6 MB go through the temporary regrouping file. Holding the file (what the issue saw) costs at
    least its 192 MB over the import-only process; reading in blocks costs a few slabs' working copies
    and the FFT's and allocator's fixed overheads (about 25 MB measured here). Bound: 0.4 x the file."""
    draws = 100_000
    out = np.lib.format.open_memmap(tmp_path / "d.npy", mode="w+", dtype=np.float64, shape=(2, draws, 120))
    rng = np.random.default_rng(5)
    for c in range(2):
        out[c] = rng.standard_normal((draws, 120))
    out.flush()
    del out
    size = (tmp_path / "d.npy").stat().st_size
    baseline = peak_of(BASELINE)
    peak = peak_of(INSPECT, tmp_path / "d.npy", draws)
    assert peak - baseline < 0.4 * size, (peak - baseline) / size


def test_more_chains_than_draws_is_refused_with_the_way_to_state_the_layout():
    x = np.random.default_rng(2).standard_normal((4, 600, 3))  # truth: 4 chains of 600 draws
    stored = np.transpose(x, (1, 0, 2))  # saved as (draws, chains, params)
    with pytest.raises(WalktuneError, match="600 chains of 4 draws") as error:
        inspect(stored)
    assert "--layout" in str(error.value) and "layout=" in str(error.value) and "\n" not in str(error.value)
    result = inspect(stored, layout="draws,chains,params")
    assert (result.summary.n_chains, result.summary.n_draws) == (4, 600)
    np.testing.assert_allclose(result.summary.mean, x.reshape(-1, 3).mean(axis=0), rtol=1e-12)
    assert result.to_dict()["inspection"]["layout"] == "draws,chains,params"
    kept = inspect(np.ascontiguousarray(stored), layout="chains,draws,params")  # stated: taken as said
    assert kept.summary.n_chains == 600


def test_two_dimensional_layouts():
    x = np.random.default_rng(3).standard_normal((2000, 3))
    with pytest.raises(WalktuneError, match="more parameters than draws"):
        inspect(x.T)
    result = inspect(x.T, layout="params,draws")
    np.testing.assert_allclose(result.summary.mean, x.mean(axis=0), rtol=1e-12)
    assert inspect(x, layout="draws,params").summary.n_draws == 2000
    with pytest.raises(WalktuneError, match="3 chains of only 5 draws"):
        inspect(np.random.default_rng(4).standard_normal((3, 5, 1)))
    with pytest.raises(WalktuneError, match="is not one of"):
        inspect(x, layout="draws, chain, params")




def test_cli_layout_option(tmp_path):
    x = np.random.default_rng(6).standard_normal((4, 500, 2))
    np.save(tmp_path / "dcp.npy", np.transpose(x, (1, 0, 2)))
    one_line_error(runner.invoke(app, ["inspect", str(tmp_path / "dcp.npy")]), "--layout")
    one_line_error(runner.invoke(app, ["inspect", str(tmp_path / "dcp.npy"), "--layout", "sideways"]), "is not one of")
    result = runner.invoke(app, ["inspect", str(tmp_path / "dcp.npy"), "--layout", "draws,chains,params",
                                 "--json", "--out", str(tmp_path / "o")])
    assert result.exit_code == 0, result.output
    payload = json.loads(result.output)
    assert payload["inspection"]["chains"] == 4 and payload["inspection"]["draws_per_chain"] == 500
    assert payload["inspection"]["layout"] == "draws,chains,params"
    assert read_chains(tmp_path / "dcp.npy", layout=payload["inspection"]["layout"]).draws.shape == (4, 500, 2)
    np.testing.assert_allclose(payload["posterior_mean"], x.reshape(-1, 2).mean(axis=0), rtol=1e-12)
    report = runner.invoke(app, ["report", str(tmp_path / "o")])  # reads the files again, in the recorded layout
    assert report.exit_code == 0, report.output
