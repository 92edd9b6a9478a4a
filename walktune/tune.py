"""The tuning job: mode, pilot, structure, advice, proof of gain.

``tune`` runs, in order:

1. the mode and the Laplace covariance there (:mod:`walktune.mode`);
2. overdispersed chains around the mode and an adaptive pilot in fixed-proposal
   stages (:mod:`walktune.pilot`);
3. the structure of the posterior from the pilot covariance (:mod:`walktune.analysis`);
4. advice from optimal-scaling theory (:mod:`walktune.theory`);
5. the proof: fixed-proposal runs from the pilot's end states, on equal
   evaluation budgets, of a baseline (the user's proposal or one tuned step
   size), tuned per-parameter step sizes and the tuned covariance;
6. findings.

Every figure in the comparison comes from fixed-proposal chains.
"""

from __future__ import annotations

import time
import traceback
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable

import numpy as np

from . import theory
from .advice import Advice, advice_payload, advise, warmup_and_thinning
from ._validation import as_covariance, as_float_array, check_finite
from .analysis import Structure, analyse
from .diagnostics import summary
from .checkpoint import Interrupted
from .engine import sample
from .errors import SamplingError, TargetError, WalktuneError
from .evaluators import TIMEOUT_PREFIX, BatchResult, InProcessEvaluator
from .geometry import (
    boundary_findings,
    climb,
    find_regions,
    funnel_findings_from_curvature,
    heavy_tail_findings,
    multimodal_finding,
    separated,
    varying_scale_findings,
    within_chain_iact,
)
from .findings import (
    Finding,
    acceptance_findings,
    conditioning_findings,
    convergence_findings,
    correlation_findings,
    identification_findings,
    prior_dominated_findings,
)
from .mode import ModeFit, find_mode
from .pilot import PilotResult, run_pilot
from .reparam import build_reparam, curved_ridge_findings

#: Default ESS the user wants, for the "evaluations needed" advice; 400 over
#: all chains is common practice (Vehtari et al. 2021 suggest 100 per chain).
DEFAULT_TARGET_ESS = 400
SCHEMA = "walktune.advice/1"

#: Up to this dimension the funnel detector also probes the log-density's
#: curvature (2 d (2 d + 1) evaluations).
MAX_CURVATURE_PROBE_DIM = 20

CAUTION = (
    "Diagnostics can show that chains have not converged; they can never prove that they have. "
    "A pilot can miss modes or regions it never reached. Confirm results with independent runs "
    "from different starting points before relying on them."
)


# --------------------------------------------------------------------------- inputs


def pilot_budget_default(dim: int) -> int:
    """Default pilot evaluations: ``20 d^2 + 2000`` (mode search included)."""
    return 20 * dim * dim + 2000


def proof_steps_default(dim: int) -> int:
    """Steps per chain of each proof run: enough for about 65 IACTs (IACT ~ 3 d) in each half-chain."""
    return max(2000, 400 * dim)


def minimum_budget(dim: int, chains: int) -> int:
    """Smallest budget that can do anything useful: the mode, two pilot stages, three short proofs."""
    return (2 * dim * dim + 50 * dim + 200) + 2 * chains * max(50, 10 * dim) + 3 * chains * 200


def _names(names, dim: int) -> list:
    if names is None:
        return [f"theta[{i}]" for i in range(dim)]
    names = [str(n) for n in names]
    if len(names) != dim:
        raise WalktuneError(f"got {len(names)} parameter names for {dim} start values; give one name per parameter.")
    if len(set(names)) != len(names):
        raise WalktuneError("parameter names must be unique; some name is repeated.")
    return names


def _bounds(bounds, names: list, start: np.ndarray) -> np.ndarray:
    dim = len(names)
    out = np.tile([-np.inf, np.inf], (dim, 1))
    if bounds is None:
        return out
    if not isinstance(bounds, dict):
        bounds = {i: b for i, b in enumerate(bounds)}
    for key, pair in bounds.items():
        if isinstance(key, (int, np.integer)) and not isinstance(key, bool):
            if not 0 <= key < dim:
                raise WalktuneError(f"bound index {key} is out of range for {dim} parameters.")
            index = int(key)
        elif key in names:
            index = names.index(key)
        else:
            raise WalktuneError(f"bounds name unknown parameter {key!r}; known parameters: {', '.join(names)}.")
        try:
            lo, hi = (float(-np.inf if pair[0] is None else pair[0]), float(np.inf if pair[1] is None else pair[1]))
        except (TypeError, ValueError, IndexError):
            raise WalktuneError(f"bounds for {names[index]} must be a pair (low, high); got {pair!r}.") from None
        if not lo < hi:
            raise WalktuneError(f"bounds for {names[index]} must have low < high; got ({lo:g}, {hi:g}).")
        if not lo < start[index] < hi:
            raise WalktuneError(
                f"start value {start[index]:g} of {names[index]} is outside its bounds ({lo:g}, {hi:g}); "
                "choose a start strictly inside."
            )
        out[index] = (lo, hi)
    return out


