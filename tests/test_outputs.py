"""Output folders: one run's files at a time, locked while a run writes; --overwrite, --restart, --json.

These are checks of walktune's own file handling (no statistics): real
processes where the point is what two processes do to one folder.
"""

import json
import os
import subprocess
import sys
import time

import numpy as np
import pytest
from typer.testing import CliRunner

from walktune.checkpoint import FILE_NAME, read_meta
from walktune.cli import app
from walktune.outputs import FIGURE_NAMES, RUN_FILES, FolderLock

runner = CliRunner()

MODEL = '''
import os, time
import numpy as np

PARAMETERS = {"a": 0.5, "b": -0.5}
calls = 0


def log_density(x):
    global calls
    calls += 1
    if calls == int(os.environ.get("MARK_AT", "0")):
        open(os.environ["MARK_FILE"], "w").close()
    time.sleep(float(os.environ.get("SLEEP", "0")))
    return -0.5 * (x[0] ** 2 + (x[1] - 0.5 * x[0]) ** 2 / 0.25)
'''

PRINTING = MODEL.replace("    calls += 1\n", "    calls += 1\n    print('model says', calls, x)\n")
PRINTING = PRINTING.replace("import os, time\n", "import os, time\nprint('model imported')\n")

SMALL = ["--seed", "3", "--budget", "6000"]


def _cli(*args, env=None, **kwargs):
    return subprocess.run(
        [sys.executable, "-m", "walktune", *map(str, args)], capture_output=True, text=True,
        env={**os.environ, "NO_COLOR": "1", **(env or {})}, **kwargs,
    )


def _one_line_error(proc, fragment):
    assert proc.returncode == 2, (proc.stdout, proc.stderr)
    lines = [line for line in proc.stderr.strip().splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:") and "Traceback" not in proc.stderr, proc.stderr
    assert fragment in lines[0], lines[0]


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    folder = tmp_path_factory.mktemp("model")
    (folder / "model.py").write_text(MODEL)
    return folder / "model.py"


@pytest.fixture(scope="module")
def finished(model, tmp_path_factory):
    """A finished tuning run with its report."""
    out = tmp_path_factory.mktemp("done") / "run"
    proc = _cli("tune", f"{model}:log_density", *SMALL, "--out", out, "-q", "--report")
    assert proc.returncode == 0, proc.stderr
    return out


def test_the_report_figure_names_are_the_ones_outputs_knows():
    from walktune.report import FIGURES

    assert tuple(name for name, _, _ in FIGURES) == FIGURE_NAMES


def test_two_concurrent_runs_into_one_folder(model, tmp_path):
    """The second run (and a report, and an inspection) are refused while the first works; its results stay whole."""
    out = tmp_path / "shared"
    mark = tmp_path / "running"
    first = subprocess.Popen(
        [sys.executable, "-m", "walktune", "tune", f"{model}:log_density", *SMALL, "--out", str(out), "-q"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "NO_COLOR": "1", "SLEEP": "0.003", "MARK_AT": "20", "MARK_FILE": str(mark)},
    )
    try:
        deadline = time.monotonic() + 120
        while not mark.exists():  # the first run is evaluating: it holds the folder
            assert first.poll() is None, first.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.05)
        second = _cli("tune", f"{model}:log_density", "--seed", "4", "--budget", "6000", "--out", out, "-q")
        _one_line_error(second, "another walktune run is using")
        _one_line_error(_cli("report", out), "another walktune run is using")
        np.save(tmp_path / "draws.npy", np.random.default_rng(0).standard_normal((2, 500, 2)))
        _one_line_error(_cli("inspect", tmp_path / "draws.npy", "--out", out, "--overwrite"),
                        "another walktune run is using")
        assert first.poll() is None, "the first run ended before the others were tried; make it slower"
        _, err = first.communicate(timeout=300)
    finally:
        if first.poll() is None:
            first.kill()
    assert first.returncode == 0, err
    advice = json.loads((out / "advice.json").read_text())
    assert advice["produced_by"]["options"]["seed"] == 3  # the first run's, whole
    assert advice["produced_by"]["command"] == "walktune tune"
    with np.load(out / "draws.npz") as draws:
        assert draws["tuned_covariance"].shape[2] == 2
    assert not (out / FILE_NAME).exists() and not (out / "partial-advice.json").exists()
    assert not list(tmp_path.glob(".shared.walktune-*"))  # no staging folder left beside


def test_a_folder_with_results_is_refused_without_overwrite(model, finished, tmp_path):
    before = {p.name: p.read_bytes() for p in finished.iterdir()}
    result = runner.invoke(app, ["tune", f"{model}:log_density", *SMALL, "--out", str(finished), "-q"])
    assert result.exit_code == 2 and "--overwrite" in result.output and result.output.count("\n") == 1
    np.save(tmp_path / "draws.npy", np.random.default_rng(0).standard_normal((2, 500, 2)))
    result = runner.invoke(app, ["inspect", str(tmp_path / "draws.npy"), "--out", str(finished)])
    assert result.exit_code == 2 and "--overwrite" in result.output
    assert {p.name: p.read_bytes() for p in finished.iterdir()} == before


