"""Which measured proposal to use, and how far the measurement can be trusted.

The proof's fixed-proposal runs are compared by their efficiency
``e = min bulk ESS / evaluations``. An ESS estimate from ``N = m n`` draws of
a chain with integrated autocorrelation time ``tau`` has relative standard error

    se = sqrt(2 (2 M + 1) / N),    M = WINDOW_PER_IACT * tau,

the variance of a windowed IACT estimate with window ``M`` (Sokal 1997); the
window of Geyer's (1992) initial monotone sequence on AR(1) chains averages
about two autocorrelation times (measured by simulation in
tests/test_recommend.py). Run ``a`` is measured faster than run ``b`` when
``log(e_a / e_b) > Z_RESOLVED * sqrt(se_a^2 + se_b^2)``.

A run whose chains have not mixed at all (each half-chain no longer than one
estimated IACT, the most an estimate from split chains can give, and R-hat above
:data:`STUCK_RHAT`) has an ESS estimate that is too high: the estimate stays
near the number of split chains while the truth ``m n / tau`` is far below it
(checked by simulation on AR(1) chains with known IACT ``(1 + phi)/(1 - phi)``
in tests/test_recommend.py). Its efficiency is then an upper bound, and a
speed-up over it a lower bound. Everywhere else a short run's ESS is as
likely under- as over-estimated, and a speed-up resting on one is imprecise.

The same comparison sizes the proof (:mod:`walktune.proof`): a run measured
slower than another beyond the error is stopped (:func:`in_contention`), the
recommended run is extended until :func:`settled`, and a run that could still
beat it (:func:`could_beat`) goes along with it. Among the runs within the
error of each other, one with a reliable ESS measured faster than the simpler
one is recommended (:func:`_by_measurement`), and the message says the
difference is not resolved.

A short run can still overstate a run's efficiency where its chain is not
geometrically ergodic: a random walk in the user's parameters beside a density
unbounded at a bound holds still ever longer as it nears the bound, and its ESS
per evaluation falls as the run grows (docs/benchmarks.md, inspection_line).

References
----------
Gelman, A. and Rubin, D. B. (1992). Inference from iterative simulation using multiple
sequences. Statistical Science, 7(4), 457-472.
Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science, 7(4), 473-483.
Sokal, A. (1997). Monte Carlo methods in statistical mechanics: foundations and new algorithms.
In Functional Integration, Springer, 131-192.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np

from .diagnostics import IACTS_FOR_PRECISE_ESS, WINDOW_PER_IACT
#: Normal quantile for a resolved difference (two-sided, about 95%).
Z_RESOLVED = 2.0
#: Standard errors of a contender's own figure within which it may still lie above the leader's (one-sided, about
#: 16%): a plausible winner, which goes along with the leader (:func:`could_beat`). Two, as for a resolved difference,
#: would take along first-round runs measured ten times slower (their relative error is above 1 after 200 steps).
Z_CONTENDER = 1.0
#: R-hat far above 1: together with half-chains no longer than one estimated IACT, chains that have not mixed at all.
STUCK_RHAT = 2.0
#: R-hat above which a run's chains disagree too much for its ESS to be compared with another run's
#: (where the not-converged finding turns critical): the message then states no factor between such runs.
DISAGREEING_RHAT = 1.1
#: Predicted factors beyond this are printed as a bound: no measurement could tell them apart.
LARGEST_SHOWN_FACTOR = 1e6
#: A proof run is settled when its ESS is reliable and its R-hat is below this on every parameter
#: (Vehtari et al. 2021 recommend below 1.01).
RHAT_SETTLED = 1.01

#: When runs are within the measurement's error of each other, the first of these is recommended:
#: no change over a change, then the tuned covariance (theory predicts it at least as fast as
#: per-parameter or single steps), then the new coordinates (a map to carry along).
PREFERENCE = ("current", "tuned-covariance", "step-sizes", "single-step", "transformed-rotated", "reduced-basis")
#: The rows whose proposal runs in the new coordinates of sampling_map.json.
NEW_COORDINATE_RUNS = ("transformed-rotated", "reduced-basis")


def format_factor(value, digits: int = 3) -> str:
    """A speed-up or slow-down factor for people: ``2.5x``, ``> 1e6x``, ``n/a``."""
    if value is None or not np.isfinite(value):
        return "n/a" if value is None or np.isnan(value) else f"> {LARGEST_SHOWN_FACTOR:.0e}x".replace("e+0", "e")
    if value > LARGEST_SHOWN_FACTOR:
        return f"> {LARGEST_SHOWN_FACTOR:.0e}x".replace("e+0", "e")
    return f"{value:.{digits}g}x"


def ess_relative_error(iact_max: float, chains: int, steps: int) -> float:
    """Relative standard error of an ESS estimate from ``chains x steps`` draws with IACT ``iact_max`` (Sokal 1997)."""
    tau = iact_max if np.isfinite(iact_max) else float(steps)
    return float(np.sqrt(2.0 * (2.0 * WINDOW_PER_IACT * tau + 1.0) / (chains * steps)))


def not_mixed(iact_max: float, steps: int, max_rhat: float) -> bool:
    """Whether chains of ``steps`` draws have not mixed at all: estimated IACT at least the half-chain length, R-hat far above 1.

    The IACT is estimated on split chains (:func:`walktune.diagnostics.measure_chains`),
    so it cannot much exceed ``steps / 2``: chains that hardly move reach that cap.

    A chain that never moved (no IACT, no R-hat) has not mixed either.
    """
    if not np.isfinite(iact_max) or not np.isfinite(max_rhat):
        return True
    return iact_max >= steps / 2 and max_rhat > STUCK_RHAT


def evaluations_to_settle(iact_max: float, chains: int, steps: int, ess_reliable: bool) -> int:
    """Evaluations a run needs in all for a precise ESS (``IACTS_FOR_PRECISE_ESS`` IACTs over its chains); 0 when it has them."""
    if ess_reliable or not np.isfinite(iact_max):
        return 0
    return int(np.ceil(IACTS_FOR_PRECISE_ESS * iact_max))


def speedup_kind(row, baseline) -> tuple[str, int | None]:
    """What a row's speed-up over ``baseline`` is, and the evaluations that would settle it.

    ``lower-bound`` where the baseline has not mixed at all and this run has a
    reliable ESS; ``upper-bound`` the other way round; ``measured`` where both
    ESS estimates are reliable; ``imprecise`` otherwise, with the evaluations both
    runs need in all for reliable ESS (None when a side has not mixed and no
    IACT is known).
    """
    if baseline is None:
        return "baseline", 0
    if not baseline.mixed and row.mixed and row.ess_reliable:
        return "lower-bound", 0
    if not row.mixed and baseline.mixed and baseline.ess_reliable:
        return "upper-bound", 0
    if row.ess_reliable and baseline.ess_reliable and row.mixed and baseline.mixed:
        return "measured", 0
    if not (row.mixed and baseline.mixed):
        return "imprecise", None
    return "imprecise", row.settle_evaluations + baseline.settle_evaluations


def _efficiency(row) -> float:
    return row.ess_per_1000 / 1000.0


def measured_faster(a, b) -> bool:
    """Whether run ``a`` is measured faster than run ``b`` beyond the measurement's error.

    A run that has not mixed has an ESS that is too high: it can never be shown
    faster, and only the other run's error counts against it.
    """
    ea, eb = _efficiency(a), _efficiency(b)
    if not (ea > 0 and np.isfinite(ea)) or not a.mixed:
        return False
    if not (eb > 0 and np.isfinite(eb)):
        return True
    gap = np.log(ea / eb)
    error = a.ess_relative_error if not b.mixed else np.hypot(a.ess_relative_error, b.ess_relative_error)
    return bool(gap > Z_RESOLVED * error)


def _evaluations_to_resolve(a, b) -> int | None:
    """Evaluations per run at which the measured ratio of ``a`` and ``b`` would be resolved (None: equal within 5%)."""
    gap = abs(np.log(_efficiency(a) / _efficiency(b)))
    if not np.isfinite(gap) or gap < 0.05:
        return None
    per_draw = 2.0 * (2.0 * WINDOW_PER_IACT * (a.iact_max + b.iact_max) + 2.0)
    return int(np.ceil(Z_RESOLVED**2 * per_draw / gap**2))


@dataclass(frozen=True)
class Recommendation:
    """The measured option to use.

    Attributes
    ----------
    proposal : str
        Name of a comparison row: ``current``, ``tuned-covariance``, ``step-sizes``,
        ``single-step``, ``transformed-rotated`` or ``reduced-basis``.
    keep_current : bool
        The user's current proposal is the one to use.
    resolved : bool
        The recommended run was measured faster than every other beyond the measurement's error.
    close : list of str
        Runs within the measurement's error of the recommended one.
    speedup, speedup_kind : float, str
        Its speed-up over the baseline row and what that figure is (see :func:`speedup_kind`).
    baseline : str
    evaluations_to_resolve : int or None
        Evaluations per run that would resolve the closest contender (None: none, or equal within 5%).
    coordinates : str
        ``parameters``, or ``sampling_map.json`` when the proposal runs in the new coordinates.
    message : str
        One sentence saying what to use, what it is worth, and how sure that is.
    """

    proposal: str
    keep_current: bool
    resolved: bool
    close: list
    speedup: float
    speedup_kind: str
    baseline: str
    evaluations_to_resolve: int | None
    coordinates: str
    message: str

    def to_dict(self) -> dict:
        out = asdict(self)
        out["speedup"] = float(self.speedup) if np.isfinite(self.speedup) else None
        return out


def recommend(rows: list) -> Recommendation:
    """Choose the row to recommend from the proof's comparison ``rows`` (the baseline first).

    The candidates are the runs no other run was measured faster than
    (:func:`measured_faster`), among those that mixed when any did; the one
    recommended is chosen by :func:`_by_measurement`.
    """
    usable = [row for row in rows if np.isfinite(row.ess_per_1000) and row.ess_per_1000 > 0] or list(rows)
    candidates = [row for row in usable if not any(measured_faster(other, row) for other in usable)]
    if any(row.mixed for row in candidates):
        candidates = [row for row in candidates if row.mixed]
    chosen = _by_measurement(candidates)
    close = [row for row in candidates if row is not chosen]
    baseline = rows[0]
    contender = max(close, key=lambda row: row.ess_per_1000) if close else None
    to_resolve = _evaluations_to_resolve(chosen, contender) if contender is not None else None
    coordinates = "sampling_map.json" if chosen.proposal in NEW_COORDINATE_RUNS else "parameters"
    message = _message(chosen, close, baseline, contender, to_resolve)
    return Recommendation(
        proposal=chosen.proposal, keep_current=chosen.proposal == "current", resolved=not close,
        close=[row.proposal for row in close], speedup=float(chosen.speedup), speedup_kind=chosen.speedup_kind,
        baseline=baseline.proposal, evaluations_to_resolve=to_resolve, coordinates=coordinates, message=message,
    )


def _by_measurement(candidates: list):
    """The candidate to recommend: the first in :data:`PREFERENCE`, unless a candidate with a reliable ESS was
    measured faster than it (within the error; issue 12: never recommend a row a measured row shows slower).

    The measurement supports a candidate over the preferred one only when its own ESS is reliable: an imprecise
    figure above the preferred one's is what the proof extends (:func:`could_beat`), not what it recommends. The
    user's current proposal keeps its place: keeping it costs nothing, and no row was measured faster beyond the error.
    """
    rank = {name: k for k, name in enumerate(PREFERENCE)}
    chosen = min(candidates, key=lambda row: (rank.get(row.proposal, len(PREFERENCE)), -row.ess_per_1000))
    measured = [row for row in candidates if row.mixed and row.ess_reliable]
    if chosen.proposal == "current" or not measured:
        return chosen
    best = max(measured, key=lambda row: (row.ess_per_1000, -rank.get(row.proposal, len(PREFERENCE))))
    return best if best.ess_per_1000 > chosen.ess_per_1000 else chosen


def could_beat(row, leader) -> bool:
    """Whether ``row`` could be faster than ``leader``: its upper confidence bound lies above the leader's efficiency,
    so only its own longer run can settle the comparison (the leader's longer run alone cannot show it slower).

    The upper end is ``e exp(Z_CONTENDER se)`` (:data:`Z_CONTENDER`; ``se`` Sokal's relative error,
    :func:`ess_relative_error`). Only a run that mixed counts (the ESS of one that has not is too high), and only
    beside a leader whose chains agree (R-hat at most :data:`DISAGREEING_RHAT`): while they disagree its figure
    cannot be compared with another run's, and its own longer run is what the proof needs first.
    """
    if row.proposal == leader.proposal or not row.mixed or not leader.max_rhat <= DISAGREEING_RHAT:
        return False
    er, el = _efficiency(row), _efficiency(leader)
    if not (er > 0 and np.isfinite(er)) or not (el > 0 and np.isfinite(el)):
        return False
    error = row.ess_relative_error if np.isfinite(row.ess_relative_error) else np.inf
    return bool(np.log(er / el) + Z_CONTENDER * error > 0)


def in_contention(rows: list) -> list:
    """The rows no other usable run was measured faster than (:func:`measured_faster`): the runs worth extending.

    A row measured slower beyond the error is plainly slower: its figure's upper
    end lies below another run's lower end, or it has not mixed and even its
    too-high ESS is below another's lower end. The speed-up over it stays
    what it is at that length (a lower bound when it has not mixed).
    """
    usable = [row for row in rows if np.isfinite(row.ess_per_1000) and row.ess_per_1000 > 0] or list(rows)
    return [row for row in rows if not any(measured_faster(other, row) for other in usable if other is not row)]


def resolved_by_extending(leader, other, evaluations: int) -> bool:
    """Whether ``leader`` would be measured faster than ``other`` once the leader alone runs ``evaluations`` in all.

    The leader's relative error falls as ``1 / sqrt(evaluations)`` at its measured
    IACT (Sokal 1997); the other run keeps its figures. A run whose efficiency is
    not below the leader's is never resolved so, nor is a leader that has not mixed.
    """
    ea, eb = _efficiency(leader), _efficiency(other)
    if not leader.mixed or not (ea > 0 and np.isfinite(ea)) or not (eb < ea):
        return False
    if not (eb > 0 and np.isfinite(eb)):
        return True
    error = leader.ess_relative_error * np.sqrt(leader.evaluations / max(evaluations, leader.evaluations))
    if other.mixed:
        error = np.hypot(error, other.ess_relative_error)
    return bool(np.log(ea / eb) > Z_RESOLVED * error)


def settled(row) -> bool:
    """Whether a run is long enough to stop: mixed, ESS reliable, R-hat below :data:`RHAT_SETTLED` on every parameter."""
    return bool(row.mixed and row.ess_reliable and np.isfinite(row.max_rhat) and row.max_rhat < RHAT_SETTLED)


def evaluations_still_needed(row) -> int | None:
    """More evaluations a run needs to be :func:`settled`, extrapolated from its measures; None when it has not mixed.

    For a reliable ESS the run needs ``IACTS_FOR_PRECISE_ESS * tau`` evaluations
    in all (its measured largest IACT ``tau``). For R-hat: the between-chain
    variance of chain means of a mixing chain falls as ``tau / n``, so
    ``R-hat - 1`` falls about as ``1 / n`` (Gelman and Rubin 1992), and the run
    needs ``evaluations (R-hat - 1) / (RHAT_SETTLED - 1)`` in all. A chain that
    has not mixed gives no IACT to extrapolate from.
    """
    if settled(row):
        return 0
    if not row.mixed or not np.isfinite(row.iact_max):
        return None
    for_ess = IACTS_FOR_PRECISE_ESS * row.iact_max
    excess = row.max_rhat - 1.0 if np.isfinite(row.max_rhat) else float("inf")
    for_rhat = row.evaluations * excess / (RHAT_SETTLED - 1.0) if excess >= RHAT_SETTLED - 1.0 else 0.0
    needed = max(for_ess, for_rhat)
    return int(np.ceil(needed - row.evaluations)) if np.isfinite(needed) else None


def speedup_text(speedup: float, kind: str) -> str:
    """``at least 3.2x``, ``at most 0.5x``, ``roughly 1.3x`` (imprecise) or ``2.1x``."""
    prefix = {"lower-bound": "at least ", "upper-bound": "at most ", "imprecise": "roughly "}.get(kind, "")
    return prefix + format_factor(speedup)


def _disagree(*rows) -> list:
    """The rows whose chains disagree (R-hat above :data:`DISAGREEING_RHAT`, or none measured)."""
    return [row for row in rows if row is not None and not row.max_rhat <= DISAGREEING_RHAT]


def _disagreeing_text(rows: list) -> str:
    worst = max(rows, key=lambda row: row.max_rhat if np.isfinite(row.max_rhat) else np.inf)
    return (f"the chains of {', '.join(row.proposal for row in rows)} disagree (R-hat up to {worst.max_rhat:.3g}), "
            "so no speed-up involving them is stated; run longer to compare them")


def _message(chosen, close, baseline, contender, to_resolve) -> str:
    # A speed-up between runs whose chains disagree compares numbers that do not measure speed yet, except a
    # lower bound: the baseline's chains have not mixed at all, so its ESS is too high and the ratio too low.
    lower_bound = chosen.speedup_kind == "lower-bound" and chosen.max_rhat <= DISAGREEING_RHAT
    unmixed = _disagree(chosen, baseline) if chosen is not baseline and not lower_bound else []
    if chosen.proposal == "current":
        text = "Keep your current proposal: no option was measured faster beyond the measurement's error"
    elif chosen is baseline or unmixed:
        text = f"Use {chosen.proposal}: no option was measured faster beyond the measurement's error"
    else:
        text = (f"Use {chosen.proposal}: its ESS per evaluation was measured at "
                f"{speedup_text(chosen.speedup, chosen.speedup_kind)} that of {baseline.proposal}")
        if lower_bound:
            text += f" (a lower bound: the chains of {baseline.proposal} have not mixed, so its ESS is too high)"
    if unmixed:
        text += "; " + _disagreeing_text(unmixed)
    if contender is None:
        return text + "."
    names = ", ".join(row.proposal for row in close)
    if _disagree(chosen, contender):
        extra = [row for row in _disagree(chosen, contender) if row not in unmixed]
        return (text + f". Not resolved: {names} measured within the error of it"
                + (f"; {_disagreeing_text(extra)}." if extra else "."))
    ratio = contender.ess_per_1000 / chosen.ess_per_1000
    settle = (f"; about {to_resolve:,} evaluations per run would settle it" if to_resolve
              else "; they are equally fast within 5%")
    return (text + f". Not resolved: {names} measured within the error of it "
            f"({contender.proposal} at {format_factor(ratio)} of its efficiency){settle}.")


# --------------------------------------------------------------------------- measured rows


@dataclass(frozen=True)
class ComparisonRow:
    """One fixed-proposal run of the proof.

    ``ess_per_1000`` is the smallest bulk ESS over parameters per 1000
    evaluations, with relative standard error ``ess_relative_error``;
    ``speedup`` its ratio to the baseline's, and ``speedup_kind`` what that
    figure is: ``baseline``, ``measured``, ``lower-bound`` (the baseline's
    chains have not mixed at all, so its ESS is too high), ``upper-bound``
    (this run's have not), or ``imprecise`` (a short run's ESS, as likely under-
    as over-estimated; ``evaluations_to_settle`` in all would make both
    reliable). See the module docstring. ``predicted_slowdown`` is the
    predicted ratio of the tuned run's smallest ESS to this run's
    (``theory.Slowdown.slowest_parameter``). ``steps`` is the run's length per
    chain and ``proof_end`` why it ended (:mod:`walktune.proof`): ``slower``
    (stopped once measured slower than another run), ``settled`` (the
    recommended run's ESS reliable and R-hat below :data:`RHAT_SETTLED`) or
    ``budget`` (the proof's budget ran out first).
    """

    proposal: str
    description: str
    acceptance: float
    ess_per_1000: float
    median_ess_per_1000: float
    evaluations: int
    speedup: float
    speedup_is_lower_bound: bool
    ess_reliable: bool
    predicted_slowdown: float
    max_rhat: float
    iact_max: float
    mixed: bool = True
    ess_relative_error: float = float("nan")
    settle_evaluations: int = 0
    speedup_kind: str = "baseline"
    evaluations_to_settle: int | None = 0
    steps: int = 0
    proof_end: str = ""

    def to_dict(self) -> dict:
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in self.__dict__.items()}


def row_from_run(name, description, chains, stats, predicted, baseline=None, proof_end=""):
    """A comparison row from a run and its diagnostics ``stats`` (walktune.diagnostics.ChainMeasures)."""
    ess = stats.bulk_ess
    evaluations = chains.evaluations
    ess_min = float(np.nanmin(ess)) if np.any(np.isfinite(ess)) else float("nan")
    if not np.isfinite(ess_min):
        # A chain that never moved: its ESS is at most the number of distinct states.
        ess_min = float(np.sum(chains.accepted) + chains.n_chains)
    per_1000 = 1000 * ess_min / evaluations
    median = 1000 * float(np.nanmedian(np.where(np.isfinite(ess), ess, ess_min))) / evaluations
    reliable = not np.any(stats.bulk_too_short)
    finite_rhat, finite_iact = stats.rhat[np.isfinite(stats.rhat)], stats.iact[np.isfinite(stats.iact)]
    max_rhat = float(np.max(finite_rhat)) if finite_rhat.size == stats.rhat.size else float("nan")
    iact_max = float(np.max(finite_iact)) if finite_iact.size == stats.iact.size else float("nan")
    steps = stats.n_draws
    row = ComparisonRow(
        proposal=name,
        description=description,
        acceptance=chains.acceptance_rate,
        ess_per_1000=per_1000,
        median_ess_per_1000=median,
        evaluations=evaluations,
        ess_reliable=reliable,
        predicted_slowdown=predicted,
        max_rhat=max_rhat,
        iact_max=iact_max,
        speedup=1.0,
        speedup_is_lower_bound=False,
        mixed=not not_mixed(iact_max, steps, max_rhat),
        ess_relative_error=ess_relative_error(iact_max, stats.n_chains, steps),
        settle_evaluations=evaluations_to_settle(iact_max, stats.n_chains, steps, reliable),
        steps=int(steps),
        proof_end=proof_end,
    )
    if baseline is None:
        return row
    kind, settle = speedup_kind(row, baseline)
    return replace(
        row,
        speedup=per_1000 / baseline.ess_per_1000 if baseline.ess_per_1000 > 0 else float("inf"),
        speedup_kind=kind,
        speedup_is_lower_bound=kind == "lower-bound",
        evaluations_to_settle=settle,
    )
