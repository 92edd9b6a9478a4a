"""A visual report of a walktune output folder: PNG figures and one self-contained HTML page.

The page embeds every figure as a data URI, loads nothing from the network,
uses no JavaScript, and opens with the advice in plain words, the findings and
the caution. Figures are drawn from the saved draws (``draws.npz`` of a tuning
run, or the files an inspection read); large runs are thinned for drawing
only, and each figure says so.
"""

from __future__ import annotations

import base64
import html
import io
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .diagnostics import autocorrelation, iact  # noqa: E402
from .errors import WalktuneError  # noqa: E402
from .export import load_advice  # noqa: E402
from .outputs import REPORT_FILES, FolderLock, replace_files  # noqa: E402
from .recommend import format_factor, speedup_text  # noqa: E402

#: Most points drawn per chain in a trace, and in a scatter over all chains.
MAX_TRACE_POINTS = 1000
MAX_SCATTER_POINTS = 2000
MAX_TRACE_PARAMETERS = 8
MAX_PAIRS = 4

STYLE = {
    "figure.facecolor": "white",
    "axes.facecolor": "#fbfbf8",
    "axes.edgecolor": "#555555",
    "axes.grid": True,
    "grid.color": "#e2e2dc",
    "grid.linewidth": 0.6,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "font.family": "DejaVu Sans",
}
CHAIN_COLOURS = ["#1b6b93", "#c4661f", "#4a8c3a", "#8e3b8c", "#b23a48", "#5a5a5a", "#2f9c95", "#a67c00"]
PROPOSAL_COLOURS = {"current": "#b23a48", "single-step": "#b23a48", "step-sizes": "#c4661f", "tuned-covariance": "#1b6b93"}


@dataclass
class Run:
    """What a report is drawn from."""

    folder: Path
    advice: dict
    names: list
    draws: dict  # label -> (chains, steps, d) array
    main: str  # label of the draws that describe the posterior
    baseline: str | None
    reparam: object = None

    @property
    def partial(self) -> bool:
        return bool(self.advice.get("partial"))


def load_run(folder) -> Run:
    """Read advice.json and the draws of a walktune output folder."""
    folder = Path(folder)
    if not folder.is_dir():
        raise WalktuneError(f"{folder} is not a folder; point at a walktune output folder.")
    if (folder / "checkpoint.npz").exists():
        # An interrupted run has no draws to draw from; its partial advice is in partial-advice.json.
        raise WalktuneError(
            f"{folder} holds an interrupted run (checkpoint.npz); no report is made of a run that has not "
            f"finished: finish it with `walktune tune --resume {folder}` (or start afresh with --restart), then "
            "make the report."
        )
    if not (folder / "advice.json").exists():
        raise WalktuneError(f"{folder} holds no walktune run (no advice.json); run `walktune tune` or `inspect --out` first.")
    advice = load_advice(folder)
    names = list(advice["parameter_names"])
    if advice.get("source") == "inspection":
        from .chainfiles import read_chains

        files = advice.get("inspected_files") or []
        missing = [f for f in files if not Path(f).exists()]
        if not files or missing:
            raise WalktuneError(
                f"the draws this inspection read are missing ({', '.join(missing) or 'none recorded'}); "
                "re-run `walktune inspect ... --out` with them in place."
            )
        if advice.get("inspection", {}).get("run") is not None:
            from .tunefolder import read_tune_output

            data, _ = read_tune_output(files[0], advice["inspection"]["run"])
        else:
            recorded = advice.get("inspection", {})
            data = read_chains(files, chain_column=recorded.get("chain_column"), layout=recorded.get("layout"))
        index = [data.names.index(n) for n in names] if set(names) <= set(data.names) else list(range(len(names)))
        info = advice.get("inspection", {})
        draws = data.draws[:, info.get("warmup_dropped", 0) :: info.get("thin", 1)]
        if index != list(range(draws.shape[2])):
            draws = draws[:, :, index]  # a copy; only when the inspection picked parameters
        return Run(folder, advice, names, {"inspected": draws}, "inspected", None)
    path = folder / "draws.npz"
    if not path.exists():
        raise WalktuneError(f"{path} is missing; the report needs the draws saved by `walktune tune`.")
    try:
        with np.load(path, allow_pickle=False) as archive:
            draws = {key: archive[key] for key in archive.files if key != "parameter_names"}
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile, zlib.error) as error:
        raise WalktuneError(f"{path} is damaged or not readable ({type(error).__name__}: {error}); "
                            "re-run `walktune tune`.") from None
    bad = [key for key, value in draws.items() if value.ndim != 3 or value.shape[2] != len(names)]
    if bad:
        raise WalktuneError(f"{path} is damaged: {bad[0]} is not shaped (chains, steps, {len(names)}); "
                            "re-run `walktune tune`.")
    labels = {key.replace("_", "-"): value for key, value in draws.items()}
    if "tuned-covariance" not in labels:
        raise WalktuneError(f"{path} has no tuned-covariance run; re-run `walktune tune`.")
    baseline = next((k for k in ("current", "single-step") if k in labels), None)
    chosen = (advice.get("recommended") or {}).get("proposal")
    main = chosen if chosen in labels else "tuned-covariance"
    reparam = None
    if (folder / "sampling_map.json").exists():
        from .reparam import load_sampling_map

        reparam = load_sampling_map(folder, names=names)
    return Run(folder, advice, names, labels, main, baseline, reparam=reparam)


