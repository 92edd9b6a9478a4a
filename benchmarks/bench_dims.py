"""Hundreds of parameters: time, memory, evaluations by stage, tuning quality and Ctrl-C latency.

    python benchmarks/bench_dims.py                 # d = 100, 300 (defaults), 300 at the smallest budget, 1000 capped
    python benchmarks/bench_dims.py --cases 100,300 # some of them (see CASES)
    python benchmarks/bench_dims.py --interrupt     # Ctrl-C latency of `walktune tune` at d = 300
    python benchmarks/bench_dims.py --interrupt --moments "mode search: Hessian"  # some of the moments
    python benchmarks/bench_dims.py --hessian 300,1000  # the Hessian's points batched against one at a time
    python benchmarks/bench_dims.py --mode-search 1000  # the job's mode search alone, at the trustworthy budget

The target is a Gaussian with a random rotation (scipy.stats.ortho_group,
seeded) and variances spread log-evenly over four decades (condition 1e4),
evaluated in batches (``vectorized=True``). Each case runs
``walktune.tune(..., seed=1)`` in a child process of its own, so that the peak
resident memory (``ru_maxrss``) is the job's; the child reports the wall time,
the evaluations and seconds of each stage (from the ``progress`` callback),
the predicted slow-down of the tuned proposal covariance against the true
covariance (:func:`walktune.theory.slowdown`: slowest parameter and slowest
direction, rescaled), and the reported posterior sds over the true ones.

Targets (issue #15): d = 300 within 10x the time of d = 100 at the default
budget; peak memory under 2 GB; predicted slow-down <= 1.1; d = 1000 to the
end with the budget stated up front.

``--interrupt [--dim 300] [--budget N]`` writes the model to a temporary
folder, runs ``walktune tune`` on it as a real process and sends SIGINT at
moments found from the stages its checkpoint records and the model's own
evaluation count (shared through a memory-mapped counter): during the mode
search, the pilot, just after the pilot (new coordinates; no evaluations), in a
proof run, and after the last proof run (its diagnostics; the geometry checks).
It times the signal to the process's exit and reads the stage the partial
advice names. Target: under 2 s everywhere.
"""

from __future__ import annotations

import argparse
import json
import mmap
import os
import resource
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import stats

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

#: name: (d, budget or None for the default, or "smallest")
CASES = {
    "100": (100, None),
    "300": (300, None),
    "300-smallest": (300, "smallest"),
    "1000": (1000, "trustworthy"),
}


def gaussian(dim: int, condition: float = 1e4, seed: int = 0):
    """A vectorised log-density of N(0, S), S = R diag(logspace(0, log10 condition)) R^T, and S."""
    rng = np.random.default_rng(seed)
    rotation = stats.ortho_group.rvs(dim, random_state=rng)
    variances = np.logspace(0, np.log10(condition), dim)
    cov = (rotation * variances) @ rotation.T
    precision = (rotation / variances) @ rotation.T

    def log_density(x):
        x = np.atleast_2d(x)
        return -0.5 * np.einsum("ij,ij->i", x @ precision, x)

    return log_density, 0.5 * (cov + cov.T)


