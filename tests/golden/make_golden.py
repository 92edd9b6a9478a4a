"""Write the golden advice.json payloads that guard refactors of the tuning job.

The tuning job is a deterministic function of the seed, the options and the
values the model returns, so the same inputs must give the same advice.json,
bit for bit, whatever the code's layout. ``tests/test_golden.py`` runs the
cases below again and compares. A deliberate change of behaviour regenerates
them:

    .venv/bin/python tests/golden/make_golden.py

and says so in its commit message. Timing fields (seconds per evaluation,
worker busy share) are not deterministic and are left out.

Same inputs give the same floats only on the same arithmetic: the cases run in
a child process with the CPU kernels pinned (:data:`PINNED_ENV`: numpy's and
OpenBLAS's AVX-512 kernels off, one BLAS thread), with the numpy, scipy and
scikit-learn of ``constraints.txt`` (recorded in ``platform.json``). Without
the pin, the same commit gave different chains on two x86-64 machines: a
rounding difference of 1e-16 flipped one accept/reject decision.
"""

from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DEMOS = HERE.parent.parent / "demo_models"

#: advice.json fields that depend on the clock.
TIMING_KEYS = ("seconds_per_evaluation", "worker_busy_share")


def _demo(name: str):
    spec = importlib.util.spec_from_file_location(f"golden_{name}", DEMOS / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _linear_gaussian_with_prior(theta):
    """A linear-Gaussian likelihood informing 2 of 6 directions (the prior is given apart)."""
    theta = np.atleast_2d(theta)
    design = np.array([[1.0, 0.5, 0.0, 0.0, 0.2, 0.0], [0.0, 1.0, -0.4, 0.0, 0.0, 0.3]])
    data = np.array([0.7, -0.2])
    residual = theta @ design.T - data
    return -0.5 * np.sum(residual**2, axis=1) / 0.05**2


def _two_separated_gaussians(theta):
    """Equal-weight mixture of N((+3, 0), I) and N((-3, 0), I)."""
    from scipy.special import logsumexp

    theta = np.asarray(theta, dtype=float)
    return float(logsumexp([-0.5 * np.sum((theta - (3.0, 0.0)) ** 2), -0.5 * np.sum((theta + (3.0, 0.0)) ** 2)]))


def cases() -> dict:
    """name -> (log_density, start, tune options)."""
    sensor = _demo("sensor_calibration")
    source = _demo("source_activity")
    mirror = _demo("mirror_sensor")
    prior_names = [f"w{i}" for i in range(6)]
    return {
        "sensor_calibration": (
            sensor.log_posterior, list(sensor.PARAMETERS.values()),
            dict(names=list(sensor.PARAMETERS), bounds=sensor.BOUNDS, seed=2026),
        ),
        "source_activity": (
            source.log_posterior, list(source.PARAMETERS.values()),
            dict(names=list(source.PARAMETERS), bounds=source.BOUNDS, seed=7, budget=60_000),
        ),
        "mirror_sensor_current": (
            mirror.log_posterior, list(mirror.PARAMETERS.values()),
            dict(names=list(mirror.PARAMETERS), seed=11, budget=40_000, current_proposal=[0.05, 0.05]),
        ),
        "two_modes": (_two_separated_gaussians, [0.5, 0.1], dict(seed=5)),
        "prior_given_apart": (
            _linear_gaussian_with_prior, np.zeros(6),
            dict(names=prior_names, prior={n: ("normal", 0.0, 1.0) for n in prior_names}, seed=3, vectorized=True,
                 budget=60_000),
        ),
    }


def advice_payload(name: str) -> dict:
    import walktune

    log_density, start, options = cases()[name]
    payload = walktune.tune(log_density, start, **options).to_dict()
    for key in TIMING_KEYS:
        payload.pop(key, None)
    # Through JSON and back, as advice.json is written and read.
    return json.loads(json.dumps(payload, allow_nan=True))


#: numpy's dispatch targets above x86-64-v3, turned off where this processor has them.
AVX512_TARGETS = ("X86_V4", "AVX512_ICL", "AVX512_SPR", "AVX512_SKX", "AVX512_CLX", "AVX512_CNL", "AVX512F")


def pinned_env() -> dict:
    """The environment of the child process: OpenBLAS's Haswell kernels on one thread, no AVX-512 in numpy."""
    from numpy._core._multiarray_umath import __cpu_dispatch__, __cpu_features__

    off = [t for t in AVX512_TARGETS if t in __cpu_dispatch__ and __cpu_features__.get(t)]
    env = dict(os.environ, OPENBLAS_CORETYPE="Haswell", OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    if off:
        env["NPY_DISABLE_CPU_FEATURES"] = " ".join(off)
    else:
        env.pop("NPY_DISABLE_CPU_FEATURES", None)
    return env


def platform() -> dict:
    """Versions the recorded floats depend on."""
    import scipy
    import sklearn

    return {"numpy": np.__version__, "scipy": scipy.__version__, "scikit-learn": sklearn.__version__}


def pinned_payloads(names) -> dict:
    """name -> advice payload, computed in a child process under :func:`pinned_env`."""
    root = str(HERE.parent.parent)
    env = pinned_env()
    env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, __file__, "--print", *names], env=env, check=True, capture_output=True,
                         text=True, cwd=root)
    return json.loads(out.stdout)


def main(names) -> None:
    if names[:1] == ["--print"]:
        print(json.dumps({name: advice_payload(name) for name in names[1:]}, allow_nan=True))
        return
    names = names or sorted(cases())
    for name, payload in pinned_payloads(names).items():
        (HERE / f"{name}.json").write_text(json.dumps(payload, indent=1, allow_nan=True) + "\n")
        print(f"wrote {name}.json")
    (HERE / "platform.json").write_text(json.dumps(platform(), indent=1) + "\n")


if __name__ == "__main__":
    main(sys.argv[1:])
