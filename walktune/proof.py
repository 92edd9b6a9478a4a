"""Proof runs in rounds, sized by need.

Every option (the baseline, per-parameter steps, the tuned covariance, the
runs in new coordinates) first runs a short round of fixed-proposal steps from
the pilot's end states. After each round every run is measured as a whole,
from its first proof step (:func:`walktune.recommend.row_from_run`), and

* a run measured slower than another beyond the error
  (:func:`walktune.recommend.measured_faster`; for a run that has not mixed,
  its too-high ESS below the other's lower end) is stopped: it is plainly
  slower, and the speed-up over it is what it is at that length (a lower bound
  when it has not mixed);
* the run that would be recommended (:func:`walktune.recommend.recommend`) is
  continued with the same fixed proposal, and with it to a common length every
  run whose upper confidence bound lies above its efficiency once its chains
  agree (:func:`walktune.recommend.could_beat`: only the contender's own longer
  run can settle that), until the recommended run has a reliable ESS and R-hat below
  1.01 (:func:`walktune.recommend.settled`) or the proof's budget is spent;
  the other runs still in contention (:func:`walktune.recommend.in_contention`)
  go along only within :data:`OTHERS_SHARE` of the budget.

The next length is what the recommended run's measures say it needs
(:func:`walktune.recommend.evaluations_still_needed`: ``IACTS_FOR_PRECISE_ESS``
IACTs for the ESS, ``R-hat - 1`` falling as ``1 / n``), times
:data:`NEED_MARGIN`, kept within :data:`GROWTH` times the current length.
Efficiency is per evaluation, so runs of unequal length compare directly.
Every decision rests on measured values only, so a seeded job is
deterministic (checkpoint replay).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .diagnostics import measure_chains
from .engine import Chains, sample
from .recommend import (
    could_beat,
    evaluations_still_needed,
    in_contention,
    recommend,
    resolved_by_extending,
    row_from_run,
    settled,
)

#: Steps per chain of the first round: ``max(FIRST_ROUND_MIN, FIRST_ROUND_PER_DIM d)``, about eight IACTs of an
#: optimally scaled random walk (IACT about 3 d, Roberts, Gelman and Gilks 1997) per chain.
FIRST_ROUND_MIN, FIRST_ROUND_PER_DIM = 200, 25
#: The least and the most a round multiplies the runs' length by.
GROWTH = (1.25, 4.0)
#: Extend to this many times what the measures say is needed: the IACT and R-hat of a short run are noisy.
NEED_MARGIN = 1.2
#: The runs other than the recommended one continue only within this share of the proof's budget: a slow
#: run that mixes needs more evaluations than the recommended one to pin its efficiency down.
OTHERS_SHARE = 1 / 5
#: Fewer steps per chain than this left in the budget: no further round.
MIN_ROUND_STEPS = 50


def first_round_steps(dim: int) -> int:
    """Steps per chain of every option's first round."""
    return max(FIRST_ROUND_MIN, FIRST_ROUND_PER_DIM * dim)


@dataclass
class Option:
    """One proof run being built in rounds: its plan, its chains so far, their measures.

    ``evaluator`` evaluates in the run's coordinates; ``to_user`` maps its draws
    to the user's parameters (None: it runs in them).
    """

    name: str
    description: str
    covariance: np.ndarray
    predicted: float
    seed: np.random.SeedSequence
    evaluator: object
    start: np.ndarray
    start_log_density: np.ndarray | None
    independent: np.ndarray | None = None
    to_user: object = None
    thin: int = 1
    parts: list = field(default_factory=list)
    run: Chains | None = None
    stats: object = None

    @property
    def steps(self) -> int:
        return sum(part.n_steps for part in self.parts)

    def cost(self, steps: int, chains: int) -> int:
        """Evaluations to bring the run to ``steps`` per chain (its start points too, when their values are unknown)."""
        start = chains if (not self.parts and self.start_log_density is None) else 0
        return max(0, steps - self.steps) * chains + (start if steps > self.steps else 0)

    def extend(self, steps: int, progress) -> None:
        """Continue the chains to ``steps`` per chain with the same fixed proposal, and measure the whole run."""
        seed = self.seed if not self.parts else self.seed.spawn(1)[0]
        part = sample(None, self.start, self.covariance, steps - self.steps, seed=seed, evaluator=self.evaluator,
                      start_log_density=self.start_log_density, independent=self.independent, progress=progress,
                      thin=self.thin)
        self.parts.append(part)
        self.start, self.start_log_density = part.last, part.log_density[:, -1].copy()
        whole = _joined(self.parts)
        if self.to_user is not None:
            whole = in_user_parameters(whole, self.to_user)  # measured in the user's own parameters
        self.run, self.stats = whole, in_steps(measure_chains(whole.draws), self.thin)


