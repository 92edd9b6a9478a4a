"""Checkpoints, interruption and resume.

The reference for every check is the same job run without interruption: a
resumed run must end with that result bit for bit (draws of every run, the
advice and the reparameterisation). Interruptions come as real signals to a
real ``walktune tune`` process, at points in the mode search, the pilot and the
proof runs.
"""

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

import walktune
from walktune.checkpoint import (
    FILE_NAME,
    SPOT_CHECK_MAX_POINTS,
    SPOT_CHECKS,
    Checkpoint,
    Interrupted,
    read_meta,
    spot_check_batches,
)
from walktune.cli import app

runner = CliRunner()

PRECISION = np.linalg.inv(np.array([[1.0, 0.9, 0.0], [0.9, 1.0, 0.3], [0.0, 0.3, 2.0]]))

MODEL = '''
import os, signal, time
import numpy as np

PARAMETERS = {"a": 0.5, "b": -0.5, "c": 1.0}
PRECISION = np.linalg.inv(np.array([[1.0, 0.9, 0.0], [0.9, 1.0, 0.3], [0.0, 0.3, 2.0]]))
calls = 0


def log_density(x):
    global calls
    calls += 1
    if calls == 1 and os.environ.get("PID_DIR"):
        open(os.path.join(os.environ["PID_DIR"], f"{os.getpid()}.pid"), "w").close()
    if calls == int(os.environ.get("MARK_AT", "0")):
        open(os.environ["MARK_FILE"], "w").close()
    if calls == int(os.environ.get("SELF_SIGNAL_AT", "0")):
        os.kill(os.getppid() if os.environ.get("IN_WORKER") else os.getpid(), signal.SIGINT)
    if calls >= int(os.environ.get("SLOW_AFTER", "1000000000")):
        time.sleep(5.0)
    time.sleep(float(os.environ.get("SLEEP", "0")))
    return -0.5 * x @ PRECISION @ x
'''

RUN = ["--seed", "11", "--budget", "6000"]


def gaussian(x):
    return -0.5 * x @ PRECISION @ x


def _same_outputs(folder: Path, reference: Path) -> None:
    """Every output file equal to the uninterrupted run's, bit for bit (timings aside)."""
    a, b = json.loads((folder / "advice.json").read_text()), json.loads((reference / "advice.json").read_text())
    for timing in ("seconds_per_evaluation", "worker_busy_share"):
        a.pop(timing), b.pop(timing)
    assert a == b
    with np.load(folder / "draws.npz") as x, np.load(reference / "draws.npz") as y:
        assert sorted(x.files) == sorted(y.files)
        for key in x.files:
            np.testing.assert_array_equal(x[key], y[key])
    for name in ("sampling_map.json", "proposal_covariance.npy", "step_sizes.csv"):
        assert (folder / name).read_bytes() == (reference / name).read_bytes(), name
    assert not (folder / FILE_NAME).exists() and not (folder / "partial-advice.json").exists()


# ----------------------------------------------------------------- library


def _stopping(checkpoint_box, at):
    calls = [0]

    def log_density(x):
        calls[0] += 1
        if calls[0] == at:
            checkpoint_box[0].request_stop(signal.SIGINT)
        return gaussian(x)

    return log_density


@pytest.fixture(scope="module")
def uninterrupted():
    return walktune.tune(gaussian, np.ones(3), seed=5, budget=12_000)


