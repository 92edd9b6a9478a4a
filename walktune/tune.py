"""The tuning job: mode, pilot, structure, advice, new coordinates, proof of gain, findings.

``tune`` is the list of its stages (:mod:`walktune.stages`), each a function
with explicit inputs and a small result:

1. the posterior being tuned: log-density, a prior given apart, bounds, the
   counted evaluator the checkpoint records (:mod:`walktune.posterior`);
2. the mode, the Laplace covariance there and overdispersed chain starts
   (:mod:`walktune.mode`);
3. an adaptive pilot in fixed-proposal stages (:mod:`walktune.pilot`);
4. the structure of the posterior and advice from optimal-scaling theory
   (:mod:`walktune.analysis`, :mod:`walktune.advice`, :mod:`walktune.theory`);
5. new coordinates (transforms, rotation, informed split) and a short pilot in
   them (:mod:`walktune.reparam`);
6. the proof: fixed-proposal runs from the pilot's end states of a baseline
   (the user's proposal or one tuned step size), tuned per-parameter step
   sizes, the tuned covariance and the runs in new coordinates, in rounds
   sized by need (:mod:`walktune.proof`);
7. hard-geometry checks (:mod:`walktune.geometry`) and the findings
   (:func:`walktune.findings.collect_findings`).

Every figure in the comparison comes from fixed-proposal chains.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from . import theory
from ._validation import as_float_array, check_finite, check_positive_int, check_positive_number, check_seed
from .advice import Advice, advice_payload, advise, warmup_and_thinning
from .analysis import Structure, analyse, r_squared_on_others
from .checkpoint import Interrupted, active
from .checks import check_geometry
from .constants import ADVICE_SCHEMA as SCHEMA
from .constants import CAUTION, DEFAULT_TARGET_ESS
from .errors import NumericalFailure, SamplingError, WalktuneError
from .findings import collect_findings
from .mode import ModeFit
from .modes import TableScope
from .pilot import PilotResult
from .posterior import (
    check_start,
    current_proposal_covariance,
    parameter_bounds,
    parameter_names,
    prepare_posterior,
    worker_busy_share,
)
from .planning import budget_statement
from .recommend import ComparisonRow, Recommendation, recommend
from .stages import (
    Budget,
    find_start,
    minimum_budget,
    new_coordinates,
    run_main_pilot,
    run_proofs,
)

__all__ = ["ComparisonRow", "TuneResult", "tune"]


# --------------------------------------------------------------------------- result


@dataclass
class TuneResult:
    """Everything the tuning job found and advises.

    Attributes
    ----------
    parameter_names : list of str
    proposal_covariance : ndarray of shape (d, d)
        Ready to use: propose ``theta + N(0, proposal_covariance)``.
    recommended : walktune.recommend.Recommendation
        The measured option to use (``recommended.proposal`` names its comparison row).
    recommended_proposal : ndarray of shape (d, d)
        Its proposal covariance, in the coordinates it runs in (``recommended.coordinates``).
    posterior_mean : ndarray of shape (d,)
        From the recommended fixed-proposal run (``posterior_run``), with
        ``posterior_mean_mcse``, ``posterior_sd``, ``posterior_rhat`` and
        ``posterior_r_squared`` (each parameter's R^2 on the others) from the same draws:
        the chains named by ``posterior_scope`` (all of them unless chains sat in
        separated regions without moving between them; see :mod:`walktune.modes`).
    posterior_covariance : ndarray of shape (d, d)
        The pilot's shrinkage estimate from pooled fixed-proposal stages (what the proposals are built from).
    step_sizes : ndarray of shape (d,)
        Per-parameter proposal standard deviations for samplers that take only those.
    single_step : float
        The best one step size for all parameters.
    expected_acceptance : float
        Of the proposal covariance on the Gaussian with the posterior covariance.
    comparison : list of ComparisonRow
    findings : list of Finding
    pilot_evaluations : int
        Evaluations spent on the mode search and the pilot.
    """

    parameter_names: list
    bounds: np.ndarray
    mode_fit: ModeFit
    proposal_covariance: np.ndarray
    posterior_mean: np.ndarray
    posterior_mean_mcse: np.ndarray
    posterior_covariance: np.ndarray
    step_sizes: np.ndarray
    single_step: float
    expected_acceptance: float
    structure: Structure
    comparison: list
    findings: list
    pilot_evaluations: int
    total_evaluations: int
    seconds_per_evaluation: float
    target_ess: int
    warmup_steps: int
    thinning: int
    pilot: PilotResult
    advice: Advice
    runs: dict = field(repr=False, default_factory=dict)
    current_proposal: np.ndarray | None = None
    seed: object = None
    partial: bool = False
    regions: list = field(default_factory=list)
    reparam: object = None
    worker_busy: float | None = None
    recommended: Recommendation | None = None
    recommended_proposal: np.ndarray | None = None
    posterior_run: str = "tuned-covariance"
    posterior_sd: np.ndarray | None = None
    posterior_rhat: np.ndarray | None = None
    posterior_scope: TableScope | None = None
    posterior_r_squared: np.ndarray | None = None

    @property
    def whole_posterior(self) -> bool:
        """The posterior table stands for the whole posterior, not for one region of several (:mod:`walktune.modes`)."""
        return self.posterior_scope is None or self.posterior_scope.whole

    @property
    def converged(self) -> bool:
        """The table's chains agree (R-hat <= 1.01 for every parameter), and the table is not one region of several."""
        return self.posterior_rhat is not None and bool(np.all(self.posterior_rhat <= 1.01)) and self.whole_posterior

    @property
    def pilot_converged(self) -> bool:
        """The pilot's adaptation settled and the chains that followed agree (:attr:`converged`)."""
        return bool(self.pilot.converged) and self.converged

    @property
    def slowdowns(self) -> dict:
        """Predicted slow-downs of the alternatives to the tuned proposal (see :mod:`walktune.theory`)."""
        return self.advice.slowdowns

    @property
    def effective_dimension(self) -> float:
        return self.structure.effective_dimension

    @property
    def rotation(self) -> np.ndarray:
        """``W`` with ``W W^T = posterior_covariance`` (lower Cholesky): ``z = W^{-1} (theta - mean)``."""
        return np.linalg.cholesky(self.posterior_covariance)

    def __repr__(self) -> str:
        from .plaintext import tune_repr

        return tune_repr(self)

    def advice_text(self) -> str:
        """The advice as plain text (for notebooks and logs): recommendation, cost, steps, findings."""
        from .plaintext import tune_advice

        return tune_advice(self)

    def evaluations_needed(self) -> dict:
        """Evaluations each proposal needs for ``target_ess`` (from its measured min ESS)."""
        out = {}
        for row in self.comparison:
            rate = row.ess_per_1000 / 1000
            out[row.proposal] = float(np.ceil(self.target_ess / rate)) if rate > 0 else float("inf")
        return out

    def to_dict(self) -> dict:
        """The advice.json payload (schema ``walktune.advice/1``; see docs/advice-schema.md)."""
        from . import __version__

        names = self.parameter_names
        needed = self.evaluations_needed()
        return {
            "schema": SCHEMA,
            "walktune_version": __version__,
            "source": "pilot",
            "partial": self.partial,
            "seed": self.seed if isinstance(self.seed, (int, type(None))) else str(self.seed),
            "parameter_names": names,
            "bounds": [[_json_float(lo), _json_float(hi)] for lo, hi in self.bounds],
            "mode": self.mode_fit.mode.tolist(),
            "mode_message": self.mode_fit.message,
            "posterior_mean": self.posterior_mean.tolist(),
            "posterior_mean_mcse": self.posterior_mean_mcse.tolist(),
            **advice_payload(self.advice, self.structure, names),
            "warmup_steps": self.warmup_steps,
            "thinning": self.thinning,
            "target_ess": self.target_ess,
            "evaluations_needed": {k: _json_float(v) for k, v in needed.items()},
            "seconds_per_evaluation": self.seconds_per_evaluation,
            "pilot_evaluations": self.pilot_evaluations,
            "total_evaluations": self.total_evaluations,
            "worker_busy_share": self.worker_busy,
            "pilot_settled": bool(self.pilot.converged),
            "pilot_converged": self.pilot_converged,
            "recommended": self._recommended_payload(),
            "posterior_table": self._posterior_table_payload(),
            "comparison": [row.to_dict() for row in self.comparison],
            "proof_draws_kept_every": max((getattr(run, "thin", 1) for run in self.runs.values()), default=1),
            "pilot_draws_kept_every": [int(stage.kept_every) for stage in self.pilot.stages],
            "regions": [
                {
                    "mode": r.mode.tolist(),
                    "mean": r.mean.tolist(),
                    "covariance": r.covariance.tolist(),
                    "proposal_covariance": theory.optimal_proposal(r.covariance).tolist(),
                    "share_of_draws": r.share,
                    "chains": r.chains,
                    "log_density_at_mode": _json_float(r.log_density),
                    "laplace_mass": _json_float(r.mass),
                    "share_of_free_chains": _json_float(r.free_share),
                }
                for r in self.regions
            ],
            "reparameterisation": None if self.reparam is None else {
                "transforms": {t.name: t.kind for t in self.reparam.transforms},
                "bends": [bend.to_dict() for bend in self.reparam.bends],
                "informed_dimension": self.reparam.informed,
                "file": "sampling_map.json",
            },
            "findings": [f.to_dict() for f in self.findings],
            "caution": CAUTION,
        }

    def _recommended_payload(self) -> dict | None:
        if self.recommended is None:
            return None
        return {
            **self.recommended.to_dict(),
            "proposal_covariance": None if self.recommended_proposal is None else self.recommended_proposal.tolist(),
            "file": "recommended_proposal.npy",
        }

    def _posterior_table_payload(self) -> dict:
        return {
            "run": self.posterior_run,
            "mean": self.posterior_mean.tolist(),
            "mcse": [_json_float(x) for x in self.posterior_mean_mcse],
            "sd": None if self.posterior_sd is None else self.posterior_sd.tolist(),
            "rhat": None if self.posterior_rhat is None else [_json_float(x) for x in self.posterior_rhat],
            "r_squared_others": None if self.posterior_r_squared is None else
            [_json_float(x) for x in self.posterior_r_squared],
            "converged": self.converged,
            **(self.posterior_scope.to_dict() if self.posterior_scope is not None else {}),
        }

    def save(self, directory, produced_by: dict | None = None) -> Path:
        """Write advice.json, the proposal covariance (.npy, .csv) and the draws (.npz) into ``directory``.

        The folder's earlier walktune files are replaced as a whole
        (:func:`walktune.outputs.replace_files`). ``produced_by`` (command,
        model file, its SHA-256, options) is recorded in advice.json.
        """
        from .export import result_files
        from .outputs import replace_files

        return replace_files(Path(directory), result_files(self, produced_by))


def _json_float(value: float):
    return float(value) if np.isfinite(value) else (None if np.isnan(value) else ("inf" if value > 0 else "-inf"))


# --------------------------------------------------------------------------- progress, checkpoints, partial advice


class _JobTracker:
    """The job's progress and checkpoint channel, and its best estimate so far (what partial advice is made from).

    Stages call it as ``tracker(stage, done, total)``; a stage's end saves a
    checkpoint holding the partial advice so far (readable even after a hard kill).
    """

    def __init__(self, checkpoint, user_progress):
        self.checkpoint = checkpoint
        self.user_progress = user_progress or (lambda *args: None)
        self.names = None
        self.counted = None
        self.stage = None
        self.covariance = None
        self.scale_factor = 1.0
        self.basis = None
        self.rows: list = []
        self.budget = None
        self._proposal = None  # (covariance, scale_factor, proposal covariance, step sizes) last advised

    def statement(self, statement) -> None:
        """The job's budget statement (:func:`walktune.stages.budget_statement`), kept for the partial advice."""
        self.budget = statement.finding().to_dict()

    def __call__(self, stage: str, done: float, total: float) -> None:
        self.stage = stage
        if done >= total:
            self.end_stage(stage)
        self.user_progress(stage, done, total)

    def end_stage(self, name: str) -> None:
        if self.checkpoint is not None:
            self.checkpoint.stage_ended(name, self.partial_advice())

    def estimate(self, covariance: np.ndarray, scale_factor: float, basis: str) -> None:
        self.covariance, self.scale_factor, self.basis = covariance, scale_factor, basis

    def pilot_stage_ended(self, pilot, estimate: bool) -> None:
        if estimate:
            self.estimate(pilot.covariance, pilot.scale_factor, f"the pilot after {len(pilot.stages)} stages")
        self.end_stage(f"{self.stage} stage {len(pilot.stages)}")

    def proof_rows(self, rows: list) -> None:
        """The proof's rows as they are appended: finished runs enter the partial advice."""
        self.rows = rows

    def partial_advice(self) -> dict:
        """Advice from the best covariance so far, marked partial; no proof unless some proof runs finished."""
        payload = {
            "schema": SCHEMA,
            "partial": True,
            "stopped_in_stage": self.stage,
            "evaluations": self.counted.count if self.counted is not None else 0,
            "parameter_names": self.names,
            "basis": None,
            "proposal_covariance": None,
            "step_sizes": None,
            "comparison": [row.to_dict() for row in self.rows],
            "budget": self.budget,
            "caution": "Partial advice from an interrupted run: not yet checked by fixed-proposal runs. " + CAUTION,
        }
        if self.covariance is not None:
            try:
                proposal, step_sizes = self._advised_proposal()
            except (WalktuneError, np.linalg.LinAlgError, ValueError):
                return payload
            payload.update(basis=self.basis, proposal_covariance=proposal, step_sizes=step_sizes)
        return payload

    def _advised_proposal(self) -> tuple:
        """The advised proposal covariance and step sizes (as lists) for the estimate so far, kept while the
        estimate stays the same: a stop then does not advise again (at d = 300, 0.8 s of slow-downs it
        does not report) what the last stage's end already advised."""
        memo = self._proposal
        if memo is None or memo[0] is not self.covariance or memo[1] != self.scale_factor:
            advice = advise(self.covariance, scale_factor=self.scale_factor)
            memo = (self.covariance, self.scale_factor, advice.proposal_covariance.tolist(),
                    advice.step_sizes.tolist())
            self._proposal = memo
        return memo[2], memo[3]


# --------------------------------------------------------------------------- the job


@dataclass(frozen=True)
class _Inputs:
    """The user's inputs, checked."""

    start: np.ndarray
    names: list
    bounds: np.ndarray
    current: np.ndarray | None
    chains: int
    seed: np.random.SeedSequence


def _check_inputs(log_density, start, names, bounds, current_proposal, budget, chains, seed, evaluator,
                  target_ess) -> _Inputs:
    start = as_float_array(start, "start")
    if start.ndim == 0:
        start = start.reshape(1)
    if start.ndim != 1 or start.shape[0] == 0:
        raise WalktuneError(f"`start` must be one point of shape (d,) with d >= 1; got shape {start.shape}.")
    check_finite(start, "start")
    dim = start.shape[0]
    names = parameter_names(names, dim)
    bound_array = parameter_bounds(bounds, names, start)
    current = current_proposal_covariance(current_proposal, dim)
    n_chains = 4 if chains is None else check_positive_int(chains, "chains", minimum=1)
    if n_chains < 2:
        raise WalktuneError("`chains` must be at least 2, so that chains can disagree when they have not mixed.")
    if budget is not None:
        budget = check_positive_int(budget, "budget")
        low = minimum_budget(dim, n_chains)
        if budget < low:
            raise WalktuneError(
                f"a budget of {budget} evaluations is too small for {dim} parameters and {n_chains} chains; "
                f"give at least {low}."
            )
        _check_budget_fits(budget, dim, n_chains)
    check_positive_number(target_ess, "target_ess")
    if not callable(log_density) and evaluator is None:
        raise WalktuneError("`log_density` must be a callable taking a parameter vector.")
    return _Inputs(start, names, bound_array, current, n_chains, check_seed(seed))


def _check_budget_fits(budget: int, dim: int, chains: int) -> None:
    """Refuse, before any work, a budget whose draws cannot be held: the pilot keeps at most about 384 MiB and
    the proof runs at most about 128 MiB each (:func:`walktune.planning.budget_statement`, ``memory``), which
    must fit in the machine's physical memory; and the proof runs may keep every k-th state only while k stays
    well below an optimally tuned proposal's IACT (:func:`walktune.planning.max_proof_kept_every`)."""
    from .planning import budget_statement, max_proof_kept_every, planned_proof, proof_kept_every

    try:
        memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (AttributeError, ValueError, OSError):  # not on POSIX: no memory check
        memory = None
    sparsest = max_proof_kept_every(dim)

    def fits(total: int) -> bool:
        plan = Budget.plan(total, dim, chains)
        return proof_kept_every(plan) <= sparsest and (memory is None or budget_statement(plan).memory <= memory)

    if fits(budget):
        return
    low, high = minimum_budget(dim, chains), budget  # the draws kept and their thinning grow with the budget
    while high - low > max(1, low // 1000):
        middle = (low + high) // 2
        low, high = (middle, high) if fits(middle) else (low, middle)
    plan = Budget.plan(budget, dim, chains)
    needed, kept_every = budget_statement(plan).memory, proof_kept_every(plan)
    if memory is not None and needed > memory:
        raise WalktuneError(
            f"a budget of {budget:.3g} evaluations keeps up to {needed / 1e9:.3g} GB of draws of {dim} parameters "
            f"in memory, more than this machine's {memory / 1e9:.3g} GB; give at most --budget {low}."
        )
    full = 8 * dim * planned_proof(plan)
    allowed = "every state must be kept" if sparsest == 1 else f"at most every {sparsest:,}th may be kept"
    raise WalktuneError(
        f"a budget of {budget:.3g} evaluations would give the proof runs up to {full / 1e9:.3g} GB of draws of "
        f"{dim} parameters; held in memory they would keep only every {kept_every:,}th state, too sparse for a "
        f"sound ESS ({allowed} at {dim} parameters); give at most --budget {low}."
    )


def _check_forced_transforms(posterior, transforms, forbid_transforms) -> None:
    """Forced transforms must suit the bounds; checked before any evaluation."""
    if transforms:
        from .reparam import choose_transforms

        start = posterior.start
        choose_transforms(np.tile(start, (3, 1)) + np.arange(3)[:, None] * 0.0, posterior.names, posterior.bounds,
                          transforms, forbid_transforms)


def _keep_checkpoint(checkpoint, error: BaseException) -> None:
    """Keep what was evaluated (a no-op when the record did not grow), except after a user error
    such as a start outside the support: there is nothing worth resuming, and a fresh run must not find it."""
    if checkpoint is not None and (isinstance(error, SamplingError) or not isinstance(error, WalktuneError)):
        checkpoint.save()


@contextmanager
def _guarded(checkpoint, tracker):
    """Around the job: partial advice on a stop, the checkpoint kept on a failure, the folder unlocked at the end."""
    try:
        yield
    except Interrupted as stop:
        stop.partial = tracker.partial_advice()
        raise
    except (ArithmeticError, np.linalg.LinAlgError, ValueError) as error:
        if isinstance(error, WalktuneError):
            _keep_checkpoint(checkpoint, error)
            raise
        # The model's own exceptions are failed evaluations (walktune.engine); what arrives here is the job's.
        _keep_checkpoint(checkpoint, error)
        text = str(error).strip().splitlines()[0] if str(error).strip() else ""
        raise NumericalFailure(
            f"numerical failure in the tuning job ({type(error).__name__}: {text}; last stage reported: "
            f"{tracker.stage or 'none'}); "
            "the posterior may be degenerate there (a density unbounded at a bound, a flat or singular direction). "
            "Try bounds or a transform for the parameters involved, or report this with the model."
        ) from error
    except BaseException as error:
        _keep_checkpoint(checkpoint, error)
        raise
    finally:
        if checkpoint is not None:
            checkpoint.release()  # the job is over: another process may take the folder


def tune(
    log_density: Callable,
    start,
    *,
    names=None,
    bounds=None,
    current_proposal=None,
    budget: int | None = None,
    chains: int | None = None,
    seed=None,
    vectorized: bool = False,
    target_ess: int = DEFAULT_TARGET_ESS,
    evaluator=None,
    progress: Callable[[str, float, float], None] | None = None,
    log_prior: Callable | None = None,
    prior: dict | None = None,
    transforms: dict | None = None,
    forbid_transforms=None,
    checkpoint=None,
) -> TuneResult:
    """Tune a random-walk Metropolis proposal for ``log_density`` and prove the gain.

    Parameters
    ----------
    log_density : callable
        Log-likelihood plus log-prior, ``log_density(theta) -> float`` with
        ``theta`` of shape (d,) (or a batch (n, d) -> (n,) when ``vectorized``).
    start : array-like of shape (d,)
        A point where the log-density is finite.
    names : list of str, optional
        Parameter names; default ``theta[i]``.
    bounds : dict, optional
        ``{name or index: (low, high)}``; either side may be infinite or None.
        Outside the bounds the log-density is taken as ``-inf``.
    current_proposal : array-like, optional
        The proposal used today: a (d, d) covariance or (d,) step sizes (sds).
    budget : int, optional
        Cap on log-density evaluations for the whole job. Default: ``20 d^2 +
        2000`` for the pilot plus at most ``chains x max(2000, 400 d)`` (3 times that up to d = 10) for the
        proof runs (:func:`walktune.stages.proof_budget_default`).
    chains : int, default=4
    seed : int or None
        Makes the whole job reproducible.
    vectorized : bool, default=False
    target_ess : int, default=400
        The ESS the user wants, for the evaluations-needed advice.
    evaluator : callable, optional
        Batch evaluator (see :mod:`walktune.evaluators`); default in-process.
    progress : callable, optional
        ``progress(stage, done, total)``, called as stages advance.
    log_prior : callable, optional
        A log-prior given apart from the likelihood; ``log_density`` is then the
        log-likelihood and the posterior is their sum. Enables the
        likelihood-informed subspace and the reduced-basis sampler.
    prior : dict, optional
        Prior specs instead: ``{name: ("normal", mean, sd) or ("uniform", low, high)}``;
        ``log_density`` is then the log-likelihood. Parameters without a spec
        get a flat prior.
    transforms : dict, optional
        ``{name: kind}`` forcing a transform (identity, log, neglog, logit).
    forbid_transforms : list of str, optional
        Transform kinds never to choose; ``"bend"`` among them: no bends of a curved ridge (walktune.bends).
    checkpoint : walktune.checkpoint.Checkpoint, optional
        Records every evaluation and saves it at stage ends and intervals;
        when it was opened with ``resume=True`` the job replays its record and
        ends as the uninterrupted run would have, bit for bit. A stop requested
        on it (:meth:`~walktune.checkpoint.Checkpoint.request_stop`) raises
        :class:`~walktune.checkpoint.Interrupted` before the next evaluation,
        carrying partial advice.

    Returns
    -------
    TuneResult
    """
    tracker = _JobTracker(checkpoint, progress)
    with _guarded(checkpoint, tracker), active(checkpoint):
        inputs = _check_inputs(log_density, start, names, bounds, current_proposal, budget, chains, seed, evaluator,
                               target_ess)
        posterior = prepare_posterior(log_density, inputs.start, inputs.names, inputs.bounds, vectorized=vectorized,
                                      evaluator=evaluator, log_prior=log_prior, prior=prior, checkpoint=checkpoint)
        _check_forced_transforms(posterior, transforms, forbid_transforms)
        tracker.names, tracker.counted = posterior.names, posterior.counted
        check_start(posterior)
        plan = Budget.plan(budget, posterior.dim, inputs.chains)
        statement = budget_statement(plan)  # what the job will spend, said before it spends it
        tracker.statement(statement)
        mode_seed, pilot_seed, proof_seed = inputs.seed.spawn(3)

        start_points = find_start(posterior, plan, np.random.default_rng(mode_seed), tracker)
        pilot = run_main_pilot(posterior, start_points, plan, pilot_seed, tracker)
        structure = analyse(pilot.covariance)
        advice = advise(pilot.covariance, scale_factor=pilot.scale_factor, current=inputs.current)
        coords = new_coordinates(posterior, pilot, start_points, plan, proof_seed, tracker, transforms,
                                 forbid_transforms)
        pilot_evaluations = posterior.counted.count
        proof = run_proofs(posterior, pilot, advice, coords, plan, inputs.current, proof_seed, tracker)
        recommended = recommend(proof.rows)
        chosen = recommended.proposal
        checks = check_geometry(posterior, proof, start_points, pilot, plan, chosen)
        table_stats = checks.table_stats
        findings = collect_findings(posterior, structure, pilot, pilot_evaluations, coords, proof, checks,
                                    recommended=chosen, expected_acceptance=advice.expected_acceptance)
        findings.append(statement.finding())

        tau_max = next(row for row in proof.rows if row.proposal == chosen).iact_max
        warmup, thinning = warmup_and_thinning(tau_max)
        total = posterior.counted.count
        return TuneResult(
            parameter_names=posterior.names,
            bounds=posterior.bounds,
            mode_fit=start_points.fit,
            proposal_covariance=advice.proposal_covariance,
            posterior_mean=table_stats.mean,
            posterior_mean_mcse=table_stats.mcse,
            posterior_sd=table_stats.sd,
            posterior_rhat=table_stats.rhat,
            posterior_r_squared=r_squared_on_others(proof.runs[chosen].draws[checks.table.chains]),
            posterior_run=chosen,
            posterior_scope=checks.table,
            recommended=recommended,
            recommended_proposal=proof.proposals.get(chosen),
            posterior_covariance=pilot.covariance,
            step_sizes=advice.step_sizes,
            single_step=advice.single_step,
            expected_acceptance=advice.expected_acceptance,
            structure=structure,
            comparison=proof.rows,
            findings=findings,
            pilot_evaluations=pilot_evaluations,
            total_evaluations=total,
            seconds_per_evaluation=posterior.counted.seconds / max(total, 1),
            worker_busy=worker_busy_share(posterior.counted, posterior.evaluator),
            target_ess=int(target_ess),
            warmup_steps=warmup or 0,
            thinning=thinning,
            pilot=pilot,
            advice=advice,
            runs=proof.runs,
            current_proposal=inputs.current,
            seed=inputs.seed.entropy,
            regions=checks.regions if len(checks.regions) > 1 else [],
            reparam=coords.reparam,
        )
