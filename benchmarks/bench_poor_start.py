"""The pilot against a poor Laplace start: the four targets of tests/test_poor_start.py.

    python benchmarks/bench_poor_start.py

For each target (exact answers by closed form or quadrature; see that test
file): walktune.tune with its default budget (seed 1), then the tuned run's
largest |mean error| in reported MCSEs, the largest relative sd error of the
pilot's covariance and of the tuned run's draws, and the efficiency (min ESS
per evaluation, Geyer's estimator) of the recommended covariance over that of
per-parameter steps from the exact marginal sds x 2.38 / sqrt(d), both run by
the plain sampler written in the test. Targets: |z| <= 4, sd errors <= 30%,
efficiency ratio >= 0.8.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
import test_poor_start as targets  # noqa: E402

import walktune  # noqa: E402


def main():
    print(f"{'target':<26} {'max |z|':>7} {'pilot sd err':>12} {'tuned sd err':>12} {'eff ratio':>9} {'pilot evals':>11} {'total':>7}")
    for name in sorted(targets.TARGETS):
        log_density, start, bounds, _ = targets.TARGETS[name]
        mean, sd = targets._exact(name)
        try:
            result = walktune.tune(log_density, np.array(start, dtype=float), bounds=bounds, vectorized=True, seed=1)
        except Exception as error:  # noqa: BLE001 - a benchmark reports a crash as a row
            print(f"{name:<26} crashed: {type(error).__name__}: {error}")
            continue
        z = np.max(np.abs(result.posterior_mean - mean) / result.posterior_mean_mcse)
        pilot_err = np.max(np.abs(np.sqrt(np.diag(result.posterior_covariance)) / sd - 1))
        tuned = result.runs["tuned-covariance"]
        tuned_err = np.max(np.abs(tuned.draws.reshape(-1, sd.size).std(axis=0) / sd - 1))
        starts = tuned.last[np.arange(32) % tuned.last.shape[0]]
        recommended = targets._min_ess_per_evaluation(log_density, starts, result.proposal_covariance, seed=7)
        oracle = targets._min_ess_per_evaluation(log_density, starts, np.diag((sd * 2.38 / np.sqrt(sd.size)) ** 2), seed=8)
        print(f"{name:<26} {z:>7.2f} {pilot_err:>12.2f} {tuned_err:>12.2f} {recommended / oracle:>9.2f} "
              f"{result.pilot_evaluations:>11} {result.total_evaluations:>7}")


if __name__ == "__main__":
    main()
