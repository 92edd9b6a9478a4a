"""Parallel evaluation: the same result bit for bit whichever evaluator ran it.

Random numbers are drawn on the driver only, so a process pool and a real Dask
LocalCluster (two worker processes on loopback) must reproduce the serial run
exactly. These tests check that against the serial evaluator itself.
"""

import os
import signal
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

import walktune
from walktune.cli import app
from walktune.evaluators import ProcessPoolEvaluator

MODEL = Path(__file__).resolve().parent.parent / "demo_models" / "sensor_calibration.py"
runner = CliRunner()


def correlated(theta):
    precision = np.array([[10.0, -9.0], [-9.0, 10.0]])
    return -0.5 * float(theta @ precision @ theta)


def test_process_pool_gives_the_serial_result_bit_for_bit():
    serial = walktune.tune(correlated, [0.3, 0.2], seed=4, budget=8_000)
    pool = ProcessPoolEvaluator(correlated, workers=2)
    try:
        parallel = walktune.tune(None, [0.3, 0.2], seed=4, budget=8_000, evaluator=pool)
    finally:
        pool.close()
    for name, run in serial.runs.items():
        np.testing.assert_array_equal(parallel.runs[name].draws, run.draws)
    np.testing.assert_array_equal(parallel.proposal_covariance, serial.proposal_covariance)


def crash_in_worker(theta):
    # Kills the worker process running it the first time a point lands far out.
    if theta[0] > 1.5 and os.getpid() != PARENT and not Path(CRASHED).exists():
        Path(CRASHED).write_text("x")
        os.kill(os.getpid(), signal.SIGKILL)
    return correlated(theta)


PARENT = os.getpid()
CRASHED = f"/tmp/walktune-crash-{PARENT}"


def test_a_killed_worker_is_replaced_and_the_result_is_unchanged():
    Path(CRASHED).unlink(missing_ok=True)
    serial = walktune.tune(correlated, [0.3, 0.2], seed=5, budget=8_000)
    pool = ProcessPoolEvaluator(crash_in_worker, workers=2)
    try:
        parallel = walktune.tune(None, [0.3, 0.2], seed=5, budget=8_000, evaluator=pool)
    finally:
        pool.close()
    assert Path(CRASHED).exists()  # a worker really died
    Path(CRASHED).unlink()
    np.testing.assert_array_equal(parallel.runs["tuned-covariance"].draws, serial.runs["tuned-covariance"].draws)


@pytest.mark.slow
def test_dask_local_cluster_gives_the_serial_result_bit_for_bit(tmp_path):
    pytest.importorskip("distributed")
    common = ["tune", f"{MODEL}:log_posterior", "--seed", "2", "--budget", "4000", "--chains", "4", "--json", "-q"]
    serial = runner.invoke(app, common + ["--out", str(tmp_path / "serial")])
    assert serial.exit_code == 0, serial.output
    dask = runner.invoke(app, common + ["--out", str(tmp_path / "dask"), "--dask", "local:2"])
    assert dask.exit_code == 0, dask.output
    a = np.load(tmp_path / "serial" / "draws.npz")
    b = np.load(tmp_path / "dask" / "draws.npz")
    for key in a.files:
        np.testing.assert_array_equal(a[key], b[key])


@pytest.mark.parametrize(
    "args, fragment",
    [(["--workers", "0"], "at least 1"), (["--workers", "2", "--dask", "local:2"], "not both"),
     (["--dask", "tcp://127.0.0.1:9"], "no Dask scheduler answered")],
)
def test_bad_parallel_options(tmp_path, args, fragment):
    result = runner.invoke(app, ["tune", f"{MODEL}:log_posterior", "--out", str(tmp_path / "o"), *args])
    assert result.exit_code == 2 and fragment in result.output
    assert not (tmp_path / "o").exists()
