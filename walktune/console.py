"""Terminal presentation of a tuning result with rich: tables and progress, nothing else.

Only the command-line layer imports this module; the library never prints.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from rich.console import Console, Group
from rich.panel import Panel
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn
from rich.table import Table
from rich.text import Text

from . import theory
from .advice import THINNING_ESS_LOSS
from .constants import CAUTION
from .diagnostics import IACT_RELATIVE_ERROR, IACTS_FOR_PRECISE_ESS
from .plaintext import duration, mean_with_mcse
from .recommend import format_factor

if TYPE_CHECKING:  # for annotations only: showing an inspection needs no tuning code
    from .tune import TuneResult

SEVERITY_STYLE = {"info": "cyan", "warn": "yellow", "critical": "bold red"}
STAGE_LABELS = {
    "mode": "finding the mode",
    "pilot": "pilot (adaptive stages)",
    "current": "proof: your proposal",
    "single-step": "proof: one step size",
    "step-sizes": "proof: per-parameter steps",
    "tuned-covariance": "proof: tuned covariance",
    "proof": "proof (fixed-proposal rounds)",
}


class StageProgress:
    """A rich progress display fed by the library's ``progress(stage, done, total)`` callback."""

    def __init__(self, console: Console, enabled: bool = True):
        self.enabled = enabled
        self.progress = Progress(
            TextColumn("{task.description:<30}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("eta"),
            TimeRemainingColumn(),
            TimeElapsedColumn(),
            console=console,
            transient=False,
            disable=not enabled,
        )
        self.tasks: dict = {}
        self._last = 0.0

    def __enter__(self):
        self.progress.__enter__()
        return self

    def __exit__(self, *exc):
        return self.progress.__exit__(*exc)

    def __call__(self, stage: str, done: float, total: float) -> None:
        if stage not in self.tasks:
            self.tasks[stage] = self.progress.add_task(STAGE_LABELS.get(stage, stage), total=total)
        self.progress.update(self.tasks[stage], completed=min(done, total), total=total)


def _needs(columns: list, rows: list) -> int:
    """Width of a boxed table whose cells (and headers) are kept whole on one line."""
    def length(cell) -> int:
        return (cell if isinstance(cell, Text) else Text(str(cell))).cell_len

    widest = [max([length(header)] + [length(row[i]) for row in rows]) for i, (header, _) in enumerate(columns)]
    return sum(widest) + 3 * len(columns) + 1  # one space of padding each side, a border between columns


def _column_groups(columns: list, rows: list, width: int) -> list | None:
    """Consecutive groups of columns after the first that fit ``width`` beside it; None when one column cannot."""
    groups, current = [], []
    for index in range(1, len(columns)):
        trial = current + [index]
        if _needs([columns[i] for i in [0, *trial]], [[row[i] for i in [0, *trial]] for row in rows]) <= width:
            current = trial
        elif current:
            groups.append(current)
            current = [index]
            if _needs([columns[0], columns[index]], [[row[0], row[index]] for row in rows]) > width:
                return None
        else:
            return None
    return groups + [current] if current else groups


def _plain_table(title, columns: list, rows: list, caption) -> Table:
    table = Table(title=title, title_justify="left", caption=caption, caption_justify="left")
    for header, justify in columns:
        table.add_column(header, justify=justify, no_wrap=True)
    for row in rows:
        table.add_row(*row)
    return table


def fitted_table(title: str, columns: list, rows: list, width: int | None, caption: str | None = None):
    """A table of ``columns`` (header, justify) and ``rows``, laid out to fit ``width`` columns.

    Every cell is kept whole (no wrapping inside a value): side by side when the
    terminal is wide enough; else the columns in stacked tables, each repeating
    the first column, in their order of importance; else one block per row, each
    value under its header. A narrow or piped terminal (80 columns) thus still
    shows every value in full. Returns a rich Table, or a Group of them.
    """
    if width is None or _needs(columns, rows) <= width:
        return _plain_table(title, columns, rows, caption)
    groups = _column_groups(columns, rows, width)
    if groups is not None and len(groups) <= 3:
        parts = []
        for number, group in enumerate(groups):
            keep = [0, *group]
            parts.append(_plain_table(title if number == 0 else None, [columns[i] for i in keep],
                                      [[row[i] for i in keep] for row in rows], None))
        return Group(*parts, *([Text(caption)] if caption else []))
    vertical = Table(title=title, title_justify="left", caption=caption, caption_justify="left", show_header=False,
                     show_lines=True, expand=True)
    vertical.add_column("what", style="bold", no_wrap=True)
    vertical.add_column("value", ratio=1)
    for row in rows:
        label = row[0] if isinstance(row[0], Text) else Text(str(row[0]), style="bold")
        lines = Text()
        for (header, _), cell in zip(columns[1:], row[1:]):
            lines.append(f"{header}: ", style="dim")
            lines.append(cell if isinstance(cell, Text) else Text(str(cell)))
            lines.append("\n")
        lines.rstrip()
        vertical.add_row(label, lines)
    return vertical


def _fmt(x: float, digits: int = 3) -> str:
    if x is None or not np.isfinite(x):
        return "n/a"
    return f"{x:.{digits}g}"


def _hours(evaluations: float, seconds_per_evaluation: float) -> str:
    return duration(evaluations * seconds_per_evaluation)


def posterior_table(result: TuneResult, width: int | None = None) -> Table:
    """Mean, MCSE, sd and R-hat, all from the draws of one run: the recommended one."""
    run = result.posterior_run
    rows = {row.proposal: row for row in result.comparison}
    shape = f", {rows[run].evaluations} evaluations" if run in rows else ""
    title = f"Posterior (mean, MCSE, sd, R-hat and R^2 from the {run} fixed-proposal run{shape})"
    scope = result.posterior_scope.describe() if result.posterior_scope is not None else ""
    if scope:
        title += f"\n{scope[0].upper()}{scope[1:]}"
    if result.posterior_rhat is not None and not result.converged:
        worst = np.nanmax(result.posterior_rhat)
        title += ("\nNOT CONVERGED: " + (f"R-hat up to {worst:.3f} (below 1.01 wanted)" if not worst <= 1.01 else
                                          "one region of a multimodal posterior") + "; do not trust these numbers")
    columns = [("parameter", "left"), ("mean", "right"), ("+/- MCSE", "right"), ("sd", "right"), ("R-hat", "right"),
               ("step", "right"), ("R^2 others", "right")]
    sd = result.posterior_sd if result.posterior_sd is not None else result.structure.sd
    r_squared = (result.posterior_r_squared if result.posterior_r_squared is not None
                 else result.structure.determined_by_others)
    table_rows = []
    for i, name in enumerate(result.parameter_names):
        rhat = result.posterior_rhat[i] if result.posterior_rhat is not None else float("nan")
        flag = "" if rhat <= 1.01 else " !"
        table_rows.append([
            name, _fmt(result.posterior_mean[i], 5), _fmt(result.posterior_mean_mcse[i], 2), _fmt(sd[i]),
            Text(f"{rhat:.3f}{flag}", style="bold red" if flag else ""),
            _fmt(result.step_sizes[i]), f"{r_squared[i]:.3f}",
        ])
    caption = ("step: tuned per-parameter proposal sd; R^2 others: how well the other parameters predict it "
               "(linearly, in the same draws).")
    if any(len(row[4].plain) and row[4].plain.endswith("!") for row in table_rows):
        caption += " ! R-hat above 1.01: the chains disagree."
    return fitted_table(title, columns, table_rows, width, caption)


def geometry_table(result: TuneResult, max_rows: int = 5) -> Table:
    return geometry_table_from(result.structure, result.parameter_names, max_rows)


def geometry_table_from(s, names, max_rows: int = 5, source: str = "the pilot's covariance estimate") -> Table:
    table = Table(title=f"Geometry (from {source})", title_justify="left", show_header=False)
    table.add_column("what", style="bold", no_wrap=True)
    table.add_column("value")
    table.add_row("effective dimension", f"{s.effective_dimension:.2f} of {len(names)} (participation ratio)")
    table.add_row("spectrum", f"correlation eigenvalues span {s.decades:.1f} decades")
    for i, j, rho in s.strongest_pairs[:max_rows]:
        if abs(rho) < 0.5:
            break
        table.add_row("correlated pair", f"{names[i]} ~ {names[j]}: {rho:+.3f}")
    for direction in s.directions[: min(max_rows, len(names))]:
        if direction.eigenvalue > 0.1:
            break
        table.add_row("pinned combination", f"{direction.describe(names)} = const +/- {direction.spread:.3g}")
    widest = s.directions[-1]
    table.add_row("widest combination", f"{widest.describe(names)} spreads +/- {widest.spread:.3g}")
    return table


def _predicted(slowdown: dict) -> str:
    """A predicted slow-down (walktune.theory.Slowdown as a dict), smallest ESS first."""
    return (f"predicted {format_factor(slowdown['slowest_parameter'], 2)} lower smallest ESS per evaluation "
            f"({format_factor(slowdown['slowest_direction'], 2)} in the slowest principal direction)")


def advice_table(result: TuneResult, output_folder: str | None) -> Table:
    table = Table(title="Advice", title_justify="left", show_header=False)
    table.add_column("what", style="bold", no_wrap=True)
    table.add_column("advice")
    rec = result.recommended
    rows = {row.proposal: row for row in result.comparison}
    if rec is not None:
        worth = result.evaluations_needed().get(rec.proposal, float("nan"))
        saved = f" Saved as {output_folder}/recommended_proposal.npy and .csv" if output_folder else ""
        if rec.coordinates != "parameters":
            saved += " (in the sampler coordinates of sampling_map.json)"
        table.add_row(Text("RECOMMENDED", style="bold green"), Text(
            f"{rec.message} For ESS {result.target_ess}: about {_fmt(worth, 3)} evaluations "
            f"(~{_hours(worth, result.seconds_per_evaluation)}).{saved}", style="bold"))
    where = f" (saved in {output_folder}/proposal_covariance.csv and .npy)" if output_folder else ""
    scale = theory.optimal_scale(len(result.parameter_names))
    table.add_row(
        "tuned covariance",
        f"propose theta + N(0, C), C = ({result.pilot.scale_factor:.3g} x {scale:.3g})^2 x posterior covariance{where}",
    )
    tuned = rows.get("tuned-covariance")
    measured = f"; measured {tuned.acceptance:.2f} in the tuned-covariance run" if tuned is not None else ""
    table.add_row("acceptance", f"expected {result.expected_acceptance:.2f} if the posterior were Gaussian{measured}")
    steps = result.slowdowns["step_sizes"]
    table.add_row("step sizes only", f"per-parameter sds in the posterior table; {_predicted(steps)}")
    single = result.slowdowns["single_step"]
    table.add_row("one step size", f"{result.single_step:.3g}; {_predicted(single)}")
    if "current" in result.slowdowns:
        cur, res = result.slowdowns["current"], result.slowdowns["current_rescaled"]
        table.add_row(
            "your proposal",
            f"as it is, {_predicted(cur)}; {format_factor(res['slowest_parameter'], 2)} if only its overall scale were tuned",
        )
    reparam = result.reparam
    if reparam is not None and reparam.bends:
        chosen = ", ".join([f"{t.kind}({t.name})" for t in reparam.transforms if t.kind != "identity"]
                           + [f"{b.name} -> {b.describe()}" for b in reparam.bends])
        table.add_row("new coordinates", f"sample z = Q^T W^-1 (B(T(theta)) - m) with T, B: {chosen}; the map is in "
                      "sampling_map.json (walktune.load_sampling_map); see the transformed-rotated row below")
    elif reparam is not None and any(t.kind != "identity" for t in reparam.transforms):
        chosen = ", ".join(f"{t.kind}({t.name})" for t in reparam.transforms if t.kind != "identity")
        table.add_row("new coordinates", f"sample z = Q^T W^-1 (T(theta) - m) with T: {chosen}; the map is in sampling_map.json "
                      "(walktune.load_sampling_map); see the transformed-rotated row below")
    else:
        table.add_row("rotated basis", "z = W^-1 (theta - mean), W = Cholesky factor of the posterior covariance (advice.json: rotation)")
    if reparam is not None and reparam.prior_variance_ratio is not None:
        table.add_row("informed directions", f"{reparam.informed} of {len(result.parameter_names)} directions are informed by the "
                      "data; the others stay close to the prior (reduced-basis row below)")
    table.add_row("warm-up", f"about {result.warmup_steps} steps per chain from a start near the mode (10 x slowest IACT)")
    table.add_row(
        "thinning",
        "keep every draw; thinning adds no information"
        + (f" (to save storage, keeping one draw in {result.thinning} keeps at least "
           f"{1 - THINNING_ESS_LOSS:.0%} of the ESS)" if result.thinning > 1 else ""),
    )
    needed = result.evaluations_needed()
    for row in result.comparison:
        n = needed[row.proposal]
        table.add_row(
            f"for ESS {result.target_ess}",
            f"{row.proposal}: {_fmt(n, 3)} evaluations (~{_hours(n, result.seconds_per_evaluation)} at the measured cost)",
        )
    return table


def comparison_table(result: TuneResult, width: int | None = None) -> Table:
    """The proof runs side by side; the notes below explain the marks."""
    rows = result.comparison
    budgets = sorted({row.evaluations for row in rows})
    budget = f"{budgets[0]} evaluations each" if len(budgets) == 1 else "evaluations in the evals column"
    title = f"Measured: fixed-proposal runs from the pilot's end states ({budget}; runs measured slower stopped early)"
    columns = [("proposal", "left"), ("accept", "right"), ("min ESS", "right"), ("med ESS", "right"),
               ("speed-up", "right"), ("R-hat max", "right")]
    if len(budgets) > 1:
        columns.insert(4, ("evals", "right"))
    chosen = result.recommended.proposal if result.recommended is not None else None
    table_rows, notes = [], []
    for row in rows:
        mark = ("> " if row.proposal == chosen else "") + row.proposal + ("" if row.ess_reliable else " *")
        if not row.mixed:
            mark += " !"
        cells = [mark, f"{row.acceptance:.2f}", _fmt(row.ess_per_1000), _fmt(row.median_ess_per_1000),
                 speedup_cell(row, short=True), _fmt(row.max_rhat, 4)]
        if len(budgets) > 1:
            cells.insert(4, str(row.evaluations))
        table_rows.append(cells)
        if getattr(row, "speedup_kind", "measured") == "imprecise":
            notes.append(f"{row.proposal}: {speedup_cell(row)}")
    caption = (f"> recommended. * imprecise ESS: fewer than {IACTS_FOR_PRECISE_ESS} autocorrelation times over the "
               f"chains (error above {IACT_RELATIVE_ERROR:.0%}). ! not mixed. min/med ESS: smallest and median over parameters, per 1000 evaluations. >= : a lower bound (the baseline's chains had "
               "not mixed at all, so its ESS is too high); <= : an upper bound; ~ : imprecise, as likely too high as too low."
               + "".join(f"\n{note}" for note in notes))
    return fitted_table(title, columns, table_rows, width, caption)


def speedup_cell(row, short: bool = False) -> str:
    """A comparison row's speed-up as measured, a bound, or imprecise with the evaluations that would settle it."""
    value = format_factor(row.speedup)
    kind = getattr(row, "speedup_kind", "measured")
    if kind == "lower-bound":
        return ">= " + value
    if kind == "upper-bound":
        return "<= " + value
    if kind == "imprecise":
        if short:
            return "~" + value
        settle = row.evaluations_to_settle
        return f"~{value} (imprecise; " + (f"~{_fmt(settle, 2)} evals in all, over both runs, would settle it)" if settle else "a run has not mixed)")
    return value


def findings_table(result) -> Table | Text:
    if not result.findings:
        return Text("No findings: nothing unusual was seen (which does not prove there is nothing).")
    table = Table(title="Findings", title_justify="left")
    table.add_column("severity", no_wrap=True)
    table.add_column("kind", no_wrap=True)
    table.add_column("what it means", ratio=1)
    for finding in result.findings:
        style = SEVERITY_STYLE[finding.severity]
        table.add_row(Text(finding.severity.upper(), style=style), finding.kind, finding.message)
    return table


def render(console: Console, result: TuneResult, label: str, output_folder: str | None) -> None:
    d = len(result.parameter_names)
    header = (
        f"{label}: {d} parameters, {result.total_evaluations} evaluations "
        f"({result.pilot_evaluations} for the mode and pilot), "
        f"{duration(result.seconds_per_evaluation)} per evaluation"
    )
    if result.worker_busy is not None:
        header += f"; workers busy {result.worker_busy:.0%} of the evaluation time"
    if result.partial:
        header += " [PARTIAL: interrupted]"
    console.print(Panel(header, title="walktune", expand=False))
    console.print(advice_table(result, output_folder))
    console.print(comparison_table(result, console.width))
    console.print(posterior_table(result, console.width))
    console.print(geometry_table(result))
    console.print(findings_table(result))
    _list_outputs(console, output_folder)
    console.print(Panel(Text(CAUTION), title="caution", border_style="yellow", expand=False))


def render_partial(console: Console, partial: dict, output_folder: str) -> None:
    """What an interrupted run leaves: partial advice, clearly marked, and how to resume."""
    stage = partial.get("stopped_in_stage") or "the start"
    console.print(
        Panel(
            f"PARTIAL: stopped during {stage} after {partial.get('evaluations', 0)} evaluations. "
            "This advice has not been checked by the fixed-proposal runs.",
            title="walktune (interrupted)", border_style="yellow", expand=False,
        )
    )
    names = partial.get("parameter_names") or []
    if partial.get("step_sizes") is not None:
        table = Table(title=f"Partial advice, from {partial.get('basis')}", title_justify="left")
        table.add_column("parameter")
        table.add_column("step size (proposal sd)", justify="right")
        for name, step in zip(names, partial["step_sizes"]):
            table.add_row(str(name), _fmt(step))
        console.print(table)
    else:
        console.print("No advice yet: the run stopped before the mode search finished.")
    rows = partial.get("comparison") or []
    if rows:
        table = Table(title="Proof runs finished before the stop", title_justify="left")
        for column in ("proposal", "acceptance", "min ESS per 1000 evals"):
            table.add_column(column, justify="left" if column == "proposal" else "right")
        for row in rows:
            table.add_row(row["proposal"], _fmt(row["acceptance"]), _fmt(row["ess_per_1000"]))
        console.print(table)
    if partial.get("checkpoint"):
        console.print(
            f"Checkpoint and partial-advice.json saved in [bold]{output_folder}[/bold]. "
            f"Continue with: walktune tune --resume {output_folder}", highlight=False,
        )
    else:
        console.print("Nothing was evaluated yet, so no checkpoint was written.")
    console.print(Panel(Text(partial.get("caution", CAUTION)), title="caution", border_style="yellow", expand=False))


def _list_outputs(console: Console, output_folder: str | None) -> None:
    """Name the files the run left, as they are in the folder."""
    if not output_folder:
        return
    from pathlib import Path

    files = sorted(p.name for p in Path(output_folder).iterdir() if p.is_file() and not p.name.startswith("."))
    console.print(f"Outputs in [bold]{output_folder}[/bold]: {', '.join(files)}")


VERDICT_STYLE = {"ok": "green", "imprecise-ess": "cyan", "too-few-draws": "yellow", "not-converged": "bold red", "stuck-chain": "bold red"}


def inspection_table(result, width: int | None = None) -> Table:
    """Per parameter, what to do first (verdict, draws still needed), then the numbers behind it.

    Columns in order of weight for the decision: the verdict; the draws still
    needed for the ESS wanted at the observed efficiency; the mean with its
    MCSE; bulk ESS and R-hat, on which the verdict rests; the IACT; tail ESS and sd.
    """
    s = result.summary
    title = (f"Chains: {s.n_chains} x {s.n_draws} draws; state changes in {result.move_rate:.1%} of steps; "
             f"ESS wanted {result.target_ess:g}")
    columns = [("parameter", "left"), ("verdict", "left"), ("draws needed", "right"), ("mean +/- MCSE", "right"),
               ("ESS", "right"), ("R-hat", "right"), ("IACT", "right"), ("tail ESS", "right"), ("sd", "right")]
    rows, notes = [], []
    for i, name in enumerate(result.parameter_names):
        imprecise = "~" if s.bulk_too_short[i] else ""
        verdict = result.verdicts[i]
        more = result.more_draws_observed[i]
        rows.append([
            name, Text(verdict.verdict, style=VERDICT_STYLE.get(verdict.verdict, "")),
            "none" if more == 0 else "+" + _fmt(more, 3), mean_with_mcse(s.mean[i], s.mcse[i]),
            imprecise + _fmt(s.bulk_ess[i], 4), f"{s.rhat[i]:.3f}", _fmt(s.iact[i]), _fmt(s.tail_ess[i], 4), _fmt(s.sd[i]),
        ])
        if verdict.verdict != "ok":
            notes.append(f"{name}: {verdict.reason}")
    caption = ("draws needed: more draws in all chains for the ESS wanted, at the observed efficiency. ESS: bulk ESS; "
               f"~ imprecise: fewer than {IACTS_FOR_PRECISE_ESS} IACTs over the chains (error above {IACT_RELATIVE_ERROR:.0%})." + "".join(f"\n{note}" for note in notes))
    return fitted_table(title, columns, rows, width, caption)


def inspection_advice_table(result) -> Table:
    d = len(result.parameter_names)
    advice = result.advice
    table = Table(title="Advice from these draws", title_justify="left", show_header=False)
    table.add_column("what", style="bold")
    table.add_column("advice")
    table.add_row(
        "proposal covariance",
        f"propose theta + N(0, C), C = {theory.optimal_scale(d):.3g}^2 x the covariance of these draws "
        f"(expected acceptance {advice.expected_acceptance:.2f})",
    )
    steps = advice.slowdowns["step_sizes"]
    table.add_row("step sizes only", f"{', '.join(_fmt(x) for x in advice.step_sizes[:8])}{' ...' if d > 8 else ''}; "
                  f"{_predicted(steps)}")
    if "current" in advice.slowdowns:
        cur, res = advice.slowdowns["current"], advice.slowdowns["current_rescaled"]
        table.add_row("your proposal", f"against the advice as it is, {_predicted(cur)}; "
                      f"{format_factor(res['slowest_parameter'], 2)} if only its overall scale were tuned")
    advised = float(np.nanmax(result.more_draws_advised))
    table.add_row("draws needed", f"with the advised proposal about {_fmt(advised, 3)} draws in all for the ESS wanted "
                  f"(optimal-scaling theory), against {_fmt(float(np.nanmax(result.more_draws_observed)), 3)} more at the observed efficiency")
    return table


def render_inspection(console: Console, result, output_folder: str | None) -> None:
    run = f", run {result.run}" if getattr(result, "run", None) else ""
    console.print(Panel(f"inspected: {', '.join(result.sources) or 'array'}{run}", title="walktune", expand=False))
    console.print(inspection_table(result, console.width))
    console.print(inspection_advice_table(result))
    console.print(geometry_table_from(result.structure, result.parameter_names, source="the covariance of these draws"))
    console.print(findings_table(result))
    _list_outputs(console, output_folder)
    console.print(Panel(Text(CAUTION), title="caution", border_style="yellow", expand=False))
