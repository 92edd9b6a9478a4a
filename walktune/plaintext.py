"""Plain-text views of a result, for notebooks and logs: a few-line summary and the advice.

Nothing here prints; the functions return strings (``repr(result)`` and
``result.advice_text()`` call them).
"""

from __future__ import annotations

import numpy as np

from .advice import THINNING_ESS_LOSS
from .constants import CAUTION
from .recommend import format_factor


def duration(seconds: float) -> str:
    """A time in the unit that fits it: ms, s, min or h (two or three significant digits)."""
    if seconds is None or not np.isfinite(seconds):
        return "n/a"
    if seconds < 0.9995:
        ms = seconds * 1e3
        return f"{ms:.0f} ms" if ms >= 99.5 else f"{ms:.2g} ms"
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} min"
    return f"{seconds / 3600:.3g} h"


def _number(x: float, digits: int = 3) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}g}"


def mean_with_mcse(mean: float, mcse: float) -> str:
    """``mean +/- MCSE``, the MCSE to two significant digits and the mean to the same decimal place."""
    if not (np.isfinite(mean) and np.isfinite(mcse) and mcse > 0):
        return f"{_number(mean, 5)} +/- {_number(mcse, 2)}"
    decimals = 1 - int(np.floor(np.log10(mcse)))
    if not 0 <= decimals <= 8 or abs(mean) >= 1e6:
        return f"{mean:.4g} +/- {mcse:.2g}"
    return f"{mean:.{decimals}f} +/- {mcse:.{decimals}f}"


def _names(names: list, limit: int = 6) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def _findings_count(findings: list) -> str:
    if not findings:
        return "none"
    counts = {}
    for finding in findings:
        counts[finding.severity] = counts.get(finding.severity, 0) + 1
    order = [s for s in ("critical", "warn", "info") if s in counts]
    return f"{len(findings)} (" + ", ".join(f"{counts[s]} {s}" for s in order) + ")"


def _speedup(rec) -> str:
    prefix = {"lower-bound": ">= ", "upper-bound": "<= ", "imprecise": "~"}.get(rec.speedup_kind, "")
    return f"{prefix}{format_factor(rec.speedup)} the ESS per evaluation of {rec.baseline}"


def tune_repr(result) -> str:
    """A few lines: parameters, recommendation and its speed-up, findings, evaluations."""
    rec = result.recommended
    chosen = "none" if rec is None else f"{rec.proposal}, measured at {_speedup(rec)}"
    lines = [
        f"TuneResult({len(result.parameter_names)} parameters: {_names(result.parameter_names)}",
        f"  recommended: {chosen}",
        f"  findings: {_findings_count(result.findings)}",
        f"  evaluations: {result.total_evaluations}{' [PARTIAL]' if result.partial else ''}; "
        "advice_text() gives the advice)",
    ]
    return "\n".join(lines)


def tune_advice(result) -> str:
    """The advice of a tuning run as plain text, every number from the run it names."""
    rec = result.recommended
    cost = result.seconds_per_evaluation
    lines = [f"walktune: {len(result.parameter_names)} parameters, {result.total_evaluations} evaluations "
             f"({result.pilot_evaluations} for the mode and pilot), {duration(cost)} per evaluation"]
    if rec is not None:
        lines.append(f"Recommended: {rec.message}")
    needed = result.evaluations_needed()
    for row in result.comparison:
        n = needed[row.proposal]
        lines.append(f"For ESS {result.target_ess} with {row.proposal}: about {_number(n)} evaluations "
                     f"(~{duration(n * cost)} at the measured cost)")
    lines.append("Step sizes (proposal sd per parameter): "
                 + ", ".join(f"{n}={_number(s)}" for n, s in zip(result.parameter_names, result.step_sizes)))
    lines.append(f"Proposal covariance: result.proposal_covariance (expected acceptance {result.expected_acceptance:.2f})")
    lines.append(f"Warm-up: about {result.warmup_steps} steps per chain from a start near the mode")
    lines.append("Thinning: keep every draw" + (f"; to save storage, keeping one draw in {result.thinning} keeps at "
                                                f"least {1 - THINNING_ESS_LOSS:.0%} of the ESS" if result.thinning > 1 else ""))
    lines += _findings_lines(result.findings)
    lines.append(f"Caution: {CAUTION}")
    return "\n".join(lines)


def _findings_lines(findings: list) -> list:
    if not findings:
        return ["Findings: none (which does not prove there is nothing)"]
    return ["Findings:"] + [f"- {f.severity.upper()} {f.kind}: {f.message}" for f in findings]


def inspection_repr(result) -> str:
    """A few lines: parameters, verdicts, the draws still needed, findings."""
    verdicts = {}
    for v in result.verdicts:
        verdicts[v.verdict] = verdicts.get(v.verdict, 0) + 1
    s = result.summary
    lines = [
        f"InspectionResult({len(result.parameter_names)} parameters: {_names(result.parameter_names)}",
        f"  chains: {s.n_chains} x {s.n_draws} draws; verdicts: " + ", ".join(f"{n} {k}" for k, n in verdicts.items()),
        f"  draws still needed for ESS {result.target_ess:g}: {_number(float(np.nanmax(result.more_draws_observed)))} "
        f"at the observed efficiency, {_number(float(np.nanmax(result.more_draws_advised)))} in all with the advised proposal",
        f"  findings: {_findings_count(result.findings)}; advice_text() gives the advice)",
    ]
    return "\n".join(lines)


def inspection_advice(result) -> str:
    """The advice of an inspection as plain text."""
    s = result.summary
    advice = result.advice
    lines = [f"walktune inspection: {s.n_chains} chains x {s.n_draws} draws, {len(result.parameter_names)} parameters"]
    for i, (name, v) in enumerate(zip(result.parameter_names, result.verdicts)):
        more = result.more_draws_observed[i]
        lines.append(f"- {name}: {v.verdict} ({v.reason}); mean {mean_with_mcse(s.mean[i], s.mcse[i])}; "
                     f"{'no more draws needed' if more == 0 else f'{_number(more)} more draws needed'}")
    lines.append(f"Proposal covariance: advice.proposal_covariance (expected acceptance {advice.expected_acceptance:.2f})")
    lines.append("Step sizes: " + ", ".join(f"{n}={_number(x)}" for n, x in zip(result.parameter_names, advice.step_sizes)))
    lines.append(f"With the advised proposal about {_number(float(np.nanmax(result.more_draws_advised)))} draws in all "
                 "for the ESS wanted (optimal-scaling theory)")
    lines += _findings_lines(result.findings)
    lines.append(f"Caution: {CAUTION}")
    return "\n".join(lines)