def _thin(n: int, limit: int) -> int:
    return max(1, int(np.ceil(n / limit)))


def _note(ax, text: str, top: bool = False) -> None:
    ax.text(0.99, 0.98 if top else 0.02, text, transform=ax.transAxes, ha="right", va="top" if top else "bottom",
            fontsize=7, color="#666666", bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.7})


def _iact_per_parameter(run: Run, label: str) -> np.ndarray:
    """IACT of each parameter: from advice.json when an inspection recorded it, else from the
    draws (at most 20,000 per chain, for choosing what to draw only)."""
    recorded = run.advice.get("inspection", {}).get("parameters")
    if label == "inspected" and recorded:
        return np.array([p["iact"] if p["iact"] is not None else np.inf for p in recorded])
    draws = run.draws[label]
    return np.asarray(iact(draws[:, : 20_000]))


def _chosen_parameters(run: Run) -> list:
    """Parameters to trace: all when few, else the worst mixed (highest IACT) first."""
    d = len(run.names)
    if d <= MAX_TRACE_PARAMETERS:
        return list(range(d))
    tau = _iact_per_parameter(run, run.main)
    return sorted(np.argsort(-tau)[:MAX_TRACE_PARAMETERS].tolist())


def figure_traces(run: Run):
    chosen = _chosen_parameters(run)
    columns = [label for label in ("pilot", run.main) if label in run.draws]
    fig, axes = plt.subplots(len(chosen), len(columns), figsize=(5.2 * len(columns), 1.6 * len(chosen) + 0.8), squeeze=False)
    for col, label in enumerate(columns):
        draws = run.draws[label]
        step = _thin(draws.shape[1], MAX_TRACE_POINTS)
        x = np.arange(0, draws.shape[1], step)
        for row, i in enumerate(chosen):
            ax = axes[row, col]
            for c in range(draws.shape[0]):
                ax.plot(x, draws[c, ::step, i], lw=0.6, color=CHAIN_COLOURS[c % len(CHAIN_COLOURS)], label=f"chain {c}")
            ax.set_ylabel(run.names[i])
            if row == 0:
                ax.set_title(f"{label} ({draws.shape[0]} chains x {draws.shape[1]} steps)")
            if step > 1 and row == len(chosen) - 1:
                _note(ax, f"1 in {step} steps drawn")
        axes[-1, col].set_xlabel("step")
    if len(run.names) > len(chosen):
        fig.suptitle(f"Traces of the {len(chosen)} slowest-mixing of {len(run.names)} parameters", fontsize=10)
    fig.tight_layout()
    return fig


def _strongest_pairs(run: Run) -> list:
    """The pairs most correlated in the pilot's covariance estimate (what the geometry table shows), with that correlation."""
    cov = np.asarray(run.advice["posterior_covariance"])
    sd = np.sqrt(np.diag(cov))
    corr = cov / np.outer(sd, sd)
    d = corr.shape[0]
    if d < 2:
        return []
    iu = np.triu_indices(d, k=1)
    order = np.argsort(-np.abs(corr[iu]))[:MAX_PAIRS]
    return [(int(iu[0][o]), int(iu[1][o]), float(corr[iu][o])) for o in order]


