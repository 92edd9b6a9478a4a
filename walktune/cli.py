"""Command line: a thin typer + rich layer over the library API."""

from __future__ import annotations

import json
import os
import sys
from contextlib import contextmanager, redirect_stdout
from pathlib import Path
from typing import List, Optional

import numpy as np
import typer
from rich.console import Console

from . import __version__
from .cli_options import parse_count, read_proposal, split_list, tune_arguments
from .errors import WalktuneError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Tune random-walk Metropolis proposals from the geometry of your posterior, and prove the gain.",
)

def _demo_model(name: str = "sensor_calibration.py") -> Path:
    """A demo model file: shipped inside the package (an install), else in the repository's demo_models/."""
    here = Path(__file__).resolve().parent
    installed = here / "demo_models" / name
    return installed if installed.exists() else here.parent / "demo_models" / name


DEMO_MODEL = _demo_model()


def _console(stderr: bool = False) -> Console:
    return Console(stderr=stderr, no_color="NO_COLOR" in os.environ or None)


def _fail(message: str, code: int = 2) -> None:
    _console(stderr=True).print(f"[bold red]error:[/bold red] {message}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


@contextmanager
def _user_errors(doing: str):
    """Turn the library's user errors and file errors into one-line messages and exit code 2."""
    try:
        yield
    except WalktuneError as error:
        _fail(str(error))
    except OSError as error:
        _fail(f"cannot {doing}: {error.strerror or error} ({error.filename})")


@contextmanager
def _json_channel(enabled: bool):
    """With --json, stdout carries the JSON only: anything else written there while the run works (the
    model's prints at import or in evaluations, in this process or in forked workers) goes to stderr.
    Yields the function that writes to the real stdout."""
    if not enabled:
        yield typer.echo
        return
    real = sys.stdout
    real.flush()
    try:
        fd, err_fd = real.fileno(), sys.stderr.fileno()
    except (AttributeError, ValueError, OSError):
        fd = None  # not a file (a test runner's buffer): redirecting sys.stdout is enough
    saved = None
    if fd is not None:
        saved = os.dup(fd)
        os.dup2(err_fd, fd)

    def emit(text: str) -> None:
        sys.stdout.flush()
        if saved is None:
            real.write(text + "\n")
            real.flush()
        else:
            with open(os.dup(saved), "w", closefd=True) as handle:
                handle.write(text + "\n")

    try:
        with redirect_stdout(sys.stderr):
            yield emit
    finally:
        sys.stdout.flush()
        if saved is not None:
            os.dup2(saved, fd)
            os.close(saved)


def _version(value: bool):
    if value:
        typer.echo(f"walktune {__version__}")
        raise typer.Exit()


@app.callback()
def main_callback(
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True, help="Print the version and exit."),
):
    """walktune: tune random-walk Metropolis samplers and diagnose their chains."""


@contextmanager
def _stop_on_signals(checkpoint):
    """First Ctrl-C or SIGTERM: stop at the next step and save. Second: exit at once (files are written atomically)."""
    import signal

    received = []

    def handler(signum, frame):
        received.append(signum)
        if len(received) > 1:
            import multiprocessing

            for child in multiprocessing.active_children():  # worker processes would run on, orphaned
                child.kill()
            os._exit(128 + signum)
        checkpoint.request_stop(signum)
        os.write(2, b"\nstopping at the next step and saving a checkpoint; press Ctrl-C again to quit at once\n")

    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def _output_folder(given: dict, out: Optional[Path], resume: Optional[Path], restart: bool) -> Path:
    """The run's output folder, from --out or --resume."""
    if resume is not None:
        if restart:
            raise WalktuneError("--restart starts a new run and --resume continues one; give one of them.")
        if out is not None and out.resolve() != resume.resolve():
            raise WalktuneError(f"a resumed run writes into its own folder {resume}; drop --out or give --out {resume}.")
        return resume
    if given["target"] is None:
        raise WalktuneError("give the log-density as TARGET (path/to/model.py:function), or --resume FOLDER.")
    out = out if out is not None else Path("walktune-output")
    if out.exists() and not out.is_dir():
        raise WalktuneError(f"output path {out} exists and is not a folder; choose another --out.")
    return out