@pytest.mark.parametrize("stop_at", [5, 400, 2_500, 7_000, 10_680])  # mode, multi-start, pilot, proof, mode checks (the proof ends at 10,640)
def test_resume_after_a_stop_anywhere_is_the_uninterrupted_run(tmp_path, uninterrupted, stop_at):
    identity = {"model": "gaussian", "seed": 5}
    box = [Checkpoint(tmp_path, identity)]
    with pytest.raises(Interrupted) as stop:
        walktune.tune(_stopping(box, stop_at), np.ones(3), seed=5, budget=12_000, checkpoint=box[0])
    assert stop.value.signum == signal.SIGINT and stop.value.checkpoint == tmp_path / FILE_NAME
    assert stop.value.partial["partial"] is True
    # The batch in hand when the stop came is finished and recorded; the next one is not started.
    recorded = read_meta(tmp_path)["evaluations"]
    assert stop_at <= recorded < stop_at + 64
    assert stop.value.partial["evaluations"] >= recorded  # also counts points outside bounds (none here)
    snapshot = read_meta(tmp_path)["snapshot"]  # the last stage end's partial advice, kept for a hard kill
    assert snapshot == {} or (snapshot["partial"] is True and snapshot["evaluations"] <= recorded)

    live = [0]

    def counting(x):
        live[0] += 1
        return gaussian(x)

    resumed_checkpoint = Checkpoint(tmp_path, identity, resume=True)
    resumed = walktune.tune(counting, np.ones(3), seed=5, budget=12_000, checkpoint=resumed_checkpoint)
    # Nothing recorded is evaluated again but the spot-checked batches (the start point first, at most 8 x 64 points).
    spot = resumed_checkpoint.spot_checked
    assert 1 <= spot <= SPOT_CHECKS * SPOT_CHECK_MAX_POINTS
    assert live[0] == uninterrupted.total_evaluations - recorded + spot
    for name, run in uninterrupted.runs.items():
        np.testing.assert_array_equal(resumed.runs[name].draws, run.draws)
    a, b = resumed.to_dict(), uninterrupted.to_dict()
    a.pop("seconds_per_evaluation"), b.pop("seconds_per_evaluation")
    assert a == b


def test_keyboard_interrupt_inside_an_evaluation_keeps_what_was_finished(tmp_path, uninterrupted):
    calls = [0]

    def interrupted_at_2500(x):
        calls[0] += 1
        if calls[0] == 2_500:
            raise KeyboardInterrupt  # Ctrl-C in a notebook lands inside the user's function
        return gaussian(x)

    with pytest.raises(KeyboardInterrupt):
        walktune.tune(interrupted_at_2500, np.ones(3), seed=5, budget=12_000, checkpoint=walktune.Checkpoint(tmp_path, {}))
    assert read_meta(tmp_path)["evaluations"] < 2_500  # the batch in hand is not recorded
    resumed = walktune.tune(gaussian, np.ones(3), seed=5, budget=12_000,
                            checkpoint=walktune.Checkpoint(tmp_path, {}, resume=True))
    for name, run in uninterrupted.runs.items():
        np.testing.assert_array_equal(resumed.runs[name].draws, run.draws)


def test_partial_advice_follows_the_stage_reached(tmp_path):
    box = [Checkpoint(tmp_path / "early", {})]
    with pytest.raises(Interrupted) as early:
        walktune.tune(_stopping(box, 3), np.ones(3), seed=5, budget=12_000, checkpoint=box[0])
    assert early.value.partial["proposal_covariance"] is None  # no estimate before the mode is found
    box = [Checkpoint(tmp_path / "proof", {})]
    with pytest.raises(Interrupted) as late:
        walktune.tune(_stopping(box, 10_000), np.ones(3), seed=5, budget=12_000, checkpoint=box[0])
    partial = late.value.partial
    assert partial["basis"].startswith("the pilot") and len(partial["comparison"]) >= 1
    cov = np.array(partial["proposal_covariance"])
    np.testing.assert_allclose(cov, cov.T)
    assert np.all(np.linalg.eigvalsh(cov) > 0)


@pytest.fixture
def stopped_in_pilot(tmp_path):
    """A job stopped at evaluation 3000 with its checkpoint in tmp_path; returns the checkpoint's bytes."""
    box = [Checkpoint(tmp_path, {})]
    with pytest.raises(Interrupted):
        walktune.tune(_stopping(box, 3_000), np.ones(3), seed=5, budget=12_000, checkpoint=box[0])
    return (tmp_path / FILE_NAME).read_bytes()


def test_a_changed_model_is_caught_on_replay_and_the_checkpoint_kept(tmp_path, stopped_in_pilot):
    before = stopped_in_pilot

    def other(x):
        return gaussian(1.01 * x)

    with pytest.raises(walktune.WalktuneError, match="the model or its data changed since"):
        walktune.tune(other, np.ones(3), seed=5, budget=12_000, checkpoint=Checkpoint(tmp_path, {}, resume=True))
    assert (tmp_path / FILE_NAME).read_bytes() == before


