"""Random-walk Metropolis chains with a fixed Gaussian proposal, run in lockstep.

At each step every chain proposes ``y = x + L z`` with ``z ~ N(0, I)`` and
``L L^T = proposal_cov``, and accepts with probability
``min(1, exp(log_density(y) - log_density(x)))`` (Metropolis et al. 1953;
Hastings 1970). The proposal is symmetric, so this leaves the target invariant.

All chains' proposals at a step are evaluated as one batch through an
evaluator; random numbers come from one stream per chain, spawned from a
:class:`numpy.random.SeedSequence`, drawn in fixed-size blocks on the driver,
so a result depends on the seed only and never on where evaluations ran.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Callable

import numpy as np

from ._validation import as_covariance, as_float_array, check_finite, check_positive_int
from .errors import SamplingError, TargetError, WalktuneError
from .evaluators import InProcessEvaluator

#: Steps of random numbers drawn per chain at a time. Part of the definition of
#: a seeded result: changing it changes every seeded run.
BLOCK_STEPS = 256

#: Default share of failed evaluations (exceptions or NaN) that stops a run.
MAX_FAILURE_SHARE = 0.5


@dataclass(frozen=True)
class Chains:
    """Draws from ``chains`` random-walk Metropolis chains.

    Attributes
    ----------
    draws : ndarray of shape (chains, ceil(steps / thin), d)
        The state after each step (the start point is not included), or with
        ``thin`` > 1 after every ``thin``-th step, the last step always kept.
    log_density : ndarray of shape (chains, ceil(steps / thin))
        The log-density at each stored state.
    accepted : ndarray of shape (chains, steps), bool
        Whether the proposal at each step was accepted.
    evaluations : int
        Log-density evaluations, counted per point, including the start points
        unless their values were passed in.
    seed : int or SeedSequence
        The entropy of the seed sequence (or the spawned sequence itself):
        passing it back as ``seed`` repeats the run bit for bit.
    proposal_cov : ndarray of shape (d, d)
        The fixed proposal covariance.
    nan_count, error_count : int
        Evaluations that returned NaN or raised; both were rejected.
    first_error : str or None
        The traceback of the first evaluation that raised.
    thin : int
        Steps per stored draw (1: every state is kept).
    """

    draws: np.ndarray
    log_density: np.ndarray
    accepted: np.ndarray
    evaluations: int
    seed: object
    proposal_cov: np.ndarray
    start: np.ndarray
    nan_count: int = 0
    error_count: int = 0
    first_error: str | None = field(default=None, repr=False)
    thin: int = 1

    @cached_property
    def acceptance_rate(self) -> float:
        """Share of accepted proposals over all chains and steps."""
        return float(np.mean(self.accepted)) if self.accepted.size else float("nan")

    @property
    def n_chains(self) -> int:
        return self.draws.shape[0]

    @property
    def n_steps(self) -> int:
        """Steps per chain (the stored draws are fewer when ``thin`` > 1)."""
        return self.accepted.shape[1]

    @property
    def dim(self) -> int:
        return self.draws.shape[2]

    @property
    def last(self) -> np.ndarray:
        """The final state of each chain, shape (chains, d)."""
        return self.draws[:, -1, :] if self.n_steps else self.start


def thinning_for(chains: int, steps: int, dim: int, memory: int) -> int:
    """Steps per stored draw: 1, or the least ``k`` keeping ``chains`` chains of ``steps`` states of ``dim``
    float64 parameters near ``memory`` bytes (every ``k``-th state; :func:`sample`'s ``thin``)."""
    return max(1, -(-(8 * chains * dim * steps) // memory))


def _seed_sequence(seed) -> np.random.SeedSequence:
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if seed is None:
        return np.random.SeedSequence()
    try:
        return np.random.SeedSequence(seed)
    except (TypeError, ValueError):
        raise WalktuneError(f"`seed` must be a non-negative whole number or None; got {seed!r}.") from None


def _start_points(start, chains: int | None) -> tuple[np.ndarray, int]:
    start = as_float_array(start, "start")
    if start.ndim == 0:
        start = start.reshape(1)
    if start.ndim == 1:
        n = 4 if chains is None else chains
        return np.tile(start, (n, 1)), n
    if start.ndim == 2:
        if chains is not None and start.shape[0] != chains:
            raise WalktuneError(
                f"`start` has {start.shape[0]} rows but chains={chains}; give one start point per chain or a single point."
            )
        return start.copy(), start.shape[0]
    raise WalktuneError(f"`start` must be a (d,) point or a (chains, d) array; got shape {start.shape}.")


class _FailureLog:
    """Counts NaN and raised evaluations and keeps the first traceback."""

    def __init__(self, max_share: float):
        self.max_share = max_share
        self.nan_count = 0
        self.error_count = 0
        self.first_error: str | None = None
        self.first_nan: str | None = None

    def record(self, values: np.ndarray, errors: dict, points: np.ndarray) -> np.ndarray:
        if errors:
            self.error_count += len(errors)
            if self.first_error is None:
                self.first_error = errors[min(errors)]
        bad = np.isnan(values)
        n_nan = int(bad.sum()) - len(errors)
        if n_nan > 0:
            self.nan_count += n_nan
            if self.first_nan is None:
                i = int(np.flatnonzero(bad)[0])
                self.first_nan = f"log-density returned NaN at {np.array2string(points[i], precision=6)}"
        if np.any(values == np.inf):
            i = int(np.flatnonzero(values == np.inf)[0])
            raise SamplingError(
                "the log-density returned +inf at "
                f"{np.array2string(points[i], precision=6)}; it must return a finite number, or -inf outside the support."
            )
        values = values.copy()
        values[bad] = -np.inf
        return values

    def check(self, evaluations: int) -> None:
        failures = self.nan_count + self.error_count
        if evaluations >= 20 and failures > self.max_share * evaluations:
            first = (self.first_error or self.first_nan or "").strip().splitlines()
            raise SamplingError(
                f"{failures} of {evaluations} log-density evaluations ({failures / evaluations:.0%}) failed "
                f"(raised or returned NaN); first failure: {first[-1] if first else 'unknown'}. "
                "Fix the log-density so it returns -inf outside the support.",
                first_failure=self.first_error or self.first_nan,
            )


def _start_values(evaluate, points: np.ndarray, start_log_density, n_chains: int) -> tuple[np.ndarray, int]:
    """The log-density at the start points (given, or evaluated and checked finite) and the evaluations spent."""
    if start_log_density is not None:
        current_lp = np.array(start_log_density, dtype=float).reshape(-1)
        if current_lp.shape[0] != n_chains or not np.all(np.isfinite(current_lp)):
            raise WalktuneError(f"`start_log_density` must hold {n_chains} finite values, one per chain.")
        return current_lp, 0
    first = evaluate(points)
    current_lp = np.asarray(first.values, dtype=float)
    if first.errors or not np.all(np.isfinite(current_lp)):
        i = min(first.errors) if first.errors else int(np.flatnonzero(~np.isfinite(current_lp))[0])
        detail = first.errors[i].strip().splitlines()[-1] if i in first.errors else f"value {current_lp[i]}"
        raise TargetError(
            f"the log-density at start point {np.array2string(points[i], precision=6)} is not finite ({detail}); "
            "choose a start inside the support."
        )
    return current_lp, n_chains


def _independent_part(independent, cov: np.ndarray, dim: int):
    """The coordinates proposed independently (sorted, checked) and the precision of their proposal; (None, None)."""
    if independent is None:
        return None, None
    fresh = np.unique(np.asarray(independent, dtype=int))
    others = np.setdiff1d(np.arange(dim), fresh)
    if fresh.size and (fresh.min() < 0 or fresh.max() >= dim):
        raise WalktuneError(f"`independent` indices must lie in 0..{dim - 1}.")
    if np.any(cov[np.ix_(fresh, others)] != 0):
        raise WalktuneError("`proposal_cov` must not couple independent coordinates with random-walk ones.")
    return fresh, np.linalg.inv(cov[np.ix_(fresh, fresh)])


def sample(
    log_density: Callable,
    start,
    proposal_cov,
    steps: int,
    *,
    chains: int | None = None,
    seed=None,
    vectorized: bool = False,
    evaluator: Callable | None = None,
    progress: Callable[[int, int], None] | None = None,
    max_failure_share: float = MAX_FAILURE_SHARE,
    start_log_density=None,
    independent=None,
    thin: int = 1,
) -> Chains:
    """Run random-walk Metropolis chains with a fixed Gaussian proposal.

    Parameters
    ----------
    log_density : callable
        Log of the (unnormalised) target density. ``log_density(theta)`` with
        ``theta`` of shape (d,) returns a float; with ``vectorized=True``,
        ``log_density(points)`` with shape (n, d) returns shape (n,). Return
        ``-inf`` outside the support.
    start : array-like of shape (d,) or (chains, d)
        One start point for all chains, or one per chain.
    proposal_cov : array-like of shape (d, d), (d,) or scalar
        Covariance of the Gaussian increment. A vector is a diagonal.
    steps : int
        Steps per chain.
    chains : int, default=4 (or the number of rows of ``start``)
        Number of chains run in lockstep.
    seed : int, sequence of int, SeedSequence or None, default=None
        Seed of the random streams; the entropy used is kept in the result.
    vectorized : bool, default=False
        Whether ``log_density`` takes a batch of points.
    evaluator : callable, optional
        Takes a (n, d) array and returns a :class:`~walktune.evaluators.BatchResult`.
        Defaults to in-process evaluation of ``log_density``.
    progress : callable, optional
        Called as ``progress(steps_done, steps)`` from time to time.
    max_failure_share : float, default=0.5
        Stop with :class:`~walktune.errors.SamplingError` when more than this
        share of evaluations raised or returned NaN.
    start_log_density : array-like of shape (chains,), optional
        The log-density at the start points when already known (continuing
        chains); they are then not evaluated again or counted.
    independent : array-like of int, optional
        Coordinates proposed afresh from ``N(0, proposal_cov[idx, idx])``
        (an independence proposal) instead of by a random-walk step; the
        Metropolis-Hastings ratio then includes the proposal densities. The
        proposal covariance must not couple them with the other coordinates.
    thin : int, default=1
        Keep the state after every ``thin``-th step only (the last step always
        kept), to bound the memory of long runs in many dimensions. The chain
        itself, its random numbers and its acceptances are those of ``thin=1``.

    Returns
    -------
    Chains
    """
    points, n_chains = _start_points(start, chains)
    check_positive_int(n_chains, "chains")
    steps = check_positive_int(steps, "steps", minimum=0)
    thin = check_positive_int(thin, "thin", minimum=1)
    check_finite(points, "start")
    dim = points.shape[1]
    cov = as_covariance(proposal_cov, dim, "proposal_cov")
    if not callable(log_density) and evaluator is None:
        raise WalktuneError("`log_density` must be a callable taking a parameter vector.")
    seed_seq = _seed_sequence(seed)
    evaluate = evaluator if evaluator is not None else InProcessEvaluator(log_density, vectorized)
    failures = _FailureLog(max_failure_share)

    current_lp, evaluations = _start_values(evaluate, points, start_log_density, n_chains)

    chol = np.linalg.cholesky(cov)
    fresh, fresh_precision = _independent_part(independent, cov, dim)
    streams = [np.random.Generator(np.random.PCG64(s)) for s in seed_seq.spawn(n_chains)]
    # The states kept: steps t (0-based) with (steps - 1 - t) % thin == 0, so that the last is among them.
    offset = (steps - 1) % thin if steps else 0
    kept = -(-steps // thin)
    draws = np.empty((n_chains, kept, dim))
    lp_out = np.empty((n_chains, kept))
    accepted = np.empty((n_chains, steps), dtype=bool)
    current = points.copy()
    start_points = points.copy()

    done = 0
    if progress is not None:
        progress(0, steps)
    while done < steps:
        block = min(BLOCK_STEPS, steps - done)
        # Each chain's stream yields a full block whatever the run length, so a
        # run is a prefix of any longer run with the same seed.
        z = np.stack([g.standard_normal((BLOCK_STEPS, dim)) for g in streams], axis=1)[:block]
        log_u = np.log(np.stack([g.random(BLOCK_STEPS) for g in streams], axis=1)[:block])
        increments = z @ chol.T  # (block, chains, d)
        for t in range(block):
            proposal = current + increments[t]
            correction = 0.0
            if fresh is not None:
                # Independence part: y = N(0, C) draw; ratio adds log q(x) - log q(y).
                proposal[:, fresh] = increments[t][:, fresh]
                old, new = current[:, fresh], proposal[:, fresh]
                correction = 0.5 * (
                    np.einsum("ij,jk,ik->i", new, fresh_precision, new) - np.einsum("ij,jk,ik->i", old, fresh_precision, old)
                )
            result = evaluate(proposal)
            values = result.values
            if result.errors or not np.isfinite(values).all():
                values = failures.record(np.asarray(values, dtype=float), result.errors, proposal)
            accept = log_u[t] < values - current_lp + correction
            current[accept] = proposal[accept]
            current_lp[accept] = values[accept]
            step = done + t
            if thin == 1:
                draws[:, step] = current
                lp_out[:, step] = current_lp
            elif (step - offset) % thin == 0:
                draws[:, (step - offset) // thin] = current
                lp_out[:, (step - offset) // thin] = current_lp
            accepted[:, step] = accept
        evaluations += block * n_chains
        done += block
        if failures.nan_count or failures.error_count:
            failures.check(done * n_chains)
        if progress is not None:
            progress(done, steps)

    return Chains(
        draws=draws,
        log_density=lp_out,
        accepted=accepted,
        evaluations=evaluations,
        seed=seed_seq.entropy if not seed_seq.spawn_key else seed_seq,
        proposal_cov=cov,
        start=start_points,
        nan_count=failures.nan_count,
        error_count=failures.error_count,
        first_error=failures.first_error,
        thin=thin,
    )
