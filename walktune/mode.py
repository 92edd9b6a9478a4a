"""Find the mode of the log-density and the Laplace covariance there.

The Laplace approximation of a posterior at its mode ``m`` is ``N(m, H^{-1})``
with ``H = -grad^2 log p(m)``, estimated here by central finite differences.
The optimizer is scipy.optimize.minimize: L-BFGS-B (which honours bounds)
first, then Nelder-Mead and Powell as fallbacks when it fails or stalls.

Finite differences evaluate their points in batches: the Hessian's
``2 d^2 + 1`` points and L-BFGS-B's forward-difference gradient (``d`` points
per gradient, handed to scipy as its ``workers`` map) go to the batch evaluator
in blocks of at most ``FD_BLOCK_BYTES`` of points, so a vectorised model
evaluates thousands at once and a pool of workers shares them; a stop request
is honoured between blocks (:func:`walktune.checkpoint.stop_point`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy
from scipy import optimize

from .checkpoint import stop_point

#: Relative step of the finite differences, about the fourth root of machine
#: epsilon (2.2e-16 ** 0.25 = 1.2e-4): for a central second difference the
#: truncation error grows as h^2 and the rounding error as eps / h^2, balanced
#: at h ~ eps^(1/4) (textbook numerical analysis). The central first difference
#: that reuses these evaluations would prefer eps^(1/3) (6e-6); at 1e-4 its
#: truncation error is of order 1e-8 relative, ample for a Newton step.
FD_STEP = 1e-4

#: Bytes of points one batch of finite differences holds at most (64 MiB: 8,388 points at d = 1000).
FD_BLOCK_BYTES = 2**26

#: L-BFGS-B takes a ``workers`` map for its finite-difference gradient from scipy 1.16 on; before, it
#: evaluates the gradient's points one at a time (the same points and values, only slower).
LBFGSB_WORKERS = tuple(int(part) for part in scipy.__version__.split(".")[:2]) >= (1, 16)


@dataclass(frozen=True)
class ModeFit:
    """Result of the search for the mode.

    Attributes
    ----------
    mode : ndarray of shape (d,)
    log_density : float
        The log-density at ``mode``.
    hessian : ndarray of shape (d, d) or None
        Finite-difference Hessian of the log-density (negative definite at a mode).
    laplace_covariance : ndarray of shape (d, d) or None
        ``(-hessian)^{-1}`` when it is positive definite, else None.
    method : str
        The optimizer that gave the mode ("start" if all failed to improve).
    message : str
        What happened, for the report.
    """

    mode: np.ndarray
    log_density: float
    hessian: np.ndarray | None
    laplace_covariance: np.ndarray | None
    method: str
    message: str


#: A mode search has run away when the log-density rises this far above its
#: value at the start while an unbounded parameter is ``RUNAWAY_FAR`` of its
#: scales from the start (a start in the far tail of a tight posterior may lie
#: 1e6 nats below the mode, but not thousands of scales away from it)...
RUNAWAY_RISE = 1e6
RUNAWAY_FAR = 1e3
#: ... or when an unbounded parameter moves this many of its scales from the start;
#: either way only when the log-density rises further still as those parameters move as far again.
RUNAWAY_DISTANCE = 1e8


class _RanAway(Exception):
    """Raised inside the optimizer's objective to stop a search that runs away (not a ValueError, which is caught)."""

    def __init__(self, point: np.ndarray):
        super().__init__("ran away")
        self.point = point


