"""Parallel evaluation: the same result bit for bit whichever evaluator ran it.

Random numbers are drawn on the driver only, so a process pool and a real Dask
LocalCluster (two worker processes on loopback) must reproduce the serial run
exactly. These tests check that against the serial evaluator itself.
"""

import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

import walktune
from walktune.cli import app
from walktune.dask_evaluator import DaskEvaluator
from walktune.evaluators import TIMEOUT_PREFIX, ProcessPoolEvaluator, ThreadPoolEvaluator

MODEL = Path(__file__).resolve().parent.parent / "demo_models" / "sensor_calibration.py"
runner = CliRunner()


def correlated(theta):
    precision = np.array([[10.0, -9.0], [-9.0, 10.0]])
    return -0.5 * float(theta @ precision @ theta)


@pytest.mark.parametrize(
    "make", [lambda: ProcessPoolEvaluator(correlated, workers=2), lambda: ThreadPoolEvaluator(correlated, threads=3)],
    ids=["process-pool", "threads"],
)
def test_local_evaluators_give_the_serial_result_bit_for_bit(make):
    serial = walktune.tune(correlated, [0.3, 0.2], seed=4, budget=8_000)
    evaluator = make()
    try:
        parallel = walktune.tune(None, [0.3, 0.2], seed=4, budget=8_000, evaluator=evaluator)
    finally:
        evaluator.close()
    for name, run in serial.runs.items():
        np.testing.assert_array_equal(parallel.runs[name].draws, run.draws)
    np.testing.assert_array_equal(parallel.proposal_covariance, serial.proposal_covariance)
    assert parallel.worker_busy is not None and 0 < parallel.worker_busy <= 1


def likelihood(theta):
    return -0.5 * float(((theta - np.array([1.0, 2.0])) ** 2 / np.array([0.1, 4.0])).sum())


def log_prior(theta):
    return -0.5 * float(theta @ theta) / 9.0


def test_a_separate_prior_with_workers_gives_the_serial_result_bit_for_bit():
    # The likelihood runs on the workers and the prior on the driver; the sums are the serial ones.
    options = dict(seed=6, budget=8_000, prior={"theta[1]": ("normal", 0.0, 5.0)}, log_prior=log_prior)
    serial = walktune.tune(likelihood, [0.5, 0.5], **options)
    pool = ProcessPoolEvaluator(likelihood, workers=2)
    try:
        parallel = walktune.tune(None, [0.5, 0.5], evaluator=pool, **options)
    finally:
        pool.close()
    assert set(parallel.runs) == set(serial.runs)
    for name, run in serial.runs.items():
        np.testing.assert_array_equal(parallel.runs[name].draws, run.draws)
    assert parallel.reparam.informed == serial.reparam.informed


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


@pytest.mark.parametrize(
    "args, fragment",
    [(["--workers", "0"], "at least 1"), (["--workers", "2", "--dask", "local:2"], "not several"),
     (["--threads", "0"], "at least 1"), (["--threads", "2", "--workers", "2"], "not several"),
     (["--threads", "2", "--time-limit", "1"], "cannot be stopped"),
     (["--dask", "tcp://127.0.0.1:9"], "no Dask scheduler answered")],
)
def test_bad_parallel_options(tmp_path, args, fragment):
    result = runner.invoke(app, ["tune", f"{MODEL}:log_posterior", "--out", str(tmp_path / "o"), *args])
    assert result.exit_code == 2 and fragment in result.output
    assert not (tmp_path / "o").exists()


# ----------------------------------------------------------------- time limits and lost workers


def hangs_far_out(theta):
    if theta[0] > 2.0:
        time.sleep(60)  # a hang in one region of the parameter space
    return correlated(theta)


def hangs_uninterruptibly(theta):
    if theta[0] > 2.0:
        signal.pthread_sigmask(signal.SIG_BLOCK, [signal.SIGALRM])  # the alarm cannot reach this evaluation
        time.sleep(60)
    return correlated(theta)


BATCH = np.array([[0.0, 0.1], [3.0, 0.0], [0.5, 0.2], [3.0, 1.0]])


@pytest.mark.parametrize("function, detail", [(hangs_far_out, ""), (hangs_uninterruptibly, "its worker was stopped")])
def test_pool_time_limit_fails_only_the_late_points(function, detail):
    pool = ProcessPoolEvaluator(function, workers=2, time_limit=0.2)
    try:
        started = time.monotonic()
        result = pool(BATCH)
        assert time.monotonic() - started < 30  # not the 60 s of the hang (about 7 s with the re-run point by point)
        expected = [correlated(p) for p in BATCH]
        assert result.values[0] == expected[0] and result.values[2] == expected[2]
        assert np.isnan(result.values[1]) and np.isnan(result.values[3])
        assert sorted(result.errors) == [1, 3]
        assert all(text.startswith(TIMEOUT_PREFIX) and detail in text for text in result.errors.values())
        # The pool still works afterwards.
        np.testing.assert_array_equal(pool(BATCH[[0, 2]]).values, [expected[0], expected[2]])
    finally:
        pool.close()


