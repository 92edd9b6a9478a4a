"""Read the draws of a folder written by ``walktune tune``.

A tuning run's folder holds ``advice.json`` and ``draws.npz``: one array per
proof run, shaped (chains, steps, d), keyed by the run's name with ``-``
written ``_`` (``tuned_covariance``), the pilot's stages one after another
(``pilot``), and ``parameter_names``. One run is read: the one asked for, or
by default the run advice.json recommends, else the tuned covariance run.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .chainfiles import ChainData
from .errors import WalktuneError

NAMES_KEY = "parameter_names"
DEFAULT_RUN = "tuned-covariance"


def _key(run: str) -> str:
    return run.replace("-", "_")


def _draws_file(path: Path) -> Path | None:
    """draws.npz of a tune folder (the folder itself or the file); None when ``path`` is not one."""
    if path.is_dir():
        candidate = path / "draws.npz"
        if not candidate.exists():
            raise WalktuneError(f"{path} is a folder without draws.npz; give a folder written by walktune tune.")
        return candidate
    if path.suffix.lower() != ".npz" or not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as archive:
            keys = set(archive.files)
    except (ValueError, OSError, EOFError):
        return None  # the general reader gives the error
    # walktune's layout: names plus several draws arrays, or advice.json beside the file.
    if NAMES_KEY in keys and (len(keys) > 2 or (path.parent / "advice.json").exists()):
        return path
    return None


def is_tune_output(paths) -> bool:
    """True when ``paths`` is one folder written by ``walktune tune`` or its draws.npz."""
    paths = [Path(p) for p in ([paths] if isinstance(paths, (str, Path)) else paths)]
    return len(paths) == 1 and _draws_file(paths[0]) is not None


def _recommended(folder: Path) -> str | None:
    advice = folder / "advice.json"
    if not advice.exists():
        return None
    try:
        payload = json.loads(advice.read_text())
    except (OSError, ValueError):
        raise WalktuneError(f"{advice} is not readable JSON; give --run to choose a run.") from None
    recommended = payload.get("recommended") if isinstance(payload, dict) else None
    return recommended.get("proposal") if isinstance(recommended, dict) else None


def _refuse_thinned_pilot(folder: Path, run: str) -> None:
    """The pilot's stages stored every k-th state (advice.json ``pilot_draws_kept_every``) with k differing
    between stages: an IACT in stored draws would be in no one unit of steps, so they are not inspected."""
    advice = folder / "advice.json"
    if _key(run) != "pilot" or not advice.exists():
        return
    try:
        kept = json.loads(advice.read_text()).get("pilot_draws_kept_every") or []
    except (OSError, ValueError, AttributeError):
        return
    if any(k != 1 for k in kept):
        raise WalktuneError(
            f"the pilot's draws in {folder} were stored thinned, every {min(kept)}-th to {max(kept)}-th state by "
            "stage (pilot_draws_kept_every in advice.json), so their IACT and ESS cannot be given in steps; "
            "inspect a proof run instead (--run tuned-covariance)."
        )


def read_tune_output(path, run: str | None = None) -> tuple[ChainData, str]:
    """The draws of one run of a ``walktune tune`` folder, with the parameter names.

    Parameters
    ----------
    path : str or Path
        The folder, or its ``draws.npz``.
    run : str, optional
        A run's name as advice.json's comparison gives it (``step-sizes``,
        ``tuned-covariance``, ``pilot``, ...). Default: the recommended run,
        else ``tuned-covariance``.

    Returns
    -------
    data : ChainData
        Draws of shape (chains, steps, d) and the names of the d parameters.
    run : str
        The name of the run read.
    """
    path = Path(path)
    draws_file = _draws_file(path)
    if draws_file is None:
        raise WalktuneError(f"{path} is not a folder written by walktune tune nor its draws.npz.")
    with np.load(draws_file, allow_pickle=False) as archive:
        keys = [k for k in archive.files if k != NAMES_KEY]
        runs = {k: k.replace("_", "-") for k in keys}
        if run is None:
            recommended = _recommended(draws_file.parent)
            run = recommended if recommended is not None and _key(recommended) in runs else DEFAULT_RUN
        if _key(run) not in runs:
            raise WalktuneError(f"{draws_file} has no run {run!r}; runs: {', '.join(sorted(runs.values()))}.")
        _refuse_thinned_pilot(draws_file.parent, run)
        draws = archive[_key(run)]
        names = [str(n) for n in archive[NAMES_KEY].reshape(-1)] if NAMES_KEY in archive.files else None
    if draws.ndim != 3 or draws.dtype.kind not in "fiu":
        raise WalktuneError(f"{draws_file}: run {run!r} is not numeric draws shaped (chains, steps, params).")
    if names is None or len(names) != draws.shape[2]:
        names = [f"theta[{i}]" for i in range(draws.shape[2])]
    return ChainData(draws=draws, names=names, sources=[str(draws_file)], layout="chains,draws,params"), run