def test_changed_data_with_the_same_value_at_the_start_is_caught(tmp_path):
    """Data reflected about the start point: the log-density there is unchanged, elsewhere it is not, so only
    recorded evaluations away from the start can tell (the resume spot-checks batches spread over the record)."""
    start = np.ones(3)
    data = np.random.default_rng(2).normal(size=(20, 3))
    reflected = 2 * start - data

    def model(y):
        return lambda x: -0.5 * float(np.sum((x - y) ** 2)) / 20

    assert model(data)(start) == model(reflected)(start)  # what the start-only check compared
    box = [Checkpoint(tmp_path, {})]
    calls = [0]

    def stopping(x):
        calls[0] += 1
        if calls[0] == 3_000:
            box[0].request_stop(signal.SIGINT)
        return model(data)(x)

    with pytest.raises(Interrupted):
        walktune.tune(stopping, start, seed=5, budget=12_000, checkpoint=box[0])
    before = (tmp_path / FILE_NAME).read_bytes()
    with pytest.raises(walktune.WalktuneError, match="at evaluation [0-9]+ where .* the model or its data changed since"):
        walktune.tune(model(reflected), start, seed=5, budget=12_000, checkpoint=Checkpoint(tmp_path, {}, resume=True))
    assert (tmp_path / FILE_NAME).read_bytes() == before


def test_spot_checks_spread_over_the_record():
    sizes = np.array([1] * 10 + [200] + [4] * 1000)
    offsets = np.r_[0, np.cumsum(sizes)]
    chosen = spot_check_batches(sizes, np.array([offsets[500] + 1]), offsets)
    assert 0 in chosen and 10 not in chosen and 500 not in chosen  # the start; not too big; no failure
    assert 5 <= len(chosen) <= 8 and max(chosen) >= 990


def test_a_stop_while_replaying_leaves_the_checkpoint_as_it_was(tmp_path, stopped_in_pilot):
    before = stopped_in_pilot
    resumed = Checkpoint(tmp_path, {}, resume=True)
    resumed.request_stop(signal.SIGTERM)
    with pytest.raises(Interrupted) as stop:
        walktune.tune(gaussian, np.ones(3), seed=5, budget=12_000, checkpoint=resumed)
    assert stop.value.signum == signal.SIGTERM and stop.value.checkpoint == tmp_path / FILE_NAME
    assert (tmp_path / FILE_NAME).read_bytes() == before


def test_other_options_leave_the_record_and_are_caught(tmp_path, stopped_in_pilot):
    before = stopped_in_pilot
    with pytest.raises(walktune.WalktuneError, match="left the checkpoint's record"):
        walktune.tune(gaussian, np.ones(3), seed=6, budget=12_000, checkpoint=Checkpoint(tmp_path, {}, resume=True))
    assert (tmp_path / FILE_NAME).read_bytes() == before


def _writes(folder, every):
    clock = iter(range(10**9)).__next__  # a fake clock: every reading moves one "second"
    checkpoint = Checkpoint(folder, {}, every=every, clock=clock)
    written = []
    original = checkpoint.save
    checkpoint.save = lambda: written.append(original()) and written[-1]
    walktune.tune(gaussian, np.ones(3), seed=5, budget=12_000, checkpoint=checkpoint)
    return sum(path is not None for path in written), len(checkpoint._sizes)


def test_checkpoints_are_written_on_the_interval(tmp_path):
    at_stage_ends, _ = _writes(tmp_path / "stages", every=0)
    with_interval, batches = _writes(tmp_path / "interval", every=30)
    # The clock is read once per evaluated batch and once per write: a write every 30 batches
    # at least, besides the stage ends (some of which fall together with an interval write).
    assert at_stage_ends >= 5
    assert with_interval >= batches // 31 > 2 * at_stage_ends


# ----------------------------------------------------------------- real processes


def _walktune(*args, env=None, **kwargs):
    return subprocess.Popen(
        [sys.executable, "-m", "walktune", "tune", *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "NO_COLOR": "1", **(env or {})}, **kwargs,
    )


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    folder = tmp_path_factory.mktemp("model")
    (folder / "model.py").write_text(MODEL)
    return folder / "model.py"


@pytest.fixture(scope="module")
def reference(model_file):
    out = model_file.parent / "reference"
    proc = _walktune(f"{model_file}:log_density", *RUN, "--out", str(out), "-q")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    return out


def _wait_for(path: Path, proc, seconds: float = 120.0) -> None:
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the run never reached the marked evaluation"
        time.sleep(0.02)


