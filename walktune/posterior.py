"""The posterior being tuned, as the job evaluates it.

Every evaluation of the tuning job goes through one object, the counted
evaluator, which

* gives ``log p(theta) = -inf`` outside the bounds without calling the model;
* adds a prior given apart from the likelihood,
  ``log p(theta) = log L(theta) + log pi(theta)`` (on the driver when the
  likelihood runs on workers, formed the same way so results agree bit for bit);
* counts and times evaluations and records them in the checkpoint, which is
  what a bit-for-bit resume replays.

Sampling in other coordinates ``z`` with ``theta = g(z)`` evaluates
``log p_z(z) = log p(g(z)) + log |det J_g(z)|`` through the same counter
(:class:`SamplerSpaceEvaluator`).
"""

from __future__ import annotations

import time
import traceback
from dataclasses import dataclass

import numpy as np

from ._validation import as_covariance, as_float_array, check_finite
from .errors import TargetError, WalktuneError
from .evaluators import TIMEOUT_PREFIX, BatchResult, InProcessEvaluator


# --------------------------------------------------------------------------- inputs


def parameter_names(names, dim: int) -> list:
    if names is None:
        return [f"theta[{i}]" for i in range(dim)]
    names = [str(n) for n in names]
    if len(names) != dim:
        raise WalktuneError(f"got {len(names)} parameter names for {dim} start values; give one name per parameter.")
    if len(set(names)) != len(names):
        raise WalktuneError("parameter names must be unique; some name is repeated.")
    return names


def parameter_bounds(bounds, names: list, start: np.ndarray) -> np.ndarray:
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


def current_proposal_covariance(value, dim: int) -> np.ndarray | None:
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



def _finite_or_minus_inf(values) -> np.ndarray:
    """Values as floats, with NaN and +inf (a failed evaluation) as -inf."""
    values = np.array(values, dtype=float)
    return np.where(np.isfinite(values) | (values == -np.inf), values, -np.inf)


class CountedEvaluator:
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

    def finite_values(self, points: np.ndarray) -> np.ndarray:
        """Many points (n, d) in one batch, for the optimizer's finite differences: as :meth:`scalar` for each."""
        return _finite_or_minus_inf(self(np.asarray(points, dtype=float)).values)


class SamplerSpaceEvaluator:
    """Evaluates the posterior of z = sampler coordinates through the user's evaluator."""

    def __init__(self, counted: CountedEvaluator, reparam):
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

    def scalar(self, z: np.ndarray) -> float:
        """One point, for the optimizer: exceptions and NaN become -inf."""
        value = float(self(np.asarray(z, dtype=float)[None, :]).values[0])
        return value if np.isfinite(value) or value == -np.inf else -np.inf

    def finite_values(self, points: np.ndarray) -> np.ndarray:
        """Many points (n, d) in one batch, for the optimizer's finite differences: as :meth:`scalar` for each."""
        return _finite_or_minus_inf(self(np.asarray(points, dtype=float)).values)


