"""Evaluation of the user's log-density on a batch of points.

The engine hands every batch of proposed points to one evaluator call; this is
the single seam through which evaluations may be sent elsewhere (other
processes, other machines). An evaluator returns one float per point and a
description of any exception raised at a point; it never decides acceptance
and never draws random numbers, so results do not depend on where the
evaluations ran.
"""

from __future__ import annotations

import sys
import time
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
    busy_seconds : float
        Seconds the workers spent evaluating, summed over workers (0 for
        in-process evaluation, where the caller's wall time is the measure).
    """

    values: np.ndarray
    errors: dict = field(default_factory=dict)
    busy_seconds: float = 0.0


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


def _evaluate_chunk(log_density: Callable, vectorized: bool, points: np.ndarray) -> BatchResult:
    """Run in a worker: evaluate a chunk of points as the in-process evaluator would, timing it."""
    t0 = time.perf_counter()
    result = InProcessEvaluator(log_density, vectorized)(points)
    result.busy_seconds = time.perf_counter() - t0
    return result


def _worker_setup() -> None:
    """In a pool worker: leave Ctrl-C to the driver, which stops the job cleanly at the next step."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _chunks(n_points: int, parts: int) -> list:
    """Split range(n_points) into ``parts`` contiguous pieces of near-equal size (no empty piece)."""
    parts = max(1, min(parts, n_points))
    edges = np.linspace(0, n_points, parts + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def _merge(n_points: int, pieces: list) -> BatchResult:
    values = np.empty(n_points)
    errors = {}
    busy = 0.0
    for (start, _), result in pieces:
        values[start : start + result.values.shape[0]] = result.values
        errors.update({start + k: v for k, v in result.errors.items()})
        busy += result.busy_seconds
    return BatchResult(values, errors, busy)


class ProcessPoolEvaluator:
    """Evaluate a batch on a pool of local worker processes, one chunk per worker.

    The function is sent to the workers by pickling; on Linux the pool forks,
    so a function from a model file (registered in ``sys.modules`` when
    loaded) reaches the workers as it is. A worker that dies mid-batch breaks
    the pool: it is rebuilt and the batch evaluated again, up to ``retries``
    times, then a :class:`~walktune.errors.SamplingError` says so.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False, workers: int = 2, retries: int = 2):
        from concurrent.futures import ProcessPoolExecutor  # noqa: F401  (checked here, used below)

        if not isinstance(workers, int) or workers < 1:
            from .errors import WalktuneError

            raise WalktuneError(f"`workers` must be a whole number >= 1; got {workers!r}.")
        self.log_density = log_density
        self.vectorized = vectorized
        self.workers = workers
        self.retries = retries
        self._pool = None

    @property
    def parallelism(self) -> int:
        return self.workers

    def _executor(self):
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        if self._pool is None:
            method = "fork" if "fork" in multiprocessing.get_all_start_methods() else None
            context = multiprocessing.get_context(method) if method else None
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=context, initializer=_worker_setup)
        return self._pool

    def __call__(self, points: np.ndarray) -> BatchResult:
        from concurrent.futures.process import BrokenProcessPool

        from .errors import SamplingError

        pieces = _chunks(points.shape[0], self.workers)
        for attempt in range(self.retries + 1):
            try:
                futures = [
                    self._executor().submit(_evaluate_chunk, self.log_density, self.vectorized, points[a:b]) for a, b in pieces
                ]
                results = [f.result() for f in futures]
            except BrokenProcessPool:
                self._pool = None  # a worker died: rebuild the pool and evaluate the batch again
                if attempt == self.retries:
                    raise SamplingError(
                        f"worker processes died {self.retries + 1} times evaluating one batch; the log-density may "
                        "crash the interpreter (e.g. run out of memory). Run with --workers 1 to see its error."
                    ) from None
                continue
            return _merge(points.shape[0], list(zip(pieces, results)))
        raise AssertionError("unreachable")

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class DaskEvaluator:
    """Evaluate a batch on a Dask cluster (``walktune[cluster]``), one chunk per worker thread.

    ``address`` is a scheduler address (``tcp://host:8786``) or ``local:N``
    to start a LocalCluster of N worker processes on this machine. The
    function is shipped with cloudpickle; functions from a walktune-loaded
    model file are pickled by value, so the workers need not import the file.
    Random numbers never leave the driver, so results are the same bit for bit
    as in-process. A task lost with its worker is recomputed by Dask on
    another worker.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False, address: str = "local:2", timeout: float = 5.0):
        from .errors import WalktuneError

        try:
            import cloudpickle
            from distributed import Client, LocalCluster
        except ImportError:
            raise WalktuneError("Dask is not installed; install walktune[cluster] (pip install 'walktune[cluster]').") from None
        module = sys.modules.get(getattr(log_density, "__module__", "") or "")
        if module is not None and module.__name__.startswith("walktune_model_"):
            cloudpickle.register_pickle_by_value(module)
        self.log_density = log_density
        self.vectorized = vectorized
        self._cluster = None
        if address.startswith("local:"):
            try:
                n = int(address.split(":", 1)[1])
            except ValueError:
                raise WalktuneError(f"--dask {address!r}: after 'local:' give the number of workers, e.g. local:4.") from None
            if n < 1:
                raise WalktuneError(f"--dask {address!r}: the number of workers must be at least 1.")
            self._cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None,
                                         host="127.0.0.1")
            self.client = Client(self._cluster)
        else:
            try:
                self.client = Client(address, timeout=timeout)
            except (OSError, TimeoutError) as error:
                raise WalktuneError(
                    f"no Dask scheduler answered at {address} within {timeout:g} s ({type(error).__name__}); "
                    "check the address and that the scheduler is running."
                ) from None
        self._remote_function = self.client.scatter(log_density, broadcast=True)

    @property
    def parallelism(self) -> int:
        return max(1, sum(self.client.nthreads().values()))

    def __call__(self, points: np.ndarray) -> BatchResult:
        pieces = _chunks(points.shape[0], self.parallelism)
        futures = [
            self.client.submit(_evaluate_chunk, self._remote_function, self.vectorized, points[a:b], pure=False)
            for a, b in pieces
        ]
        results = self.client.gather(futures)
        return _merge(points.shape[0], list(zip(pieces, results)))

    def close(self) -> None:
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()


def make_evaluator(log_density: Callable, vectorized: bool = False, workers: int | None = None, dask: str | None = None):
    """The evaluator for the command line's ``--workers`` / ``--dask`` options."""
    from .errors import WalktuneError

    if workers is not None and dask is not None:
        raise WalktuneError("give --workers or --dask, not both.")
    if dask is not None:
        return DaskEvaluator(log_density, vectorized, dask)
    if workers is not None:
        if workers < 1:
            raise WalktuneError(f"--workers must be at least 1; got {workers}.")
        if workers > 1:
            return ProcessPoolEvaluator(log_density, vectorized, workers)
    return InProcessEvaluator(log_density, vectorized)