def _current_proposal(value, dim: int) -> np.ndarray | None:
    """A covariance (d, d), or per-parameter step sizes (d,) as standard deviations."""
    if value is None:
        return None
    array = as_float_array(value, "current_proposal")
    if array.ndim == 1:
        if array.shape[0] != dim:
            raise WalktuneError(
                f"current proposal step sizes must have {dim} values (one per parameter); got {array.shape[0]}."
            )
        check_finite(array, "current_proposal")
        if np.any(array <= 0):
            raise WalktuneError("current proposal step sizes must all be positive.")
        return np.diag(array**2)
    return as_covariance(array, dim, "current_proposal")


class _Counted:
    """Wraps an evaluator: enforces bounds, counts evaluations, times them, records them in a checkpoint."""

    def __init__(self, evaluator, bounds: np.ndarray, checkpoint=None):
        self.evaluator = evaluator
        self.bounds = bounds
        self.checkpoint = checkpoint
        self.count = 0
        self.seconds = 0.0
        self.busy_seconds = 0.0
        self.worker_seconds = 0.0
        self.timeouts = 0
        self.bounded = bool(np.any(np.isfinite(bounds)))

    def __call__(self, points: np.ndarray) -> BatchResult:
        points = np.atleast_2d(points)
        result = self._bounded(points)
        self.count += points.shape[0]  # after the call: a batch stopped by an interruption is not counted
        return result

    def _bounded(self, points: np.ndarray) -> BatchResult:
        if self.bounded:
            inside = np.all((points > self.bounds[:, 0]) & (points < self.bounds[:, 1]), axis=1)
            if not inside.all():
                values = np.full(points.shape[0], -np.inf)
                errors = {}
                if inside.any():
                    index = np.flatnonzero(inside)
                    inner = self._timed(points[index])
                    values[index] = inner.values
                    errors = {int(index[k]): v for k, v in inner.errors.items()}
                return BatchResult(values, errors)
        return self._timed(points)

    def _timed(self, points):
        if self.checkpoint is not None:
            result, seconds, busy = self.checkpoint.evaluate(points, self.evaluator)
        else:
            t0 = time.perf_counter()
            result = self.evaluator(points)
            seconds, busy = time.perf_counter() - t0, result.busy_seconds
        self.seconds += seconds
        if busy > 0:  # ran on workers (a resumed run may have started in this process)
            self.busy_seconds += busy
            self.worker_seconds += seconds
        if result.errors:
            self.timeouts += sum(text.startswith(TIMEOUT_PREFIX) for text in result.errors.values())
        return result

    def scalar(self, theta: np.ndarray) -> float:
        """One point, for the optimizer: exceptions and NaN become -inf."""
        result = self(np.asarray(theta, dtype=float)[None, :])
        value = float(result.values[0])
        return value if np.isfinite(value) or value == -np.inf else -np.inf


class _SamplerSpaceEvaluator:
    """Evaluates the posterior of z = sampler coordinates through the user's evaluator."""

    def __init__(self, counted: _Counted, reparam):
        self.counted = counted
        self.reparam = reparam

    def __call__(self, points: np.ndarray) -> BatchResult:
        theta, jacobian = self.reparam.from_sampler_with_jacobian(points)
        if np.isfinite(jacobian.sum() + theta.sum()):  # the usual case: every point maps to a finite theta
            inner = self.counted(theta)
            return BatchResult(inner.values + jacobian, inner.errors)
        ok = np.all(np.isfinite(theta), axis=1) & np.isfinite(jacobian)
        values = np.full(points.shape[0], -np.inf)
        errors = {}
        if ok.any():
            index = np.flatnonzero(ok)
            inner = self.counted(theta[index])
            values[index] = inner.values + jacobian[index]
            errors = {int(index[k]): v for k, v in inner.errors.items()}
        return BatchResult(values, errors)


class _WithPrior:
    """An evaluator of the likelihood (anywhere) plus a prior given apart (here, on the driver).

    The sum is formed as :meth:`_PriorTerms.posterior` forms it, so results
    match in-process evaluation bit for bit.
    """

    def __init__(self, evaluator, prior_terms):
        self.evaluator = evaluator
        self.prior_terms = prior_terms
        self.parallelism = getattr(evaluator, "parallelism", 1)
        self.time_limit = getattr(evaluator, "time_limit", None)

    def __call__(self, points: np.ndarray) -> BatchResult:
        extra, prior_errors = self.prior_terms.log_prior_values(points)
        result = self.evaluator(points)
        errors = {**result.errors, **prior_errors}
        return BatchResult(np.asarray(result.values, dtype=float) + extra, errors, result.busy_seconds)