class PriorAddedEvaluator:
    """An evaluator of the likelihood (anywhere) plus a prior given apart (here, on the driver).

    The sum is formed as :meth:`PriorTerms.posterior` forms it, so results
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


class PriorTerms:
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

            batch = None
            if self.vectorized:  # the Hessian's 2 d^2 points in blocks, each one call
                batch = lambda points: np.asarray(self.log_prior(points), dtype=float).reshape(-1)  # noqa: E731
            hessian = finite_difference_hessian(value, centre, np.maximum(posterior_sd, 1e-12), evaluate_batch=batch)
            laplace = laplace_covariance(hessian)
            if laplace is not None:
                return laplace
        width = self.bounds[:, 1] - self.bounds[:, 0]
        fallback = np.where(np.isfinite(width), width**2 / 12, 1e8 * posterior_sd**2)
        missing = ~np.isfinite(variance)
        cov[missing, missing] = fallback[missing]
        return cov


def worker_busy_share(counted: CountedEvaluator, evaluator) -> float | None:
    """Share of the wall time of batches evaluated on workers that the workers spent evaluating
    (None for in-process evaluation)."""
    workers = getattr(evaluator, "parallelism", 1)
    if workers <= 1 or counted.worker_seconds <= 0:
        return None
    return float(min(1.0, counted.busy_seconds / (counted.worker_seconds * workers)))


# --------------------------------------------------------------------------- the posterior


@dataclass
class Posterior:
    """The posterior the job tunes, and the one counted evaluator every stage evaluates it through.

    Attributes
    ----------
    names : list of str
    bounds : ndarray of shape (d, 2)
        Low and high bound of each parameter (infinite where open).
    start : ndarray of shape (d,)
    counted : CountedEvaluator
    prior_terms : PriorTerms or None
        The prior given apart from the likelihood, if any.
    evaluator : evaluator
        What the counted evaluator calls (in-process, threads, workers, Dask).
    """

    names: list
    bounds: np.ndarray
    start: np.ndarray
    counted: CountedEvaluator
    prior_terms: PriorTerms | None
    evaluator: object

    @property
    def dim(self) -> int:
        return self.start.shape[0]

    @property
    def time_limit(self) -> float | None:
        return getattr(self.evaluator, "time_limit", None)


def prepare_posterior(log_density, start, names, bounds, *, vectorized, evaluator, log_prior, prior,
                      checkpoint) -> Posterior:
    """Assemble the posterior from the model and a prior given apart; evaluates nothing.

    ``log_density`` is the log-posterior, or the log-likelihood when
    ``log_prior`` or ``prior`` is given. With an ``evaluator`` (workers) the
    likelihood is computed there and the prior added here.
    """
    prior_terms = None
    if log_prior is not None or prior is not None:
        prior_terms = PriorTerms(log_prior, prior, names, bounds, vectorized)
        if evaluator is not None:
            evaluator = PriorAddedEvaluator(evaluator, prior_terms)
        else:
            log_density = prior_terms.posterior(log_density)
    base = evaluator if evaluator is not None else InProcessEvaluator(log_density, vectorized)
    return Posterior(names, bounds, start, CountedEvaluator(base, bounds, checkpoint), prior_terms, base)


def check_start(posterior: Posterior) -> None:
    """Evaluate the start point; a start outside the support is the user's error."""
    first = posterior.counted(posterior.start[None, :])
    if first.errors or not np.isfinite(first.values[0]):
        if first.errors:
            detail = first.errors[0].strip().splitlines()[-1]
            raise TargetError(f"evaluating the log-density at the start point failed ({detail}).")
        raise TargetError(
            f"the log-density at the start point is not finite (value {first.values[0]}); choose a start inside the support."
        )


#: Moves of each parameter alone, in its rough scale, when probing whether the log-density depends on it.
PROBE_MOVES = (-4.0, -1.0, 1.0, 4.0)


def unused_parameters(posterior: Posterior, scales: np.ndarray) -> list:
    """Parameters the log-density does not depend on, found by moving each alone from the start.

    Each parameter not bounded on both sides is moved by ``PROBE_MOVES`` times
    its scale (moves that leave its bounds are dropped), all in one batch
    through ``posterior.counted``. A parameter is unused when at least two
    moves stayed inside and every value equals the start's exactly: no
    change at all, so nothing makes the posterior proper along it. A flat
    density on a finite interval is proper, so parameters bounded on both
    sides are not probed.

    Parameters
    ----------
    posterior : Posterior
    scales : ndarray of shape (d,)
        A rough scale per parameter.

    Returns
    -------
    list of str
        The names of the unused parameters (empty when every probed parameter matters).
    """
    start, bounds = posterior.start, posterior.bounds
    probed = [i for i in range(posterior.dim) if not np.all(np.isfinite(bounds[i]))]
    points, owners = [], []
    for i in probed:
        for move in PROBE_MOVES:
            value = start[i] + move * scales[i]
            if bounds[i, 0] < value < bounds[i, 1] and value != start[i]:
                point = start.copy()
                point[i] = value
                points.append(point)
                owners.append(i)
    if not points:
        return []
    result = posterior.counted(np.array([start] + points))
    values, owners = result.values, np.array(owners)
    flat = []
    for i in probed:
        mine = values[1:][owners == i]
        if mine.size >= 2 and not result.errors and np.isfinite(values[0]) and np.all(mine == values[0]):
            flat.append(posterior.names[i])
    return flat


def check_parameters_used(posterior: Posterior, scales: np.ndarray) -> None:
    """Stop with a one-line error when the log-density does not depend on some parameters (an improper posterior)."""
    flat = unused_parameters(posterior, scales)
    if not flat:
        return
    which = ", ".join(flat)
    everything = len(flat) == posterior.dim
    raise TargetError(
        f"the log-density does not change when {which} {'move' if len(flat) > 1 else 'moves'} alone"
        + (" (it is flat)" if everything else "")
        + f", so the posterior is not proper along {'them' if len(flat) > 1 else 'it'}; add a prior for "
        f"{which} (PRIOR or LOG_PRIOR in the model file, prior= in Python) or a lower and an upper bound (--bound NAME=LOW:HIGH)."
    )