def _run_options(given: dict, out: Path, resume: Optional[Path], restart: bool = False):
    """The options of the run (a resumed run's own) and the model; called with the folder locked."""
    from .checkpoint import check_model_unchanged, options_for_new_run, options_for_resume
    from .target import load_target

    if resume is not None:
        options, stored = options_for_resume(resume, given, lambda text: load_target(text).canonical)
    else:
        options = options_for_new_run(out, given, restart=restart)
    spec = load_target(options["target"])
    if resume is not None:
        check_model_unchanged(resume, stored, spec.source_digest, spec.canonical)
    options["target"] = spec.canonical
    return options, spec


def _interrupted(stop, out: Path, console: Console, emit, as_json: bool, quiet: bool) -> None:
    """Save and show the partial advice of a stopped run; exit 128 + the signal."""
    from .console import render_partial
    from .io import atomic_write_bytes, json_bytes

    partial = stop.partial or {"partial": True}
    partial["checkpoint"] = str(stop.checkpoint) if stop.checkpoint else None
    if stop.checkpoint is not None:
        atomic_write_bytes(out / "partial-advice.json", json_bytes(partial))
    if as_json:
        emit(json.dumps(partial, indent=2))
    elif quiet:
        _console(stderr=True).print(f"interrupted; checkpoint in {out}; resume with: walktune tune --resume {out}")
    else:
        render_partial(console, partial, str(out))
    raise typer.Exit(128 + (stop.signum or 2)) from None


def _make_room(out: Path, *, resume: bool, restart: bool, overwrite: bool) -> None:
    """With the folder locked: --restart discards an interrupted run (saying so); a new run into another
    run's files needs --overwrite (see docs/usage.md, "Output folders")."""
    from .checkpoint import discard_interrupted
    from .outputs import RESULT_FILES, check_free

    if resume:
        return
    check_free(out, overwrite=overwrite, names=RESULT_FILES)  # before anything is discarded
    if restart:
        gone = discard_interrupted(out)
        if gone:
            _console(stderr=True).print(
                f"--restart: discarded {' and '.join(gone)} of the earlier run in {out}", highlight=False
            )


def _provenance(command: str, options: dict, spec=None) -> dict:
    """What produced an output folder, for advice.json's ``produced_by``."""
    return {
        "command": command,
        "model_file": getattr(spec, "source_file", None),
        "model_sha256": getattr(spec, "source_digest", None),
        "options": json.loads(json.dumps(options, default=str)),
    }


def _run_tune(
    target: Optional[str],
    names: Optional[str],
    start: Optional[str],
    bounds: List[str],
    budget: Optional[int],
    chains: Optional[int],
    seed: Optional[int],
    out: Optional[Path],
    current_proposal: Optional[Path],
    target_ess: Optional[int],
    as_json: bool,
    quiet: bool,
    report: bool = False,
    transform: Optional[List[str]] = None,
    no_transform: Optional[List[str]] = None,
    workers: Optional[int] = None,
    dask: Optional[str] = None,
    resume: Optional[Path] = None,
    checkpoint_every: float = 30.0,
    time_limit: Optional[float] = None,
    threads: Optional[int] = None,
    overwrite: bool = False,
    restart: bool = False,
    command: str = "walktune tune",
) -> None:
    from .outputs import FolderLock

    with _json_channel(as_json) as emit:
        given = {
            "target": target, "names": names, "start": start, "bound": list(bounds or []), "budget": budget,
            "chains": chains, "seed": seed, "target_ess": target_ess, "transform": list(transform or []),
            "no_transform": list(no_transform or []),
            "current_proposal": read_proposal(current_proposal).tolist() if current_proposal is not None else None,
        }
        out = _output_folder(given, out, resume, restart)
        lock = FolderLock(out).acquire()  # before anything is read from or written to the folder
        try:
            options, spec = _run_options(given, out, resume, restart)
            arguments = tune_arguments(options, spec)
            _make_room(out, resume=resume is not None, restart=restart, overwrite=overwrite)
            result = _tune_in(out, options, spec, arguments, emit, as_json, quiet, workers, dask, resume,
                              checkpoint_every, time_limit, threads)
            produced_by = _provenance(command, options, spec)
            result.save(out, produced_by=produced_by)
            if report:
                from .report import write_report

                write_report(out)
            # The results replaced the folder's earlier files, the checkpoint and any partial advice included.
        finally:
            lock.release()
        if as_json:
            from .export import with_provenance

            emit(json.dumps(with_provenance(result.to_dict(), produced_by), indent=2))
        elif not quiet:
            from .console import render

            render(_console(), result, target or options["target"], str(out))
        else:
            _console().print(f"advice written to {out}")