def run_case(dim: int, budget) -> dict:
    """One tuning job (in this process); what it cost and how good its answer is."""
    import walktune
    from walktune import theory
    from walktune.planning import trustworthy_budget
    from walktune.stages import minimum_budget

    if budget == "smallest":
        budget = minimum_budget(dim, 4)
    elif budget == "trustworthy":  # the least budget the up-front statement calls enough
        budget = trustworthy_budget(dim, 4)
    log_density, cov = gaussian(dim)
    stage = {"name": "setup"}
    evaluations: dict = {}
    seconds: dict = {}
    peaks: dict = {}  # peak resident memory so far (MB) at each stage's last progress report
    last = [time.perf_counter()]

    def counted(x):
        x = np.atleast_2d(x)
        evaluations[stage["name"]] = evaluations.get(stage["name"], 0) + x.shape[0]
        return log_density(x)

    def progress(name, done, total):
        now = time.perf_counter()
        seconds[stage["name"]] = seconds.get(stage["name"], 0.0) + now - last[0]
        peaks[stage["name"]] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        last[0] = now
        # What follows a stage's end (other-mode climbs after the mode search, geometry checks after the
        # last proof run) is counted apart.
        stage["name"] = name if done < total else f"after {name}"

    t0, cpu0 = time.perf_counter(), time.process_time()
    result = walktune.tune(counted, np.ones(dim), seed=1, vectorized=True, budget=budget, progress=progress)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    seconds[stage["name"]] = seconds.get(stage["name"], 0.0) + time.perf_counter() - last[0]
    slow = theory.slowdown(result.proposal_covariance, cov)
    sd_ratio = result.posterior_sd / np.sqrt(np.diag(cov))
    statement = [f.message for f in result.findings if f.kind == "budget"]
    return {
        "dim": dim,
        "budget": budget,
        "seconds": wall,
        "cpu_seconds": cpu,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "evaluations": int(result.total_evaluations),
        "evaluations_by_stage": evaluations,
        "seconds_by_stage": {k: round(v, 2) for k, v in seconds.items()},
        "peak_rss_mb_by_stage": {k: round(v) for k, v in peaks.items()},
        "slowdown_parameter": slow.slowest_parameter,
        "slowdown_direction": slow.slowest_direction,
        "sd_ratio_min": float(sd_ratio.min()),
        "sd_ratio_max": float(sd_ratio.max()),
        "pilot_sd_ratio_max_error": float(np.max(np.abs(np.sqrt(np.diag(result.posterior_covariance) / np.diag(cov)) - 1))),
        "recommended": result.posterior_run,
        "expected_acceptance": result.expected_acceptance,
        "pilot_converged": result.pilot_converged,
        "proof_steps": int(result.runs["tuned-covariance"].n_steps),
        "findings": [f"{f.kind}:{f.severity}" for f in result.findings],
        "budget_statement": statement,
    }


def in_child(name: str) -> dict:
    output = subprocess.run([sys.executable, __file__, "--child", name], capture_output=True, text=True,
                            env={**os.environ, "PYTHONPATH": str(ROOT)})
    if output.returncode != 0:
        return {"case": name, "error": output.stderr.strip().splitlines()[-1:]}
    return {"case": name, **json.loads(output.stdout.strip().splitlines()[-1])}


# --------------------------------------------------------------------------- the mode search's Hessian


