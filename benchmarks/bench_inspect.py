"""Full inspection of a large .npy against numpy.load plus one FFT autocovariance pass.

    python benchmarks/bench_inspect.py [--chains 4 --draws 250000 --params 100]

Writes a (chains, draws, params) float64 file of AR(1) chains to a temporary
folder, then times, each in a fresh process, (a) numpy.load of the file plus
one bare FFT autocovariance pass over it and (b) walktune.inspection on the
memory-mapped file as `walktune inspect` reads it. Prints the time ratio
(target <= 4) and the peak resident memory of (b) as a multiple of the array's
size (target <= 2.5).
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

BASELINE = """
import resource, sys, time
import numpy as np
t0 = time.perf_counter()
x = np.load(sys.argv[1])
n = x.shape[1]
size = 1 << int(np.ceil(np.log2(2 * n)))
for p in range(0, x.shape[2], 10):  # in blocks, or the padded spectrum alone would not fit
    block = x[:, :, p:p + 10]
    f = np.fft.rfft(block - block.mean(axis=1, keepdims=True), n=size, axis=1)
    np.fft.irfft(f.real**2 + f.imag**2, n=size, axis=1)[:, :n]
print(time.perf_counter() - t0, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)
"""

OURS = """
import resource, sys, time
t0 = time.perf_counter()
from walktune.chainfiles import read_chains
from walktune.inspection import inspect
data = read_chains(sys.argv[1])
result = inspect(data.draws, data.names)
result.to_dict()
print(time.perf_counter() - t0, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)
"""


def run(code: str, path: Path) -> tuple[float, float]:
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(code), str(path)], capture_output=True, text=True, check=True)
    seconds, peak = out.stdout.split()
    return float(seconds), float(peak)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--chains", type=int, default=4)
    parser.add_argument("--draws", type=int, default=250_000)
    parser.add_argument("--params", type=int, default=100)
    args = parser.parse_args()
    shape = (args.chains, args.draws, args.params)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "draws.npy"
        out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=shape)
        rng = np.random.default_rng(0)
        for p in range(args.params):
            phi = 0.5 + 0.45 * p / max(args.params - 1, 1)
            out[:, :, p] = lfilter([1.0], [1.0, -phi], rng.standard_normal((args.chains, args.draws)), axis=1)
        out.flush()
        del out
        size = np.prod(shape) * 8
        base_s, base_mem = run(BASELINE, path)
        ours_s, ours_mem = run(OURS, path)
    print(f"inspect {shape[0]}x{shape[1]}x{shape[2]} ({size / 1e9:.2f} GB): numpy.load + FFT pass {base_s:.1f} s, "
          f"walktune {ours_s:.1f} s, ratio {ours_s / base_s:.2f} (target <= 4); "
          f"peak memory {ours_mem / size:.2f} x the array (target <= 2.5; baseline {base_mem / size:.2f} x)")


if __name__ == "__main__":
    main()
