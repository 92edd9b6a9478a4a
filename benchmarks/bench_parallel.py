"""Speed of parallel and distributed evaluation, as ratios against the serial evaluator run here.

    python benchmarks/bench_parallel.py            # all four parts (about 4 minutes on 2 cores)
    python benchmarks/bench_parallel.py pilot      # or one part: pilot, scale, overhead, threads

(1) pilot: wall time of the adaptive pilot on a log-density that takes 10 ms
    (sleeping, or spinning the CPU), with 2 workers (process pool, and a Dask
    LocalCluster of 2 worker processes), against the serial evaluator, for 4
    and 8 chains; target: speed-up >= 1.7 on 2 cores.
(2) scale: 16 Dask workers on loopback, a log-density that sleeps 50 ms, 32
    chains: parallel efficiency = (evaluations x 50 ms / 16) / wall time;
    target >= 0.8.
(3) overhead: per-evaluation cost of each evaluator (and of checkpoint
    recording) on a 10 microsecond log-density with 4 chains, as a ratio of
    the in-process call.
(4) threads: whether threads help, on a 1 ms log-density that releases the GIL
    (SHA-256 of a buffer, which hashlib computes without the GIL) and on one that
    holds it (a Python loop): steps per second with 2 threads and 2 pool
    workers against in-process, 4 chains.
The same seed is used everywhere, and each parallel pilot is checked to give the
serial pilot's covariance bit for bit.
"""

from __future__ import annotations

import sys
import tempfile
import time

import numpy as np

from walktune.checkpoint import Checkpoint
from walktune.engine import sample
from walktune.dask_evaluator import DaskEvaluator
from walktune.evaluators import InProcessEvaluator, ProcessPoolEvaluator, ThreadPoolEvaluator
from walktune.pilot import run_pilot

DIM = 3
PRECISION = np.linalg.inv(np.array([[1.0, 0.8, 0.0], [0.8, 1.0, 0.3], [0.0, 0.3, 2.0]]))


def gaussian(theta):
    return -0.5 * float(theta @ PRECISION @ theta)


def sleeping_10ms(theta):
    time.sleep(0.010)
    return gaussian(theta)


def spinning_10ms(theta):
    end = time.perf_counter() + 0.010
    while time.perf_counter() < end:
        pass
    return gaussian(theta)


def sleeping_50ms(theta):
    time.sleep(0.050)
    return gaussian(theta)


def ten_microseconds(theta):
    end = time.perf_counter() + 10e-6
    while time.perf_counter() < end:
        pass
    return gaussian(theta)


def pilot_seconds(evaluator, chains: int, budget: int):
    starts = np.random.default_rng(0).standard_normal((chains, DIM))
    t0 = time.perf_counter()
    result = run_pilot(None, starts, np.eye(DIM), budget, np.random.SeedSequence(7), evaluator=evaluator)
    return time.perf_counter() - t0, result


def part_pilot(budget: int = 800) -> None:
    print(f"(1) pilot of {budget} evaluations, 10 ms per evaluation, 2 workers; speed-up = serial / parallel wall time")
    for name, function in (("sleep", sleeping_10ms), ("work", spinning_10ms)):
        for chains in (4, 8):
            serial_time, serial = pilot_seconds(InProcessEvaluator(function), chains, budget)
            row = [f"    {name:5s} {chains} chains: serial {serial_time:6.2f} s"]
            for label, make in (("pool", lambda: ProcessPoolEvaluator(function, workers=2)),
                                ("dask", lambda: DaskEvaluator(function, address="local:2"))):
                evaluator = make()
                try:
                    pilot_seconds(evaluator, chains, 4 * chains)  # warm the workers
                    seconds, result = pilot_seconds(evaluator, chains, budget)
                finally:
                    evaluator.close()
                assert np.array_equal(result.covariance, serial.covariance), "parallel pilot differs from serial"
                row.append(f"{label} {seconds:6.2f} s ({serial_time / seconds:.2f}x)")
            print(", ".join(row), flush=True)