def _tune_in(out, options, spec, arguments, emit, as_json, quiet, workers, dask, resume, checkpoint_every,
             time_limit, threads):
    """Run the tuning job with its checkpoint in the locked folder ``out``; a stop exits with partial advice."""
    from .checkpoint import FILE_NAME, Checkpoint, Interrupted
    from .console import StageProgress
    from .tune import tune

    evaluator = None
    try:
        if workers is not None or dask is not None or time_limit is not None or threads is not None:
            from .evaluators import make_evaluator

            evaluator = make_evaluator(spec.function, spec.vectorized, workers=workers, dask=dask, time_limit=time_limit,
                                       threads=threads)
        if options["chains"] is None:
            # Many chains keep many workers busy. Fixed here, so that a resume on other workers runs the same chains.
            options["chains"] = max(4, getattr(evaluator, "parallelism", 1))
        identity = {"options": options, "model_digest": spec.source_digest}
        checkpoint = Checkpoint(out, identity, every=checkpoint_every, resume=resume is not None)
        if resume is not None and not quiet:
            _console(stderr=True).print(
                f"resuming from {out / FILE_NAME}: replaying {checkpoint.resumed_evaluations} recorded evaluations "
                "without calling the model, then going on", highlight=False,
            )
        note = None if as_json else _budget_note(arguments, options["chains"], quiet)  # --json: in the findings
        with _stop_on_signals(checkpoint), StageProgress(_console(stderr=True), enabled=not (quiet or as_json)) as progress:
            return tune(None if evaluator is not None else spec.function, chains=options["chains"],
                        evaluator=evaluator, checkpoint=checkpoint, progress=_saying_first(note, progress),
                        **arguments)
    except Interrupted as stop:
        _interrupted(stop, out, _console(), emit, as_json, quiet)
    finally:
        if evaluator is not None and hasattr(evaluator, "close"):
            evaluator.close()


def _budget_note(arguments: dict, chains: int, quiet: bool) -> str | None:
    """What the job will spend (:func:`walktune.planning.budget_statement`), to say before the progress bar;
    a budget too small for trustworthy figures is said even with --quiet. None when there is nothing to say
    (a budget below the minimum is left to tune()'s error)."""
    from .planning import budget_statement
    from .stages import Budget, minimum_budget

    dim, budget = len(arguments["start"]), arguments["budget"]
    if budget is not None and budget < minimum_budget(dim, chains):
        return None
    statement = budget_statement(Budget.plan(budget, dim, chains))
    if statement.trustworthy and quiet:
        return None
    return ("budget: " if statement.trustworthy else "warning: ") + statement.message


def _saying_first(note: str | None, progress):
    """The progress callback, saying ``note`` on stderr at its first call: once the job has checked its inputs
    and the model's start, before its first stage spends anything (bad input stays a one-line error)."""
    said = []

    def call(stage, done, total):
        if note and not said:
            said.append(True)
            _console(stderr=True).print(note, highlight=False, markup=False, soft_wrap=True)
        progress(stage, done, total)

    return call