def in_user_parameters(run: Chains, to_user) -> Chains:
    """A run in new coordinates with its draws and log-densities in the user's parameters.

    ``to_user`` is the map's ``from_sampler``; where the map is a
    :class:`walktune.reparam.SamplingMap`, ``log p(theta) = log p_z(z) - log |det d theta / d z|``
    so that every run's log-densities compare with every other's (the detectors pool runs: the funnel checks
    set aside chains whose log-densities lie apart, :func:`walktune.funnels.chains_apart`).
    """
    with_jacobian = getattr(getattr(to_user, "__self__", None), "from_sampler_with_jacobian", None)
    if with_jacobian is None:
        return replace(run, draws=to_user(run.draws))
    theta, log_jacobian = with_jacobian(run.draws)
    return replace(run, draws=theta, log_density=run.log_density - log_jacobian)


def _joined(parts: list) -> Chains:
    """One run from consecutive parts of the same chains."""
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    return Chains(
        draws=np.concatenate([p.draws for p in parts], axis=1),
        log_density=np.concatenate([p.log_density for p in parts], axis=1),
        accepted=np.concatenate([p.accepted for p in parts], axis=1),
        evaluations=sum(p.evaluations for p in parts),
        seed=first.seed,
        proposal_cov=first.proposal_cov,
        start=first.start,
        nan_count=sum(p.nan_count for p in parts),
        error_count=sum(p.error_count for p in parts),
        first_error=next((p.first_error for p in parts if p.first_error), None),
        thin=first.thin,
    )


def in_steps(stats, thin: int):
    """Diagnostics of draws kept every ``thin`` steps, with the IACT and the draws per chain counted in steps.

    Parts of a run each keep their own last state, so at a part's end two kept
    states may lie fewer than ``thin`` steps apart; the IACT in steps is then
    overstated by at most a part's share of one stored interval.
    """
    if thin == 1:
        return stats
    return replace(stats, iact=stats.iact * thin, n_draws=stats.n_draws * thin)


def measured_rows(options: list, ends: dict | None = None) -> list:
    """The comparison rows of the options run so far (the baseline first), with why each ended."""
    rows = []
    for option in options:
        if option.run is None:
            continue
        rows.append(row_from_run(option.name, option.description, option.run, option.stats, option.predicted,
                                 rows[0] if rows else None, proof_end=(ends or {}).get(option.name, "")))
    return rows


def _next_steps(chosen, steps: int, chains: int) -> int:
    """Steps per chain the recommended run's measures ask for next, within :data:`GROWTH` of ``steps``."""
    more = evaluations_still_needed(chosen)
    low, high = int(np.ceil(GROWTH[0] * steps)), int(GROWTH[1] * steps)
    if more is None:
        return high
    wanted = int(np.ceil(NEED_MARGIN * (chosen.evaluations + more) / chains))
    return int(np.clip(wanted, low, high))