class _PriorTerms:
    """A prior given apart from the likelihood: its log-density and its covariance."""

    def __init__(self, log_prior, specs, names, bounds, vectorized):
        self.log_prior = log_prior
        self.names = names
        self.bounds = bounds
        self.vectorized = vectorized
        self.specs = {}
        for key, spec in (specs or {}).items():
            if key not in names:
                raise WalktuneError(f"prior given for unknown parameter {key!r}; known: {', '.join(names)}.")
            try:
                kind, a, b = spec[0], float(spec[1]), float(spec[2])
            except (TypeError, ValueError, IndexError):
                raise WalktuneError(f"prior for {key} must be ('normal', mean, sd) or ('uniform', low, high).") from None
            if kind not in ("normal", "uniform") or not (b > 0 if kind == "normal" else b > a):
                raise WalktuneError(f"prior for {key} must be ('normal', mean, sd > 0) or ('uniform', low < high).")
            self.specs[names.index(key)] = (kind, a, b)

    def _spec_log_density(self, theta: np.ndarray) -> np.ndarray:
        theta = np.atleast_2d(theta)
        total = np.zeros(theta.shape[0])
        for i, (kind, a, b) in self.specs.items():
            if kind == "normal":
                total += -0.5 * ((theta[:, i] - a) / b) ** 2
            else:
                total += np.where((theta[:, i] > a) & (theta[:, i] < b), 0.0, -np.inf)
        return total

    def log_prior_at(self, theta: np.ndarray) -> np.ndarray:
        """Specs plus log-prior at one point (d,), or at a batch (n, d) when vectorized; may raise."""
        extra = self._spec_log_density(theta)
        if self.log_prior is not None:
            extra = extra + np.asarray(self.log_prior(theta), dtype=float).reshape(-1)
        return extra

    def posterior(self, log_likelihood):
        def log_posterior(theta):
            theta = np.asarray(theta, dtype=float)
            value = np.asarray(log_likelihood(theta), dtype=float).reshape(-1) + self.log_prior_at(theta)
            return value if self.vectorized else float(value[0])

        return log_posterior

    def log_prior_values(self, points: np.ndarray) -> tuple[np.ndarray, dict]:
        """The prior's log-density at each point, and the tracebacks of points where it raised."""
        if self.vectorized:
            return self.log_prior_at(points), {}
        extra = np.empty(points.shape[0])
        errors = {}
        for i, point in enumerate(points):
            try:
                extra[i] = self.log_prior_at(point)[0]
            except Exception:  # noqa: BLE001 - a failed evaluation, reported like the likelihood's
                extra[i], errors[i] = np.nan, traceback.format_exc()
        return extra, errors

    def covariance(self, centre: np.ndarray, posterior_sd: np.ndarray) -> np.ndarray:
        """Prior covariance: from specs; from the log-prior's Hessian at ``centre``; else very wide."""
        d = centre.shape[0]
        variance = np.full(d, np.inf)
        for i, (kind, a, b) in self.specs.items():
            variance[i] = b**2 if kind == "normal" else (b - a) ** 2 / 12
        cov = np.diag(np.where(np.isfinite(variance), variance, 0.0))
        if self.log_prior is not None:
            from .mode import finite_difference_hessian, laplace_covariance

            def value(theta):
                out = np.asarray(self.log_prior(theta[None, :] if self.vectorized else theta), dtype=float).reshape(-1)[0]
                return float(out)

            hessian = finite_difference_hessian(value, centre, np.maximum(posterior_sd, 1e-12))
            laplace = laplace_covariance(hessian)
            if laplace is not None:
                return laplace
        width = self.bounds[:, 1] - self.bounds[:, 0]
        fallback = np.where(np.isfinite(width), width**2 / 12, 1e8 * posterior_sd**2)
        missing = ~np.isfinite(variance)
        cov[missing, missing] = fallback[missing]
        return cov


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ComparisonRow:
    """One fixed-proposal run of the proof.

    ``ess_per_1000`` is the smallest bulk ESS over parameters per 1000
    evaluations; ``speedup`` its ratio to the baseline's. When the baseline
    chain was too short to estimate its ESS, the speed-up is a lower bound.
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

    def to_dict(self) -> dict:
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in self.__dict__.items()}


@dataclass
class TuneResult:
    """Everything the tuning job found and advises.

    Attributes
    ----------
    parameter_names : list of str
    proposal_covariance : ndarray of shape (d, d)
        Ready to use: propose ``theta + N(0, proposal_covariance)``.
    posterior_mean : ndarray of shape (d,)
        From the tuned fixed-proposal run, with ``posterior_mean_mcse``.
    posterior_covariance : ndarray of shape (d, d)
        The pilot's shrinkage estimate from pooled fixed-proposal stages.
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
            "pilot_converged": self.pilot.converged,
            "comparison": [row.to_dict() for row in self.comparison],
            "regions": [
                {
                    "mode": r.mode.tolist(),
                    "mean": r.mean.tolist(),
                    "covariance": r.covariance.tolist(),
                    "proposal_covariance": theory.optimal_proposal(r.covariance).tolist(),
                    "share_of_draws": r.share,
                    "chains": r.chains,
                }
                for r in self.regions
            ],
            "reparameterisation": None if self.reparam is None else {
                "transforms": {t.name: t.kind for t in self.reparam.transforms},
                "informed_dimension": self.reparam.informed,
                "file": "reparam.json",
            },
            "findings": [f.to_dict() for f in self.findings],
            "caution": CAUTION,
        }

    def save(self, directory) -> Path:
        """Write advice.json, the proposal covariance (.npy, .csv) and the draws (.npz) atomically."""
        from .export import result_files
        from .io import write_folder

        return write_folder(Path(directory), result_files(self))


