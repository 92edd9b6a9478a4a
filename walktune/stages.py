"""The stages of the tuning job, each a function with explicit inputs and a small result.

:func:`walktune.tune` strings them together::

    start   = find_start(posterior, budget, rng, tracker)          # mode, Laplace covariance, other modes, chain starts
    pilot   = run_main_pilot(posterior, start, budget, seed, tracker)
    advice  = advise(pilot.covariance, ...)                       # walktune.advice, walktune.analysis
    coords  = new_coordinates(posterior, pilot, start, budget, seed, tracker, ...)
    proof   = run_proofs(posterior, pilot, advice, coords, budget, current, seed, tracker)
    chosen  = recommend(proof.rows).proposal
    checks  = check_geometry(posterior, proof, start, pilot, budget, chosen)

Each stage decides its own evaluation budget from :class:`Budget` (the job's
total, the pilot's share) and the evaluations already spent
(``posterior.counted.count``); the formulas are beside the stage.

Every evaluation goes through ``posterior.counted`` (the checkpoint records it),
every random number comes from the seed a stage is handed, and every figure in
the comparison comes from fixed-proposal chains (adaptation is for the pilots).
The ``tracker`` is the job's progress and checkpoint channel: stages report
progress and their best covariance so far through it, and nothing else.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import theory
from .advice import Advice
from .diagnostics import ChainMeasures
from .engine import Chains, thinning_for
from .errors import TargetError, WalktuneError
from .findings import Finding
from .geometry import climb, separated, within_chain_iact
from .improper import find_spread_runaway, runaway_message
from .mode import ModeFit, find_mode, hessians_affordable
from .modes import ModeMass, weigh_start_modes
from .pilot import PilotResult, run_pilot
from .posterior import Posterior, SamplerSpaceEvaluator, check_parameters_used
from .proof import Option, first_round_steps, run_rounds
from .recommend import ComparisonRow
from .bends import bend_ridges
from .reparam import build_reparam, curvature_measure, curved_ridge_findings
from .unconstrained import UnconstrainedStart, near_bound, pilot_map, run_unconstrained_pilot, unconstrained_mode

#: Up to this dimension the funnel detector also probes the log-density's
#: curvature (2 d (2 d + 1) evaluations).
MAX_CURVATURE_PROBE_DIM = 20


# --------------------------------------------------------------------------- budgets


def pilot_budget_default(dim: int) -> int:
    """Default pilot evaluations: ``20 d^2 + 2000`` (mode search included).

    Without a cap on the job, a pilot whose start proves poor (a parameter
    near a bound, or one whose scale a probe had to correct) may spend as much
    again: :meth:`Budget.pilot_extension`.
    """
    return 20 * dim * dim + 2000


def proof_steps_default(dim: int) -> int:
    """Steps per chain of one proof run before the proof ran in rounds: about 65 IACTs (IACT ~ 3 d) per half-chain."""
    return max(2000, 400 * dim)


#: Up to this dimension the proof's default budget is the old equal-length proof's total (three runs).
SMALL_PROOF_DIM = 10


def proof_budget_default(dim: int, chains: int) -> int:
    """Default evaluations of the whole proof: ``chains x max(2000, 400 d)`` times 3 up to d = 10, else once.

    An optimally scaled random walk has IACT about 3 d on a Gaussian (Roberts,
    Gelman and Gilks 1997). R-hat below 1.01 on every parameter asks for about
    1000 IACTs (docs/method.md, Proof rounds): up to d = 10 the old proof's
    total (three runs of ``max(2000, 400 d)`` steps per chain) holds them.
    Above, one such run: about 500 IACTs, twice the ``IACTS_FOR_PRECISE_ESS``
    a reliable ESS needs, with room for the other options' first rounds; when
    the budget ends first, the ``proof-unsettled`` finding says how many more
    evaluations would settle the recommended run.
    """
    runs = 3 if dim <= SMALL_PROOF_DIM else 1
    return chains * runs * proof_steps_default(dim)


def minimum_budget(dim: int, chains: int) -> int:
    """Smallest budget that can do anything useful: the mode, two pilot stages, three short proofs."""
    return (2 * dim * dim + 50 * dim + 200) + 2 * chains * max(50, 10 * dim) + 3 * chains * 200


def _minimum_pilot(dim: int, chains: int) -> int:
    """Two pilot stages of at least 50 (or 10 d) steps per chain."""
    return chains * 2 * max(50, 10 * dim)


@dataclass(frozen=True)
class Budget:
    """The job's evaluation budget: the cap on the whole job (None: defaults) and the pilots' share."""

    total: int | None
    pilot: int
    chains: int
    dim: int

    @classmethod
    def plan(cls, total: int | None, dim: int, chains: int) -> "Budget":
        if total is None:
            return cls(None, pilot_budget_default(dim), chains, dim)
        return cls(total, max(int(0.4 * total), minimum_budget(dim, chains) - 3 * chains * 200), chains, dim)

    @property
    def pilot_extension(self) -> int:
        """Evaluations a pilot with a poor start may add: the default pilot budget again, none under a cap."""
        return self.pilot if self.total is None else 0


#: Bytes of draws one proof run keeps at most: a longer run keeps every k-th state (:func:`proof_thinning`).
PROOF_DRAWS_MEMORY = 2**27


def proof_thinning(chains: int, steps: int, dim: int) -> int:
    """Steps per stored draw of a proof run: 1, or the least ``k`` keeping its draws near :data:`PROOF_DRAWS_MEMORY`.

    A thinned chain's ESS is the full chain's when ``k`` is well below its
    IACT; an optimally tuned random walk has an IACT of about ``d / 0.33``
    (Roberts, Gelman and Gilks 1997), and with the default run length
    ``k ~ d^2 / 10^4`` (d = 300: 9 against an IACT near 900).
    """
    return thinning_for(chains, steps, dim, PROOF_DRAWS_MEMORY)



# --------------------------------------------------------------------------- mode and starts


@dataclass(frozen=True)
class StartingPoints:
    """The mode, the covariance the pilot starts from, and the chains' starting states.

    Attributes
    ----------
    fit : ModeFit
    initial_covariance : ndarray of shape (d, d)
        Laplace covariance at the mode, or a guess from the bounds and the start.
    centres : list of ndarray of shape (d,)
        The mode and any separate modes found by the extra climbs.
    states, values : ndarray of shape (chains, d) and (chains,)
        Overdispersed starting states and their log-densities.
    unconstrained : walktune.unconstrained.UnconstrainedStart or None
        Where the pilot starts in unconstrained coordinates, when the mode or
        the mass is near a bound.
    minor_modes : list of walktune.modes.ModeMass
        Separate modes of negligible Laplace mass: reported, and no chain starts there.
    main_mode : walktune.modes.ModeMass or None
        The heaviest mode, when other modes were found (None otherwise).
    """

    fit: ModeFit
    initial_covariance: np.ndarray
    centres: list
    states: np.ndarray
    values: np.ndarray
    unconstrained: UnconstrainedStart | None = None
    minor_modes: list = field(default_factory=list)
    main_mode: ModeMass | None = None


def _initial_covariance(fit: ModeFit, bounds: np.ndarray, start: np.ndarray) -> np.ndarray:
    if fit.laplace_covariance is not None:
        return fit.laplace_covariance
    width = bounds[:, 1] - bounds[:, 0]
    guess = np.where(np.isfinite(width), width / 6.0, 0.1 * np.maximum(np.abs(start), 1.0))
    return np.diag(guess**2)


def _reflect_into(points: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Mirror coordinates that fall outside ``bounds`` (d, 2) back across the bound they crossed."""
    low, high = bounds[:, 0], bounds[:, 1]
    points = np.where(points < low, 2 * low - points, points)
    points = np.where(points > high, 2 * high - points, points)
    return np.clip(points, low, high)