class _Objective:
    """Negative log-density that maps non-finite values to a large penalty and stops a runaway search."""

    def __init__(self, evaluate, penalty: float, start: np.ndarray, start_value: float, scales: np.ndarray,
                 bounds: np.ndarray, evaluate_batch=None):
        self.evaluate = evaluate
        self.evaluate_batch = evaluate_batch if evaluate_batch is not None else one_at_a_time(evaluate)
        self.penalty = penalty
        self.calls = 0
        self.start, self.start_value, self.scales = start, start_value, scales
        self.unbounded = ~np.all(np.isfinite(bounds), axis=1)

    def __call__(self, x: np.ndarray) -> float:
        self.calls += 1
        value = self.evaluate(x)
        self._check(x, value)
        return -value if np.isfinite(value) else self.penalty

    def many(self, points: np.ndarray) -> np.ndarray:
        """The objective at each row of ``points`` (n, d), evaluated in blocks of batches."""
        d = points.shape[1]
        values = in_blocks(self.evaluate_batch, points.shape[0], d, lambda lo, hi: points[lo:hi])
        self.calls += points.shape[0]
        for x, value in zip(points, values):
            self._check(x, value)
        return np.where(np.isfinite(values), -values, self.penalty)

    def gradient_map(self, scales: np.ndarray):
        """A map-like for scipy's ``workers``: the objective in ``theta / scales`` at all of a finite-difference
        gradient's points in one call (``fun`` is the same objective wrapped by scipy, not called)."""

        def evaluate_all(fun, iterable):
            points = np.array([np.asarray(z, dtype=float) for z in iterable])
            return [np.atleast_1d(value) for value in self.many(points * scales)] if points.size else []

        return evaluate_all

    def _check(self, x: np.ndarray, value: float) -> None:
        if not np.isfinite(value):
            return
        moved = np.where(self.unbounded, np.abs(x - self.start) / self.scales, 0.0)
        distance = np.max(moved, initial=0.0)
        risen = value > self.start_value + RUNAWAY_RISE
        if (risen and distance > RUNAWAY_FAR) or distance > RUNAWAY_DISTANCE:
            # Confirmed only if the log-density still rises when the far parameters move as far again:
            # an optimizer's wild trial step from a poor start can be far out and above the start's
            # value for the sake of the other parameters, without the density growing out there.
            far = moved >= 1e-3 * distance
            further = np.array(x, dtype=float)
            further[far] += x[far] - self.start[far]
            self.calls += 1
            beyond = self.evaluate(further)
            if np.isfinite(beyond) and beyond > value:
                raise _RanAway(np.array(x, dtype=float))


def ran_away(point: np.ndarray, start: np.ndarray, scales: np.ndarray, names) -> str:
    """A one-line message naming the parameters a runaway mode search moved furthest (in their scales).

    Parameters
    ----------
    point, start, scales : ndarray of shape (d,)
        Where the search was stopped, where it began, and the rough scale per parameter.
    names : list of str or None
    """
    distance = np.abs(point - start) / scales
    names = names if names is not None else [f"theta[{i}]" for i in range(start.shape[0])]
    # The parameters that moved at least a thousandth as far as the furthest: the direction of the runaway.
    which = [names[i] for i in np.flatnonzero(distance >= 1e-3 * distance.max())] if distance.max() > 0 else list(names)
    where = ", ".join(f"{names[i]}={point[i]:.3g}" for i in range(len(names)) if names[i] in which)
    return (
        f"the mode search ran away: the log-density keeps increasing as {', '.join(which)} "
        f"{'move' if len(which) > 1 else 'moves'} away without bound (stopped at {where}), "
        f"so the posterior is not proper; add a prior for {', '.join(which)} (PRIOR or LOG_PRIOR in the model file, "
        "prior= in Python) or bounds (--bound NAME=LOW:HIGH)."
    )


def _steps(point: np.ndarray, scales: np.ndarray) -> np.ndarray:
    return FD_STEP * np.maximum(np.abs(point), scales)


def one_at_a_time(evaluate):
    """A batch evaluator ``(n, d) -> (n,)`` from a one-point one, for callers that have no batch evaluator."""
    return lambda points: np.array([evaluate(x) for x in points], dtype=float)