def standard_normal_hanging_far_out(theta):
    if theta[0] > 2.6:
        time.sleep(60)
    return -0.5 * float(theta @ theta)


def test_timeouts_are_rejected_and_reported_by_the_tuning_job():
    # N(0, I)-like target: the chains reach theta[0] > 2 now and then.
    pool = ProcessPoolEvaluator(standard_normal_hanging_far_out, workers=2, time_limit=0.01)
    try:
        result = walktune.tune(None, [0.3, 0.2], seed=4, budget=6_000, evaluator=pool)
    finally:
        pool.close()
    finding = [f for f in result.findings if f.kind == "timed-out-evaluations"]
    assert len(finding) == 1 and finding[0].evidence["timeouts"] > 0
    # No stored state lies in the region that timed out: those proposals were all rejected.
    for run in result.runs.values():
        assert run.draws[:, :, 0].max() <= 2.6
    assert result.to_dict()["worker_busy_share"] is not None


def test_a_function_that_cannot_be_shipped_is_refused_clearly():
    # Dask pickles the function (the forked pool needs no pickling); a lock cannot be pickled.
    lock = __import__("threading").Lock()
    with pytest.raises(walktune.WalktuneError, match="cannot be sent to worker processes"):
        DaskEvaluator(lambda t: correlated(t) if lock else 0.0, address="local:2")


@pytest.mark.parametrize("args, fragment", [(["--time-limit", "0"], "positive"), (["--time-limit", "5"], "needs --workers")])
def test_bad_time_limit(tmp_path, args, fragment):
    result = runner.invoke(app, ["tune", f"{MODEL}:log_posterior", "--out", str(tmp_path / "o"), *args])
    assert result.exit_code == 2 and fragment in result.output, result.output
    assert not (tmp_path / "o").exists()


DASK_MODEL = '''
import os, signal, time
from pathlib import Path
import numpy as np

PARAMETERS = {"a": 0.3, "b": 0.2}


def log_density(theta):
    on_worker = os.environ.get("WALKTUNE_TEST_DRIVER") != str(os.getpid())
    crashed = Path(os.environ["WALKTUNE_TEST_CRASHED"])
    if on_worker and theta[0] > 1.0 and not crashed.exists():
        crashed.write_text("x")
        os.kill(os.getpid(), signal.SIGKILL)  # the worker process dies mid-batch
    if on_worker and theta[0] > 50.0:
        time.sleep(60)
    return -0.5 * float(theta @ np.array([[10.0, -9.0], [-9.0, 10.0]]) @ theta)
'''


@pytest.mark.slow
def test_dask_local_cluster_gives_the_serial_result_bit_for_bit_even_when_a_worker_dies(tmp_path, monkeypatch):
    # A real LocalCluster with two worker processes on loopback; one of them is killed mid-run.
    (tmp_path / "model.py").write_text(DASK_MODEL)
    monkeypatch.setenv("WALKTUNE_TEST_DRIVER", str(os.getpid()))
    monkeypatch.setenv("WALKTUNE_TEST_CRASHED", str(tmp_path / "crashed"))
    common = ["tune", f"{tmp_path / 'model.py'}:log_density", "--seed", "3", "--budget", "4000", "--chains", "4", "-q"]
    serial = runner.invoke(app, common + ["--out", str(tmp_path / "serial")])
    assert serial.exit_code == 0, serial.output
    dask = runner.invoke(app, common + ["--out", str(tmp_path / "dask"), "--dask", "local:2"])
    assert dask.exit_code == 0, dask.output
    assert (tmp_path / "crashed").exists()  # a worker really died; Dask ran its task again elsewhere
    with np.load(tmp_path / "serial" / "draws.npz") as a, np.load(tmp_path / "dask" / "draws.npz") as b:
        for key in a.files:
            np.testing.assert_array_equal(a[key], b[key])


@pytest.mark.slow
def test_dask_time_limit_restarts_the_hung_worker(tmp_path, monkeypatch):
    from walktune.dask_evaluator import DaskEvaluator
    from walktune.target import load_target

    (tmp_path / "model.py").write_text(DASK_MODEL)
    (tmp_path / "crashed").write_text("x")  # no crash in this test
    monkeypatch.setenv("WALKTUNE_TEST_DRIVER", str(os.getpid()))
    monkeypatch.setenv("WALKTUNE_TEST_CRASHED", str(tmp_path / "crashed"))
    spec = load_target(f"{tmp_path / 'model.py'}:log_density")
    evaluator = DaskEvaluator(spec.function, address="local:2", time_limit=0.5)
    try:
        batch = np.array([[0.1, 0.0], [60.0, 0.0]])
        started = time.monotonic()
        result = evaluator(batch)
        assert time.monotonic() - started < 30
        assert np.isfinite(result.values[0]) and np.isnan(result.values[1])
        assert list(result.errors) == [1] and result.errors[1].startswith(TIMEOUT_PREFIX)
        again = evaluator(np.array([[0.1, 0.0], [0.2, 0.1]]))  # the restarted worker serves again
        assert np.all(np.isfinite(again.values)) and evaluator.parallelism == 2
    finally:
        evaluator.close()