def _overdispersed_starts(counted, centres, cov, chains: int, rng, bounds: np.ndarray):
    """Starts drawn from ``N(centre, 4 cov)``, mirrored into the bounds, pulled in until the density is finite.

    Chain ``c`` starts around ``centres[c % len(centres)]``, so that chains
    begin in every separate mode the optimizer found. A draw outside a bound
    is mirrored back across it rather than pulled towards the centre: a mode
    on a bound where the density is unbounded (a gamma shape below 1) is a
    point a random walk cannot leave in any useful time, and no chain may
    start there. Returns the points (chains, d) and their log-densities (chains,).
    """
    chol = np.linalg.cholesky(cov)
    points = np.empty((chains, centres[0].shape[0]))
    values = np.empty(chains)
    for c in range(chains):
        centre = centres[c % len(centres)]
        z = rng.standard_normal(centre.shape[0])
        for spread in (2.0, 1.0, 0.5, 0.25, 0.1, 0.0):
            candidate = _reflect_into(centre + spread * (chol @ z), bounds)
            value = counted.scalar(candidate)
            if np.isfinite(value):
                break
        points[c], values[c] = candidate, value
    return points, values


def _other_modes(counted, start, fit, cov, bounds, count: int, rng) -> list:
    """Climb from ``count`` points spread widely around the start; return the modes separate from ``fit.mode``.

    The points are drawn around the start with, per parameter, the largest of
    5 Laplace sds, the distance from the start to the mode, and half the
    mode's magnitude (a tight posterior far from zero may have a mirror image),
    clipped inside the bounds; and from the mode's mirror image ``-mode`` (clipped
    likewise) when it is more than 5 Laplace sds away. A climb's end point counts
    as another mode only when the log-density dips between it and every mode already known
    (:func:`walktune.geometry.separated`). Returns ``(mode, log-density)`` pairs.
    """
    dim = start.shape[0]
    sd = np.sqrt(np.diag(cov))
    spread = np.maximum.reduce([5.0 * sd, np.abs(fit.mode - start), 0.5 * np.abs(fit.mode)])
    known = [(fit.mode, fit.log_density)]
    low = np.where(np.isfinite(bounds[:, 0]), bounds[:, 0] + 1e-3 * sd, -np.inf)
    high = np.where(np.isfinite(bounds[:, 1]), bounds[:, 1] - 1e-3 * sd, np.inf)
    points = [np.clip(start + spread * rng.standard_normal(dim), low, high) for _ in range(count)]
    # And the mode's mirror image through zero, when it lies beyond 5 Laplace sds: a parameter whose sign the
    # data cannot see (it enters as a square) has a mirror mode that random spread points seldom reach.
    mirror = np.clip(-fit.mode, low, high)
    if np.any(np.abs(mirror - fit.mode) > 5.0 * sd):
        points.append(mirror)
    for point in points:
        if not np.isfinite(counted.scalar(point)):
            continue
        end, value, converged = climb(counted.scalar, point, np.maximum(sd, 1e-12), budget=30 * (dim + 1),
                                      log_density_batch=counted.finite_values)
        if not (converged and np.isfinite(value)):
            continue
        if all(separated(counted.scalar, end, mode, value, lp) for mode, lp in known):
            known.append((end, value))
    return known[1:]