def _limit_text(limit) -> str:
    return f" ({limit:g} s)" if limit else ""


def _worker_busy(counted: _Counted, evaluator) -> float | None:
    """Share of the wall time of batches evaluated on workers that the workers spent evaluating
    (None for in-process evaluation)."""
    workers = getattr(evaluator, "parallelism", 1)
    if workers <= 1 or counted.worker_seconds <= 0:
        return None
    return float(min(1.0, counted.busy_seconds / (counted.worker_seconds * workers)))


class _JobState:
    """Where a running job is and its best estimate so far: what partial advice is made from."""

    def __init__(self):
        self.names = None
        self.counted = None
        self.stage = None
        self.covariance = None
        self.scale_factor = 1.0
        self.basis = None
        self.rows: list = []

    def estimate(self, covariance: np.ndarray, scale_factor: float, basis: str) -> None:
        self.covariance, self.scale_factor, self.basis = covariance, scale_factor, basis

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
            "caution": "Partial advice from an interrupted run: not yet checked by fixed-proposal runs. " + CAUTION,
        }
        if self.covariance is not None:
            try:
                advice = advise(self.covariance, scale_factor=self.scale_factor)
            except (WalktuneError, np.linalg.LinAlgError, ValueError):
                return payload
            payload.update(
                basis=self.basis,
                proposal_covariance=advice.proposal_covariance.tolist(),
                step_sizes=advice.step_sizes.tolist(),
            )
        return payload


def _json_float(value: float):
    return float(value) if np.isfinite(value) else (None if np.isnan(value) else ("inf" if value > 0 else "-inf"))


# --------------------------------------------------------------------------- the job


def _initial_covariance(fit: ModeFit, bounds: np.ndarray, start: np.ndarray) -> np.ndarray:
    if fit.laplace_covariance is not None:
        return fit.laplace_covariance
    width = bounds[:, 1] - bounds[:, 0]
    guess = np.where(np.isfinite(width), width / 6.0, 0.1 * np.maximum(np.abs(start), 1.0))
    return np.diag(guess**2)


def _overdispersed_starts(counted: _Counted, centres, cov, chains: int, rng):
    """Starts drawn from ``N(centre, 4 cov)``, pulled in until the density is finite.

    Chain ``c`` starts around ``centres[c % len(centres)]``, so that chains
    begin in every separate mode the optimizer found. Returns the points
    (chains, d) and their log-densities (chains,).
    """
    chol = np.linalg.cholesky(cov)
    points = np.empty((chains, centres[0].shape[0]))
    values = np.empty(chains)
    for c in range(chains):
        centre = centres[c % len(centres)]
        z = rng.standard_normal(centre.shape[0])
        for spread in (2.0, 1.0, 0.5, 0.25, 0.1, 0.0):
            candidate = centre + spread * (chol @ z)
            value = counted.scalar(candidate)
            if np.isfinite(value):
                break
        points[c], values[c] = candidate, value
    return points, values