def _to_extend(options: list, rows: list, chosen, steps: int, chains: int, others_left: int) -> list:
    """The recommended run; the runs whose upper confidence bound lies above its efficiency (:func:`could_beat`),
    whatever the others' share; and the other runs in contention its longer run alone would not be expected to
    resolve, as far as ``others_left`` evaluations (their share of the budget) reach."""
    by_name = {row.proposal: row for row in rows}
    out = []
    for option in options:
        if option.name == chosen.proposal or could_beat(by_name[option.name], chosen):
            # Only its own longer run can show whether it is faster: the leader's longer run cannot.
            out.append(option)
        elif not resolved_by_extending(chosen, by_name[option.name], steps * chains):
            if option.cost(steps, chains) <= others_left:
                others_left -= option.cost(steps, chains)
                out.append(option)
    return out


def _affordable_steps(options: list, left: int, chains: int) -> int:
    """The longest common length the options can reach within ``left`` evaluations."""
    low, high = max(o.steps for o in options), max(o.steps for o in options) + left // chains + 1
    while high - low > 1:
        mid = (low + high) // 2
        low, high = (mid, high) if sum(o.cost(mid, chains) for o in options) <= left else (low, mid)
    return low


def _within_budget(active: list, chosen, wanted: int, left: int, chains: int) -> tuple:
    """The runs of the next round, the common length they can reach within ``left`` evaluations, and the target.

    When the budget cannot take every active run past the recommended one's length, contenders behind it are
    brought up towards its length (a comparison of like-for-like runs), or, when even that is out of reach, the
    recommended run goes on alone.
    """
    affordable = _affordable_steps(active, left, chains)
    if affordable - chosen.steps >= MIN_ROUND_STEPS:
        return active, affordable, wanted
    behind = [o for o in active if o.steps + MIN_ROUND_STEPS <= chosen.steps]
    if behind:
        catch_up = min(chosen.steps, _affordable_steps(behind, left, chains))
        if catch_up - min(o.steps for o in behind) >= MIN_ROUND_STEPS:
            return behind, catch_up, catch_up
    alone = [o for o in active if o.name == chosen.proposal]
    return alone, _affordable_steps(alone, left, chains), wanted


@dataclass(frozen=True)
class Rounds:
    """What the rounds did: the final rows, how many rounds, the budget, and whether the proof settled."""

    rows: list
    rounds: int
    budget: int
    settled: bool


def run_rounds(options: list, budget: int, chains: int, first_steps: int, tracker, rows_out: list) -> Rounds:
    """Run the options in rounds until the recommended run is settled or ``budget`` evaluations are spent.

    ``rows_out`` is refilled with the rows after every round (the tracker's
    partial advice reads it); ``tracker("proof", done, total)`` reports the
    evaluations so far against a running total: what is spent, what this
    round plans, and what the recommended run's measures still ask for,
    within the budget.
    """
    spent, target, active, rounds = 0, first_steps, list(options), 0
    while True:
        rounds += 1
        todo = [o for o in active if o.steps < target]
        planned = spent + sum(o.cost(target, chains) for o in todo)
        for option in todo:
            option.extend(target, lambda done, total, before=spent:
                          tracker("proof", before + done * chains, max(planned, before + done * chains + 1)))
            spent += option.parts[-1].evaluations
        rows = measured_rows(options)
        in_play = {row.proposal for row in in_contention(rows)}
        chosen = next(row for row in rows if row.proposal == recommend(rows).proposal)
        wanted = _next_steps(chosen, chosen.steps, chains)
        others_left = int(OTHERS_SHARE * budget) - sum(o.run.evaluations for o in options if o.name != chosen.proposal)
        active = _to_extend([o for o in options if o.name in in_play], rows, chosen, wanted, chains, others_left)
        active, affordable, wanted = _within_budget(active, chosen, wanted, budget - spent, chains)
        if settled(chosen) or affordable - min(o.steps for o in active) < MIN_ROUND_STEPS:
            end = "settled" if settled(chosen) else "budget"
            rows_out[:] = measured_rows(options, {o.name: end if o.name in in_play else "slower" for o in options})
            tracker("proof", spent, spent)
            return Rounds(list(rows_out), rounds, budget, settled(chosen))
        rows_out[:] = rows
        target = min(wanted, affordable)
        tracker("proof", spent, spent + sum(o.cost(target, chains) for o in active) + 1)
        tracker.end_stage(f"proof round {rounds}")
