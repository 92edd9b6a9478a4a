"""Tuned efficiency against the optimum, and the pilot evaluations it took.

    python benchmarks/bench_tuning.py

For Gaussian targets with a random rotation, d in {2, 5, 10, 20, 50} and
condition numbers {1, 1e2, 1e4}: run walktune.tune with its default budget,
then an independent fixed-proposal run with the recommended covariance and,
in the same run, one with the true covariance at the optimal scale. Prints
the efficiency (mean 1/IACT over parameters) of the recommendation as a ratio
of the true optimum's, and the pilot evaluations against 20 d^2 + 2000.
Targets: ratio >= 0.9, pilot evaluations <= 20 d^2 + 2000.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import stats

import walktune
from walktune import diagnostics as D
from walktune import theory as T


def gaussian(dim, condition, seed):
    rng = np.random.default_rng(seed)
    rotation = stats.ortho_group.rvs(dim, random_state=rng) if dim > 1 else np.eye(1)
    cov = rotation @ np.diag(np.logspace(0, np.log10(condition), dim)) @ rotation.T
    precision = np.linalg.inv(cov)

    def log_density(x):
        x = np.atleast_2d(x)
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    return log_density, cov


def efficiency(log_density, proposal, dim, seed):
    steps = max(5000, 600 * dim)
    chains = walktune.sample(log_density, np.zeros((32, dim)), proposal, steps, seed=seed, vectorized=True)
    return float(np.mean(1.0 / D.iact(chains.draws[:, steps // 10 :])))


def main():
    print(f"{'d':>3} {'cond':>7} {'ratio':>6} {'pilot':>7} {'limit':>7} {'slowdown':>9} {'seconds':>8}")
    for dim in (2, 5, 10, 20, 50):
        for condition in (1.0, 1e2, 1e4):
            log_density, cov = gaussian(dim, condition, seed=dim)
            t0 = time.perf_counter()
            result = walktune.tune(log_density, np.ones(dim), seed=1, vectorized=True)
            seconds = time.perf_counter() - t0
            tuned = efficiency(log_density, result.proposal_covariance, dim, seed=5)
            best = efficiency(log_density, T.optimal_proposal(cov), dim, seed=5)
            slow = T.slowdown(result.proposal_covariance, cov).slowest_direction
            limit = 20 * dim * dim + 2000
            print(f"{dim:>3} {condition:>7.0e} {tuned / best:>6.2f} {result.pilot_evaluations:>7} {limit:>7} {slow:>9.3f} {seconds:>8.1f}")


if __name__ == "__main__":
    main()