def _which_draws(run: Run, label: str) -> str:
    draws = run.draws[label]
    return f"draws of the {label} run ({draws.shape[0]} chains x {draws.shape[1]} steps)"


def figure_pairs(run: Run):
    pairs = _strongest_pairs(run)
    if not pairs:
        return None
    draws = run.draws[run.main]
    flat = draws.reshape(-1, draws.shape[2])
    step = _thin(flat.shape[0], MAX_SCATTER_POINTS)
    rows = [("", flat)]
    transforms = run.reparam.transforms if run.reparam is not None else []
    if any(t.kind != "identity" for t in transforms):
        from .reparam import forward

        with np.errstate(divide="ignore", invalid="ignore"):
            u = np.column_stack([forward(t.kind, flat[:, i], t.low, t.high) for i, t in enumerate(transforms)])
        rows.append(("transformed: ", u))
    fig, axes = plt.subplots(len(rows), len(pairs), figsize=(3.6 * len(pairs), 3.6 * len(rows)), squeeze=False)
    for r, (prefix, values) in enumerate(rows):
        points = values[::step]
        for ax, (i, j, pilot_rho) in zip(axes[r], pairs):
            ax.scatter(points[:, i], points[:, j], s=3, alpha=0.35, color="#1b6b93", edgecolors="none")
            sub = np.cov(values[:, [i, j]].T)
            eigenvalues, vectors = np.linalg.eigh(sub)
            centre = values[:, [i, j]].mean(axis=0)
            for value, vector, colour in zip(eigenvalues, vectors.T, ("#b23a48", "#c4661f")):
                end = 2 * np.sqrt(max(value, 0)) * vector
                ax.plot([centre[0] - end[0], centre[0] + end[0]], [centre[1] - end[1], centre[1] + end[1]], color=colour, lw=1.6)
            kinds = {k.name: k.kind for k in transforms}

            def label(name):
                kind = kinds.get(name, "identity")
                return f"{kind}({name})" if prefix and kind != "identity" else name

            ax.set_xlabel(label(run.names[i]))
            ax.set_ylabel(label(run.names[j]))
            rho = np.corrcoef(values[:, i], values[:, j])[0, 1]
            pilot_note = "" if prefix else f"\npilot's estimate {pilot_rho:+.3f}"
            ax.set_title(f"{prefix}correlation {rho:+.3f} in these draws{pilot_note}", fontsize=9)
            if step > 1:
                _note(ax, f"1 in {step} draws drawn")
    title = f"Strongest pairs (by the pilot's covariance), principal axes +/- 2 sd; {_which_draws(run, run.main)}"
    if len(rows) > 1:
        title += "\nbelow: the same pairs in the chosen transformed coordinates"
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


def figure_spectrum(run: Run):
    values = np.sort(np.asarray(run.advice["correlation_eigenvalues"]))
    ratio = None if run.reparam is None else run.reparam.prior_variance_ratio
    fig, axes = plt.subplots(1, 2 if ratio is not None else 1, figsize=(6.5 * (2 if ratio is not None else 1), 3.4), squeeze=False)
    ax = axes[0, 0]
    pinned = values < 0.1
    index = np.arange(1, values.size + 1)
    ax.semilogy(index, values, color="#555555", lw=0.8)
    ax.scatter(index[~pinned], values[~pinned], color="#1b6b93", s=18, label="explored directions", zorder=3)
    ax.scatter(index[pinned], values[pinned], color="#b23a48", s=18, label="pinned (eigenvalue < 0.1)", zorder=3)
    ax.axhline(0.1, color="#b23a48", lw=0.6, ls="--")
    ax.xaxis.get_major_locator().set_params(integer=True)
    ax.set_xlabel("principal direction (tightest first)")
    ax.set_ylabel("eigenvalue of the correlation matrix")
    ax.set_title(f"Eigen-spectrum of the pilot's covariance: {run.advice['spectrum_decades']:.1f} decades, "
                 f"effective dimension {run.advice['effective_dimension']:.1f} of {values.size}")
    ax.legend(loc="upper left")
    if ratio is not None:
        ax = axes[0, 1]
        informed = np.arange(ratio.size) < run.reparam.informed
        position = np.arange(1, ratio.size + 1)
        ax.semilogy(position, ratio, color="#555555", lw=0.8)
        ax.scatter(position[informed], ratio[informed], color="#1b6b93", s=18, label="informed by the data", zorder=3)
        ax.scatter(position[~informed], ratio[~informed], color="#c4661f", s=18, label="prior-dominated", zorder=3)
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.set_xlabel("likelihood-informed direction")
        ax.set_ylabel("posterior / prior variance")
        ax.set_title(f"{run.reparam.informed} of {ratio.size} directions informed")
        ax.legend(loc="lower right")
    fig.tight_layout()
    return fig


