"""Full inspection of a large .npy against numpy.load plus one FFT autocovariance pass.

    python benchmarks/bench_inspect.py [--chains 4 --draws 250000 --params 100]

Writes a (chains, draws, params) float64 file of AR(1) chains to a temporary
folder, then times, each in a fresh process, (a) numpy.load of the file plus
one bare FFT autocovariance pass over it and (b) walktune.inspection on the
memory-mapped file as `walktune inspect` reads it. Prints the time ratio
(target <= 4) and the peak resident memory of (b) as a multiple of the array's
size (target <= 2.5).

    python benchmarks/bench_inspect.py --memory [--zeros-gb 4 --values-gb 0.4 1.6 --folder /work/tmp]

The memory case (issue 15): peak resident memory of `walktune inspect` on large
files, each in a fresh process, minus that of a process that only imports
walktune, against walktune.inspection.MEMORY_BLOCK_BYTES (target: at most 1.5x
one block plus the output). Files: a sparse .npy of zeros of --zeros-gb (made by
np.lib.format.open_memmap, which leaves the file sparse; inspect refuses it
after one pass, all parameters being constant) and .npy files of independent
normal draws (4 chains, 250 parameters) of each --values-gb. Peak memory is each
process's own VmHWM (Linux).
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

# Peak resident memory of this process alone: VmHWM of /proc/self/status. (ru_maxrss is not used here:
# Linux carries the parent's peak over into a child's ru_maxrss at exec, and the parent wrote the files.)
PEAK = "int(dict(l.split(':', 1) for l in open('/proc/self/status'))['VmHWM'].split()[0]) * 1024"

BASELINE = f"""
import sys, time
import numpy as np
t0 = time.perf_counter()
x = np.load(sys.argv[1])
n = x.shape[1]
size = 1 << int(np.ceil(np.log2(2 * n)))
for p in range(0, x.shape[2], 10):  # in blocks, or the padded spectrum alone would not fit
    block = x[:, :, p:p + 10]
    f = np.fft.rfft(block - block.mean(axis=1, keepdims=True), n=size, axis=1)
    np.fft.irfft(f.real**2 + f.imag**2, n=size, axis=1)[:, :n]
print(time.perf_counter() - t0, {PEAK})
"""

OURS = f"""
import sys, time
t0 = time.perf_counter()
from walktune.chainfiles import read_chains
from walktune.inspection import inspect
data = read_chains(sys.argv[1])
result = inspect(data.draws, data.names)
result.to_dict()
print(time.perf_counter() - t0, {PEAK})
"""


def run(code: str, path: Path) -> tuple[float, float]:
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(code), str(path)], capture_output=True, text=True, check=True)
    seconds, peak = out.stdout.split()
    return float(seconds), float(peak)


IMPORT_ONLY = f"""
import walktune.inspection, walktune.chainfiles
print(0.0, {PEAK})
"""

INSPECT_FILE = f"""
import sys, time
from walktune.chainfiles import read_chains
from walktune.errors import WalktuneError
from walktune.inspection import inspect
t0 = time.perf_counter()
try:
    inspect(read_chains(sys.argv[1])).to_dict()
except WalktuneError as error:
    print(str(error)[:60], file=sys.stderr)
print(time.perf_counter() - t0, {PEAK})
"""


def _values_file(path: Path, gigabytes: float, chains: int = 4, params: int = 250) -> tuple:
    draws = int(gigabytes * 1e9 / (8 * chains * params))
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=(chains, draws, params))
    rng = np.random.default_rng(1)
    for c in range(chains):
        for start in range(0, draws, 20_000):
            out[c, start : start + 20_000] = rng.standard_normal((min(20_000, draws - start), params))
    out.flush()
    del out
    return chains, draws, params


def memory_case(zeros_gb: float, values_gb: list, folder: str | None) -> None:
    from walktune import inspection

    block = inspection.MEMORY_BLOCK_BYTES
    _, baseline = run(IMPORT_ONLY, Path("."))
    print(f"memory block {block / 2**20:.0f} MiB; a process that only imports walktune peaks at {baseline / 2**20:.0f} MiB")
    with tempfile.TemporaryDirectory(dir=folder) as scratch:
        cases = []
        zeros = Path(scratch) / "zeros.npy"
        shape = (4, int(zeros_gb * 1e9 / (8 * 4 * 100)), 100)
        np.lib.format.open_memmap(zeros, mode="w+", dtype=np.float64, shape=shape).flush()
        cases.append((f"zeros {shape} sparse", zeros))
        for gigabytes in values_gb:
            path = Path(scratch) / f"values_{gigabytes}.npy"
            cases.append((f"normal draws {_values_file(path, gigabytes)}", path))
        for label, path in cases:
            seconds, peak = run(INSPECT_FILE, path)
            size = path.stat().st_size
            print(f"{label}, {size / 1e9:.2f} GB: {seconds:.0f} s, peak {peak / 2**20:.0f} MiB, "
                  f"{(peak - baseline) / 2**20:.0f} MiB above the import-only process = "
                  f"{(peak - baseline) / block:.2f} blocks (target <= 1.5 plus the output)")
            path.unlink()


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--chains", type=int, default=4)
    parser.add_argument("--draws", type=int, default=250_000)
    parser.add_argument("--params", type=int, default=100)
    parser.add_argument("--memory", action="store_true", help="Run the large-file memory case instead.")
    parser.add_argument("--zeros-gb", type=float, default=4.0)
    parser.add_argument("--values-gb", type=float, nargs="*", default=[0.4, 1.6])
    parser.add_argument("--folder", default=None, help="Where to write the large files (default: the temporary folder).")
    args = parser.parse_args()
    if args.memory:
        memory_case(args.zeros_gb, args.values_gb, args.folder)
        return
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