def find_start(posterior: Posterior, budget: Budget, rng: np.random.Generator, tracker) -> StartingPoints:
    """Mode search (a third of the pilot's budget, less the Hessian's), climbs for other modes, and the starts.

    Four climbs from spread points and one from the mode's mirror image look for
    other modes; chains start only in modes of non-negligible Laplace mass
    (:mod:`walktune.modes`).
    """
    bounds, start, dim = posterior.bounds, posterior.start, posterior.dim
    counted = posterior.counted
    scales = np.where(np.isfinite(bounds).all(axis=1), (bounds[:, 1] - bounds[:, 0]) / 10, 1.0)
    scales = np.maximum(np.minimum(scales, np.maximum(np.abs(start), 1.0)), 1e-8)
    check_parameters_used(posterior, scales)
    tracker("mode", 0, 1)  # after the checks of the model, which end in a one-line error
    # Hessians that leave the pilot its two shortest stages (docs/method.md, The mode search at large d).
    hessians = hessians_affordable(dim, budget.pilot - _minimum_pilot(dim, budget.chains))
    mode_budget = max(20 * (dim + 1), budget.pilot // 3 - (2 * dim * dim if hessians else 0))
    fit = find_mode(counted.scalar, start, bounds, scales, mode_budget, names=posterior.names,
                    evaluate_batch=counted.finite_values, hessians=hessians)
    tracker("mode", 1, 1)
    initial = _initial_covariance(fit, bounds, start)
    tracker.estimate(initial, 1.0, "the Laplace approximation at the mode")
    other_modes = _other_modes(counted, start, fit, initial, bounds, 4, rng)
    optimizer_fit = fit
    fit, main, centres, minor = weigh_start_modes(counted.scalar, fit, other_modes, initial, bounds,
                                                  counted.finite_values)
    if fit is not optimizer_fit:
        initial = _initial_covariance(fit, bounds, start)
        tracker.estimate(initial, 1.0, "the Laplace approximation at the heaviest mode")
    states, values = _overdispersed_starts(counted, centres, initial, budget.chains, rng, bounds)
    unconstrained = _unconstrained_start(posterior, fit, initial, centres, budget, rng)
    return StartingPoints(fit, initial, centres, states, values, unconstrained, minor, main)


def _unconstrained_start(posterior: Posterior, fit: ModeFit, initial: np.ndarray, centres: list, budget: Budget,
                         rng) -> UnconstrainedStart | None:
    """The pilot's start in unconstrained coordinates, when a parameter's mode or mass is near a bound (else None).

    The mode search in ``u`` may spend a sixth of the pilot's budget; the chains
    start overdispersed around the ``u``-mode and the other modes, mapped.
    """
    bounds, counted = posterior.bounds, posterior.counted
    if not np.any(np.isfinite(bounds)):
        return None
    sd = np.sqrt(np.diag(initial))
    near = near_bound(counted.scalar, fit.mode, fit.log_density, sd, bounds)
    if not near.any():
        return None
    reparam = pilot_map(posterior.names, bounds, near)
    evaluate_u = SamplerSpaceEvaluator(counted, reparam)
    search = max(20 * (posterior.dim + 1), budget.pilot // 6)
    fit_u, cov_u = unconstrained_mode(evaluate_u.scalar, reparam, fit, posterior.start, initial, near, search)
    with np.errstate(divide="ignore", invalid="ignore"):
        others = [reparam.to_sampler(c) for c in centres[1:]]
    centres_u = [fit_u.mode] + [c for c in others if np.all(np.isfinite(c))]
    # In u the transformed parameters are unbounded; the others keep their bounds.
    bounds_u = np.where(near[:, None], [-np.inf, np.inf], bounds)
    states, values = _overdispersed_starts(evaluate_u, centres_u, cov_u, budget.chains, rng, bounds_u)
    return UnconstrainedStart(reparam, near, fit_u, cov_u, states, values)


# --------------------------------------------------------------------------- pilot


def run_main_pilot(posterior: Posterior, start: StartingPoints, budget: Budget, seed, tracker) -> PilotResult:
    """The adaptive pilot: what the pilot's budget leaves after the mode search.

    With an unconstrained start (a mode or mass near a bound) it runs first in
    the unconstrained coordinates, then in the user's parameters
    (:func:`walktune.unconstrained.run_unconstrained_pilot`), with the extra
    allowance of a poor start.
    """
    counted, dim = posterior.counted, posterior.dim
    available = max(budget.pilot - counted.count, _minimum_pilot(dim, budget.chains))
    progress = lambda done, total: tracker("pilot", done, total)  # noqa: E731
    within = len(start.centres) > 1
    if start.unconstrained is None:
        pilot = run_pilot(
            None, start.states, start.initial_covariance, available, seed, evaluator=counted, progress=progress,
            state_log_density=start.values, within_chains=within, extension=budget.pilot_extension,
            on_stage=lambda p: tracker.pilot_stage_ended(p, estimate=True),
        )
    else:
        pilot = run_unconstrained_pilot(posterior.counted, start.unconstrained, available + budget.pilot_extension,
                                        _minimum_pilot(dim, budget.chains), seed, tracker, within)
    tracker("pilot", pilot.evaluations, pilot.evaluations)
    _refuse_growing_spread(posterior, start, pilot)
    return pilot


def _refuse_growing_spread(posterior: Posterior, start: StartingPoints, pilot: PilotResult) -> None:
    """Stop with a one-line error when an unsettled pilot's spread grew along a direction where the density is flat.

    :mod:`walktune.improper`; at most ``2 len(RAY_DISTANCES)`` evaluations, only after a large growth.
    """
    if pilot.converged:
        return
    centre = _pooled_draws(pilot, posterior.dim).mean(axis=0)
    found = find_spread_runaway(posterior.counted, centre, start.initial_covariance, pilot.covariance)
    if found is not None:
        raise TargetError(runaway_message(found, posterior.names))


# --------------------------------------------------------------------------- new coordinates


@dataclass(frozen=True)
class PlannedRun:
    """A fixed-proposal proof run to make: its name, description and proposal covariance.

    ``predicted`` is the predicted slow-down of the smallest per-parameter ESS
    against the tuned covariance (``theory.Slowdown.slowest_parameter``; NaN
    when there is none); ``independent`` lists coordinates proposed
    independently (the reduced-basis run), or None.
    """

    name: str
    description: str
    covariance: np.ndarray
    predicted: float = float("nan")
    independent: np.ndarray | None = None


@dataclass(frozen=True)
class NewCoordinates:
    """The map to sampling coordinates, what it showed, and the runs it proposes.

    Attributes
    ----------
    reparam : walktune.reparam.SamplingMap or None
    findings : list of Finding
        Curved ridges, or why no map could be built.
    prior_covariance : ndarray of shape (d, d) or None
        Of a prior given apart.
    plan : list of PlannedRun
        Proof runs in the new coordinates (empty when they would change nothing).
    states : ndarray of shape (chains, d) or None
        The chains' states in the refitted new coordinates.
    """

    reparam: object
    findings: list
    prior_covariance: np.ndarray | None
    plan: list = field(default_factory=list)
    states: np.ndarray | None = None


def _pooled_draws(pilot: PilotResult, dim: int) -> np.ndarray:
    return pilot.draws.reshape(-1, dim) if pilot.draws is not None else pilot.states


def new_coordinates(posterior: Posterior, pilot: PilotResult, start: StartingPoints, budget: Budget, seed,
                    tracker, transforms, forbid_transforms) -> NewCoordinates:
    """Transforms, the whitened/rotated basis and the informed split; a short pilot in them when they change anything.

    The pilot in new coordinates gets half the pilot's budget, and with a cap
    on the job at most a fifth of what is left.
    """
    dim, names, counted, prior_terms = posterior.dim, posterior.names, posterior.counted, posterior.prior_terms
    covariance = pilot.covariance
    findings, prior_cov, reparam = [], None, None
    pooled = _pooled_draws(pilot, dim)
    n_independent = None
    try:
        prior_cov = prior_terms.covariance(start.fit.mode, np.sqrt(np.diag(covariance))) if prior_terms else None
        n_independent = pooled.shape[0] / max(1.0, within_chain_iact(pilot.draws)) if pilot.draws is not None else None
        reparam = build_reparam(pooled, names, posterior.bounds, prior_covariance=prior_cov, force=transforms,
                                forbid=forbid_transforms, covariance=covariance, n_independent=n_independent)
    except (WalktuneError, np.linalg.LinAlgError, ValueError) as error:
        findings.append(Finding("undecided", "info", [], f"no reparameterisation: {error}", {}))
    if reparam is None:
        return NewCoordinates(None, findings, prior_cov)
    curvature = curvature_measure(pooled)
    if "bend" not in (forbid_transforms if isinstance(forbid_transforms, (list, tuple)) else ()):
        reparam = bend_ridges(reparam, pooled, curvature, prior_cov, n_independent)
    findings += curved_ridge_findings(pooled, reparam, names, before=curvature)
    transformed = any(t.kind != "identity" for t in reparam.transforms) or bool(reparam.bends)
    reduced = prior_terms is not None and 0 < reparam.informed < dim
    if not (transformed or reduced):
        return NewCoordinates(reparam, findings, prior_cov)
    if budget.total is None:
        z_budget = budget.pilot // 2
    else:
        z_budget = min(budget.pilot // 2, max(0, (budget.total - counted.count) // 5))
    z_pilot = run_pilot(
        None, reparam.to_sampler(pilot.states), np.eye(dim), max(z_budget, _minimum_pilot(dim, budget.chains)),
        seed.spawn(1)[0], evaluator=SamplerSpaceEvaluator(counted, reparam),
        progress=lambda done, total: tracker("pilot in new coordinates", done, total),
        on_stage=lambda p: tracker.pilot_stage_ended(p, estimate=False),
    )
    tracker("pilot in new coordinates", z_pilot.evaluations, z_pilot.evaluations)
    old_map = reparam
    reparam = reparam.refit(z_pilot.draws.reshape(-1, dim).mean(axis=0), z_pilot.covariance, prior_cov, n_independent)
    states = reparam.to_sampler(old_map.from_sampler(z_pilot.states))
    plan = []
    if transformed:
        bent = f", {', '.join(b.name for b in reparam.bends)} straightened" if reparam.bends else ""
        plan.append(PlannedRun("transformed-rotated", f"random walk in the transformed, whitened coordinates{bent}",
                               (z_pilot.scale_factor * theory.optimal_scale(dim)) ** 2 * np.eye(dim)))
    if reduced:
        r = reparam.informed
        diag = np.r_[np.full(r, theory.optimal_scale(r) ** 2), np.ones(dim - r)]
        plan.append(PlannedRun("reduced-basis", f"random walk in the {r} informed directions, independence proposals "
                               "from the fitted Gaussian in the others", np.diag(diag), independent=np.arange(r, dim)))
    return NewCoordinates(reparam, findings, prior_cov, plan, states)


# --------------------------------------------------------------------------- proof


@dataclass(frozen=True)
class Proof:
    """The fixed-proposal runs, their diagnostics (computed once) and their comparison rows.

    Attributes
    ----------
    rows : list of ComparisonRow
        The baseline first.
    runs : dict of str to Chains
        Draws in the user's parameters, by proposal name.
    stats : dict of str to walktune.diagnostics.ChainMeasures
    steps : dict of str to int
        Steps per chain of each run (runs measured slower stopped early).
    proposals : dict of str to ndarray of shape (d, d)
        Each run's proposal covariance, in the coordinates it ran in (the new
        coordinates' runs in those of ``sampling_map.json``).
    budget : int
        Evaluations the proof could spend (:func:`proof_budget`).
    rounds : int
    settled : bool
        The recommended run's ESS is reliable and its R-hat below 1.01
        (:func:`walktune.recommend.settled`) within the budget.
    """

    rows: list
    runs: dict
    stats: dict
    steps: dict
    proposals: dict = field(default_factory=dict)
    budget: int = 0
    rounds: int = 0
    settled: bool = False

    @property
    def full_length_runs(self) -> dict:
        """The runs of the longest length (those still extended when the proof ended), by name."""
        longest = max(run.n_steps for run in self.runs.values())
        return {name: run for name, run in self.runs.items() if run.n_steps == longest}

    def pooled(self) -> tuple:
        """Every run's draws as chains of one length, for the detectors: (draws, log_density, chain_ids).

        Runs stopped early are shorter; each longer run is cut into consecutive
        pieces of the shortest run's length in draws kept (its last whole
        pieces; a long run keeps every k-th state, :func:`proof_thinning`),
        each piece a chain of the pool, with the index of the chain it comes from.
        Shapes (pieces, length, d), (pieces, length) and (pieces,).
        """
        length = min(run.draws.shape[1] for run in self.runs.values())
        draws, log_density, chain_ids = [], [], []
        for run in self.runs.values():
            stored = run.draws.shape[1]
            pieces = stored // length
            kept = slice(stored - pieces * length, stored)
            draws.append(run.draws[:, kept].reshape(run.n_chains * pieces, length, run.dim))
            log_density.append(run.log_density[:, kept].reshape(run.n_chains * pieces, length))
            chain_ids.append(np.repeat(np.arange(run.n_chains), pieces))
        return np.concatenate(draws), np.concatenate(log_density), np.concatenate(chain_ids)

    @property
    def evaluations(self) -> int:
        """Evaluations the proof spent, all runs together."""
        return sum(run.evaluations for run in self.runs.values())

    @property
    def tuned(self) -> Chains:
        return self.runs["tuned-covariance"]

    @property
    def tuned_stats(self) -> ChainMeasures:
        return self.stats["tuned-covariance"]

    @property
    def tuned_row(self) -> ComparisonRow:
        return next(row for row in self.rows if row.proposal == "tuned-covariance")


def detection_reserve(dim: int, total: int | None) -> int:
    """Evaluations kept back from the proof for the mode and funnel checks after it."""
    reserve = 5 * 60 * (dim + 1) + 200 + (2 * dim * (2 * dim + 1) if dim <= MAX_CURVATURE_PROBE_DIM else 0)
    return reserve if total is None else min(reserve, total // 10)


def _user_space_plan(advice: Advice, current: np.ndarray | None, dim: int) -> list:
    """The baseline (the user's proposal, or one tuned step size), per-parameter steps, the tuned covariance."""
    slowdowns = advice.slowdowns
    if current is not None:
        baseline = PlannedRun("current", "the proposal you use now", current, slowdowns["current"]["slowest_parameter"])
    else:
        single = advice.single_step
        baseline = PlannedRun("single-step", f"one tuned step size {single:.3g} for all parameters",
                              single**2 * np.eye(dim), slowdowns["single_step"]["slowest_parameter"])
    return [
        baseline,
        PlannedRun("step-sizes", "tuned per-parameter step sizes", np.diag(advice.step_sizes**2),
                   slowdowns["step_sizes"]["slowest_parameter"]),
        PlannedRun("tuned-covariance", "the tuned full proposal covariance", advice.proposal_covariance, 1.0),
    ]


def proof_budget(dim: int, budget: Budget, spent: int, options: int) -> int:
    """Evaluations the proof may spend: by default :func:`proof_budget_default`; with a cap on the job, what the
    mode search and pilots left less the detection reserve (at least 50 steps per chain for every option)."""
    if budget.total is None:
        return proof_budget_default(dim, budget.chains)
    left = budget.total - spent - detection_reserve(dim, budget.total)
    return max(left, 50 * options * budget.chains)


def run_proofs(posterior: Posterior, pilot: PilotResult, advice: Advice, coords: NewCoordinates, budget: Budget,
               current: np.ndarray | None, seed, tracker) -> Proof:
    """Fixed-proposal runs from the pilot's end states, in rounds sized by need (:mod:`walktune.proof`).

    Every option runs a first round of :func:`walktune.proof.first_round_steps`
    (fewer when the budget cannot hold them); runs measured slower stop, and the
    others continue until the recommended one is settled or :func:`proof_budget` is spent.
    """
    dim, counted, chains = posterior.dim, posterior.counted, budget.chains
    plan = _user_space_plan(advice, current, dim)
    options = [Option(p.name, p.description, p.covariance, p.predicted, child, counted, pilot.states,
                      pilot.state_log_density)
               for p, child in zip(plan, seed.spawn(len(plan)))]
    if coords.plan:
        z_evaluator = SamplerSpaceEvaluator(counted, coords.reparam)
        options += [Option(p.name, p.description, p.covariance, float("nan"), child, z_evaluator, coords.states, None,
                           independent=p.independent, to_user=coords.reparam.from_sampler)
                    for p, child in zip(coords.plan, seed.spawn(len(coords.plan)))]
    cap = proof_budget(dim, budget, counted.count, len(options))
    # A run's draws beyond PROOF_DRAWS_BYTES are kept every k-th state (the longest any run could become).
    thin = proof_thinning(chains, cap // chains, dim)
    for option in options:
        option.thin = thin
    first = min(first_round_steps(dim), max(50, cap // (len(options) * chains)))
    rows: list = []
    tracker.proof_rows(rows)
    rounds = run_rounds(options, cap, chains, first, tracker, rows)
    return Proof(
        rows=rounds.rows,
        runs={o.name: o.run for o in options},
        stats={o.name: o.stats for o in options},
        steps={o.name: o.steps for o in options},
        proposals={o.name: o.covariance for o in options},
        budget=cap,
        rounds=rounds.rounds,
        settled=rounds.settled,
    )
