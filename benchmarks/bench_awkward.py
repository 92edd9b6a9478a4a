"""walktune on awkward posteriors with exact answers: right numbers, a measured-best recommendation, or an alarm.

    python benchmarks/bench_awkward.py [--targets a,b,...] [--quick] [--seed N] [--json FILE]

For each target of benchmarks/awkward_targets.py (exact answers from closed
forms, quadrature or a cached reference run; see that module):

1. run ``walktune.tune`` with its default options and a fixed seed (the
   log-density is given as a batch function, ``vectorized=True``; positive
   parameters are given their bound, as a user would);
2. compare the posterior table (``posterior_mean``, ``posterior_mean_mcse``,
   ``posterior_sd``: all from one run, the recommended one, named by
   ``posterior_run``) with the exact answers: means within 4 reported MCSE,
   widened by the reference's own MCSE where the answer comes from a reference
   run (an MCSE above sd / 10, an ESS below 100, fails), sds within 30%;
3. run, with the plain sampler of benchmarks/plain_rwm.py (not walktune's
   engine), three fixed proposals on equal evaluation budgets from exact
   (stationary) draws: the option walktune recommends
   (``TuneResult.recommended``; a row in the new coordinates is run as a plain
   random walk in z on the log-density at ``reparam.from_sampler(z)`` plus the
   log-Jacobian and measured in the user's parameters; the reduced-basis row,
   which needs independence proposals, is replaced by the tuned covariance and
   marked), the oracle per-parameter steps ``2.38 / sqrt(d)`` times the exact
   marginal sds (Roberts, Gelman and Gilks 1997), and walktune's tuned
   covariance; the efficiency of each is its minimum bulk ESS over parameters
   (Vehtari et al. 2021, via walktune.diagnostics) per evaluation;
4. record the findings walktune raised.

A target passes when (where a fixed proposal can mix) means and sds are right
and the recommendation reaches at least 0.8 times the oracle's efficiency, or
(where no fixed proposal can mix, a funnel) a warn/critical funnel finding is
raised. Prints a markdown table for docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import datetime
import json
import sys
import time
import traceback
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import awkward_targets as A  # noqa: E402
from plain_rwm import run_chains  # noqa: E402

import walktune  # noqa: E402
from walktune import diagnostics as D  # noqa: E402

#: The issue's criteria: means within 4 MCSE, sds within 30%, recommendation >= 0.8 x the oracle.
MEAN_MCSE_MULTIPLE = 4.0
SD_TOLERANCE = 0.30
MIN_EFFICIENCY_RATIO = 0.8
#: A reported mean whose MCSE exceeds sd / sqrt(100) rests on an ESS below 100: too little to check
#: against anything (common practice: Vehtari et al. 2021 ask for a bulk ESS of 100 per chain; this
#: floor is a quarter of that for walktune's 4 chains). Without it, chains stuck in different modes
#: pass "within 4 MCSE" because their MCSE is as large as the error.
MIN_REPORTED_ESS = 100


def run_settings(dim: int, quick: bool) -> tuple[int, int]:
    """Chains and steps per chain of each efficiency run (equal budgets for all three proposals)."""
    # Few long chains: a run needs diagnostics.IACTS_FOR_PRECISE_ESS IACTs over its chains for a precise ESS, and slow proposals have long IACTs.
    return (8, max(5000, 500 * dim)) if quick else (8, max(40000, 4000 * dim))


def tune_target(target: A.Target, seed: int):
    """walktune.tune with its default options on ``target``; returns the result or the exception it raised."""
    try:
        return walktune.tune(target.log_density, target.start, names=target.names, bounds=target.bounds or None,
                             seed=seed, vectorized=True)
    except Exception as error:  # noqa: BLE001 - a crash is a benchmark result
        return error


def recommended_proposal(result) -> tuple[np.ndarray, str, object]:
    """The proposal walktune recommends, how it was read, and the map it runs through (or None).

    ``TuneResult.recommended`` names a comparison row and its coordinates:

    * in the user's parameters (``coordinates == "parameters"``): the row's
      covariance (``recommended_proposal``), run as is;
    * in the new coordinates (``reparam.json``): ``recommended_proposal`` is a
      covariance in z and the map is ``TuneResult.reparam``; the plain sampler
      walks z (see :func:`efficiency`);
    * the reduced-basis row mixes a random walk with independence proposals
      from a fitted Gaussian, which the plain random-walk sampler does not do:
      the tuned covariance is run instead and the row says so.

    Without ``recommended`` (older walktune): ``proposal_covariance``.
    """
    recommended = getattr(result, "recommended", None)
    if recommended is None:
        return result.proposal_covariance, "proposal_covariance (no `recommended` attribute)", None
    name = str(recommended.proposal)
    if name == "reduced-basis":
        return (result.proposal_covariance, "recommended = reduced-basis (independence proposals: not runnable by the "
                "plain random-walk sampler; tuned covariance run instead)", None)
    cov = getattr(result, "recommended_proposal", None)
    if cov is None:
        return (result.proposal_covariance, f"recommended = {name} (no proposal given; tuned covariance run instead)",
                None)
    if recommended.coordinates != "parameters":
        how = f"recommended = {name} (random walk in z of {recommended.coordinates})"
        return np.asarray(cov, float), how, result.reparam
    return np.asarray(cov, float), f"recommended = {name}", None


def check_moments(target: A.Target, result) -> dict:
    """Reported means within 4 reported MCSE (plus the exact answer's own MC error) and sds within 30%.

    The posterior table comes from one run, the recommended one
    (``TuneResult.posterior_run``): ``posterior_mean``, ``posterior_mean_mcse``
    and ``posterior_sd`` are its draws' figures. A mean counts as right only
    when its MCSE is at most ``sd / sqrt(MIN_REPORTED_ESS)``.
    """
    mean = np.asarray(result.posterior_mean, float)
    mcse = np.asarray(result.posterior_mean_mcse, float)
    reported_sd = np.asarray(result.posterior_sd, float)
    allowed = MEAN_MCSE_MULTIPLE * np.sqrt(mcse**2 + target.mean_error**2)
    z = np.abs(mean - target.mean) / np.sqrt(mcse**2 + target.mean_error**2)
    sd_ratio = reported_sd / target.sd
    mcse_in_sds = mcse / target.sd
    informative = bool(np.all(mcse_in_sds <= 1 / np.sqrt(MIN_REPORTED_ESS)))
    means_ok = bool(informative and np.all(np.isfinite(allowed)) and np.all(np.abs(mean - target.mean) <= allowed))
    sds_ok = bool(np.all(np.isfinite(sd_ratio)) and np.all(np.abs(sd_ratio - 1) <= SD_TOLERANCE))
    rhat = getattr(result, "posterior_rhat", None)
    max_rhat = float(np.nanmax(rhat)) if rhat is not None and np.any(np.isfinite(rhat)) else float("nan")
    return {"means_ok": means_ok, "sds_ok": sds_ok, "mean_z": z.tolist(), "sd_ratio": sd_ratio.tolist(),
            "mcse_in_sds": mcse_in_sds.tolist(), "posterior_run": str(getattr(result, "posterior_run", "")),
            "posterior_max_rhat": max_rhat,
            "reported_mean": mean.tolist(), "reported_mcse": mcse.tolist(), "reported_sd": reported_sd.tolist()}


def stationary_starts(target: A.Target, chains: int, rng: np.random.Generator) -> np.ndarray:
    """``chains`` exact draws at which the log-density is finite."""
    draws = target.exact_draws(4 * chains, rng)
    finite = draws[np.isfinite(target.log_density(draws))]
    return finite[:chains]


def _sampler_space(target: A.Target, reparam):
    """The log-density of z, ``log p(theta(z)) + log |det d theta / d z|``, for a plain walk in z."""

    def log_density_z(z):
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            theta, log_jacobian = reparam.from_sampler_with_jacobian(z)
            lp = np.asarray(target.log_density(theta), float) + log_jacobian
        return np.where(np.all(np.isfinite(theta), axis=-1), lp, -np.inf)

    return log_density_z


def efficiency(target: A.Target, cov, chains: int, steps: int, seed: int, reparam=None) -> dict:
    """Min bulk ESS per evaluation of plain fixed-proposal chains started from exact draws.

    With ``reparam`` (walktune's map to new coordinates), the chains are a
    plain random walk in z with covariance ``cov`` on the log-density of z
    (:func:`_sampler_space`), started at the exact draws' z, and measured in
    the user's parameters (``reparam.from_sampler`` of the draws): one
    evaluation of the target per proposal, as in the user's parameters.

    The relative standard error is Sokal's (1997) approximation for a window of
    about 5 IACTs, ``sqrt(2 (2 M + 1) / N)`` with ``M = 5 tau_max``, ``N`` all draws.
    """
    rng = np.random.default_rng(seed)
    starts = stationary_starts(target, chains, rng)
    if reparam is None:
        draws, acceptance = run_chains(target.log_density, starts, cov, steps, rng)
    else:
        z_draws, acceptance = run_chains(_sampler_space(target, reparam), reparam.to_sampler(starts), cov, steps, rng)
        draws = reparam.from_sampler(z_draws)
    ess = D.bulk_ess(draws)
    values = np.where(np.isfinite(np.asarray(ess)), np.asarray(ess), 0.0)
    worst = int(np.argmin(values))
    n_total = chains * steps
    tau = n_total / max(values[worst], 1e-12)
    return {
        "ess_per_eval": float(values[worst] / n_total), "acceptance": float(acceptance), "worst": target.names[worst],
        "reliable": not bool(np.any(ess.too_short)), "relative_se": float(np.sqrt(2 * (10 * tau + 1) / n_total)),
        "evaluations": n_total, "in_new_coordinates": reparam is not None,
    }


def exact_covariance_proposal(target: A.Target) -> np.ndarray:
    """``2.38^2 / d`` times the exact posterior covariance (from 100,000 exact or reference draws).

    The optimal Gaussian proposal for a Gaussian target (Roberts, Gelman and
    Gilks 1997): what a perfect covariance estimate would give, for scale.
    """
    draws = target.exact_draws(100_000, np.random.default_rng(7))
    return 2.38**2 / target.dim * np.atleast_2d(np.cov(draws.T))


def _funnel_alarm(findings) -> bool:
    return any(f.kind in ("funnel", "varying-scale") or "funnel" in f.kind for f in findings
               if f.severity in ("warn", "critical"))


def evaluate_target(name: str, quick: bool = False, seed: int = 1, steps: int | None = None,
                    with_exact: bool = True) -> dict:
    """Tune ``name``, check its numbers, run the proposals by the plain sampler; one row of the table.

    ``steps`` overrides the steps per chain of :func:`run_settings`;
    ``with_exact=False`` skips the exact-covariance run (it is for scale only).
    """
    target = A.build(name)
    t0 = time.perf_counter()
    result = tune_target(target, seed)
    row = {"target": name, "description": target.description, "dim": target.dim, "source": target.source,
           "fixed_can_mix": target.fixed_can_mix, "tune_seconds": time.perf_counter() - t0}
    if isinstance(result, Exception):
        row.update(crashed=f"{type(result).__name__}: {result}", passed=False,
                   trace="".join(traceback.format_exception_only(type(result), result)).strip())
        return row
    row.update(crashed=None, total_evaluations=int(result.total_evaluations),
               findings=[f"{f.kind}:{f.severity}" for f in result.findings],
               pilot_converged=bool(result.pilot.converged), **check_moments(target, result))
    chains, default_steps = run_settings(target.dim, quick)
    steps = default_steps if steps is None else int(steps)
    cov, how, reparam = recommended_proposal(result)
    oracle = np.diag((2.38 / np.sqrt(target.dim) * target.sd) ** 2)
    # The same seed for every proposal; the recommended run is reused when it is the tuned covariance.
    runs = {"recommended": efficiency(target, cov, chains, steps, seed=seed + 10, reparam=reparam),
            "oracle": efficiency(target, oracle, chains, steps, seed=seed + 10)}
    same = reparam is None and np.array_equal(cov, result.proposal_covariance)
    runs["tuned_covariance"] = runs["recommended"] if same else efficiency(
        target, result.proposal_covariance, chains, steps, seed=seed + 10)
    if with_exact:
        runs["exact_covariance"] = efficiency(target, exact_covariance_proposal(target), chains, steps, seed=seed + 10)
    base = runs["oracle"]["ess_per_eval"]
    row.update(recommended_as=how, recommended_row=str(getattr(getattr(result, "recommended", None), "proposal", "")),
               runs=runs)
    for key in runs:
        if key == "oracle":
            continue
        row[f"{key}_vs_oracle"] = runs[key]["ess_per_eval"] / base if base > 0 else float("inf")
        row[f"{key}_ratio_se"] = float(np.hypot(runs[key]["relative_se"], runs["oracle"]["relative_se"]))
    if target.fixed_can_mix:
        row["passed"] = row["means_ok"] and row["sds_ok"] and row["recommended_vs_oracle"] >= MIN_EFFICIENCY_RATIO
    else:
        row["passed"] = _funnel_alarm(result.findings)
    return row


def _ratio_cell(row, key) -> str:
    """``ratio +/- se``, starred when either run was too short for a reliable ESS (under diagnostics.IACTS_FOR_PRECISE_ESS IACTs over its chains)."""
    if key not in row["runs"]:
        return "-"
    value = row[f"{key}_vs_oracle"]
    reliable = row["runs"][key]["reliable"] and row["runs"]["oracle"]["reliable"]
    return f"{value:.2f} +/- {value * row[f'{key}_ratio_se']:.2f}{'' if reliable else '*'}"


def markdown_table(rows: list) -> str:
    lines = ["| target | d | recommended (table's run) | means ok | sds ok | recommended vs oracle "
             "| tuned covariance vs oracle | exact covariance vs oracle | total evaluations | findings | passes |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for row in rows:
        if row["crashed"]:
            lines.append(f"| {row['target']} | {row['dim']} | - | crash | crash | - | - | - | - "
                         f"| `{row['crashed'][:80]}` | no |")
            continue
        worst_z, worst_sd = max(row["mean_z"]), row["sd_ratio"][int(np.argmax(np.abs(np.log(row["sd_ratio"]))))]
        findings = ", ".join(row["findings"]) or "none"
        fallback = " (run: tuned covariance)" if "instead" in row["recommended_as"] else ""
        lines.append(
            f"| {row['target']} | {row['dim']} | {row['recommended_row']}{fallback}; "
            f"R-hat {row['posterior_max_rhat']:.3g} "
            f"| {'yes' if row['means_ok'] else 'no'} (max {worst_z:.1f} MCSE; "
            f"MCSE up to {max(row['mcse_in_sds']):.2g} sd) "
            f"| {'yes' if row['sds_ok'] else 'no'} (worst x{worst_sd:.2f}) "
            f"| {_ratio_cell(row, 'recommended')} "
            f"| {_ratio_cell(row, 'tuned_covariance')} | {_ratio_cell(row, 'exact_covariance')} "
            f"| {row['total_evaluations']} | {findings} "
            f"| {'yes' if row['passed'] else 'no'}{'' if row['fixed_can_mix'] else ' (funnel: alarm needed)'} |"
        )
    return "\n".join(lines)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--targets", default="", help="comma-separated target names (default: all)")
    parser.add_argument("--quick", action="store_true", help="shorter efficiency runs (8 chains, max(5000, 500 d) steps)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--json", default=None, help="also write every row as JSON here")
    args = parser.parse_args(argv)
    names = [n.strip() for n in args.targets.split(",") if n.strip()] or A.TARGET_NAMES
    unknown = sorted(set(names) - set(A.TARGET_NAMES))
    if unknown:
        parser.error(f"unknown targets {', '.join(unknown)}; known: {', '.join(A.TARGET_NAMES)}")
    rows = []
    for name in names:
        row = evaluate_target(name, quick=args.quick, seed=args.seed)
        rows.append(row)
        print(f"{name}: {'crash' if row['crashed'] else 'done'} in {row['tune_seconds']:.1f} s (tune)", file=sys.stderr,
              flush=True)
    print(f"{datetime.date.today()} python benchmarks/bench_awkward.py{' --quick' if args.quick else ''}"
          f"{' --targets ' + args.targets if args.targets else ''} --seed {args.seed}\n")
    print(markdown_table(rows))
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1, default=float))


if __name__ == "__main__":
    main()