@app.command("tune")
def tune_command(
    target: Optional[str] = typer.Argument(
        None, help="The log-density: path/to/model.py:function or package.module:function (not needed with --resume)."
    ),
    names: Optional[str] = typer.Option(None, "--names", help="Comma-separated parameter names (overrides PARAMETERS)."),
    start: Optional[str] = typer.Option(None, "--start", help="Comma-separated start values (overrides START)."),
    bound: List[str] = typer.Option([], "--bound", help="NAME=LOW:HIGH, repeatable; -inf/inf or empty for an open side."),
    budget: Optional[str] = typer.Option(
        None, "--budget", help="Cap on log-density evaluations for the whole job (a whole number: 50000 or 5e4)."
    ),
    chains: Optional[int] = typer.Option(None, "--chains", help="Number of chains (default 4)."),
    seed: Optional[int] = typer.Option(None, "--seed", help="Seed for a reproducible run."),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Output folder (default walktune-output)."),
    current_proposal: Optional[Path] = typer.Option(
        None, "--current-proposal", help="Your proposal today: covariance or step sizes in .npy, .csv or .json."
    ),
    target_ess: Optional[int] = typer.Option(None, "--target-ess", help="ESS you need, for the evaluations-needed advice (default 400)."),
    as_json: bool = typer.Option(False, "--json", help="Print the advice.json payload instead of tables."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No tables or progress; write the output folder only."),
    report: bool = typer.Option(False, "--report", help="Also write figures and report.html into the output folder."),
    transform: List[str] = typer.Option([], "--transform", help="NAME=KIND forces a transform (identity, log, neglog, logit); repeatable."),
    no_transform: List[str] = typer.Option([], "--no-transform", help="A transform kind never to choose (or `bend`: no bends); repeatable."),
    workers: Optional[int] = typer.Option(None, "--workers", help="Evaluate on N local worker processes (default: in this process)."),
    dask: Optional[str] = typer.Option(None, "--dask", help="Evaluate on a Dask cluster: a scheduler address, or local:N."),
    threads: Optional[int] = typer.Option(
        None, "--threads", help="Evaluate on N threads of this process (only for log-densities that release the GIL)."
    ),
    resume: Optional[Path] = typer.Option(
        None, "--resume", help="Continue the interrupted run in this folder from its checkpoint (same result, bit for bit)."
    ),
    checkpoint_every: float = typer.Option(
        30.0, "--checkpoint-every", help="Seconds between checkpoints within a stage; stage ends always save one (0: only those)."
    ),
    time_limit: Optional[float] = typer.Option(
        None, "--time-limit", help="Seconds one evaluation may take (with --workers or --dask); a late one counts as failed."
    ),
    overwrite: bool = typer.Option(
        False, "--overwrite", help="Replace, as a whole, the files of an earlier run in the output folder."
    ),
    restart: bool = typer.Option(
        False, "--restart", help="Discard the checkpoint of an interrupted or failed run in the output folder and start afresh."
    ),
):
    """Tune a proposal for TARGET: pilot chains, geometry, advice, and a measured comparison.

    The run saves a checkpoint in its output folder; Ctrl-C or SIGTERM stops it at the next step with
    partial advice, and --resume FOLDER continues it.
    """
    with _user_errors("write outputs"):
        _run_tune(target, names, start, bound, parse_count(budget, "--budget"), chains, seed, out, current_proposal,
                  target_ess, as_json, quiet, report, transform, no_transform, workers, dask, resume, checkpoint_every,
                  time_limit, threads, overwrite=overwrite, restart=restart)


@app.command("inspect")
def inspect_command(
    files: List[Path] = typer.Argument(
        ..., help="Draws: .npy, .npz, .csv or .tsv (several files are several chains), or a folder written by tune."
    ),
    run: Optional[str] = typer.Option(
        None, "--run", help="Run of a tune folder to read (default: the recommended one, else tuned-covariance)."
    ),
    chain_column: Optional[str] = typer.Option(None, "--chain-column", help="CSV column that names each row's chain."),
    layout: Optional[str] = typer.Option(
        None, "--layout",
        help="Axes of a .npy/.npz array: chains,draws,params (3-D default), draws,chains,params, draws,params "
        "(2-D default) or params,draws.",
    ),
    warmup: int = typer.Option(0, "--warmup", help="Draws to drop from the start of every chain."),
    thin: int = typer.Option(1, "--thin", help="Keep every N-th draw after warm-up."),
    params: Optional[str] = typer.Option(None, "--params", help="Comma-separated parameters to analyse (default: all)."),
    proposal: Optional[Path] = typer.Option(
        None, "--proposal", help="The proposal the chains ran with (covariance or step sizes; .npy, .csv or .json)."
    ),
    target_ess: float = typer.Option(400, "--target-ess", help="ESS wanted per parameter."),
    target_mcse: Optional[float] = typer.Option(None, "--target-mcse", help="Wanted MCSE of each mean."),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Write advice.json and the proposal files here."),
    as_json: bool = typer.Option(False, "--json", help="Print the advice.json payload instead of tables."),
    report: bool = typer.Option(False, "--report", help="Also write figures and report.html into --out."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace, as a whole, the files of an earlier run in --out."),
):
    """Diagnose chains you already have and advise a proposal, without the model."""
    from .chainfiles import read_chains
    from .console import render_inspection
    from .inspection import inspect
    from .outputs import FolderLock, check_free
    from .tunefolder import is_tune_output, read_tune_output

    with _user_errors("read or write"):
        if is_tune_output(files):
            data, run = read_tune_output(files[0], run)
        elif run is not None:
            raise WalktuneError("--run picks a run of a folder written by walktune tune; give that folder or its draws.npz.")
        else:
            data = read_chains(files, chain_column=chain_column, layout=layout)
        chosen = split_list(params, "params")
        current = read_proposal(proposal) if proposal is not None else None
        if out is not None and out.exists() and not out.is_dir():
            raise WalktuneError(f"output path {out} exists and is not a folder; choose another --out.")
        if report and out is None:
            raise WalktuneError("--report writes into the output folder; give --out too.")
        lock = FolderLock(out).acquire() if out is not None else None  # before anything is written
        try:
            if lock is not None:
                check_free(out, overwrite=overwrite)
            result = inspect(
                data, warmup=warmup, thin=thin, params=chosen, proposal=current,
                target_ess=target_ess, target_mcse=target_mcse, chain_column=chain_column, run=run,
            )
            if out is not None:
                options = {"files": [str(Path(f).resolve()) for f in files], "chain_column": chain_column,
                           "layout": data.layout, "warmup": warmup, "thin": thin, "params": chosen, "target_ess": target_ess,
                           "target_mcse": target_mcse, "proposal": str(proposal) if proposal else None, "run": run}
                result.save(out, produced_by=_provenance("walktune inspect", options))
                if report:
                    from .report import write_report

                    write_report(out)
        finally:
            if lock is not None:
                lock.release()
        if as_json:
            typer.echo(json.dumps(result.to_dict(), indent=2))
        else:
            render_inspection(_console(), result, str(out) if out else None)


@app.command("report")
def report_command(
    folder: Path = typer.Argument(..., help="A walktune output folder (from tune, or inspect --out)."),
):
    """Write PNG figures and a self-contained report.html into FOLDER."""
    from .report import write_report

    with _user_errors("write the report"):
        page = write_report(folder)
        _console().print(f"wrote {page} and its figures")


@app.command("demo")
def demo_command(
    out: Path = typer.Option(Path("walktune-demo"), "--out", "-o", help="Output folder for the demo."),
    seed: int = typer.Option(2026, "--seed", help="Seed of the demo run."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No tables or progress."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace, as a whole, an earlier demo's files in --out."),
):
    """Run the whole job on a bundled demo model (a sensor calibration with correlated parameters)."""
    with _user_errors("write outputs"):
        if not DEMO_MODEL.exists():
            raise WalktuneError(f"the demo model {DEMO_MODEL} is missing; reinstall walktune.")
        _run_tune(f"{DEMO_MODEL}:log_posterior", None, None, [], None, None, seed, out, None, 400, False, quiet,
                  report=True, overwrite=overwrite, command="walktune demo")


@app.command("export")
def export_command(
    source: Path = typer.Argument(..., help="A walktune output folder or its advice.json."),
    to: Path = typer.Option(..., "--to", help="File to write."),
    fmt: Optional[str] = typer.Option(
        None, "--format", help="npy, csv, json or python (default: from the --to file's ending)."
    ),
    recommended: bool = typer.Option(
        False, "--recommended", help="Export the recommended option's proposal instead of the tuned covariance."
    ),
):
    """Convert the tuned (or, with --recommended, the recommended) proposal in advice.json to .npy, .csv, a small .json or a Python module."""
    from .export import EXPORT_FORMATS, export_advice

    with _user_errors("export"):
        chosen = fmt or {".npy": "npy", ".csv": "csv", ".json": "json", ".py": "python"}.get(to.suffix)
        if chosen is None:
            raise WalktuneError(f"cannot tell the format from {to.name!r}; give --format ({', '.join(EXPORT_FORMATS)}).")
        path = export_advice(source, to, chosen, recommended=recommended)
        _console().print(f"wrote {path}")


def main() -> None:
    try:
        app()
    except KeyboardInterrupt:
        _console(stderr=True).print("interrupted")
        sys.exit(130)


if __name__ == "__main__":
    main()