def part_scale(steps: int = 40, workers: int = 16, chains: int = 32) -> None:
    evaluator = DaskEvaluator(sleeping_50ms, address=f"local:{workers}")
    try:
        start = np.random.default_rng(0).standard_normal((chains, DIM))
        sample(None, start, np.eye(DIM), 2, seed=1, evaluator=evaluator)  # warm the workers
        t0 = time.perf_counter()
        run = sample(None, start, np.eye(DIM), steps, seed=1, evaluator=evaluator)
        wall = time.perf_counter() - t0
    finally:
        evaluator.close()
    ideal = run.evaluations * 0.050 / workers
    print(f"(2) {workers} Dask workers, {chains} chains, {steps} steps of a 50 ms log-density: wall {wall:.2f} s, "
          f"ideal {ideal:.2f} s, parallel efficiency {ideal / wall:.2f} (target >= 0.8)", flush=True)


def per_evaluation(evaluator, steps: int, chains: int = 4, repeats: int = 3) -> float:
    """Seconds per evaluation inside the sampler, best of ``repeats`` runs (the machine's load varies)."""
    start = np.random.default_rng(0).standard_normal((chains, DIM))
    sample(None, start, np.eye(DIM), 20, seed=1, evaluator=evaluator)  # warm up
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        run = sample(None, start, np.eye(DIM), steps, seed=1, evaluator=evaluator)
        best = min(best, (time.perf_counter() - t0) / run.evaluations)
    return best


def part_overhead() -> None:
    calls = 20_000
    t0 = time.perf_counter()
    point = np.zeros(DIM)
    for _ in range(calls):
        ten_microseconds(point)
    bare = (time.perf_counter() - t0) / calls
    print(f"(3) a 10 us log-density: bare call {bare * 1e6:.1f} us; per evaluation with 4 chains (ratio to the bare call):")
    rows = [("in-process", InProcessEvaluator(ten_microseconds), 5_000)]
    folder = tempfile.mkdtemp()

    class Recorded:
        def __init__(self):
            self.inner = InProcessEvaluator(ten_microseconds)
            self.checkpoint = Checkpoint(folder, {}, every=30.0)

        def __call__(self, points):
            return self.checkpoint.evaluate(points, self.inner)[0]

    rows.append(("in-process + checkpoint record", Recorded(), 5_000))
    rows.append(("threads, 2", ThreadPoolEvaluator(ten_microseconds, threads=2), 2_000))
    rows.append(("process pool, 2 workers", ProcessPoolEvaluator(ten_microseconds, workers=2), 2_000))
    rows.append(("Dask local, 2 workers", DaskEvaluator(ten_microseconds, address="local:2"), 200))
    for label, evaluator, steps in rows:
        try:
            seconds = per_evaluation(evaluator, steps)
        finally:
            if hasattr(evaluator, "close"):
                evaluator.close()
        print(f"    {label:32s} {seconds * 1e6:9.1f} us  ({seconds / bare:7.1f}x)", flush=True)


BUFFER = bytes(range(256)) * 4096 * 2  # 2 MB: about 1 ms of SHA-256 here


def hashing_1ms(theta):
    import hashlib

    hashlib.sha256(BUFFER).digest()  # releases the GIL while it hashes
    return gaussian(theta)


def python_loop_1ms(theta):
    total = 0
    for i in range(25_000):
        total += i
    return gaussian(theta)


def part_threads(steps: int = 300, repeats: int = 5) -> None:
    print("(4) threads vs processes, 4 chains, 1 ms log-density; speed-up over in-process (best of "
          f"{repeats}, interleaved)")
    for label, function in (("releases the GIL (hashlib)", hashing_1ms), ("holds the GIL (Python loop)", python_loop_1ms)):
        evaluators = {"in-process": InProcessEvaluator(function), "2 threads": ThreadPoolEvaluator(function, threads=2),
                      "2 pool workers": ProcessPoolEvaluator(function, workers=2)}
        best = dict.fromkeys(evaluators, np.inf)
        try:
            for _ in range(repeats):  # interleaved, so that a change in the machine's speed hits all alike
                for name, evaluator in evaluators.items():
                    best[name] = min(best[name], per_evaluation(evaluator, steps, repeats=1))
        finally:
            for evaluator in evaluators.values():
                if hasattr(evaluator, "close"):
                    evaluator.close()
        bare = best["in-process"]
        others = ", ".join(f"{name} {bare / best[name]:.2f}x" for name in list(evaluators)[1:])
        print(f"    {label:28s} in-process {bare * 1e3:.2f} ms/eval, {others}", flush=True)


def main(argv) -> None:
    parts = argv or ["pilot", "scale", "overhead", "threads"]
    for part in parts:
        {"pilot": part_pilot, "scale": part_scale, "overhead": part_overhead, "threads": part_threads}[part]()


if __name__ == "__main__":
    main(sys.argv[1:])