def figure_autocorrelation(run: Run):
    fig, ax = plt.subplots(figsize=(6.5, 3.4))
    labels = [label for label in (run.baseline, run.main) if label]
    curves = {}
    for label in labels:
        draws = run.draws[label]
        tau = _iact_per_parameter(run, label)
        slowest = int(np.nanargmax(tau)) if np.any(np.isfinite(tau)) else 0  # all NaN: no chain moved
        column = np.asarray(draws[:, :, [slowest]], dtype=float)
        curves[label] = (slowest, float(np.asarray(iact(column))[0]), autocorrelation(column)[:, 0])
    longest = max((c[1] for c in curves.values() if np.isfinite(c[1])), default=4.0)
    reach = int(min(max(5 * longest, 20), min(run.draws[l].shape[1] for l in labels) - 1))
    for label, (slowest, tau, rho) in curves.items():
        ax.plot(np.arange(reach + 1), rho[: reach + 1], color=PROPOSAL_COLOURS.get(label, "#555555"),
                label=f"{label}: {run.names[slowest]} (IACT {tau:.3g})")
    ax.axhline(0, color="#555555", lw=0.6)
    ax.set_xlabel("lag (steps)")
    ax.set_ylabel("autocorrelation")
    ax.set_title(f"Autocorrelation of the slowest parameter, in the draws of the {' and '.join(labels)} runs")
    ax.legend()
    fig.tight_layout()
    return fig


def figure_ess(run: Run):
    rows = run.advice.get("comparison") or []
    fig, ax = plt.subplots(figsize=(6.5, 3.4))
    if rows:
        labels = [r["proposal"] for r in rows]
        values = [max(r["ess_per_1000"] or 0.0, 1e-6) for r in rows]
        ax.set_yscale("log")
        for k, row in enumerate(rows):
            hatch = "//" if not row.get("ess_reliable", True) else None
            ax.bar(k, values[k], color=PROPOSAL_COLOURS.get(row["proposal"], "#555555"), hatch=hatch, edgecolor="#333333")
            ax.scatter(k, max(row.get("median_ess_per_1000") or 0.0, 1e-6), color="black", marker="D", s=16, zorder=3)
            text = format_factor(row["speedup"]) if row.get("speedup") else ""
            kind = row.get("speedup_kind") or ("lower-bound" if row.get("speedup_is_lower_bound") else "measured")
            if kind in ("lower-bound", "upper-bound"):
                # The arrow points where the truth lies: above a lower bound, below an upper one.
                ax.annotate("", xy=(k, values[k] * (2.5 if kind == "lower-bound" else 0.4)), xytext=(k, values[k]),
                            arrowprops={"arrowstyle": "->", "color": "black"})
                text = (">= " if kind == "lower-bound" else "<= ") + text
            elif kind == "imprecise":
                text = "~" + text
            ax.text(k, values[k], text, ha="center", va="bottom", fontsize=8)
        ax.set_xticks(range(len(rows)), labels)
        ax.set_ylim(min(values) / 3, max(values) * 6)
        ax.set_ylabel("min ESS per 1000 evaluations (log scale)")
        ax.set_title("Measured efficiency of every proof run (bars: min over parameters; diamonds: median)")
        _note(ax, "speed-ups over the first run; arrow: a bound (truth beyond it); hatched, ~: imprecise ESS (run too short)", top=True)
    else:
        info = run.advice.get("inspection", {}).get("parameters", [])
        ess = [p["bulk_ess"] or 0.0 for p in info]
        order = np.argsort(ess)[: 30]
        ax.barh(range(len(order)), [ess[o] for o in order], color="#1b6b93")
        ax.set_yticks(range(len(order)), [info[o]["name"] for o in order])
        ax.axvline(run.advice.get("target_ess", 400), color="#b23a48", ls="--", lw=0.8, label="ESS wanted")
        ax.set_xlabel("bulk ESS")
        ax.set_title("Bulk ESS per parameter (lowest first)")
        ax.legend()
    fig.tight_layout()
    return fig


