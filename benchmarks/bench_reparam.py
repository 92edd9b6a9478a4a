"""Reparameterisation benchmarks.

    python benchmarks/bench_reparam.py

(1) A linear-Gaussian inverse problem, d = 50 with 5 data-informed directions
    and a N(0, I) prior: min ESS per 1000 evaluations of the reduced-basis
    sampler over that of the full-covariance random walk, both measured by
    walktune.tune in the same run. Target >= 5.
(2) The transform layer's overhead per evaluation: the in-process evaluator
    calling a ~10 microsecond log-density on batches of 4 points (4 chains,
    the default) and of 32 points, with and without the map to sampler
    coordinates (log, logit and identity transforms, a full W). Target <= 1.2.
"""

from __future__ import annotations

import time

import numpy as np

import walktune
from walktune.evaluators import InProcessEvaluator
from walktune.reparam import TransformChoice, fit_map
from walktune.posterior import CountedEvaluator, SamplerSpaceEvaluator


def reduced_basis_ratio():
    d, informed = 50, 5
    rng = np.random.default_rng(0)
    basis = np.linalg.qr(rng.standard_normal((d, informed)))[0]
    G = rng.standard_normal((40, informed)) @ basis.T * 3.0
    noise = 0.5
    y = G @ rng.standard_normal(d) + noise * rng.standard_normal(40)

    def log_likelihood(theta):
        theta = np.atleast_2d(theta)
        return -0.5 * np.sum((y - theta @ G.T) ** 2, axis=1) / noise**2

    prior = {f"t{i}": ("normal", 0.0, 1.0) for i in range(d)}
    result = walktune.tune(log_likelihood, np.zeros(d), names=list(prior), prior=prior, seed=1, vectorized=True)
    rows = {row.proposal: row for row in result.comparison}
    return rows["reduced-basis"].ess_per_1000, rows["tuned-covariance"].ess_per_1000, result.reparam.informed


def ten_microseconds(theta):
    # About 10 us of work on this machine: a small polynomial and a few transcendental calls.
    x = float(theta[0])
    total = 0.0
    for k in range(12):
        total += np.sin(x + k) * 0.01
    return -0.5 * float(theta @ theta) + total


def overhead_ratio(repeats=3000, batch=4):
    d = 4
    names = ["a", "b", "c", "d"]
    bounds = [(0.0, np.inf), (0.0, 1.0), (-np.inf, np.inf), (-np.inf, np.inf)]
    choices = [TransformChoice(n, k, lo, hi, {}) for n, k, (lo, hi) in zip(names, ["log", "logit", "identity", "identity"], bounds)]
    rng = np.random.default_rng(1)
    a = rng.standard_normal((d, d)) * 0.1
    reparam = fit_map(names, choices, np.zeros(d), a @ a.T + 0.05 * np.eye(d))
    bare = CountedEvaluator(InProcessEvaluator(ten_microseconds), np.array(bounds))
    mapped = SamplerSpaceEvaluator(bare, reparam)
    repeats = repeats * 4 // batch
    z = rng.standard_normal((repeats, batch, d)) * 0.5
    theta = reparam.from_sampler(z)

    def run(evaluate, points):
        t0 = time.perf_counter()
        for batch in points:
            evaluate(batch)
        return time.perf_counter() - t0

    base = min(run(bare, theta) for _ in range(3))
    ours = min(run(mapped, z) for _ in range(3))
    per_eval = base / (repeats * batch) * 1e6
    return per_eval, ours / base


def main():
    reduced, full, informed = reduced_basis_ratio()
    print(f"reduced basis, d=50 ({informed} informed found): {reduced:.2f} vs full-covariance {full:.3f} "
          f"min ESS/1000 evaluations, ratio {reduced / full:.1f} (target >= 5)")
    for batch in (4, 32):
        per_eval, ratio = overhead_ratio(batch=batch)
        print(f"transform layer, batches of {batch} points: bare log-density {per_eval:.1f} us per evaluation, "
              f"with the map to sampler coordinates ratio {ratio:.2f} (target <= 1.2)")


if __name__ == "__main__":
    main()
