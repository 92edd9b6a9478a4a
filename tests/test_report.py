"""The visual report: figures drawn from the saved draws, a self-contained page, a real browser."""

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

import walktune
from walktune.chainfiles import read_chains
from walktune.cli import app
from walktune.inspection import inspect
from walktune.report import build_figures, load_run, write_report

runner = CliRunner()
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def tuned_folder(tmp_path_factory):
    cov = np.array([[1.0, 0.95], [0.95, 1.0]])
    precision = np.linalg.inv(cov)
    result = walktune.tune(lambda x: -0.5 * x @ precision @ x, [0.5, -0.5], names=["alpha", "beta"], seed=3, budget=40_000)
    return result.save(tmp_path_factory.mktemp("run") / "out")


@pytest.fixture(scope="module")
def wide_inspection(tmp_path_factory):
    # d = 100 draws from an inspection: the report must stay readable.
    folder = tmp_path_factory.mktemp("wide")
    rng = np.random.default_rng(0)
    np.save(folder / "draws.npy", rng.standard_normal((4, 3000, 100)).cumsum(axis=1) * 0.05 + rng.standard_normal((4, 3000, 100)))
    data = read_chains(folder / "draws.npy")
    inspect(data.draws, data.names, sources=data.sources).save(folder / "out")
    return folder / "out"


def test_every_figure_is_written_and_the_page_embeds_them(tuned_folder):
    page = write_report(tuned_folder)
    for name in ("traces", "pairs", "spectrum", "autocorrelation", "ess", "evaluations"):
        data = (tuned_folder / f"{name}.png").read_bytes()
        assert data.startswith(PNG_SIGNATURE) and len(data) > 5000, name
    text = page.read_text()
    assert text.count("data:image/png;base64,") == 6
    # The page opens with the advice, then findings, and carries the caution.
    assert text.index("Advice in plain words") < text.index("Findings") < text.index("Figures")
    assert "never prove" in text
    # The posterior table names the one run its numbers come from: the recommended one.
    advice = json.loads((tuned_folder / "advice.json").read_text())
    assert f"Posterior (from the {advice['recommended']['proposal']} fixed-proposal run)" in text


def test_page_has_no_network_reference_and_no_script(tuned_folder):
    text = write_report(tuned_folder).read_text()
    assert "<script" not in text.lower()
    for attribute in re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', text):
        assert attribute.startswith("data:"), attribute
    assert not re.search(r"https?://|url\(|@import", text)


def test_figures_show_the_saved_draws_with_parameter_names(tuned_folder):
    run = load_run(tuned_folder)
    figures = build_figures(run)
    saved = np.load(tuned_folder / "draws.npz")
    tuned = saved["tuned_covariance"]
    # Traces: right column is the tuned run; y-data are the saved draws (thinned for drawing).
    axes = figures["traces"].axes
    labels = {ax.get_ylabel() for ax in axes}
    assert labels == {"alpha", "beta"}
    right = [ax for ax in axes if "tuned-covariance" in ax.get_title() or ax.get_ylabel() and ax.get_position().x0 > 0.5]
    line = right[0].get_lines()[0]
    step = int(np.diff(line.get_xdata())[0])
    np.testing.assert_array_equal(line.get_ydata(), tuned[0, ::step, 0])
    # Pairs: the scatter's points are saved draws, axes named after the pair.
    ax = figures["pairs"].axes[0]
    assert (ax.get_xlabel(), ax.get_ylabel()) == ("alpha", "beta")
    points = ax.collections[0].get_offsets()
    flat = tuned.reshape(-1, 2)
    stride = int(np.ceil(flat.shape[0] / 2000))
    np.testing.assert_array_equal(np.asarray(points), flat[::stride])
    # The ESS bars are the comparison's numbers.
    advice = json.loads((tuned_folder / "advice.json").read_text())
    heights = [p.get_height() for p in figures["ess"].axes[0].patches]
    np.testing.assert_allclose(heights, [r["ess_per_1000"] for r in advice["comparison"]])


def test_wide_run_renders_and_says_what_it_left_out(wide_inspection):
    page = write_report(wide_inspection)
    run = load_run(wide_inspection)
    traces = build_figures(run)["traces"]
    assert len({ax.get_ylabel() for ax in traces.axes}) == 8
    assert "8 slowest-mixing of 100" in traces._suptitle.get_text()
    assert page.stat().st_size > 10_000


def test_partial_run_is_marked(tuned_folder, tmp_path):
    copy = tmp_path / "partial"
    shutil.copytree(tuned_folder, copy)
    advice = json.loads((copy / "advice.json").read_text())
    advice["partial"] = True
    (copy / "advice.json").write_text(json.dumps(advice))
    assert "PARTIAL" in write_report(copy).read_text()


def chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.mark.skipif(chromium() is None and not os.environ.get("CI"), reason="chromium not installed (.ci/run installs it)")
def test_page_renders_in_a_real_headless_browser(tuned_folder, tmp_path):
    browser = chromium()
    assert browser, "CI must install Debian's chromium (.ci/run does)"
    page = write_report(tuned_folder)
    shot = tmp_path / "shot.png"
    subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1200,2000", f"--screenshot={shot}", page.as_uri()],
        check=True, capture_output=True, timeout=120,
    )
    from matplotlib import image

    pixels = image.imread(shot)
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    grey = pixels[..., :3].mean(axis=2)
    # Not blank: text, tables and figures make the page far from uniform.
    assert grey.std() > 0.05 and (grey < 0.5).mean() > 0.005