def hessian_cost(dim: int, blocks: int = 4, one_point: int = 2000) -> dict:
    """CPU seconds per evaluation of the Hessian's points through the counted posterior: one point at a time
    (as before batching) against blocks of the batched Hessian (walktune.mode), and the whole Hessian's
    ``2 d^2 + 1`` evaluations projected from each (the same process, the same model)."""
    from walktune import mode
    from walktune.evaluators import InProcessEvaluator
    from walktune.posterior import CountedEvaluator

    log_density, _ = gaussian(dim)
    counted = CountedEvaluator(InProcessEvaluator(log_density, True), np.tile([-np.inf, np.inf], (dim, 1)))
    point, h = np.ones(dim), mode.FD_STEP * np.ones(dim)
    first, second = np.tril_indices(dim, -1)
    rows = min(max(1, mode.FD_BLOCK_BYTES // (8 * dim)), 4 * first.size // blocks)
    cpu = time.process_time()
    for k in range(blocks):
        counted.finite_values(mode._pair_points(point, h, first, second, k * rows, (k + 1) * rows))
    batched = (time.process_time() - cpu) / (blocks * rows)
    cpu = time.process_time()
    for x in mode._pair_points(point, h, first, second, 0, one_point):
        counted.scalar(x)
    single = (time.process_time() - cpu) / one_point
    total = 2 * dim * dim + 1
    return {"dim": dim, "block_points": rows, "cpu_us_per_evaluation_batched": round(1e6 * batched, 2),
            "cpu_us_per_evaluation_one_point": round(1e6 * single, 2), "ratio": round(single / batched, 1),
            "hessian_cpu_s_batched": round(total * batched, 1), "hessian_cpu_s_one_point": round(total * single, 1)}


def mode_search_cost(dim: int) -> dict:
    """The job's mode search alone at the least budget the statement calls trustworthy, as
    :func:`walktune.stages.find_start` runs it (through the counted posterior): evaluations, time, memory,
    and the Laplace covariance's predicted slow-down against the true covariance."""
    from walktune import theory
    from walktune.evaluators import InProcessEvaluator
    from walktune.mode import find_mode, hessians_affordable
    from walktune.planning import budget_statement, trustworthy_budget
    from walktune.posterior import CountedEvaluator
    from walktune.stages import Budget, _minimum_pilot

    budget = Budget.plan(trustworthy_budget(dim, 4), dim, 4)
    log_density, cov = gaussian(dim)
    counted = CountedEvaluator(InProcessEvaluator(log_density, True), np.tile([-np.inf, np.inf], (dim, 1)))
    hessians = hessians_affordable(dim, budget.pilot - _minimum_pilot(dim, 4))
    share = max(20 * (dim + 1), budget.pilot // 3 - (2 * dim * dim if hessians else 0))
    t0, cpu0 = time.perf_counter(), time.process_time()
    fit = find_mode(counted.scalar, np.ones(dim), counted.bounds, np.ones(dim), share,
                    evaluate_batch=counted.finite_values, hessians=hessians)
    wall, cpu = time.perf_counter() - t0, time.process_time() - cpu0
    slow = theory.slowdown(fit.laplace_covariance, cov) if fit.laplace_covariance is not None else None
    return {"dim": dim, "budget": budget.total, "statement": budget_statement(budget).message, "hessians": hessians,
            "optimizer_share": share, "evaluations": counted.count, "seconds": round(wall, 1),
            "cpu_seconds": round(cpu, 1), "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "message": fit.message, "max_abs_mode": float(np.abs(fit.mode).max()),
            "laplace_slowdown": None if slow is None else [slow.slowest_parameter, slow.slowest_direction]}


# --------------------------------------------------------------------------- Ctrl-C latency

MODEL = '''
import mmap, os
import numpy as np
from scipy import stats

_rng = np.random.default_rng(0)
_rotation = stats.ortho_group.rvs({dim}, random_state=_rng)
_variances = np.logspace(0, 4, {dim})
_precision = (_rotation / _variances) @ _rotation.T
VECTORIZED = True
PARAMETERS = {{f"x{{i}}": 1.0 for i in range({dim})}}
_file = open(os.environ["BENCH_COUNTER"], "r+b")
_counter = np.frombuffer(mmap.mmap(_file.fileno(), 8), dtype=np.int64)


def log_density(x):
    x = np.atleast_2d(x)
    _counter[0] += x.shape[0]
    return -0.5 * np.einsum("ij,ij->i", x @ _precision, x)
'''


def _cpu_seconds(pid: int) -> float:
    """User and system CPU seconds of a running process so far (/proc/PID/stat)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _checkpoint_stage(out: Path):
    """The last stage the run's checkpoint recorded as ended (None before the first)."""
    try:
        with np.load(out / "checkpoint.npz", allow_pickle=False) as archive:
            return json.loads(str(archive["meta"][()])).get("stage")
    except (OSError, KeyError, ValueError):
        return None


def _interrupt_once(folder: Path, dim: int, moment: dict, budget) -> dict:
    """Run ``walktune tune`` and send SIGINT at ``moment``: once the checkpoint records stage ``after`` as ended
    (None: from the start), the model has made ``more`` evaluations since, and then ``idle`` seconds passed
    without one."""
    counter_path = folder / "counter"
    counter_path.write_bytes(np.zeros(1, dtype=np.int64).tobytes())
    out = folder / f"out-{moment['label'].replace(' ', '-').replace(':', '')}"
    command = [sys.executable, "-m", "walktune", "tune", f"{folder / 'model.py'}:log_density", "--seed", "1",
               "--out", str(out), "--quiet", "--checkpoint-every", "0"]
    if budget is not None:
        command += ["--budget", str(budget)]
    with open(counter_path, "r+b") as handle:
        counter = np.frombuffer(mmap.mmap(handle.fileno(), 8), dtype=np.int64)
        process = subprocess.Popen(command, env={**os.environ, "PYTHONPATH": str(ROOT), "BENCH_COUNTER": str(counter_path)},
                                   stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        seen, still_since, base, last_poll = -1, time.perf_counter(), None, 0.0
        while process.poll() is None:
            count, now = int(counter[0]), time.perf_counter()
            if count != seen:
                seen, still_since = count, now
            if base is None and now - last_poll > 0.05:
                last_poll = now
                if moment["after"] is None or _checkpoint_stage(out) == moment["after"]:
                    base = count
            if base is not None and count >= base + moment["more"] and now - still_since >= moment["idle"]:
                break
            time.sleep(0.005)
        if process.poll() is not None:
            tail = process.stderr.read().strip().splitlines()[-1:]
            return {"error": "finished before the signal", "exit_code": process.returncode, "stderr": tail,
                    "last_stage": _checkpoint_stage(out)}
        cpu_before = _cpu_seconds(process.pid)
        sent = time.perf_counter()
        process.send_signal(signal.SIGINT)
        _, status, usage = os.wait4(process.pid, 0)
        latency = time.perf_counter() - sent
        process.returncode = os.waitstatus_to_exitcode(status)
        # CPU seconds from the signal to the exit: the latency on an idle machine, whatever the load here.
        cpu_after = usage.ru_utime + usage.ru_stime
        count = int(counter[0])
    partial = out / "partial-advice.json"
    stage = json.loads(partial.read_text()).get("stopped_in_stage") if partial.exists() else None
    return {"evaluations_at_signal": seen, "evaluations_at_exit": count, "latency_s": round(latency, 3),
            "cpu_s_after_signal": round(cpu_after - cpu_before, 3),
            "exit_code": process.returncode, "stopped_in_stage": stage}


#: When to send SIGINT: after the checkpoint records a stage's end, so many evaluations more, then so many
#: seconds without an evaluation.
MOMENTS = [
    {"label": "mode search", "after": None, "more": 3000, "idle": 0.0},
    # At d = 300 the optimizer's share of a 600,000 budget is 6,020 evaluations: the Hessian's blocks follow.
    {"label": "mode search: Hessian", "after": None, "more": 60_000, "idle": 0.0},
    # The pilot's stages: the checkpoint names the first "mode stage 1" (the tracker's stage is still the mode's
    # when it ends), and a capped job may run one stage only; at d = 300 and a 600,000 budget the mode search
    # and the climbs spend about 237,000 evaluations, the pilot the next 12,000.
    {"label": "pilot", "after": None, "more": 241_000, "idle": 0.0},
    # The pilot's end is not always in the checkpoint (no write without new evaluations): counts again,
    # the pilot ending at about 249,200 evaluations.
    {"label": "new coordinates", "after": None, "more": 249_000, "idle": 0.3},
    {"label": "proof", "after": None, "more": 270_000, "idle": 0.0},
    {"label": "after the proof: its diagnostics", "after": "proof", "more": 0, "idle": 0.3},
    {"label": "after the proof: geometry checks", "after": "proof", "more": 0, "idle": 6.0},
]


def interrupt_latencies(dim: int, budget, labels=None) -> list:
    """SIGINT at each of :data:`MOMENTS` (those named in ``labels``, if given) in a fresh `walktune tune` run of
    the d-dimensional model."""
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "model.py").write_text(MODEL.format(dim=dim))
        for moment in MOMENTS:
            if labels is not None and moment["label"] not in labels:
                continue
            results.append({"moment": moment["label"], **_interrupt_once(folder, dim, moment, budget)})
            print(json.dumps(results[-1]), flush=True)
    return results


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--child")
    parser.add_argument("--cases", default=",".join(CASES))
    parser.add_argument("--interrupt", action="store_true")
    parser.add_argument("--dim", type=int, default=300)
    parser.add_argument("--budget", type=int, default=None)
    parser.add_argument("--moments", default=None, help="with --interrupt: labels of MOMENTS, comma-separated")
    parser.add_argument("--hessian", default=None, help="dimensions, comma-separated: the Hessian's cost per evaluation")
    parser.add_argument("--mode-search", default=None, help="dimensions, comma-separated: the job's mode search alone")
    args = parser.parse_args()
    if args.mode_search:
        for dim in args.mode_search.split(","):
            print(json.dumps(mode_search_cost(int(dim))), flush=True)
        return
    if args.hessian:
        for dim in args.hessian.split(","):
            print(json.dumps(hessian_cost(int(dim))), flush=True)
        return
    if args.child:
        if args.child not in CASES:
            dim, _, budget = args.child.partition("-")
            CASES[args.child] = (int(dim), None if budget in ("", "None") else int(budget))
        dim, budget = CASES[args.child]
        print(json.dumps(run_case(dim, budget)))
        return
    if args.interrupt:
        interrupt_latencies(args.dim, args.budget, None if args.moments is None else args.moments.split(","))
        return
    for name in args.cases.split(","):
        print(json.dumps(in_child(name)), flush=True)


if __name__ == "__main__":
    main()