def test_overwrite_replaces_the_folders_walktune_files_as_a_whole(finished, tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    for path in finished.iterdir():
        (folder / path.name).write_bytes(path.read_bytes())
    (folder / "notes.txt").write_text("the user's own file")
    assert (folder / "report.html").exists() and (folder / "draws.npz").exists()
    np.save(tmp_path / "draws.npy", np.random.default_rng(0).standard_normal((2, 500, 2)))
    result = runner.invoke(app, ["inspect", str(tmp_path / "draws.npy"), "--out", str(folder), "--overwrite"])
    assert result.exit_code == 0, result.output
    left = {p.name for p in folder.iterdir()}
    # The tuning run's draws, coordinates and report are gone; the inspection's files and the user's stay.
    assert left == {"advice.json", "proposal_covariance.npy", "proposal_covariance.csv", "step_sizes.csv", "notes.txt"}
    advice = json.loads((folder / "advice.json").read_text())
    assert advice["source"] == "inspection" and advice["produced_by"]["command"] == "walktune inspect"
    assert advice["produced_by"]["options"]["files"] == [str((tmp_path / "draws.npy").resolve())]


def test_advice_records_what_produced_it(model, finished):
    import hashlib

    produced = json.loads((finished / "advice.json").read_text())["produced_by"]
    assert produced["model_file"] == str(model.resolve())
    assert produced["model_sha256"] == hashlib.sha256(model.read_bytes()).hexdigest()
    assert produced["options"]["target"] == f"{model.resolve()}:log_density"
    assert produced["options"]["budget"] == 6000 and produced["options"]["seed"] == 3


def test_a_report_replaces_an_earlier_report_as_a_whole(finished, tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    for path in finished.iterdir():
        (folder / path.name).write_bytes(path.read_bytes())
    for name in FIGURE_NAMES:
        (folder / f"{name}.png").write_bytes(b"a figure of an earlier report")
    result = runner.invoke(app, ["report", str(folder)])
    assert result.exit_code == 0, result.output
    for name in FIGURE_NAMES:  # each figure is this report's, or gone when this report has none of that kind
        path = folder / f"{name}.png"
        assert not path.exists() or path.read_bytes().startswith(b"\x89PNG"), name


def test_a_lock_taken_and_released_leaves_no_new_empty_folder(tmp_path):
    with FolderLock(tmp_path / "new"):
        assert (tmp_path / "new").is_dir()
    assert not (tmp_path / "new").exists()
    assert "checkpoint.npz" in RUN_FILES


@pytest.mark.parametrize("extra", [[], ["--workers", "2"]])
def test_a_printing_model_does_not_corrupt_json_output(tmp_path, extra):
    (tmp_path / "printing.py").write_text(PRINTING)
    proc = _cli("tune", f"{tmp_path / 'printing.py'}:log_density", *SMALL, "--out", tmp_path / "out", "--json", *extra)
    assert proc.returncode == 0, proc.stderr
    payload = json.loads(proc.stdout)  # stdout is the JSON and nothing else
    assert payload["schema"] == "walktune.advice/1" and payload["produced_by"]["options"]["seed"] == 3
    assert payload == json.loads((tmp_path / "out" / "advice.json").read_text()) | {
        k: payload[k] for k in ("seconds_per_evaluation", "worker_busy_share")
    }
    assert "model imported" in proc.stderr and "model says" in proc.stderr  # the prints went to stderr


FAILING = MODEL.replace(
    "    time.sleep(float(os.environ.get(\"SLEEP\", \"0\")))",
    "    if calls > 1500:\n        raise RuntimeError('the model broke')",
)


def test_a_failed_run_can_be_started_afresh_with_restart(tmp_path):
    path = tmp_path / "model.py"
    path.write_text(FAILING)
    out = tmp_path / "run"
    failed = runner.invoke(app, ["tune", f"{path}:log_density", *SMALL, "--out", str(out), "-q"])
    assert failed.exit_code == 2, failed.output
    assert read_meta(out)["evaluations"] > 0  # the failed run kept its checkpoint
    path.write_text(MODEL)  # the model is fixed
    new = runner.invoke(app, ["tune", f"{path}:log_density", *SMALL, "--out", str(out), "-q"])
    assert new.exit_code == 2 and "--restart" in new.output
    resumed = runner.invoke(app, ["tune", "--resume", str(out), "-q"])
    assert resumed.exit_code == 2 and "changed since" in resumed.output
    restarted = runner.invoke(app, ["tune", f"{path}:log_density", *SMALL, "--out", str(out), "-q", "--restart"])
    assert restarted.exit_code == 0, restarted.output
    assert "discarded checkpoint.npz" in restarted.output
    assert not (out / FILE_NAME).exists() and (out / "advice.json").exists()
    both = runner.invoke(app, ["tune", "--resume", str(out), "--restart"])
    assert both.exit_code == 2 and "one of them" in both.output
