"""Evaluation of the user's log-density on a batch of points.

The engine hands every batch of proposed points to one evaluator call; this is
the single seam through which evaluations may be sent elsewhere (other
processes, other machines). An evaluator returns one float per point and a
description of any exception raised at a point; it never decides acceptance
and never draws random numbers, so results do not depend on where the
evaluations ran.
"""

from __future__ import annotations

import traceback
from dataclasses import dataclass, field
from typing import Callable

import numpy as np


@dataclass
class BatchResult:
    """Values of the log-density at a batch of points.

    Attributes
    ----------
    values : ndarray of shape (n_points,)
        The log-density; NaN where the function raised an exception.
    errors : dict of int to str
        For each point whose evaluation raised, the formatted traceback.
    """

    values: np.ndarray
    errors: dict = field(default_factory=dict)


def _to_scalar(value) -> float:
    array = np.asarray(value, dtype=float)
    if array.size != 1:
        raise TypeError(f"the log-density must return one number per point; it returned shape {array.shape}")
    return float(array.reshape(()))


class InProcessEvaluator:
    """Evaluate in this process: one call per point, or one call per batch.

    Parameters
    ----------
    log_density : callable
        ``log_density(theta)`` with ``theta`` of shape (d,) returning a float,
        or, when ``vectorized`` is true, ``log_density(points)`` with points of
        shape (n, d) returning shape (n,).
    vectorized : bool, default=False
        Whether the function takes a whole batch at once.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False):
        self.log_density = log_density
        self.vectorized = vectorized

    def _one(self, point: np.ndarray) -> float:
        return _to_scalar(self.log_density(point))

    def __call__(self, points: np.ndarray) -> BatchResult:
        if self.vectorized:
            try:
                values = np.asarray(self.log_density(points), dtype=float).reshape(-1)
                if values.shape[0] != points.shape[0]:
                    raise TypeError(
                        f"a vectorized log-density must return shape ({points.shape[0]},) for "
                        f"{points.shape[0]} points; it returned {values.shape[0]} values"
                    )
                return BatchResult(values)
            except Exception:
                # Find which points fail by evaluating them one at a time.
                return self._pointwise(points, lambda p: _to_scalar(self.log_density(p[None, :])))
        return self._pointwise(points, self._one)

    @staticmethod
    def _pointwise(points: np.ndarray, evaluate: Callable) -> BatchResult:
        values = np.empty(points.shape[0])
        errors = {}
        for i, point in enumerate(points):
            try:
                values[i] = evaluate(point)
            except Exception:
                values[i] = np.nan
                errors[i] = traceback.format_exc()
        return BatchResult(values, errors)

    def close(self) -> None:
        """Release resources (none for in-process evaluation)."""