@pytest.mark.slow
@pytest.mark.parametrize(
    "sig, mark_at, extra, resume_extra, group",
    [
        (signal.SIGINT, 150, [], [], False),  # in the mode search
        (signal.SIGTERM, 1_800, [], [], False),  # in the pilot
        (signal.SIGINT, 4_000, [], ["--workers", "2"], False),  # in the proof runs; resumed on a process pool
        (signal.SIGTERM, 1_500, ["--workers", "2"], ["--workers", "2"], False),  # a pool (marks count per worker)
        (signal.SIGINT, 1_200, ["--workers", "2"], [], True),  # Ctrl-C as a terminal sends it: to the whole group
        (signal.SIGINT, 700, ["--dask", "local:2"], [], False),  # a Dask LocalCluster; resumed in this process
    ],
)
def test_signal_stops_with_partial_advice_and_resume_ends_bit_for_bit(
    tmp_path, model_file, reference, sig, mark_at, extra, resume_extra, group
):
    out = tmp_path / "run"
    mark = tmp_path / "mark"
    proc = _walktune(f"{model_file}:log_density", *RUN, "--out", str(out), *extra,
                     env={"MARK_AT": str(mark_at), "MARK_FILE": str(mark), "SLEEP": "0.0004"}, start_new_session=group)
    _wait_for(mark, proc)
    if group:
        os.killpg(proc.pid, sig)  # the driver and its worker processes alike
    else:
        proc.send_signal(sig)
    stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 128 + sig, stderr  # 130 for SIGINT, 143 for SIGTERM
    assert "PARTIAL" in stdout and f"walktune tune --resume {out}" in stdout.replace("\n", "")
    assert "Traceback" not in stderr
    partial = json.loads((out / "partial-advice.json").read_text())
    assert partial["partial"] is True and partial["evaluations"] > 0
    assert read_meta(out)["evaluations"] > 0
    assert not (out / "advice.json").exists()

    resumed = _walktune("--resume", str(out), "-q", *resume_extra)
    _, stderr = resumed.communicate(timeout=300)
    assert resumed.returncode == 0, stderr
    _same_outputs(out, reference)


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return False
    return "\nState:\tZ" not in state  # a zombie has exited


@pytest.mark.slow
@pytest.mark.parametrize("extra", [[], ["--workers", "2"]])
def test_second_ctrl_c_exits_at_once_and_leaves_no_broken_file(tmp_path, model_file, extra):
    out = tmp_path / "run"
    mark = tmp_path / "mark"
    # From evaluation 600 on, each evaluation takes 5 s: the first Ctrl-C waits for it, the second must not.
    proc = _walktune(f"{model_file}:log_density", *RUN, "--out", str(out), *extra,
                     env={"MARK_AT": "600", "MARK_FILE": str(mark), "SLOW_AFTER": "600", "PID_DIR": str(tmp_path)})
    _wait_for(mark, proc)
    proc.send_signal(signal.SIGINT)
    time.sleep(0.5)
    sent = time.monotonic()
    proc.send_signal(signal.SIGINT)
    proc.communicate(timeout=60)
    assert time.monotonic() - sent < 3.0  # not the 5 s an evaluation in progress takes
    assert proc.returncode == 130
    # Stage-end checkpoints were written before; whatever is there is whole.
    assert read_meta(out)["evaluations"] > 0
    assert not [p for p in out.iterdir() if p.name.endswith(".tmp")]
    # No worker process is left running an evaluation on its own.
    evaluating = [int(p.name.split(".")[0]) for p in tmp_path.glob("*.pid")]
    assert len(evaluating) == (2 if extra else 1)
    time.sleep(0.5)
    assert not [pid for pid in evaluating if _alive(pid)]


# ----------------------------------------------------------------- bad resume input


@pytest.fixture(scope="module")
def interrupted(model_file):
    """A run that stopped itself with a real SIGINT at evaluation 900."""
    out = model_file.parent / "interrupted"
    proc = _walktune(f"{model_file}:log_density", *RUN, "--out", str(out), "-q", env={"SELF_SIGNAL_AT": "900"})
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 130, err
    return out


@pytest.fixture
def copy_of(interrupted, tmp_path):
    folder = tmp_path / "run"
    shutil.copytree(interrupted, folder)
    return folder