def _other_modes(counted, start, fit, cov, bounds, count: int, rng) -> list:
    """Climb from ``count`` points spread widely around the start; return modes separate from ``fit.mode``.

    The points are drawn around the start with, per parameter, the largest of
    5 Laplace sds, the distance from the start to the mode, and half the
    mode's magnitude (a tight posterior far from zero may have a mirror image),
    clipped inside the bounds. A climb's end point counts as another mode only
    when the log-density dips between it and every mode already known
    (:func:`walktune.geometry.separated`).
    """
    dim = start.shape[0]
    sd = np.sqrt(np.diag(cov))
    spread = np.maximum.reduce([5.0 * sd, np.abs(fit.mode - start), 0.5 * np.abs(fit.mode)])
    known = [(fit.mode, fit.log_density)]
    low = np.where(np.isfinite(bounds[:, 0]), bounds[:, 0] + 1e-3 * sd, -np.inf)
    high = np.where(np.isfinite(bounds[:, 1]), bounds[:, 1] - 1e-3 * sd, np.inf)
    for _ in range(count):
        point = np.clip(start + spread * rng.standard_normal(dim), low, high)
        if not np.isfinite(counted.scalar(point)):
            continue
        end, value, converged = climb(counted.scalar, point, np.maximum(sd, 1e-12), budget=30 * (dim + 1))
        if not (converged and np.isfinite(value)):
            continue
        if all(separated(counted.scalar, end, mode, value, lp) for mode, lp in known):
            known.append((end, value))
    return [mode for mode, _ in known[1:]]


def _proof_run(name, proposal, counted, pilot, steps, seed, progress):
    return sample(
        None, pilot.states, proposal, steps, seed=seed, evaluator=counted, start_log_density=pilot.state_log_density,
        progress=(lambda done, total: progress(name, done, total)) if progress else None,
    )


def _row_from_run(name, description, chains, stats, predicted, baseline=None):
    """A comparison row from a run and its diagnostics ``stats`` (walktune.diagnostics.Summary)."""
    ess = stats.bulk_ess
    evaluations = chains.evaluations
    ess_min = float(np.nanmin(ess)) if np.any(np.isfinite(ess)) else float("nan")
    if not np.isfinite(ess_min):
        # A chain that never moved: its ESS is at most the number of distinct states.
        ess_min = float(np.sum(chains.accepted) + chains.n_chains)
    per_1000 = 1000 * ess_min / evaluations
    median = 1000 * float(np.nanmedian(np.where(np.isfinite(ess), ess, ess_min))) / evaluations
    reliable = not np.any(stats.bulk_too_short)
    row = dict(
        proposal=name,
        description=description,
        acceptance=chains.acceptance_rate,
        ess_per_1000=per_1000,
        median_ess_per_1000=median,
        evaluations=evaluations,
        ess_reliable=reliable,
        predicted_slowdown=predicted,
        max_rhat=float(np.nanmax(stats.rhat)),
        iact_max=float(np.nanmax(stats.iact)),
    )
    if baseline is None:
        row.update(speedup=1.0, speedup_is_lower_bound=False)
    else:
        row.update(
            speedup=per_1000 / baseline.ess_per_1000 if baseline.ess_per_1000 > 0 else float("inf"),
            # An unreliable baseline ESS is an overestimate (its IACT is underestimated),
            # so the true speed-up is at least the printed one.
            # (This run's own ESS must be trustworthy for that to hold.)
            speedup_is_lower_bound=(not baseline.ess_reliable) and reliable,
        )
    return ComparisonRow(**row)


