"""Speed of the engine and the diagnostics, as ratios against bare baselines run here.

    python benchmarks/bench_core.py

(1) engine time per chain-step on a cheap vectorised Gaussian log-density
    against a minimal hand-written numpy random-walk loop doing the same work;
    target <= 1.3.
(2) iact + ess + rhat on 4 x 100,000 x 50 draws against one bare FFT
    autocovariance pass over the same array; target <= 3.
Each time is the best of several repeats.
"""

from __future__ import annotations

import time

import numpy as np

import walktune
from walktune import diagnostics as D


def best_of(fn, repeats=5):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def gaussian(points):
    return -0.5 * np.einsum("ij,ij->i", points, points)


def hand_written_loop(start, chol, steps, seed):
    """The least a random-walk Metropolis loop must do, with one generator."""
    rng = np.random.default_rng(seed)
    chains, dim = start.shape
    current = start.copy()
    current_lp = gaussian(current)
    draws = np.empty((chains, steps, dim))
    accepted = np.empty((chains, steps), dtype=bool)
    for t in range(steps):
        proposal = current + rng.standard_normal((chains, dim)) @ chol.T
        lp = gaussian(proposal)
        accept = np.log(rng.random(chains)) < lp - current_lp
        current[accept] = proposal[accept]
        current_lp[accept] = lp[accept]
        draws[:, t] = current
        accepted[:, t] = accept
    return draws


def bare_fft_pass(x):
    n = x.shape[1]
    size = 1 << int(np.ceil(np.log2(2 * n)))
    f = np.fft.rfft(x - x.mean(axis=1, keepdims=True), n=size, axis=1)
    return np.fft.irfft(f.real**2 + f.imag**2, n=size, axis=1)[:, :n]


def engine_ratio(chains=8, dim=10, steps=20_000):
    start = np.zeros((chains, dim))
    cov = np.eye(dim) * 2.38**2 / dim
    chol = np.linalg.cholesky(cov)
    base = best_of(lambda: hand_written_loop(start, chol, steps, 1), repeats=3)
    ours = best_of(lambda: walktune.sample(gaussian, start, cov, steps, seed=1, vectorized=True), repeats=3)
    per_step = 1e6 / (chains * steps)
    return base * per_step, ours * per_step, ours / base


def diagnostics_ratio(shape=(4, 100_000, 50)):
    x = np.random.default_rng(0).standard_normal(shape)
    base = best_of(lambda: bare_fft_pass(x), repeats=3)
    ours = best_of(lambda: (D.iact(x), D.ess(x), D.rhat(x)), repeats=3)
    return base, ours, ours / base


def main():
    b, o, r = engine_ratio()
    print(f"engine: hand-written loop {b:.2f} us/chain-step, walktune.sample {o:.2f} us/chain-step, ratio {r:.2f} (target <= 1.3)")
    b, o, r = diagnostics_ratio()
    print(f"diagnostics 4x100000x50: bare FFT pass {b:.2f} s, iact+ess+rhat {o:.2f} s, ratio {r:.2f} (target <= 3)")


if __name__ == "__main__":
    main()