def _fails(args, fragment, folder):
    before = (folder / FILE_NAME).read_bytes() if (folder / FILE_NAME).exists() else None
    result = runner.invoke(app, args)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:") and fragment in lines[0], result.output
    if before is not None:
        assert (folder / FILE_NAME).read_bytes() == before  # never overwritten by a failed resume


def test_resume_with_another_seed(copy_of):
    _fails(["tune", "--resume", str(copy_of), "--seed", "12"], "--seed", copy_of)


def test_resume_with_another_model(copy_of, tmp_path):
    other = tmp_path / "other.py"
    other.write_text(MODEL.replace("0.9", "0.8"))
    _fails(["tune", f"{other}:log_density", "--resume", str(copy_of)], "TARGET", copy_of)


def test_resume_after_the_model_file_changed(copy_of, model_file):
    meta_target = read_meta(copy_of)["identity"]["options"]["target"]
    assert meta_target == f"{model_file.resolve()}:log_density"
    original = model_file.read_text()
    model_file.write_text(original + "\n# edited\n")
    try:
        _fails(["tune", "--resume", str(copy_of)], "changed since", copy_of)
    finally:
        model_file.write_text(original)


def test_resume_of_a_newer_schema(copy_of):
    path = copy_of / FILE_NAME
    with np.load(path) as archive:
        arrays = {k: archive[k] for k in archive.files}
    meta = json.loads(str(arrays["meta"][()]))
    meta["schema"] = "walktune.checkpoint/9"
    arrays["meta"] = np.array(json.dumps(meta))
    np.savez(path, **arrays)
    _fails(["tune", "--resume", str(copy_of)], "newer walktune", copy_of)


@pytest.mark.parametrize("damage", ["truncate", "flip"])
def test_resume_of_a_corrupted_checkpoint(copy_of, damage):
    path = copy_of / FILE_NAME
    data = bytearray(path.read_bytes())
    if damage == "truncate":
        data = data[: len(data) // 2]
    else:
        data[len(data) // 3] ^= 0xFF
    path.write_bytes(bytes(data))
    _fails(["tune", "--resume", str(copy_of)], "damaged", copy_of)


def test_a_new_run_will_not_overwrite_a_checkpoint(copy_of, model_file):
    _fails(["tune", f"{model_file}:log_density", "--out", str(copy_of)], "--resume", copy_of)


def test_resume_without_a_checkpoint(tmp_path):
    _fails(["tune", "--resume", str(tmp_path)], "no checkpoint", tmp_path)


def test_report_of_an_interrupted_run_says_to_resume(copy_of):
    _fails(["report", str(copy_of)], "--resume", copy_of)


CRASHING = MODEL.replace(
    "    time.sleep(float(os.environ.get(\"SLEEP\", \"0\")))",
    "    if x[0] > 1.5 and os.getpid() != int(os.environ[\"DRIVER\"]):\n"
    "        os.kill(os.getpid(), signal.SIGKILL)  # every worker that meets this region dies",
)


def test_workers_dying_again_and_again_stop_the_run_with_the_checkpoint_kept(tmp_path):
    assert "SIGKILL" in CRASHING
    (tmp_path / "crashing.py").write_text(CRASHING)
    out = tmp_path / "run"
    proc = _walktune(f"{tmp_path / 'crashing.py'}:log_density", *RUN, "--out", str(out), "--workers", "2",
                     env={"DRIVER": "0"})
    _, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 2
    lines = stderr.strip().splitlines()
    assert lines[-1].startswith("error:") and "worker processes died" in lines[-1] and "Traceback" not in stderr
    assert read_meta(out)["evaluations"] > 0  # what was evaluated before is kept for --resume


def test_a_folder_in_use_by_a_running_job_is_refused(copy_of):
    # Another process holds the folder as a running resume would (a lock is shared within one process).
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, walktune.checkpoint as c; "
         "k = c.Checkpoint(sys.argv[1], c.read_meta(sys.argv[1])['identity'], resume=True); print('held', flush=True); "
         "sys.stdin.read()", str(copy_of)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        _fails(["tune", "--resume", str(copy_of)], "another walktune run is using", copy_of)
    finally:
        holder.communicate(input="", timeout=60)


def test_stale_temporary_files_are_cleared(copy_of):
    stale = copy_of / f".{FILE_NAME}.abc123.tmp"
    stale.write_bytes(b"half a checkpoint")
    Checkpoint(copy_of, read_meta(copy_of)["identity"], resume=True).release()
    assert not stale.exists()
