"""Evaluation of the user's log-density on a batch of points.

The engine hands every batch of proposed points to one evaluator call; this is
the single seam through which evaluations may be sent elsewhere (other
processes, other machines). An evaluator returns one float per point and a
description of any exception raised at a point; it never decides acceptance
and never draws random numbers, so results do not depend on where the
evaluations ran.
"""

from __future__ import annotations

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


def _refuse_non_numeric(value) -> None:
    """Raise TypeError, naming what came back, when a log-density returned text or another non-number.

    ``np.asarray(value, dtype=float)`` alone would turn the string "1.5" into 1.5.
    """
    if isinstance(value, (str, bytes)):
        raise TypeError(f"the log-density returned a {type(value).__name__} ({value!r:.40}) instead of a number")
    array = np.asarray(value)
    kind = array.dtype.kind
    if kind in "USV" or (kind == "O" and any(isinstance(v, (str, bytes)) for v in array.reshape(-1))):
        raise TypeError(
            f"the log-density returned text ({type(value).__name__} {str(value)!r:.40}) instead of numbers"
        )
    if kind not in "iufO":
        raise TypeError(f"the log-density returned a {type(value).__name__} of dtype {array.dtype} instead of a number")


def _to_scalar(value) -> float:
    if value is None:
        raise TypeError("the log-density returned None instead of a number (is a return statement missing?)")
    _refuse_non_numeric(value)
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise TypeError(f"the log-density returned a {type(value).__name__} instead of a number") from None
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
        try:
            return self._evaluate(points)
        except SystemExit as exit_:
            from .errors import TargetError

            raise TargetError(
                f"the model exited (it called sys.exit({exit_.code!r}) or raised SystemExit) while evaluating the "
                "log-density; a log-density must return a number (-inf outside the support), not exit."
            ) from None

    def _evaluate(self, points: np.ndarray) -> BatchResult:
        if self.vectorized:
            try:
                raw = self.log_density(points)
                if raw is None:
                    raise TypeError("the log-density returned None instead of an array of numbers")
                _refuse_non_numeric(raw)
                values = np.asarray(raw, dtype=float).reshape(-1)
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


#: How a timed-out evaluation is described in ``BatchResult.errors``; counted by the tuning job.
TIMEOUT_PREFIX = "EvaluationTimeout:"


def timeout_message(limit: float, detail: str = "") -> str:
    return f"{TIMEOUT_PREFIX} the log-density did not return within {limit:g} s{detail}"


class EvaluationTimeout(BaseException):
    """Raised inside a worker's evaluation by the alarm; a BaseException so the user's ``except Exception`` lets it by."""


def _on_alarm(signum, frame):
    raise EvaluationTimeout()


def _evaluate_limited(log_density: Callable, vectorized: bool, points: np.ndarray, limit: float) -> BatchResult:
    """Evaluate point by point, each under a SIGALRM timer of ``limit`` seconds (a worker's main thread only)."""
    import signal

    evaluator = InProcessEvaluator(log_density, vectorized)
    values = np.empty(points.shape[0])
    errors = {}
    previous = signal.signal(signal.SIGALRM, _on_alarm)
    try:
        for i in range(points.shape[0]):
            try:
                signal.setitimer(signal.ITIMER_REAL, limit)
                one = evaluator(points[i : i + 1])
                signal.setitimer(signal.ITIMER_REAL, 0)
                values[i] = one.values[0]
                if one.errors:
                    errors[i] = one.errors[0]
            except EvaluationTimeout:
                values[i] = np.nan
                errors[i] = timeout_message(limit)
            finally:
                signal.setitimer(signal.ITIMER_REAL, 0)
    finally:
        signal.signal(signal.SIGALRM, previous)
    return BatchResult(values, errors)


def _evaluate_chunk(log_density: Callable, vectorized: bool, points: np.ndarray, limit: float | None = None) -> BatchResult:
    """Run in a worker: evaluate a chunk of points as the in-process evaluator would, timing it."""
    t0 = time.perf_counter()
    if limit is None:
        result = InProcessEvaluator(log_density, vectorized)(points)
    else:
        result = _evaluate_limited(log_density, vectorized, points, limit)
    result.busy_seconds = time.perf_counter() - t0
    return result


def _timed_out(n_points: int, limit: float, detail: str) -> BatchResult:
    """A chunk whose worker was stopped: every point counts as timed out."""
    return BatchResult(np.full(n_points, np.nan), {i: timeout_message(limit, detail) for i in range(n_points)})


def _check_shippable(function: Callable, how: str) -> None:
    """Refuse, in one line, a function that cannot be pickled for the workers."""
    import pickle

    dumps = pickle.dumps
    if how == "cloudpickle":
        import cloudpickle

        dumps = cloudpickle.dumps
    try:
        dumps(function)
    except Exception as error:  # noqa: BLE001 - pickling raises many kinds of errors
        from .errors import WalktuneError

        raise WalktuneError(
            f"the log-density cannot be sent to worker processes ({type(error).__name__}: {error}); define it at the "
            "top level of a model file, and keep open files, locks and connections out of what it refers to "
            "(open them inside the function), or run without --workers/--dask."
        ) from None


