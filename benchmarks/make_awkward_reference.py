"""Long reference runs for the awkward targets without a closed form; writes benchmarks/awkward_reference.npz.

    python benchmarks/make_awkward_reference.py [--targets a,b,...]

With ``--targets``, only those targets are run again and their entries
replaced; every other target's arrays are copied from the existing file
unchanged (the zip container is written anew, so the file's bytes differ,
but each array is the one that was there).

For each target of ``awkward_targets.REFERENCE_SPECS``: a plain random-walk
Metropolis sampler (benchmarks/plain_rwm.py, not walktune's engine) in log
coordinates for positive parameters (``z = log x``, Jacobian ``sum z`` added),
started around the optimum of the log-density in z with BFGS's inverse
Hessian as the first proposal shape; four warm-up stages re-estimate the
proposal as ``2.38^2 / d`` times the draws' covariance (Roberts, Gelman and
Gilks 1997; Haario, Saksman and Tamminen 2001); then one long fixed-proposal
run of 32 chains. The run is accepted only when every parameter's
rank-normalised split R-hat is below 1.01 (Vehtari et al. 2021). Saved per
target: mean and sd in the user's parameters, their Monte Carlo standard
errors (mean: sd / sqrt(ESS); sd: delta method on the squared deviations),
max R-hat, min ESS and 20,000 draws for stationary starts.

The logistic target's optimum is also checked against scikit-learn's L2
LogisticRegression (C = prior variance, no separate intercept).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import optimize

sys.path.insert(0, str(Path(__file__).resolve().parent))
import awkward_targets as A  # noqa: E402
from plain_rwm import run_chains  # noqa: E402

from walktune import diagnostics as D  # noqa: E402

CHAINS = 32
WARMUP_STEPS = 3000
FINAL_STEPS = 40000
KEEP_DRAWS = 20000


def _in_log_coordinates(log_density, positive):
    def batch(z):
        z = np.atleast_2d(z)
        x = np.where(positive, np.exp(np.where(positive, z, 0.0)), z)
        return np.asarray(log_density(x)) + np.sum(np.where(positive, z, 0.0), axis=1)

    return batch


def _optimum(batch, z0):
    fit = optimize.minimize(lambda z: -batch(z[None])[0], z0, method="Nelder-Mead",
                            options={"maxiter": 20000, "xatol": 1e-8, "fatol": 1e-10})
    fit = optimize.minimize(lambda z: -batch(z[None])[0], fit.x, method="BFGS")
    return fit.x, np.atleast_2d(fit.hess_inv)


def reference_run(name: str, seed: int) -> dict:
    spec = A.REFERENCE_SPECS[name]
    positive = np.array(spec["positive"])
    batch = _in_log_coordinates(A.reference_log_density(name), positive)
    z0 = np.where(positive, np.log(np.where(positive, spec["start"], 1.0)), spec["start"])
    mode, cov = _optimum(batch, z0)
    d = mode.size
    rng = np.random.default_rng(seed)
    start = mode + rng.standard_normal((CHAINS, d)) @ np.linalg.cholesky(cov).T
    start = np.where(np.isfinite(batch(start))[:, None], start, mode)
    proposal = 2.38**2 / d * cov
    for _ in range(4):
        draws, acceptance = run_chains(batch, start, proposal, WARMUP_STEPS, rng)
        proposal = 2.38**2 / d * np.cov(draws[:, WARMUP_STEPS // 2 :].reshape(-1, d).T)
        start = draws[:, -1]
    draws, acceptance = run_chains(batch, start, proposal, FINAL_STEPS, rng)
    rhat_z = D.rhat(draws)
    x = np.where(positive, np.exp(np.where(positive, draws, 0.0)), draws)
    rhat_x = D.rhat(x)
    flat = x.reshape(-1, d)
    mean, sd = flat.mean(axis=0), flat.std(axis=0, ddof=1)
    ess = np.asarray(D.ess(x))
    square_ess = np.asarray(D.ess((x - mean) ** 2))
    square_sd = ((flat - mean) ** 2).std(axis=0, ddof=1)
    keep = flat[rng.choice(flat.shape[0], KEEP_DRAWS, replace=False)]
    return {
        "mode_z": mode, "acceptance": acceptance, "mean": mean, "sd": sd, "mean_mcse": sd / np.sqrt(ess),
        "sd_mcse": square_sd / np.sqrt(square_ess) / (2 * sd), "max_rhat": max(rhat_z.max(), rhat_x.max()),
        "min_ess": ess.min(), "draws_total": flat.shape[0], "draws": keep,
    }


def _check_logistic_mode(mode):
    """The optimum should equal scikit-learn's L2 logistic fit with C = prior variance (100)."""
    from sklearn.linear_model import LogisticRegression

    _, design, label = A.tumour_logistic_log_density()
    sk = LogisticRegression(C=100.0, fit_intercept=False, tol=1e-10, max_iter=100000).fit(design, label)
    return float(np.max(np.abs(sk.coef_[0] - mode) / np.maximum(np.abs(mode), 1e-3)))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--targets", default="", help="comma-separated targets to run again (default: all)")
    args = parser.parse_args(argv)
    chosen = [n.strip() for n in args.targets.split(",") if n.strip()] or list(A.REFERENCE_SPECS)
    unknown = sorted(set(chosen) - set(A.REFERENCE_SPECS))
    if unknown:
        parser.error(f"unknown targets {', '.join(unknown)}; known: {', '.join(A.REFERENCE_SPECS)}")
    out = {}
    if args.targets and A.REFERENCE_FILE.exists():
        with np.load(A.REFERENCE_FILE) as old:
            out = {key: old[key] for key in old.files if key.split("/")[0] not in chosen}
    # The seed of each target is fixed by its place in REFERENCE_SPECS, whichever targets are run.
    for seed, name in enumerate(A.REFERENCE_SPECS, start=100):
        if name not in chosen:
            continue
        t0 = time.perf_counter()
        ref = reference_run(name, seed)
        if ref["max_rhat"] >= 1.01:
            raise SystemExit(f"{name}: reference run not converged (max R-hat {ref['max_rhat']:.4f})")
        for key, value in ref.items():
            out[f"{name}/{key}"] = np.asarray(value)
        line = (f"{name}: {time.perf_counter() - t0:.0f} s, acceptance {ref['acceptance']:.2f}, max R-hat "
                f"{ref['max_rhat']:.4f}, min ESS {ref['min_ess']:.0f}\n  mean {np.array2string(ref['mean'], precision=5)}"
                f"\n  sd   {np.array2string(ref['sd'], precision=5)}\n  mean MCSE / sd "
                f"{np.array2string(ref['mean_mcse'] / ref['sd'], precision=4)}")
        if name == "tumour_logistic":
            line += f"\n  scikit-learn L2 fit vs optimum: max relative difference {_check_logistic_mode(ref['mode_z']):.2e}"
        print(line, flush=True)
    partial = A.REFERENCE_FILE.with_name(A.REFERENCE_FILE.stem + ".partial.npz")
    np.savez_compressed(partial, **out)
    partial.replace(A.REFERENCE_FILE)  # atomic: the old file or the new one, never half of one
    print(f"wrote {A.REFERENCE_FILE}")


if __name__ == "__main__":
    main()