def figure_needed(run: Run):
    needed = run.advice.get("evaluations_needed") or {}
    finite = {k: v for k, v in needed.items() if isinstance(v, (int, float)) and v and np.isfinite(v)}
    if not finite:
        return None
    fig, ax = plt.subplots(figsize=(6.5, 3.0))
    labels = list(finite)
    ax.barh(range(len(labels)), [finite[k] for k in labels],
            color=[PROPOSAL_COLOURS.get(k, "#555555") for k in labels])
    ax.set_xscale("log")
    ax.set_yticks(range(len(labels)), labels)
    ax.set_xlabel("evaluations (log scale)")
    ax.set_title(f"Evaluations needed for ESS {run.advice.get('target_ess', 400):g}, from each proof run's measured min ESS")
    fig.tight_layout()
    return fig


FIGURES = [
    ("traces", figure_traces, "Traces of each parameter in the pilot and in the recommended run, one colour per chain."),
    ("pairs", figure_pairs, "The pairs most correlated in the pilot's covariance estimate, drawn from the recommended run's "
     "draws, with the principal axes of their covariance in those draws; each panel gives both correlations."),
    ("spectrum", figure_spectrum, "Eigenvalues of the correlation matrix of the pilot's covariance estimate: the pinned directions (small eigenvalues) cap the step a diagonal proposal can take, so it crawls along the widest ones (large eigenvalues); with a prior given apart, the directions the data inform."),
    ("autocorrelation", figure_autocorrelation, "Autocorrelation of the slowest parameter in the baseline run and the recommended run."),
    ("ess", figure_ess, "Effective samples per 1000 evaluations in every proof run (fixed proposals; runs measured slower stopped early)."),
    ("evaluations", figure_needed, "Evaluations each proposal needs for the ESS wanted, at the efficiency measured in its proof run."),
]


def build_figures(run: Run) -> dict:
    """name -> matplotlib Figure (None where a figure does not apply)."""
    with plt.style.context(STYLE):
        return {name: make(run) for name, make, _ in FIGURES}


def _png(fig) -> bytes:
    buffer = io.BytesIO()
    # Light compression: these figures are written once and the page embeds them.
    fig.savefig(buffer, format="png", dpi=100, pil_kwargs={"compress_level": 3})
    plt.close(fig)
    return buffer.getvalue()