def _check_limit(limit) -> float | None:
    if limit is None:
        return None
    if not isinstance(limit, (int, float)) or not np.isfinite(limit) or limit <= 0:
        from .errors import WalktuneError

        raise WalktuneError(f"the time limit must be a positive number of seconds; got {limit!r}.")
    return float(limit)


def _worker_setup() -> None:
    """In a pool worker: leave Ctrl-C to the driver, which stops the job cleanly at the next step, and
    let SIGTERM end the worker as usual (a forked worker would otherwise inherit the driver's handler)."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


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


class ThreadPoolEvaluator:
    """Evaluate a batch on threads of this process, one chunk per thread.

    Helps only a log-density that releases the GIL for most of its time
    (compiled code, large numpy or scipy operations, I/O); Python code holding
    the GIL runs no faster than in-process. Costs far less per batch than
    processes, and needs no pickling. A running evaluation cannot be stopped in
    its thread, so there is no time limit here.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False, threads: int = 2):
        from concurrent.futures import ThreadPoolExecutor

        if not isinstance(threads, int) or threads < 1:
            from .errors import WalktuneError

            raise WalktuneError(f"`threads` must be a whole number >= 1; got {threads!r}.")
        self.log_density = log_density
        self.vectorized = vectorized
        self.threads = threads
        self._pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="walktune-eval")

    @property
    def parallelism(self) -> int:
        return self.threads

    def __call__(self, points: np.ndarray) -> BatchResult:
        pieces = _chunks(points.shape[0], self.threads)
        futures = [self._pool.submit(_evaluate_chunk, self.log_density, self.vectorized, points[a:b]) for a, b in pieces]
        return _merge(points.shape[0], list(zip(pieces, [f.result() for f in futures])))

    def close(self) -> None:
        self._pool.shutdown(wait=True)


def _worker_main(conn, log_density: Callable, vectorized: bool, limit: float | None) -> None:
    """A pool worker's loop: receive a chunk, evaluate it, send back (values, errors, busy seconds)."""
    _worker_setup()
    while True:
        try:
            points = conn.recv()
        except (EOFError, OSError):
            return  # the driver is gone
        if points is None:
            return
        try:
            result = _evaluate_chunk(log_density, vectorized, points, limit)
        except ValueError as error:  # a WalktuneError: the model exited; the driver stops the job with it
            conn.send(("error", str(error)))
            continue
        conn.send((result.values, result.errors, result.busy_seconds))


class _PoolWorker:
    """One worker process and the driver's end of its pipe."""

    def __init__(self, context, log_density, vectorized, limit):
        self.conn, child = context.Pipe()
        self.process = context.Process(target=_worker_main, args=(child, log_density, vectorized, limit), daemon=True)
        self.process.start()
        child.close()

    def stop(self, kill: bool = False) -> None:
        if not kill:
            try:
                self.conn.send(None)
                self.process.join(timeout=2)
            except (OSError, ValueError):
                pass
        if self.process.is_alive():
            self.process.kill()
            self.process.join(timeout=5)
        self.conn.close()


