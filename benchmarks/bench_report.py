"""Report generation for a large run against loading its draws.

    python benchmarks/bench_report.py

Two folders with d = 100 and 4 chains x 100,000 draws:
(a) a real tuning run on a 100-dimensional correlated Gaussian whose budget
    gives tuned runs of 100,000 steps per chain; baseline: loading its
    draws.npz (every array read);
(b) an inspection of a 4 x 100,000 x 100 .npy of AR(1) chains; baseline:
    numpy.load of that file, with the page cache warm and (as root on Linux)
    emptied first, so that both sides read the disk.
Each is timed in fresh processes (best of 2-3); prints write_report time over
load time. Target: a few times.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

LOAD_NPZ = """
import sys, time
import numpy as np
t0 = time.perf_counter()
with np.load(sys.argv[1]) as archive:
    arrays = [archive[k] for k in archive.files]
print(time.perf_counter() - t0)
"""

LOAD_NPY = """
import sys, time
import numpy as np
t0 = time.perf_counter()
x = np.load(sys.argv[1])
print(time.perf_counter() - t0)
"""

REPORT = """
import sys, time
import walktune.report
t0 = time.perf_counter()
walktune.report.write_report(sys.argv[1])
print(time.perf_counter() - t0)
"""


def drop_caches() -> bool:
    """Empty the page cache (root on Linux only), so that loading reads the disk."""
    try:
        subprocess.run(["sync"], check=True)
        Path("/proc/sys/vm/drop_caches").write_text("3\n")
        return True
    except OSError:
        return False


def timed(code, arg, repeats, cold=False):
    runs = []
    for _ in range(repeats):
        if cold:
            drop_caches()
        out = subprocess.run([sys.executable, "-c", textwrap.dedent(code), str(arg)], capture_output=True, text=True, check=True)
        runs.append(float(out.stdout.strip()))
    return min(runs)


def tuning_folder(folder: Path) -> Path:
    import walktune
    from walktune.stages import pilot_budget_default

    dim = 100
    rng = np.random.default_rng(1)
    a = rng.standard_normal((dim, dim)) / np.sqrt(dim)
    cov = a @ a.T + 0.1 * np.eye(dim)
    precision = np.linalg.inv(cov)

    def log_density(x):
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    budget = pilot_budget_default(dim) + 3 * 4 * 100_000 + 20_000
    result = walktune.tune(log_density, np.zeros(dim), seed=1, vectorized=True, budget=budget)
    return result.save(folder / "tuned")


def inspection_folder(folder: Path) -> tuple[Path, Path]:
    from walktune.chainfiles import read_chains
    from walktune.inspection import inspect

    path = folder / "draws.npy"
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=(4, 100_000, 100))
    rng = np.random.default_rng(0)
    for p in range(100):
        out[:, :, p] = lfilter([1.0], [1.0, -(0.3 + 0.65 * p / 99)], rng.standard_normal((4, 100_000)), axis=1)
    out.flush()
    del out
    data = read_chains(path)
    return inspect(data.draws, data.names, sources=[path]).save(folder / "inspected"), path


def main():
    import argparse

    parser = argparse.ArgumentParser()
    parser.add_argument("--skip-tuning", action="store_true", help="only the inspection case (the tuning case takes minutes)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if not args.skip_tuning:
            tuned = tuning_folder(folder)
            load = timed(LOAD_NPZ, tuned / "draws.npz", 3)
            report = timed(REPORT, tuned, 2)
            shape = np.load(tuned / "draws.npz")["tuned_covariance"].shape
            print(f"tuning run, tuned draws {shape}: load draws.npz {load:.2f} s, write_report {report:.2f} s, "
                  f"ratio {report / load:.1f}")
        inspected, path = inspection_folder(folder)
        load = timed(LOAD_NPY, path, 3)
        report = timed(REPORT, inspected, 2)
        print(f"inspection, 4x100000x100 .npy, page cache warm: numpy.load {load:.2f} s, write_report {report:.2f} s, "
              f"ratio {report / load:.1f}")
        if drop_caches():
            load = timed(LOAD_NPY, path, 2, cold=True)
            report = timed(REPORT, inspected, 2, cold=True)
            print(f"inspection, 4x100000x100 .npy, read from disk: numpy.load {load:.2f} s, write_report {report:.2f} s, "
                  f"ratio {report / load:.1f}")


if __name__ == "__main__":
    main()
