"""The command line: the job end to end, exports, and one-line errors for bad input."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import assert_one_line_error as one_line_error
from typer.testing import CliRunner

from walktune import __version__
from walktune.cli import app

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo_models"
runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args])


def assert_one_line_error(result, *fragments):
    one_line_error(result, *fragments, code=None)


def test_version_and_help():
    assert run("--version").output.strip() == f"walktune {__version__}"
    for command in ([], ["tune"], ["demo"], ["export"]):
        result = run(*command, "--help")
        assert result.exit_code == 0 and "Usage" in result.output


def test_module_entry_point():
    out = subprocess.run([sys.executable, "-m", "walktune", "--version"], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == f"walktune {__version__}"


@pytest.mark.parametrize("model", ["sensor_calibration", "source_activity", "cooling_curve"])
def test_every_demo_model_runs(tmp_path, model):
    out = tmp_path / "out"
    result = run("tune", f"{DEMO / model}.py:log_posterior", "--seed", 3, "--budget", 30_000, "--out", out, "--json")
    assert result.exit_code == 0, result.output
    payload = json.loads(result.output)
    assert payload["schema"] == "walktune.advice/1"
    assert (out / "proposal_covariance.npy").exists()


def test_demo_model_shows_the_geometry_it_was_built_for(tmp_path):
    # sensor_calibration: strong linear correlation; cooling_curve: several decades.
    sensor = json.loads(run("tune", f"{DEMO}/sensor_calibration.py:log_posterior", "--seed", 1, "--budget", 30_000,
                            "--out", tmp_path / "a", "--json").output)
    assert "strong-correlation" in {f["kind"] for f in sensor["findings"]}
    cooling = json.loads(run("tune", f"{DEMO}/cooling_curve.py:log_posterior", "--seed", 1, "--budget", 30_000,
                             "--out", tmp_path / "b", "--json").output)
    assert cooling["spectrum_decades"] >= 2


def test_tables_and_caution_are_printed(tmp_path):
    result = run("tune", f"{DEMO}/sensor_calibration.py:log_posterior", "--seed", 1, "--budget", 30_000, "--out", tmp_path / "o")
    assert result.exit_code == 0
    for text in ("Advice", "Measured", "tuned-covariance", "never prove"):
        assert text in result.output


def test_options_override_the_model_file(tmp_path):
    result = run(
        "tune", f"{DEMO}/sensor_calibration.py:log_posterior", "--names", "o,g,s", "--start", "0.5,2.0,-1",
        "--bound", "s=-5:3", "--seed", 1, "--budget", 30_000, "--out", tmp_path / "o", "--json",
    )
    payload = json.loads(result.output)
    assert payload["parameter_names"] == ["o", "g", "s"]
    assert payload["bounds"][2] == [-5.0, 3.0]


def test_current_proposal_from_files(tmp_path):
    target = f"{DEMO}/sensor_calibration.py:log_posterior"
    np.save(tmp_path / "p.npy", np.diag([0.01, 1e-4, 0.01]))
    (tmp_path / "p.csv").write_text("offset_mv,gain_mv_per_kn,log_noise\n0.1,0.01,0.1\n")
    (tmp_path / "p.json").write_text(json.dumps({"step_sizes": [0.1, 0.01, 0.1]}))
    for name in ("p.npy", "p.csv", "p.json"):
        result = run("tune", target, "--current-proposal", tmp_path / name, "--seed", 1, "--budget", 30_000,
                     "--out", tmp_path / f"o-{name}", "--json")
        assert result.exit_code == 0, result.output
        assert json.loads(result.output)["comparison"][0]["proposal"] == "current"


def test_export_formats(tmp_path):
    out = tmp_path / "o"
    run("tune", f"{DEMO}/sensor_calibration.py:log_posterior", "--seed", 1, "--budget", 30_000, "--out", out, "-q")
    advice = json.loads((out / "advice.json").read_text())
    cov = np.array(advice["proposal_covariance"])
    assert run("export", out, "--to", tmp_path / "c.npy").exit_code == 0
    np.testing.assert_array_equal(np.load(tmp_path / "c.npy"), cov)
    assert run("export", out / "advice.json", "--to", tmp_path / "c.csv").exit_code == 0
    np.testing.assert_allclose(np.loadtxt(tmp_path / "c.csv", delimiter=",", skiprows=1), cov)
    assert run("export", out, "--to", tmp_path / "tuned.py").exit_code == 0
    namespace = {}
    exec((tmp_path / "tuned.py").read_text(), namespace)
    np.testing.assert_array_equal(np.array(namespace["PROPOSAL_COVARIANCE"]), cov)
    # The recommended option's proposal, the same as the file saved beside advice.json.
    assert run("export", out, "--recommended", "--to", tmp_path / "r.json").exit_code == 0
    exported = json.loads((tmp_path / "r.json").read_text())
    assert exported["proposal"] == advice["recommended"]["proposal"]
    np.testing.assert_array_equal(np.array(exported["proposal_covariance"]), np.load(out / "recommended_proposal.npy"))
    assert_one_line_error(run("export", out, "--to", tmp_path / "c.xyz"), "format")
    (tmp_path / "old.json").write_text(json.dumps({"schema": "walktune.advice/0"}))
    assert_one_line_error(run("export", tmp_path / "old.json", "--to", tmp_path / "c.npy"), "schema")


@pytest.fixture
def broken_models(tmp_path):
    (tmp_path / "raises.py").write_text("import numpy as np\n1 / 0\ndef lp(x):\n    return 0.0\n")
    (tmp_path / "textstart.py").write_text("PARAMETERS = {'a': 'one', 'b': 1.0}\ndef lp(x):\n    return 0.0\n")
    (tmp_path / "exits.py").write_text("import sys\nPARAMETERS = {'a': 0.0}\ndef lp(x):\n    sys.exit(3)\n")
    (tmp_path / "raises_exit.py").write_text("PARAMETERS = {'a': 0.0}\ndef lp(x):\n    raise SystemExit\n")
    (tmp_path / "vnone.py").write_text("PARAMETERS = {'a': 0.0}\nVECTORIZED = True\ndef lp(x):\n    pass\n")
    (tmp_path / "none.py").write_text("PARAMETERS = {'a': 0.0}\ndef lp(x):\n    -0.5 * float(x @ x)\n")
    (tmp_path / "ok.py").write_text(
        "import numpy as np\nPARAMETERS = {'a': 0.0, 'b': 1.0}\nBOUNDS = {'b': (0, 10)}\n"
        "def lp(x):\n    return -0.5 * float(x @ x)\n"
        "def nowhere(x):\n    return -np.inf\n"
    )
    return tmp_path


@pytest.mark.parametrize(
    "args, fragments",
    [
        (["missing.py:lp"], ["does not exist"]),
        (["raises.py:lp"], ["ZeroDivisionError", "line 2"]),
        (["ok.py:nothere"], ["no function 'nothere'"]),
        (["ok.py"], ["must look like"]),
        (["no_such_package_xyz.mod:lp"], ["cannot import"]),
        (["ok.py:lp", "--start", "1,2,3"], ["3 start values for 2 parameters"]),
        (["ok.py:lp", "--start", "1,x"], ["numbers"]),
        (["ok.py:lp", "--bound", "zz=0:1"], ["unknown parameter 'zz'"]),
        (["ok.py:lp", "--bound", "b=2:5"], ["outside its bounds"]),
        (["ok.py:lp", "--bound", "b0:5"], ["NAME=LOW:HIGH"]),
        (["ok.py:lp", "--current-proposal", "nofile.npy"], ["does not exist"]),
        (["ok.py:lp", "--current-proposal", "bad.npy"], ["(2, 2)"]),
        (["ok.py:lp", "--current-proposal", "notpd.npy"], ["positive definite"]),
        (["ok.py:lp", "--budget", "50"], ["too small"]),
        (["ok.py:nowhere"], ["start inside the support"]),  # evaluated once: still no folder, no checkpoint
        (["ok.py:lp", "--seed", "-3"], ["`seed` must be a whole number >= 0"]),
        (["ok.py:lp", "--budget", "1e10"], ["GB of draws", "give at most --budget"]),  # before any evaluation
        (["ok.py:lp", "--budget", "1e23"], ["GB of draws"]),
        (["ok.py:lp", "--budget", "4000.5"], ["whole number"]),
        (["ok.py:lp", "--budget", "lots"], ["whole number"]),
        (["textstart.py:lp"], ["PARAMETERS", "number"]),
        (["exits.py:lp"], ["the model exited", "sys.exit(3)"]),
        (["raises_exit.py:lp"], ["the model exited"]),
        (["exits.py:lp", "--workers", "2"], ["the model exited", "sys.exit(3)"]),  # in a worker process
        (["vnone.py:lp"], ["returned None"]),
        (["none.py:lp"], ["returned None"]),
        (["ok.py:lp", "--target-ess", "-5"], ["`target_ess` must be a number > 0"]),
    ],
)
def test_bad_input_gives_one_line_and_leaves_nothing(broken_models, monkeypatch, args, fragments):
    monkeypatch.chdir(broken_models)
    np.save(broken_models / "bad.npy", np.eye(3))
    np.save(broken_models / "notpd.npy", np.array([[1.0, 2.0], [2.0, 1.0]]))
    before = set(broken_models.iterdir())
    result = run("tune", *args, "--out", "result")
    assert_one_line_error(result, *fragments)
    assert set(broken_models.iterdir()) == before  # no output folder, no staging folder


def test_none_is_not_called_not_finite(broken_models, monkeypatch):
    monkeypatch.chdir(broken_models)
    result = run("tune", "none.py:lp", "--out", "result")
    assert "not finite" not in result.output


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("run") / "out"
    result = run("tune", f"{DEMO}/sensor_calibration.py:log_posterior", "--seed", 2, "--budget", 30_000, "--out", out, "-q")
    assert result.exit_code == 0, result.output
    return out


@pytest.mark.parametrize("key", ["parameter_names", "proposal_covariance", "posterior_covariance", "findings"])
def test_report_and_export_of_an_advice_json_missing_keys(finished_run, tmp_path, key):
    folder = tmp_path / "copy"
    folder.mkdir()
    for path in finished_run.iterdir():
        (folder / path.name).write_bytes(path.read_bytes())
    advice = json.loads((folder / "advice.json").read_text())
    del advice[key]
    (folder / "advice.json").write_text(json.dumps(advice))
    assert_one_line_error(run("report", folder), key)
    assert_one_line_error(run("export", folder, "--to", tmp_path / "p.npy"), key)


@pytest.mark.parametrize("damage", ["truncate", "garbage", "wrong-shape"])
def test_report_of_a_damaged_draws_npz(finished_run, tmp_path, damage):
    folder = tmp_path / "copy"
    folder.mkdir()
    for path in finished_run.iterdir():
        (folder / path.name).write_bytes(path.read_bytes())
    data = (folder / "draws.npz").read_bytes()
    if damage == "truncate":
        (folder / "draws.npz").write_bytes(data[: len(data) // 2])
    elif damage == "garbage":
        (folder / "draws.npz").write_bytes(b"PK\x03\x04" + bytes(range(256)) * 40)
    else:
        np.savez(folder / "draws.npz", tuned_covariance=np.zeros((4, 10)))
    assert_one_line_error(run("report", folder), "draws.npz")


def test_inspect_targets_must_be_positive(tmp_path):
    np.save(tmp_path / "d.npy", np.random.default_rng(0).standard_normal((2, 300, 2)))
    assert_one_line_error(run("inspect", tmp_path / "d.npy", "--target-mcse", 0), "target_mcse")
    assert_one_line_error(run("inspect", tmp_path / "d.npy", "--target-ess", -5), "target_ess")


@pytest.mark.parametrize(
    "options, fragment",
    [
        ({"seed": -1}, "`seed`"),
        ({"seed": "abc"}, "`seed`"),
        ({"seed": 1.5}, "`seed`"),
        ({"budget": 4000.0}, "`budget` must be a whole number"),
        ({"start": []}, "`start` must be one point"),
        ({"target_ess": -1}, "`target_ess`"),
    ],
)
def test_python_api_input_errors(options, fragment):
    import walktune

    calls = []

    def log_density(x):
        calls.append(x)
        return -0.5 * float(x @ x)

    arguments = {"start": [0.0, 1.0], **options}
    with pytest.raises(walktune.WalktuneError, match=fragment.replace("`", ".")) as error:
        walktune.tune(log_density, **arguments)
    assert "\n" not in str(error.value) and not calls  # refused before any evaluation


def test_cli_error_through_a_real_process(tmp_path):
    out = subprocess.run(
        [sys.executable, "-m", "walktune", "tune", str(tmp_path / "none.py:f")], capture_output=True, text=True
    )
    assert out.returncode == 2
    assert out.stderr.strip().startswith("error:") and "Traceback" not in out.stderr
    assert len(out.stderr.strip().splitlines()) == 1


@pytest.mark.parametrize("target, run_name", [("folder", None), ("npz", None), ("npz", "step-sizes"), ("folder", "pilot")])
def test_inspect_reads_a_tune_folder(finished_run, tmp_path, target, run_name):
    # Reference: the saved draws themselves (numpy's mean over chains and steps) and the
    # names and recommendation advice.json records.
    advice = json.loads((finished_run / "advice.json").read_text())
    expected_run = run_name or advice["recommended"]["proposal"]
    path = finished_run if target == "folder" else finished_run / "draws.npz"
    out = tmp_path / "inspected"
    result = run("inspect", path, *(["--run", run_name] if run_name else []), "--out", out, "--report")
    assert result.exit_code == 0, result.output
    inspected = json.loads((out / "advice.json").read_text())
    assert inspected["parameter_names"] == advice["parameter_names"]
    assert inspected["inspection"]["run"] == expected_run
    with np.load(finished_run / "draws.npz") as archive:
        draws = archive[expected_run.replace("-", "_")]
    np.testing.assert_allclose(inspected["posterior_mean"], draws.reshape(-1, draws.shape[2]).mean(axis=0), rtol=1e-10)
    assert (out / "report.html").exists()


def test_inspect_run_errors(finished_run, tmp_path):
    assert_one_line_error(run("inspect", finished_run, "--run", "nothing"), "no run 'nothing'", "tuned-covariance")
    np.save(tmp_path / "plain.npy", np.zeros((10, 2)))
    assert_one_line_error(run("inspect", tmp_path / "plain.npy", "--run", "pilot"), "--run")
    (tmp_path / "empty").mkdir()
    assert_one_line_error(run("inspect", tmp_path / "empty"), "without draws.npz")
