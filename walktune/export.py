"""Files a user's own sampler can read: advice.json and the proposal covariance.

Output folder of a tuning run:

* ``advice.json``: everything, schema ``walktune.advice/1`` (docs/advice-schema.md);
* ``proposal_covariance.npy`` and ``proposal_covariance.csv`` (header row of names);
* ``step_sizes.csv``: one row of per-parameter proposal sds, header of names;
* ``draws.npz``: the proof runs' draws, one array per proposal shaped (chains, steps, d),
  the pilot's stages one after another (``pilot``), plus ``parameter_names``.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .constants import ADVICE_SCHEMA
from .errors import WalktuneError
from .io import csv_bytes, json_bytes, npy_bytes, npz_bytes, write_folder

SUPPORTED_SCHEMAS = (ADVICE_SCHEMA,)


def with_provenance(payload: dict, produced_by: dict | None) -> dict:
    """advice.json's payload with ``produced_by``: what wrote it (docs/advice-schema.md)."""
    from . import __version__

    record = {"command": "Python API", "model_file": None, "model_sha256": None, "options": None}
    record.update(produced_by or {})
    record["walktune_version"] = __version__
    return {**payload, "produced_by": record}


def result_files(result, produced_by: dict | None = None) -> dict:
    """name -> bytes of a tuning run's output folder; ``produced_by`` describes the command that ran it."""
    names = result.parameter_names
    arrays = {name.replace("-", "_"): run.draws for name, run in result.runs.items()}
    if result.pilot.all_draws:
        # Every pilot stage in order (stages differ in proposal; see advice.json for the stages).
        arrays["pilot"] = np.concatenate(result.pilot.all_draws, axis=1)
    arrays["parameter_names"] = np.array(names)
    files = {
        "advice.json": json_bytes(with_provenance(result.to_dict(), produced_by)),
        "proposal_covariance.npy": npy_bytes(result.proposal_covariance),
        "proposal_covariance.csv": csv_bytes(result.proposal_covariance, names),
        "step_sizes.csv": csv_bytes(result.step_sizes[None, :], names),
        "draws.npz": npz_bytes(arrays),
    }
    if result.reparam is not None:
        files["reparam.json"] = json_bytes(result.reparam.to_dict())
    return files


def load_advice(path) -> dict:
    """Read an advice.json (or the folder holding one) and check its schema."""
    path = Path(path)
    if path.is_dir():
        path = path / "advice.json"
    if not path.exists():
        raise WalktuneError(f"no advice file at {path}; point at a walktune output folder or its advice.json.")
    try:
        payload = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise WalktuneError(f"{path} is not valid JSON ({error.msg if hasattr(error, 'msg') else error}).") from None
    schema = payload.get("schema") if isinstance(payload, dict) else None
    if schema not in SUPPORTED_SCHEMAS:
        raise WalktuneError(
            f"{path} has schema {schema!r}; this walktune reads {', '.join(SUPPORTED_SCHEMAS)}. "
            "Re-run `walktune tune` with this version."
        )
    _check_payload(payload, path)
    return payload


#: Keys every advice.json of a finished run has, whatever its source (docs/advice-schema.md).
REQUIRED_KEYS = ("source", "parameter_names", "posterior_mean", "posterior_covariance", "proposal_covariance",
                 "step_sizes", "expected_acceptance", "effective_dimension", "spectrum_decades",
                 "correlation_eigenvalues", "predicted_slowdown", "target_ess", "evaluations_needed", "comparison",
                 "findings")


def _check_payload(payload: dict, path: Path) -> None:
    """The keys and shapes that readers rely on; a one-line error names what is missing or wrong."""
    missing = [key for key in REQUIRED_KEYS if key not in payload]
    if missing:
        raise WalktuneError(
            f"{path} lacks {', '.join(missing[:4])}{', ...' if len(missing) > 4 else ''}: it is not a whole advice.json "
            "of a finished run; write it again with `walktune tune` or `walktune inspect --out`."
        )
    names = payload["parameter_names"]
    d = len(names) if isinstance(names, list) else -1
    try:
        shapes_ok = (
            d > 0 and all(isinstance(n, str) for n in names)
            and np.asarray(payload["proposal_covariance"], dtype=float).shape == (d, d)
            and np.asarray(payload["posterior_covariance"], dtype=float).shape == (d, d)
            and np.asarray(payload["step_sizes"], dtype=float).shape == (d,)
        )
    except (TypeError, ValueError):
        shapes_ok = False
    if not shapes_ok:
        raise WalktuneError(
            f"{path} is damaged: parameter_names must be a list of names, proposal_covariance and "
            "posterior_covariance d x d numbers and step_sizes d numbers; write it again with walktune."
        )


EXPORT_FORMATS = ("npy", "csv", "json", "python")


def export_advice(source, destination, fmt: str) -> Path:
    """Convert the proposal covariance in an advice.json to another format.

    Parameters
    ----------
    source : path
        advice.json or its folder.
    destination : path
        The file to write (atomically).
    fmt : {"npy", "csv", "json", "python"}
        ``json`` writes a small file with names, step sizes and covariance only;
        ``python`` writes a module defining ``PARAMETER_NAMES``, ``PROPOSAL_COVARIANCE``
        and ``STEP_SIZES`` as plain lists.
    """
    if fmt not in EXPORT_FORMATS:
        raise WalktuneError(f"unknown export format {fmt!r}; choose one of {', '.join(EXPORT_FORMATS)}.")
    payload = load_advice(source)
    names = payload["parameter_names"]
    cov = np.asarray(payload["proposal_covariance"], dtype=float)
    steps = payload.get("step_sizes")
    if fmt == "npy":
        data = npy_bytes(cov)
    elif fmt == "csv":
        data = csv_bytes(cov, names)
    elif fmt == "json":
        data = json_bytes({"parameter_names": names, "proposal_covariance": cov.tolist(), "step_sizes": steps})
    else:
        data = (
            '"""Proposal tuned by walktune: propose theta + N(0, PROPOSAL_COVARIANCE)."""\n\n'
            f"PARAMETER_NAMES = {names!r}\n"
            f"PROPOSAL_COVARIANCE = {cov.tolist()!r}\n"
            f"STEP_SIZES = {steps!r}\n"
        ).encode()
    destination = Path(destination)
    write_folder(destination.parent, {destination.name: data})
    return destination