@pytest.mark.parametrize(
    "setup, fragment",
    [
        ("empty", "no walktune run"),
        ("old", "schema"),
        ("nodraws", "draws.npz is missing"),
        ("notafolder", "not a folder"),
    ],
)
def test_bad_folders_give_one_line_errors(tuned_folder, tmp_path, setup, fragment):
    target = tmp_path / "f"
    if setup == "empty":
        target.mkdir()
    elif setup == "old":
        target.mkdir()
        (target / "advice.json").write_text(json.dumps({"schema": "walktune.advice/0"}))
    elif setup == "nodraws":
        shutil.copytree(tuned_folder, target)
        (target / "draws.npz").unlink()
    else:
        target.write_text("x")
    result = runner.invoke(app, ["report", str(target)])
    assert result.exit_code == 2
    lines = [line for line in result.output.strip().splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:") and fragment in result.output


def test_report_flags_on_tune_and_inspect(tmp_path):
    demo = Path(__file__).resolve().parent.parent / "demo_models" / "sensor_calibration.py"
    result = runner.invoke(app, ["tune", f"{demo}:log_posterior", "--seed", "1", "--budget", "30000",
                                 "--out", str(tmp_path / "t"), "-q", "--report"])
    assert result.exit_code == 0 and (tmp_path / "t" / "report.html").exists()
    np.save(tmp_path / "d.npy", np.random.default_rng(1).standard_normal((2, 500, 3)))
    result = runner.invoke(app, ["inspect", str(tmp_path / "d.npy"), "--out", str(tmp_path / "i"), "--report"])
    assert result.exit_code == 0 and (tmp_path / "i" / "report.html").exists()
    result = runner.invoke(app, ["inspect", str(tmp_path / "d.npy"), "--report"])
    assert result.exit_code == 2 and "--out" in result.output


def test_pairs_figure_shows_the_transformed_coordinates_when_chosen(tmp_path):
    from walktune.reparam import forward

    def log_density(theta):
        a, e = theta
        if a <= 0 or not 0 < e < 1:
            return -np.inf
        return -0.5 * (np.log(a * e / 10.0) / 0.05) ** 2 - 0.5 * (np.log(a / 40.0) / 0.5) ** 2

    result = walktune.tune(log_density, [40.0, 0.25], names=["a", "e"], bounds={"a": (0, np.inf), "e": (0, 1)},
                           seed=1, budget=40_000, transforms={"a": "log", "e": "logit"})
    folder = result.save(tmp_path / "out")
    run = load_run(folder)
    fig = build_figures(run)["pairs"]
    lower = fig.axes[1]
    assert lower.get_xlabel() == "log(a)" and lower.get_ylabel() == "logit(e)"
    # The pairs are drawn from the recommended run's draws, and the figure says so.
    assert run.main == result.recommended.proposal
    assert f"draws of the {run.main} run" in fig._suptitle.get_text()
    flat = run.draws[run.main].reshape(-1, 2)
    stride = int(np.ceil(flat.shape[0] / 2000))
    expected = np.column_stack([forward("log", flat[::stride, 0], 0, np.inf), forward("logit", flat[::stride, 1], 0, 1)])
    np.testing.assert_allclose(np.asarray(lower.collections[0].get_offsets()), expected)


def test_spectrum_marks_informed_directions_when_a_prior_was_given(tmp_path):
    def log_likelihood(theta):
        return -0.5 * ((theta[0] - 1.0) / 0.1) ** 2

    prior = {"a": ("normal", 0.0, 2.0), "b": ("normal", 0.0, 2.0)}
    folder = walktune.tune(log_likelihood, [1.0, 0.0], names=["a", "b"], prior=prior, seed=1, budget=30_000).save(tmp_path / "o")
    fig = build_figures(load_run(folder))["spectrum"]
    assert len(fig.axes) == 2 and fig.axes[1].get_title() == "1 of 2 directions informed"


def test_plain_words_quote_the_recommended_rows_speedup():
    """The sentence names the recommended run and its own speed-up, not the last row's."""
    from walktune.report import _plain_advice

    def row(name, speedup, kind, acceptance):
        return {"proposal": name, "speedup": speedup, "speedup_kind": kind, "acceptance": acceptance,
                "ess_reliable": kind != "imprecise", "ess_per_1000": 10 * speedup}

    advice = {
        "comparison": [row("single-step", 1.0, "baseline", 0.3), row("step-sizes", 6.25, "measured", 0.28),
                       row("tuned-covariance", 1.5, "imprecise", 0.2)],
        "recommended": {"proposal": "step-sizes", "keep_current": False, "resolved": True, "coordinates": "parameters",
                        "message": ""},
        "predicted_slowdown": {"step_sizes": {"slowest_parameter": 7e60, "slowest_direction": 7e60, "mean_direction": 7e60}},
        "posterior_table": {"run": "step-sizes", "converged": False},
    }
    text = " ".join(_plain_advice(advice))
    assert "Use step-sizes" in text and "6.25x" in text and "1.5x" not in text
    assert "0.28" in text  # the acceptance measured in that run
    assert "> 1e6x" in text and "e+60" not in text
    assert "have not converged" in text


def test_figures_survive_a_run_in_which_no_chain_moved(tuned_folder):
    """A stuck run has no meaningful autocorrelation time (it can come out NaN); the report must still draw."""
    run = load_run(tuned_folder)
    stuck = np.broadcast_to(run.draws[run.main][:1, :1], run.draws[run.main].shape).copy()  # one point, every chain
    run.draws[run.main] = stuck
    figures = build_figures(run)
    assert figures["autocorrelation"] is not None and figures["traces"] is not None
