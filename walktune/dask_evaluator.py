"""Evaluation on a Dask cluster: one actor per worker process holds the function (``walktune[cluster]``).

A batch is cut into one chunk per worker and sent as a direct call to each
worker's actor (see :mod:`walktune.evaluators` for the seam and the other
evaluators).
"""

from __future__ import annotations

import sys
import time
from typing import Callable

import numpy as np

from .evaluators import BatchResult, _check_limit, _check_shippable, _chunks, _evaluate_chunk, _merge, _timed_out


#: Dask settings for the LocalCluster walktune starts (``--dask local:N``): no dashboard is shown, so the
#: statistical profiler and the monitors feeding it are turned off or slowed. On a small machine they
#: cost half a core for 16 idle workers, which the evaluations need.
LOCAL_CLUSTER_CONFIG = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.admin.system-monitor.gil.enabled": False,
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.admin.tick.interval": "1s",
}


class _WorkerEvaluator:
    """Lives on a Dask worker as an actor: holds the unpickled function and evaluates chunks sent to it."""

    def __init__(self, payload: bytes, vectorized: bool):
        import pickle

        self.log_density = pickle.loads(payload)
        self.vectorized = vectorized

    def evaluate(self, points: np.ndarray) -> BatchResult:
        return _evaluate_chunk(self.log_density, self.vectorized, points)


class DaskEvaluator:
    """Evaluate a batch on a Dask cluster (``walktune[cluster]``), one chunk per worker process.

    ``address`` is a scheduler address (``tcp://host:8786``) or ``local:N``
    to start a LocalCluster of N worker processes on this machine. The
    function is pickled once with cloudpickle (functions from a walktune-loaded
    model file by value, so the workers need not import the file) and held on
    each worker by a Dask actor; a batch is one direct call per worker, which
    costs a third of the latency of a scheduled task. Random numbers never leave
    the driver, so results are the same bit for bit as in-process.

    A worker lost mid-batch: the actors are started again on the workers there
    are (Dask's nannies restart lost workers) and the batch is evaluated again,
    up to ``retries`` times. With ``time_limit``, a chunk not back within
    ``time_limit`` per point (plus a second) counts as timed out and its worker
    is restarted, since a running evaluation cannot be stopped inside its thread.
    """

    def __init__(self, log_density: Callable, vectorized: bool = False, address: str = "local:2", timeout: float = 5.0,
                 time_limit: float | None = None, retries: int = 3):
        from .errors import WalktuneError

        self.time_limit = _check_limit(time_limit)
        try:
            import cloudpickle
            from distributed import Client, LocalCluster
        except ImportError:
            raise WalktuneError("Dask is not installed; install walktune[cluster] (pip install 'walktune[cluster]').") from None
        module = sys.modules.get(getattr(log_density, "__module__", "") or "")
        if module is not None and module.__name__.startswith("walktune_model_"):
            cloudpickle.register_pickle_by_value(module)
        _check_shippable(log_density, "cloudpickle")
        self.log_density = log_density
        self.vectorized = vectorized
        self.retries = retries
        self._payload = cloudpickle.dumps(log_density)
        self._cluster = None
        if address.startswith("local:"):
            try:
                n = int(address.split(":", 1)[1])
            except ValueError:
                raise WalktuneError(f"--dask {address!r}: after 'local:' give the number of workers, e.g. local:4.") from None
            if n < 1:
                raise WalktuneError(f"--dask {address!r}: the number of workers must be at least 1.")
            import dask

            with dask.config.set(LOCAL_CLUSTER_CONFIG):
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
        self._expected_workers = 0
        self._actors: list = []
        self._start_actors()

    def _start_actors(self) -> None:
        from .errors import WalktuneError

        try:
            self.client.wait_for_workers(max(1, self._expected_workers), timeout=30)
        except (TimeoutError, OSError):
            if not self.client.scheduler_info()["workers"]:
                raise WalktuneError("the Dask cluster has no workers; start some (dask worker ADDRESS).") from None
        workers = sorted(self.client.scheduler_info()["workers"])
        self._expected_workers = max(self._expected_workers, len(workers))
        futures = [
            self.client.submit(_WorkerEvaluator, self._payload, self.vectorized, workers=[w], allow_other_workers=False,
                               actor=True, pure=False)
            for w in workers
        ]
        self._actors = list(zip(workers, self.client.gather(futures)))
        self._actor_futures = futures  # keep the actors alive

    @property
    def parallelism(self) -> int:
        return max(1, len(self._actors))

    def __call__(self, points: np.ndarray) -> BatchResult:
        from .errors import SamplingError, WalktuneError

        for attempt in range(self.retries + 1):
            pieces = _chunks(points.shape[0], self.parallelism)
            calls = [actor.evaluate(points[a:b]) for (_, actor), (a, b) in zip(self._actors, pieces)]
            try:
                results = self._collect(calls, pieces)
            except WalktuneError:  # the model exited on a worker (see InProcessEvaluator)
                raise
            except Exception:  # noqa: BLE001 - a lost worker shows as many kinds of comm errors
                # The user's errors are caught on the worker; this is a worker or connection lost.
                if attempt == self.retries:
                    raise SamplingError(
                        f"Dask workers were lost {self.retries + 1} times evaluating one batch; the log-density may "
                        "crash the interpreter or run out of memory, or the cluster is failing. Run with --workers 1 "
                        "to see the log-density's own error."
                    ) from None
                self._start_actors()
                continue
            return _merge(points.shape[0], list(zip(pieces, results)))
        raise AssertionError("unreachable")

    def _collect(self, calls, pieces) -> list:
        if self.time_limit is None:
            return [call.result() for call in calls]
        deadline = time.monotonic() + self.time_limit * max(b - a for a, b in pieces) + 1.0
        results, late = [], []
        for k, call in enumerate(calls):
            try:
                results.append(call.result(timeout=max(0.0, deadline - time.monotonic())))
            except TimeoutError:
                results.append(None)
                late.append(self._actors[k][0])
        if late:
            # A running evaluation cannot be stopped in its thread; its worker process can be restarted.
            try:
                self.client.restart_workers(late)
            except Exception:  # noqa: BLE001 - workers without a nanny cannot be restarted; go on without them
                pass
            self._start_actors()
            detail = " on a Dask worker, which was restarted"
            results = [r if r is not None else _timed_out(b - a, self.time_limit, detail) for r, (a, b) in zip(results, pieces)]
        return results

    def close(self) -> None:
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()