class ProcessPoolEvaluator:
    """Evaluate a batch on local worker processes, one chunk per worker, each over its own pipe.

    On Linux the workers are forked, so the function reaches them as it is,
    without pickling (elsewhere it is pickled). A plain pipe per worker costs
    about a third of :class:`concurrent.futures.ProcessPoolExecutor`'s overhead
    per batch (docs/benchmarks.md) and tells exactly which worker holds which
    chunk: a worker that dies mid-batch is replaced and its chunk sent again,
    up to ``retries`` times per batch, then a
    :class:`~walktune.errors.SamplingError` says so.

    With ``time_limit`` (seconds per evaluation) each evaluation runs under a
    SIGALRM timer in its worker: Python code, sleeps and most blocking calls
    are stopped there and the point counts as a failed evaluation. Code that
    never returns to the interpreter cannot be stopped that way; when a chunk is
    still out ``time_limit`` per point plus a grace period later, its worker is
    killed and replaced, and the chunk evaluated again one point at a time
    under the same deadline, so that only the late points count as timed out.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False, workers: int = 2, retries: int = 2,
                 time_limit: float | None = None):
        import multiprocessing

        if not isinstance(workers, int) or workers < 1:
            from .errors import WalktuneError

            raise WalktuneError(f"`workers` must be a whole number >= 1; got {workers!r}.")
        method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
        if method != "fork":
            _check_shippable(log_density, "pickle")
        self._context = multiprocessing.get_context(method)
        self.log_density = log_density
        self.vectorized = vectorized
        self.workers = workers
        self.retries = retries
        self.time_limit = _check_limit(time_limit)
        self._pool: list | None = None

    @property
    def parallelism(self) -> int:
        return self.workers

    def _worker(self, k: int) -> _PoolWorker:
        if self._pool is None:
            self._pool = [None] * self.workers
        if self._pool[k] is None:
            self._pool[k] = _PoolWorker(self._context, self.log_density, self.vectorized, self.time_limit)
        return self._pool[k]

    def _replace(self, k: int) -> None:
        """Stop worker k for good (it died or hangs); a fresh one is forked when next needed."""
        self._pool[k].stop(kill=True)
        self._pool[k] = None

    def __call__(self, points: np.ndarray) -> BatchResult:
        pieces = _chunks(points.shape[0], self.workers)
        results = self._run({k: points[a:b] for k, (a, b) in enumerate(pieces)})
        late = [k for k, r in results.items() if r is None]
        for k in late:
            # Uninterruptible code: find the late point by sending the chunk's points one at a time.
            a, b = pieces[k]
            detail = " and did not answer the alarm; its worker was stopped"
            singles = [self._run({k: points[i : i + 1]})[k] for i in range(a, b)]
            results[k] = _merge(b - a, [
                ((i, i + 1), r if r is not None else _timed_out(1, self.time_limit, detail)) for i, r in enumerate(singles)
            ])
        return _merge(points.shape[0], [(pieces[k], results[k]) for k in range(len(pieces))])

    def _run(self, chunks: dict) -> dict:
        """Evaluate chunk k on worker k; a late chunk (time limit) comes back as None."""
        from multiprocessing.connection import wait

        from .errors import SamplingError

        results, deaths, deadline = {}, 0, {}
        for k, chunk in chunks.items():
            self._send(k, chunk, deadline)
        while len(results) < len(chunks):
            waiting = {self._pool[k].conn: k for k in chunks if k not in results}
            timeout = None
            if deadline:
                timeout = max(0.0, min(deadline[k] for k in waiting.values()) - time.monotonic())
            for conn in wait(list(waiting), timeout=timeout):
                k = waiting[conn]
                try:
                    reply = conn.recv()
                except (EOFError, OSError):
                    # The worker died mid-chunk: replace it and send the chunk again.
                    deaths += 1
                    self._replace(k)
                    if deaths > self.retries:
                        raise SamplingError(
                            f"worker processes died {deaths} times evaluating one batch; the log-density may crash "
                            "the interpreter (e.g. run out of memory). Run with --workers 1 to see its error."
                        ) from None
                    self._send(k, chunks[k], deadline)
                    continue
                if len(reply) == 2:
                    from .errors import TargetError

                    raise TargetError(reply[1])
                results[k] = BatchResult(*reply)
            now = time.monotonic()
            for k in [k for k in waiting.values() if k not in results and k in deadline and deadline[k] <= now]:
                self._replace(k)
                results[k] = None
        return results

    def _send(self, k: int, chunk: np.ndarray, deadline: dict) -> None:
        try:
            self._worker(k).conn.send(chunk)
        except (OSError, ValueError):  # the worker died between batches
            self._replace(k)
            self._worker(k).conn.send(chunk)
        if self.time_limit is not None:
            deadline[k] = time.monotonic() + self.time_limit * chunk.shape[0] + max(2.0, self.time_limit)

    def close(self) -> None:
        for worker in self._pool or []:
            if worker is not None:
                worker.stop()
        self._pool = None


def make_evaluator(log_density: Callable, vectorized: bool = False, workers: int | None = None, dask: str | None = None,
                   time_limit: float | None = None, threads: int | None = None):
    """The evaluator for the command line's ``--workers`` / ``--threads`` / ``--dask`` / ``--time-limit`` options."""
    from .errors import WalktuneError

    if sum(option is not None for option in (workers, dask, threads)) > 1:
        raise WalktuneError("give one of --workers, --threads and --dask, not several.")
    _check_limit(time_limit)
    if threads is not None:
        if threads < 1:
            raise WalktuneError(f"--threads must be at least 1; got {threads}.")
        if time_limit is not None:
            raise WalktuneError("--time-limit needs --workers N or --dask: an evaluation in a thread cannot be stopped.")
        return ThreadPoolEvaluator(log_density, vectorized, threads)
    if dask is not None:
        from .dask_evaluator import DaskEvaluator

        return DaskEvaluator(log_density, vectorized, dask, time_limit=time_limit)
    if workers is not None:
        if workers < 1:
            raise WalktuneError(f"--workers must be at least 1; got {workers}.")
        if workers > 1 or time_limit is not None:
            return ProcessPoolEvaluator(log_density, vectorized, workers, time_limit=time_limit)
    if time_limit is not None:
        raise WalktuneError(
            "--time-limit needs --workers N or --dask: an evaluation running in this process cannot be stopped safely."
        )
    return InProcessEvaluator(log_density, vectorized)