@contextmanager
def _guarded(checkpoint, state):
    """Around the job: partial advice on a stop, the checkpoint kept on a failure, the folder unlocked at the end."""
    try:
        yield
    except Interrupted as stop:
        stop.partial = state.partial_advice()
        raise
    except BaseException as error:
        # Keep what was evaluated (a no-op when the record did not grow), except after a user error
        # such as a start outside the support: there is nothing worth resuming, and a fresh run must not find it.
        if checkpoint is not None and (isinstance(error, SamplingError) or not isinstance(error, WalktuneError)):
            checkpoint.save()
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
        2000`` for the pilot plus three proof runs of ``chains x max(2000, 400 d)``.
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
        Transform kinds never to choose.
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
    state = _JobState()
    with _guarded(checkpoint, state):
        start = as_float_array(start, "start")
        if start.ndim == 0:
            start = start.reshape(1)
        if start.ndim != 1:
            raise WalktuneError(f"`start` must be one point of shape (d,); got shape {start.shape}.")
        check_finite(start, "start")
        dim = start.shape[0]
        names = _names(names, dim)
        bound_array = _bounds(bounds, names, start)
        current = _current_proposal(current_proposal, dim)
        n_chains = 4 if chains is None else int(chains)
        if n_chains < 2:
            raise WalktuneError("`chains` must be at least 2, so that chains can disagree when they have not mixed.")
        if budget is not None:
            low = minimum_budget(dim, n_chains)
            if budget < low:
                raise WalktuneError(
                    f"a budget of {budget} evaluations is too small for {dim} parameters and {n_chains} chains; "
                    f"give at least {low}."
                )
        if not callable(log_density) and evaluator is None:
            raise WalktuneError("`log_density` must be a callable taking a parameter vector.")
        seed_seq = np.random.SeedSequence(seed) if not isinstance(seed, np.random.SeedSequence) else seed
        mode_seed, pilot_seed, proof_seed = seed_seq.spawn(3)
        prior_terms = None
        if log_prior is not None or prior is not None:
            prior_terms = _PriorTerms(log_prior, prior, names, bound_array, vectorized)
            if evaluator is not None:
                # The evaluator computes the likelihood (on workers); the prior is added here.
                evaluator = _WithPrior(evaluator, prior_terms)
            else:
                log_density = prior_terms.posterior(log_density)
        if transforms:
            from .reparam import choose_transforms

            # Check forced transforms against the bounds now, before any evaluation.
            choose_transforms(np.tile(start, (3, 1)) + np.arange(3)[:, None] * 0.0, names, bound_array, transforms, forbid_transforms)
        base = evaluator if evaluator is not None else InProcessEvaluator(log_density, vectorized)
        counted = _Counted(base, bound_array, checkpoint)
        state.names, state.counted = names, counted
        user_progress = progress or (lambda *args: None)

        def end_stage(name):
            """A checkpoint at a stage end, holding the partial advice so far (readable even after a hard kill)."""
            if checkpoint is not None:
                checkpoint.stage_ended(name, state.partial_advice())

        def pilot_stage_ended(p, estimate: bool):
            if estimate:
                state.estimate(p.covariance, p.scale_factor, f"the pilot after {len(p.stages)} stages")
            end_stage(f"{state.stage} stage {len(p.stages)}")

        def report(stage, done, total):
            state.stage = stage
            if done >= total:
                end_stage(stage)
            user_progress(stage, done, total)

        first = counted(start[None, :])
        if first.errors or not np.isfinite(first.values[0]):
            detail = first.errors[0].strip().splitlines()[-1] if first.errors else f"value {first.values[0]}"
            raise TargetError(f"the log-density at the start point is not finite ({detail}); choose a start inside the support.")

        # Budgets.
        if budget is None:
            pilot_budget = pilot_budget_default(dim)
            proof_steps = proof_steps_default(dim)
        else:
            pilot_budget = max(int(0.4 * budget), minimum_budget(dim, n_chains) - 3 * n_chains * 200)

        # 1. Mode and Laplace covariance.
        report("mode", 0, 1)
        scales = np.where(np.isfinite(bound_array).all(axis=1), (bound_array[:, 1] - bound_array[:, 0]) / 10, 1.0)
        scales = np.maximum(np.minimum(scales, np.maximum(np.abs(start), 1.0)), 1e-8)
        mode_budget = max(20 * (dim + 1), pilot_budget // 3 - 2 * dim * dim)
        fit = find_mode(counted.scalar, start, bound_array, scales, mode_budget)
        report("mode", 1, 1)
        initial_cov = _initial_covariance(fit, bound_array, start)
        state.estimate(initial_cov, 1.0, "the Laplace approximation at the mode")

        # 2. Pilot from overdispersed starts.
        rng = np.random.default_rng(mode_seed)
        other_modes = _other_modes(counted, start, fit, initial_cov, bound_array, 4, rng)
        centres = [fit.mode] + other_modes
        states, state_values = _overdispersed_starts(counted, centres, initial_cov, n_chains, rng)
        used = counted.count
        pilot = run_pilot(
            None, states, initial_cov, max(pilot_budget - used, n_chains * 2 * max(50, 10 * dim)),
            pilot_seed, evaluator=counted, progress=lambda done, total: report("pilot", done, total),
            state_log_density=state_values, within_chains=len(centres) > 1,
            on_stage=lambda p: pilot_stage_ended(p, estimate=True),
        )
        report("pilot", pilot.evaluations, pilot.evaluations)
        covariance = pilot.covariance

        # 3-4. Structure and advice.
        structure = analyse(covariance)
        advice = advise(covariance, scale_factor=pilot.scale_factor, current=current)
        proposal, step_sizes, single, slowdowns = (
            advice.proposal_covariance, advice.step_sizes, advice.single_step, advice.slowdowns
        )

        # 4b. Reparameterisation: transforms, rotated basis, informed split, and a
        # short adaptive pilot in the new coordinates (fixed-proposal stages).
        reparam, ridge_findings, z_plan, prior_cov = None, [], [], None
        pooled = pilot.draws.reshape(-1, dim) if pilot.draws is not None else pilot.states
        try:
            prior_cov = prior_terms.covariance(fit.mode, np.sqrt(np.diag(covariance))) if prior_terms else None
            n_independent = pooled.shape[0] / max(1.0, within_chain_iact(pilot.draws)) if pilot.draws is not None else None
            reparam = build_reparam(pooled, names, bound_array, prior_covariance=prior_cov, force=transforms,
                                    forbid=forbid_transforms, covariance=covariance, n_independent=n_independent)
        except (WalktuneError, np.linalg.LinAlgError, ValueError) as error:
            ridge_findings.append(Finding("undecided", "info", [], f"no reparameterisation: {error}", {}))
        if reparam is not None:
            ridge_findings += curved_ridge_findings(pooled, reparam, names)
            transformed = any(t.kind != "identity" for t in reparam.transforms)
            reduced = prior_terms is not None and 0 < reparam.informed < dim
            if transformed or reduced:
                z_budget = pilot_budget // 2 if budget is None else min(pilot_budget // 2, max(0, (budget - counted.count) // 5))
                z_evaluator = _SamplerSpaceEvaluator(counted, reparam)
                z_pilot = run_pilot(
                    None, reparam.to_sampler(pilot.states), np.eye(dim), max(z_budget, 2 * n_chains * max(50, 10 * dim)),
                    proof_seed.spawn(1)[0], evaluator=z_evaluator,
                    progress=lambda done, total: report("pilot in new coordinates", done, total),
                    on_stage=lambda p: pilot_stage_ended(p, estimate=False),
                )
                report("pilot in new coordinates", z_pilot.evaluations, z_pilot.evaluations)
                old_map = reparam
                reparam = reparam.refit(z_pilot.draws.reshape(-1, dim).mean(axis=0), z_pilot.covariance, prior_cov, n_independent)
                z_states = reparam.to_sampler(old_map.from_sampler(z_pilot.states))
                if transformed:
                    z_plan.append(("transformed-rotated", "random walk in the transformed, whitened coordinates",
                                   (z_pilot.scale_factor * theory.optimal_scale(dim)) ** 2 * np.eye(dim), None))
                if reduced:
                    r = reparam.informed
                    diag = np.r_[np.full(r, theory.optimal_scale(r) ** 2), np.ones(dim - r)]
                    z_plan.append(("reduced-basis", f"random walk in the {r} informed directions, independence proposals "
                                   "from the fitted Gaussian in the others", np.diag(diag), np.arange(r, dim)))
        pilot_evaluations = counted.count

        # 5. Proof: equal budgets, fixed proposals, from the pilot's end states.
        # Evaluations kept back for the mode checks after the proof runs.
        detection_reserve = 5 * 60 * (dim + 1) + 200 + (2 * dim * (2 * dim + 1) if dim <= MAX_CURVATURE_PROBE_DIM else 0)
        n_runs = 3 + len(z_plan)
        if budget is not None:
            detection_reserve = min(detection_reserve, budget // 10)
            # What the mode search and pilots left, shared equally by the runs.
            proof_steps = max(50, (budget - counted.count - detection_reserve) // (n_runs * n_chains))
        if current is not None:
            baseline_name, baseline_cov, baseline_text = "current", current, "the proposal you use now"
            baseline_predicted = slowdowns["current"]["slowest"]
        else:
            baseline_name, baseline_cov = "single-step", single**2 * np.eye(dim)
            baseline_text = f"one tuned step size {single:.3g} for all parameters"
            baseline_predicted = slowdowns["single_step"]["slowest"]
        plan = [
            (baseline_name, baseline_text, baseline_cov, baseline_predicted),
            ("step-sizes", "tuned per-parameter step sizes", np.diag(step_sizes**2), slowdowns["step_sizes"]["slowest"]),
            ("tuned-covariance", "the tuned full proposal covariance", proposal, 1.0),
        ]
        # Each run's diagnostics are computed once (walktune.diagnostics.summary) and reused below.
        rows, runs, stats = [], {}, {}
        state.rows = rows
        proof_seeds = proof_seed.spawn(len(plan))
        for (name, text, cov, predicted), child in zip(plan, proof_seeds):
            run = _proof_run(name, cov, counted, pilot, proof_steps, child, report)
            runs[name], stats[name] = run, summary(run.draws)
            rows.append(_row_from_run(name, text, run, stats[name], predicted, rows[0] if rows else None))

        tuned_row = rows[-1]
        if z_plan:
            z_evaluator = _SamplerSpaceEvaluator(counted, reparam)
            for (name, text, cov, fresh), child in zip(z_plan, proof_seed.spawn(len(z_plan))):
                run = sample(None, z_states, cov, proof_steps, seed=child, evaluator=z_evaluator, independent=fresh,
                             progress=lambda done, total, name=name: report(name, done, total))
                # Measured in the user's own parameters.
                run = replace(run, draws=reparam.from_sampler(run.draws))
                runs[name], stats[name] = run, summary(run.draws)
                rows.append(_row_from_run(name, text, run, stats[name], float("nan"), rows[0]))
        tuned = runs["tuned-covariance"]
        posterior_mean = tuned.draws.reshape(-1, dim).mean(axis=0)
        mcse = stats["tuned-covariance"].mcse
        tuned_rhat = stats["tuned-covariance"].rhat
        tau_max = tuned_row.iact_max

        # 6. Findings.
        findings: list[Finding] = []
        findings += correlation_findings(structure, names)
        findings += conditioning_findings(structure, names)
        findings += convergence_findings(tuned_rhat, names, "tuned-covariance")
        findings += identification_findings(np.sqrt(np.diag(covariance)), bound_array, names)
        if prior_terms is not None and prior_cov is not None:
            findings += prior_dominated_findings(
                np.diag(covariance), np.diag(prior_cov), names,
                reparam.informed if reparam is not None and reparam.prior_variance_ratio is not None else None, dim,
            )
        findings += acceptance_findings(rows)
        detection_budget = None if budget is None else max(0, budget - counted.count)
        # The detectors look at every proof run: all are fixed-proposal continuations of the pilot's chains.
        proof_draws = np.concatenate([run.draws for run in runs.values()], axis=0)
        tau_within = within_chain_iact(proof_draws)
        regions, undecided_modes = find_regions(
            counted.scalar, proof_draws, tau_within, extra_centres=centres[1:], seed=0, budget=detection_budget,
            chain_ids=[c % n_chains for c in range(proof_draws.shape[0])],
        )
        multimodal = multimodal_finding(regions, names)
        if multimodal is not None:
            findings.append(multimodal)
        funnel, undecided_scale = varying_scale_findings(proof_draws, within_chain_iact(proof_draws, np.median), names)
        probe_cost = 2 * dim * (2 * dim + 1) + 2 * dim + 1
        if not funnel and dim <= MAX_CURVATURE_PROBE_DIM and (budget is None or budget - counted.count >= probe_cost):
            # The model itself can show a funnel the draws were too few to show.
            funnel = funnel_findings_from_curvature(counted.scalar, posterior_mean, np.sqrt(np.diag(covariance)), names)
            if funnel:
                undecided_scale = None
        findings += funnel
        findings += boundary_findings(tuned.draws, bound_array, names)
        findings += heavy_tail_findings(tuned.draws, stats["tuned-covariance"].bulk_ess, names)
        for note in (undecided_modes, undecided_scale):
            if note:
                findings.append(Finding("undecided", "info", [], f"{note}; run longer to let walktune check.", {}))
        findings += ridge_findings
        if not tuned_row.ess_reliable:
            findings.append(
                Finding(
                    "short-chains", "warn", [],
                    "the tuned run was too short for a trustworthy ESS (fewer than 50 autocorrelation times per "
                    "chain); its ESS and the speed-ups are rough. Raise the budget.",
                    {"iact_max": tau_max, "steps": proof_steps},
                )
            )
        if not pilot.converged:
            findings.append(
                Finding(
                    "pilot-unsettled", "info", [],
                    "the pilot's covariance was still changing when its budget ran out; the advice may improve "
                    "with a larger budget.",
                    {"pilot_evaluations": pilot_evaluations},
                )
            )
        for name, run in runs.items():
            if run.error_count or run.nan_count:
                findings.append(
                    Finding(
                        "failed-evaluations", "warn", [],
                        f"in the {name} run the log-density raised {run.error_count} times and returned NaN "
                        f"{run.nan_count} times; those proposals were rejected. First: "
                        f"{(run.first_error or '').strip().splitlines()[-1] if run.first_error else 'NaN'}",
                        {"errors": run.error_count, "nans": run.nan_count},
                    )
                )

        if counted.timeouts:
            findings.append(
                Finding(
                    "timed-out-evaluations", "warn", [],
                    f"{counted.timeouts} evaluations did not return within the time limit"
                    f"{_limit_text(getattr(base, 'time_limit', None))} and were rejected as failed. A chain that rejects "
                    "slow regions samples the posterior restricted to where the model answers in time: raise the limit "
                    "if those regions matter.",
                    {"timeouts": counted.timeouts},
                )
            )

        total = counted.count
        return TuneResult(
            parameter_names=names,
            bounds=bound_array,
            mode_fit=fit,
            proposal_covariance=proposal,
            posterior_mean=posterior_mean,
            posterior_mean_mcse=mcse,
            posterior_covariance=covariance,
            step_sizes=step_sizes,
            single_step=single,
            expected_acceptance=advice.expected_acceptance,
            structure=structure,
            comparison=rows,
            findings=findings,
            pilot_evaluations=pilot_evaluations,
            total_evaluations=total,
            seconds_per_evaluation=counted.seconds / max(total, 1),
            worker_busy=_worker_busy(counted, base),
            target_ess=int(target_ess),
            warmup_steps=warmup_and_thinning(tau_max)[0] or 0,
            thinning=warmup_and_thinning(tau_max)[1],
            pilot=pilot,
            advice=advice,
            runs=runs,
            current_proposal=current,
            seed=seed_seq.entropy,
            regions=regions if len(regions) > 1 else [],
            reparam=reparam,
        )