def in_blocks(evaluate_batch, count: int, dim: int, make_points) -> np.ndarray:
    """Values at ``count`` points built block by block: ``make_points(lo, hi)`` gives rows ``lo:hi``.

    Each block holds at most :data:`FD_BLOCK_BYTES` of points, so memory stays
    bounded at any dimension; a stop request is honoured between blocks.
    """
    rows = max(1, FD_BLOCK_BYTES // (8 * dim))
    values = np.empty(count)
    for lo in range(0, count, rows):
        if lo:
            stop_point()
        hi = min(count, lo + rows)
        values[lo:hi] = evaluate_batch(make_points(lo, hi))
    return values


#: The four corners of a mixed second difference, in the order (+,+), (+,-), (-,+), (-,-).
_CORNERS = np.array([[1.0, 1.0], [1.0, -1.0], [-1.0, 1.0], [-1.0, -1.0]])


def _axis_points(point: np.ndarray, h: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Rows ``lo:hi`` of ``point +- h_i e_i`` in the order (0, +), (0, -), (1, +), ..."""
    k = np.arange(lo, hi)
    axis, sign = k // 2, np.where(k % 2 == 0, 1.0, -1.0)
    x = np.repeat(point[None, :], k.size, axis=0)
    x[np.arange(k.size), axis] += sign * h[axis]
    return x


def _pair_points(point: np.ndarray, h: np.ndarray, first: np.ndarray, second: np.ndarray, lo: int,
                 hi: int) -> np.ndarray:
    """Rows ``lo:hi`` of the corners ``point + s h_i e_i + t h_j e_j`` of the pairs ``(first, second)``, 4 per pair."""
    k = np.arange(lo, hi)
    pair, corner = k // 4, k % 4
    i, j = first[pair], second[pair]
    x = np.repeat(point[None, :], k.size, axis=0)
    rows = np.arange(k.size)
    x[rows, i] += _CORNERS[corner, 0] * h[i]
    x[rows, j] += _CORNERS[corner, 1] * h[j]
    return x


def finite_difference_hessian(evaluate, point: np.ndarray, scales: np.ndarray, bounds=None, with_gradient=False,
                              evaluate_batch=None):
    """Central-difference Hessian of ``evaluate`` at ``point`` (2 d^2 + 1 evaluations).

    Steps are ``1e-4 * max(|x_i|, scale_i)``, kept inside ``bounds``. Returns
    None if any evaluation is not finite. With ``with_gradient``, returns
    ``(hessian, gradient)``; the central-difference gradient reuses the
    Hessian's evaluations.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(theta) -> float`` for one point of shape (d,): the centre.
    point, scales : ndarray of shape (d,)
    bounds : ndarray of shape (d, 2), optional
    with_gradient : bool
    evaluate_batch : callable, optional
        ``evaluate_batch(points) -> values`` for points of shape (n, d), the
        same function as ``evaluate``; the ``2 d^2`` shifted points go to it
        in blocks (:func:`in_blocks`): first ``x +- h_i e_i`` for each ``i``,
        then the four corners ``x + s h_i e_i + t h_j e_j`` of each pair
        ``j < i`` (``i`` outer). Default: ``evaluate`` one point at a time.
    """
    failed = (None, None) if with_gradient else None
    d = point.shape[0]
    h = _steps(point, scales)
    if bounds is not None:
        room = np.minimum(point - bounds[:, 0], bounds[:, 1] - point)
        h = np.minimum(h, 0.5 * room)
        if np.any(h <= 0):
            return failed
    f0 = evaluate(point)
    if not np.isfinite(f0):
        return failed
    batch = evaluate_batch if evaluate_batch is not None else one_at_a_time(evaluate)
    axis = in_blocks(batch, 2 * d, d, lambda lo, hi: _axis_points(point, h, lo, hi)).reshape(d, 2)
    first, second = np.tril_indices(d, -1)  # (i, j), j < i, with i outer
    corners = in_blocks(batch, 4 * first.size, d,
                        lambda lo, hi: _pair_points(point, h, first, second, lo, hi)).reshape(-1, 4)
    hess = np.empty((d, d))
    plus, minus = axis[:, 0], axis[:, 1]
    hess[np.arange(d), np.arange(d)] = (plus - 2 * f0 + minus) / h**2
    gradient = (plus - minus) / (2 * h)
    mixed = (corners[:, 0] - corners[:, 1] - corners[:, 2] + corners[:, 3]) / (4 * h[first] * h[second])
    hess[first, second] = mixed
    hess[second, first] = mixed
    if not np.all(np.isfinite(hess)):
        return failed
    return (hess, gradient) if with_gradient else hess


def laplace_covariance(hessian: np.ndarray | None) -> np.ndarray | None:
    """``(-H)^{-1}`` when ``-H`` is positive definite, else None."""
    if hessian is None:
        return None
    precision = -0.5 * (hessian + hessian.T)
    try:
        chol = np.linalg.cholesky(precision)
    except np.linalg.LinAlgError:
        return None
    inverse = np.linalg.inv(chol)
    cov = inverse.T @ inverse
    return 0.5 * (cov + cov.T)


#: Hessians the mode search takes at most: one at the optimizer's point and one after each of two Newton steps.
MAX_HESSIANS = 3


def hessians_affordable(dim: int, evaluations: int) -> int:
    """How many finite-difference Hessians (``2 d^2 + 1`` evaluations each, up to :data:`MAX_HESSIANS`) fit in
    ``evaluations``."""
    return int(min(MAX_HESSIANS, max(0, evaluations) // (2 * dim * dim + 1)))


def find_mode(evaluate, start: np.ndarray, bounds: np.ndarray, scales: np.ndarray, max_evaluations: int,
              names=None, evaluate_batch=None, hessians: int | None = None) -> ModeFit:
    """Maximise ``evaluate`` from ``start`` and estimate the Hessian there.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(theta) -> float`` log-density (may return -inf).
    start : ndarray of shape (d,)
    bounds : ndarray of shape (d, 2)
        Lower and upper bounds; infinite where unbounded.
    scales : ndarray of shape (d,)
        A rough scale per parameter, for step sizes.
    max_evaluations : int
        Evaluations the optimizers may spend (the Hessian comes on top).
    names : list of str, optional
        Parameter names, for the error when the search runs away.
    evaluate_batch : callable, optional
        ``evaluate_batch(points) -> values`` for points of shape (n, d): the
        same log-density for many points at once (non-finite as -inf). The
        finite differences (L-BFGS-B's gradient, the Hessian) go through it.
        Default: ``evaluate`` one point at a time.
    hessians : int, optional
        Finite-difference Hessians the search may take (:func:`hessians_affordable`):
        0 for none (no Laplace covariance), 1 for the one at the optimizer's
        point, up to 3 with the Newton polish. Default: 3 when ``d <= 200``, else 0.

    Raises
    ------
    walktune.errors.TargetError
        When the search runs away (``RUNAWAY_RISE``, ``RUNAWAY_DISTANCE``): the log-density has no maximum.
    """
    start_value = evaluate(start)
    penalty = abs(start_value) * 10 + 1e10
    objective = _Objective(evaluate, penalty, start, start_value, scales, bounds, evaluate_batch)
    try:
        best_x, best_f, method, notes = _optimize(objective, start, start_value, bounds, scales, max_evaluations)
    except _RanAway as stop:
        from .errors import TargetError

        raise TargetError(ran_away(stop.point, start, scales, names)) from None
    if hessians is None:
        hessians = MAX_HESSIANS if start.shape[0] <= 200 else 0
    return _polish(evaluate, best_x, best_f, method, notes, bounds, scales, evaluate_batch, hessians)


def _optimize(objective, start, start_value, bounds, scales, max_evaluations):
    """L-BFGS-B, then Nelder-Mead and Powell when it fails; returns (x, -log-density, method, notes)."""
    finite_bounds = [(None if np.isinf(lo) else lo, None if np.isinf(hi) else hi) for lo, hi in bounds]
    best_x, best_f, method, notes = start.copy(), -start_value, "start", []
    # The optimizers work on theta / scales so that every parameter is of order one.
    scaled_bounds = [
        (None if lo is None else lo / s, None if hi is None else hi / s) for (lo, hi), s in zip(finite_bounds, scales)
    ]
    lbfgsb = {"maxfun": max_evaluations, "eps": 1e-7}
    if LBFGSB_WORKERS:
        lbfgsb["workers"] = objective.gradient_map(scales)
    attempts = [
        ("L-BFGS-B", lbfgsb),
        ("Nelder-Mead", {"xatol": 1e-8, "fatol": 1e-10}),
        ("Powell", {}),
    ]
    for name, options in attempts:
        remaining = max_evaluations - objective.calls
        if remaining < 10 * (start.shape[0] + 1):
            notes.append(f"no budget left for {name}")
            break
        if name != "L-BFGS-B":
            options = dict(options, maxfev=remaining)
        try:
            result = optimize.minimize(
                lambda z: objective(z * scales), best_x / scales, method=name, bounds=scaled_bounds, options=options
            )
            x = result.x * scales
            f = objective(x)
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as error:
            notes.append(f"{name} failed: {error}")
            continue
        improved = f < best_f
        if improved:
            best_x, best_f, method = x, f, name
        if result.success:
            break
        notes.append(f"{name}: {result.message}")
        # An optimizer that improved but ran out of evaluations is left to the
        # Newton polish below; fallbacks are for ones that failed outright.
        if improved:
            break
    return best_x, best_f, method, notes


def _polish(evaluate, best_x, best_f, method, notes, bounds, scales, evaluate_batch, hessians: int) -> ModeFit:
    """The Hessian at the optimizer's point, then up to two Newton steps kept only if they improve.

    At most ``hessians`` Hessians in all: a Newton step kept after the last
    one the budget allows keeps the Hessian of the point before it.
    """
    hessian, gradient = (None, None)
    if hessians > 0:
        hessian, gradient = finite_difference_hessian(evaluate, best_x, scales, bounds, with_gradient=True,
                                                      evaluate_batch=evaluate_batch)
    cov = laplace_covariance(hessian)
    # Newton polish: where the Hessian is negative definite, one Newton step
    # from an optimizer's stopping point lands on the mode of a near-quadratic
    # log-density (exactly, for a Gaussian). Kept only if it improves.
    for step in range(2):
        if cov is None or gradient is None:
            break
        candidate = best_x + cov @ gradient
        inside = np.all((candidate > bounds[:, 0]) & (candidate < bounds[:, 1]))
        value = evaluate(candidate) if inside else -np.inf
        if not (np.isfinite(value) and -value < best_f - 1e-12 * max(1.0, abs(best_f))):
            break
        best_x, best_f = candidate, -value
        notes.append("Newton polish")
        if step + 2 > hessians:
            break
        new_hessian, new_gradient = finite_difference_hessian(evaluate, best_x, scales, bounds, with_gradient=True,
                                                              evaluate_batch=evaluate_batch)
        new_cov = laplace_covariance(new_hessian)
        if new_cov is None:
            break
        hessian, gradient, cov = new_hessian, new_gradient, new_cov
    message = f"mode by {method}" + (f" ({'; '.join(notes)})" if notes else "")
    if hessians <= 0:
        d = best_x.shape[0]
        message += f"; no Hessian taken (it would cost {2 * d * d + 1:,} evaluations), so no Laplace covariance"
    elif cov is None:
        message += "; the Hessian there is not negative definite, so no Laplace covariance"
    return ModeFit(best_x, -best_f, hessian, cov, method, message)