def _plain_advice(advice: dict) -> list:
    lines = []
    rows = advice.get("comparison") or []
    if advice.get("source") == "inspection":
        info = advice.get("inspection", {})
        lines.append(f"These are {info.get('chains')} chains of {info.get('draws_per_chain')} draws from your own sampler; "
                     f"the state changed in {info.get('acceptance_from_draws', float('nan')):.0%} of steps.")
    recommended = advice.get("recommended")
    if rows and recommended:
        chosen = next((row for row in rows if row["proposal"] == recommended["proposal"]), rows[-1])
        where = ("recommended_proposal.csv (in the sampler coordinates of sampling_map.json)"
                 if recommended.get("coordinates") == "sampling_map.json" else "recommended_proposal.csv")
        if chosen is rows[0]:
            worth = "no other option was measured faster than it beyond the measurement's error"
        else:
            worth = (f"measured per evaluation it gave {speedup_text(chosen['speedup'], chosen.get('speedup_kind', 'measured'))} "
                     f"the effective samples per evaluation of {rows[0]['proposal']}")
        action = "Keep your current proposal" if recommended.get("keep_current") else f"Use {chosen['proposal']} ({where})"
        lines.append(f"{action}: {worth}.")
        if not recommended.get("resolved", True):
            lines.append(recommended["message"])
        lines.append(f"Expect an acceptance rate near {chosen['acceptance']:.2f} (measured in that run).")
    elif rows:
        lines.append("Use the proposal covariance in proposal_covariance.csv.")
    else:
        lines.append("Use the proposal covariance in proposal_covariance.csv (the covariance of the draws scaled for their dimension).")
    lines.append("If your sampler takes only step sizes, use step_sizes.csv; theory predicts "
                 f"{format_factor(advice['predicted_slowdown']['step_sizes']['slowest_parameter'], 2)} lower smallest ESS "
                 "per evaluation than with the tuned covariance.")
    table = advice.get("posterior_table")
    if table and table.get("region") is not None:
        lines.append(_scope_text(table))
    if table and not table.get("converged", True):
        why = ("it covers one region of a multimodal posterior" if table.get("whole_posterior", True) is False
               else "the chains have not converged (R-hat above 1.01)")
        lines.append(f"The posterior summary comes from the {table['run']} run, and {why}: do not trust it yet.")
    critical = [f for f in advice.get("findings", []) if f["severity"] == "critical"]
    if critical:
        lines.append("Before anything else: " + "; ".join(f["kind"] for f in critical) + " (see the findings).")
    return lines


PAGE_CSS = """
body { font-family: 'DejaVu Sans', Arial, sans-serif; max-width: 1100px; margin: 2em auto; color: #222; line-height: 1.45; }
h1 { font-size: 1.5em; border-bottom: 2px solid #1b6b93; padding-bottom: .2em; }
h2 { font-size: 1.15em; margin-top: 1.8em; color: #1b6b93; }
.partial { background: #fde7e9; border: 1px solid #b23a48; padding: .6em 1em; font-weight: bold; }
.caution { background: #fff6e0; border-left: 4px solid #c4661f; padding: .6em 1em; }
.advice li { margin: .3em 0; }
table { border-collapse: collapse; font-size: .9em; }
th, td { border: 1px solid #ccc; padding: .25em .6em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
tr.text td { text-align: left; vertical-align: top; }
.sev-critical { color: #b23a48; font-weight: bold; }
.sev-warn { color: #a65a00; font-weight: bold; }
.sev-info { color: #1b6b93; }
figure { margin: 1.2em 0; }
figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { font-size: .9em; color: #555; }
"""


def _scope_text(table: dict) -> str:
    """Which chains of the run the posterior table pools, when not all (advice.json ``posterior_table``)."""
    mass = table.get("region_mass")
    text = (f"The posterior table comes from chains {', '.join(map(str, table['chains']))} in region {table['region']} "
            f"({'Laplace mass ' + format(mass, '.2g') if mass is not None else 'mass unknown'}) only")
    if table.get("excluded_chains"):
        text += f"; chains {', '.join(map(str, table['excluded_chains']))} sat in other regions and are left out"
    return text + (" (what is left out holds a negligible share of the mass)." if table.get("whole_posterior")
                   else "; it is not the whole posterior.")


def _posterior_html(advice: dict, names: list) -> list:
    """The posterior table of a tuning run: mean, MCSE, sd and R-hat from the one run it names."""
    table = advice.get("posterior_table")
    if not table:
        return []
    esc = html.escape
    parts = [f"<h2>Posterior (from the {esc(table['run'])} fixed-proposal run)</h2>"]
    if table.get("region") is not None:
        parts.append(f"<p>{esc(_scope_text(table))}</p>")
    if not table.get("converged", True):
        why = ("one region of a multimodal posterior" if table.get("whole_posterior", True) is False
               else "an R-hat is above 1.01 (marked !)")
        parts.append(f'<p class="partial">NOT CONVERGED: {why}; these numbers are not trustworthy yet.</p>')
    parts.append("<table><tr><th>parameter</th><th>mean</th><th>MCSE</th><th>sd</th><th>R-hat</th></tr>")

    def cell(value, digits=4):
        return "n/a" if value is None else f"{value:.{digits}g}"

    for i, name in enumerate(names):
        rhat = (table.get("rhat") or [None] * len(names))[i]
        flag = " !" if rhat is None or rhat > 1.01 else ""
        parts.append(f"<tr><td>{esc(name)}</td><td>{cell(table['mean'][i], 5)}</td><td>{cell(table['mcse'][i], 2)}</td>"
                     f"<td>{cell((table.get('sd') or [None] * len(names))[i])}</td><td>{cell(rhat)}{flag}</td></tr>")
    parts.append("</table>")
    return parts


