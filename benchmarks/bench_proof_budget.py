"""Proof runs sized by need against equal budgets: total evaluations of the default job.

    PYTHONPATH=. python benchmarks/bench_proof_budget.py [--dims 20 50 100] [--base PATH]

On correlated Gaussians (a random correlation matrix with condition number
about 3e3, scipy.stats.random_correlation, times standard deviations spread
over two decades) at each d: run ``walktune.tune`` with its default budget
from this checkout, and the same job from the checkout at ``--base`` (the
equal-budget proof, commit f3053ac; run in a subprocess with that checkout
first on PYTHONPATH) in the same run. Prints, for each: total evaluations,
pilot evaluations, proof evaluations per option, the recommended run's
smallest ESS, max R-hat and whether its ESS is reliable, and the predicted
slowest-direction slow-down of the tuned covariance against the true one.
Target: total <= half of the base's at each d, the recommended ESS reliable.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np
from scipy import stats


def correlated_gaussian(dim: int, seed: int):
    """Log-density of N(0, S): S a random correlation (eigenvalues log-spaced over 3.5 decades) scaled by random sds."""
    rng = np.random.default_rng(seed)
    eigenvalues = np.logspace(0, 3.5, dim)
    eigenvalues *= dim / eigenvalues.sum()
    correlation = stats.random_correlation.rvs(eigenvalues, random_state=rng)
    sd = 10 ** rng.uniform(-1, 1, dim)
    cov = correlation * np.outer(sd, sd)
    precision = np.linalg.inv(cov)

    def log_density(x):
        x = np.atleast_2d(x)
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    return log_density, cov


def run_job(dim: int) -> dict:
    """The default job on the d-dimensional target; what the table reports."""
    import walktune
    from walktune import theory as T

    log_density, cov = correlated_gaussian(dim, seed=dim)
    t0 = time.perf_counter()
    result = walktune.tune(log_density, np.zeros(dim), seed=1, vectorized=True)
    seconds = time.perf_counter() - t0
    chosen = next(row for row in result.comparison if row.proposal == result.recommended.proposal)
    ess = chosen.ess_per_1000 * chosen.evaluations / 1000
    return {
        "total": int(result.total_evaluations),
        "pilot": int(result.pilot_evaluations),
        "proof": {row.proposal: int(row.evaluations) for row in result.comparison},
        "recommended": chosen.proposal,
        "ess": float(ess),
        "rhat": float(chosen.max_rhat),
        "reliable": bool(chosen.ess_reliable),
        "kinds": {row.proposal: row.speedup_kind for row in result.comparison},
        "slowdown": float(T.slowdown(result.proposal_covariance, cov).slowest_direction),
        "findings": sorted({f.kind for f in result.findings}),
        "seconds": seconds,
    }


def run_base(dim: int, base: str) -> dict:
    env = dict(os.environ, PYTHONPATH=base + os.pathsep + os.path.dirname(os.path.abspath(__file__)))
    out = subprocess.run([sys.executable, os.path.abspath(__file__), "--worker", str(dim)], env=env, check=True,
                         capture_output=True, text=True, cwd=base)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _line(label: str, dim: int, r: dict) -> str:
    proof = " ".join(f"{name}={n}" for name, n in r["proof"].items())
    return (f"{dim:>4} {label:<6} {r['total']:>8} {r['pilot']:>7} {r['recommended']:<17} {r['ess']:>7.0f} "
            f"{r['rhat']:>7.4f} {str(r['reliable']):<5} {r['slowdown']:>6.3f} {r['seconds']:>7.1f}  {proof}")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--dims", type=int, nargs="*", default=[20, 50, 100])
    parser.add_argument("--base", default="/work/wt-proofsize-base")
    parser.add_argument("--worker", type=int, default=None)
    args = parser.parse_args()
    if args.worker is not None:
        print(json.dumps(run_job(args.worker)))
        return
    print(f"{'d':>4} {'code':<6} {'total':>8} {'pilot':>7} {'recommended':<17} {'minESS':>7} {'R-hat':>7} "
          f"{'rel.':<5} {'slow':>6} {'sec':>7}  proof evaluations per option")
    for dim in args.dims:
        new, old = run_job(dim), run_base(dim, args.base)
        print(_line("new", dim, new))
        print(_line("base", dim, old))
        print(f"{dim:>4} ratio  {new['total'] / old['total']:.3f} (target <= 0.5); new findings: {', '.join(new['findings'])}")
        print(f"{'':>4} kinds  new {new['kinds']}; base {old['kinds']}", flush=True)


if __name__ == "__main__":
    main()
