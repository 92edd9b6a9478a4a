"""The pilot alone at hundreds of parameters: peak memory, CPU seconds, draws kept, quality of its covariance.

    python benchmarks/bench_pilot_memory.py --dims 100,300          # the default bound (walktune.pilot)
    python benchmarks/bench_pilot_memory.py --dims 100 --unbounded  # every state kept (the pilot before the bound)

The target is bench_dims.py's: a rotated Gaussian with variances spread
log-evenly over four decades (condition 1e4), vectorised. The pilot runs as
``walktune.tune`` runs it without a cap (``run_pilot`` with the default pilot
budget and its extension), from the exact covariance (what the Laplace
approximation gives for a Gaussian) and four chains drawn from ``N(0, 4 C)``,
each dimension in a child process of its own, so that the peak resident
memory (``ru_maxrss``) is the pilot's. Reported: CPU and wall seconds, peak
memory, the stages (steps, steps per stored draw), the bytes of draws kept,
and the predicted slow-down of the pilot's covariance against the true one
(:func:`walktune.theory.slowdown`).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_dims import gaussian  # noqa: E402


def run(dim: int, unbounded: bool) -> dict:
    from walktune import pilot, theory
    from walktune.stages import Budget

    log_density, cov = gaussian(dim)
    budget = Budget.plan(None, dim, 4)
    rng = np.random.default_rng(0)
    states = rng.multivariate_normal(np.zeros(dim), 4 * cov, size=4)
    memory = 2**62 if unbounded else None
    t0, cpu0 = time.perf_counter(), time.process_time()
    result = pilot.run_pilot(log_density, states, cov, budget.pilot, np.random.SeedSequence(1), vectorized=True,
                             extension=budget.pilot_extension, draws_memory=memory)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    slow = theory.slowdown(result.covariance, cov)
    return {
        "dim": dim, "unbounded": unbounded, "cpu_seconds": round(cpu, 1), "seconds": round(wall, 1),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
        "evaluations": result.evaluations, "converged": result.converged,
        "stage_steps": [s.steps for s in result.stages], "kept_every": [s.kept_every for s in result.stages],
        "kept_mb": round(sum(d.nbytes for d in result.all_draws) / 2**20, 1),
        "slowdown_parameter": slow.slowest_parameter, "slowdown_direction": slow.slowest_direction,
        "sd_ratio_max_error": float(np.max(np.abs(np.sqrt(np.diag(result.covariance) / np.diag(cov)) - 1))),
    }


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--dims", default="100,300")
    parser.add_argument("--unbounded", action="store_true")
    parser.add_argument("--child", type=int)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(run(args.child, args.unbounded)))
        return
    for dim in args.dims.split(","):
        command = [sys.executable, __file__, "--child", dim] + (["--unbounded"] if args.unbounded else [])
        out = subprocess.run(command, capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(HERE.parent)})
        print(out.stdout.strip().splitlines()[-1] if out.returncode == 0 else json.dumps(
            {"dim": dim, "error": out.stderr.strip().splitlines()[-1:]}), flush=True)


if __name__ == "__main__":
    main()