def render_html(run: Run, pngs: dict) -> str:
    a = run.advice
    esc = html.escape
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>walktune report: {esc(str(run.folder.name))}</title>",
        f"<style>{PAGE_CSS}</style></head><body>",
        f"<h1>walktune report: {esc(str(run.folder.name))}</h1>",
    ]
    if run.partial:
        parts.append('<p class="partial">PARTIAL: this run was interrupted; the figures show what it had done.</p>')
    parts.append("<h2>Advice in plain words</h2><ul class=\"advice\">")
    parts += [f"<li>{esc(line)}</li>" for line in _plain_advice(a)]
    parts.append("</ul>")
    parts.append("<h2>Findings</h2>")
    if a.get("findings"):
        parts.append("<table><tr><th>severity</th><th>kind</th><th>what it means</th></tr>")
        for f in a["findings"]:
            parts.append(f'<tr class="text"><td class="sev-{esc(f["severity"])}">{esc(f["severity"])}</td>'
                         f'<td>{esc(f["kind"])}</td><td>{esc(f["message"])}</td></tr>')
        parts.append("</table>")
    else:
        parts.append("<p>No findings: nothing unusual was seen (which does not prove there is nothing).</p>")
    parts.append(f'<p class="caution"><strong>Caution.</strong> {esc(a.get("caution", ""))}</p>')
    rows = a.get("comparison") or []
    if rows:
        parts.append("<h2>Measured comparison</h2><table><tr><th>proposal</th><th>acceptance</th>"
                     "<th>min ESS / 1000 evaluations</th><th>median</th><th>evaluations</th><th>speed-up</th></tr>")
        for r in rows:
            kind = r.get("speedup_kind") or ("lower-bound" if r.get("speedup_is_lower_bound") else "measured")
            speed = esc(speedup_text(r["speedup"], kind)) if r.get("speedup") is not None else "n/a"
            if kind == "imprecise" and r.get("evaluations_to_settle"):
                speed += f" (about {r['evaluations_to_settle']:,} evaluations in all, over both runs, would settle it)"
            if r["proposal"] == (a.get("recommended") or {}).get("proposal"):
                speed += " &larr; recommended"
            parts.append(f"<tr><td>{esc(r['proposal'])}</td><td>{r['acceptance']:.2f}</td><td>{(r['ess_per_1000'] or 0):.3g}</td>"
                         f"<td>{(r['median_ess_per_1000'] or 0):.3g}</td><td>{r['evaluations']}</td><td>{speed}</td></tr>")
        parts.append("</table>")
    parts += _posterior_html(a, run.names)
    parts.append("<h2>Figures</h2>")
    for name, _, caption in FIGURES:
        if name in pngs:
            data = base64.b64encode(pngs[name]).decode()
            parts.append(f'<figure><img alt="{esc(name)}" src="data:image/png;base64,{data}">'
                         f"<figcaption>{esc(caption)} (file {name}.png)</figcaption></figure>")
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(folder) -> Path:
    """Write the figures (PNG) and report.html into ``folder``; returns the page's path."""
    folder = Path(folder)
    if not folder.is_dir():
        raise WalktuneError(f"{folder} is not a folder; point at a walktune output folder.")
    with FolderLock(folder):  # no run may write the folder while its report is drawn from it
        run = load_run(folder)
        figures = build_figures(run)
        pngs = {name: _png(fig) for name, fig in figures.items() if fig is not None}
        page = render_html(run, pngs).encode()
        files = {f"{name}.png": data for name, data in pngs.items()}
        files["report.html"] = page
        replace_files(run.folder, files, replaced=REPORT_FILES)  # no figure of an earlier report stays
    return run.folder / "report.html"
