"""Files a user's own sampler can read: advice.json and the proposal covariance.

Output folder of a tuning run:

* ``advice.json``: everything, schema ``walktune.advice/1`` (docs/advice-schema.md);
* ``proposal_covariance.npy`` and ``proposal_covariance.csv`` (header row of names);
* ``step_sizes.csv``: one row of per-parameter proposal sds, header of names;
* ``recommended_proposal.npy`` and ``.csv``: the proposal covariance of the
  recommended option (advice.json ``recommended``), whichever it is: the tuned
  covariance, per-parameter steps as a diagonal covariance, one step size, your
  current proposal, or, for the runs in new coordinates, the covariance in the
  sampler coordinates of ``sampling_map.json`` (headed ``z[i]``);
* ``draws.npz``: the proof runs' draws, one array per proposal shaped (chains, steps, d)
  (every ``proof_draws_kept_every``-th state of advice.json when a run would
  keep more than 128 MiB of draws: :func:`walktune.stages.proof_thinning`),
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
        # Every pilot stage in order (stages differ in proposal), each stage's stored draws: every
        # pilot_draws_kept_every[i]-th state of stage i (advice.json).
        arrays["pilot"] = np.concatenate(result.pilot.all_draws, axis=1)
    arrays["parameter_names"] = np.array(names)
    files = {
        "advice.json": json_bytes(with_provenance(result.to_dict(), produced_by)),
        "proposal_covariance.npy": npy_bytes(result.proposal_covariance),
        "proposal_covariance.csv": csv_bytes(result.proposal_covariance, names),
        "step_sizes.csv": csv_bytes(result.step_sizes[None, :], names),
        "draws.npz": npz_bytes(arrays),
    }
    if result.recommended_proposal is not None:
        in_new_coordinates = result.recommended is not None and result.recommended.coordinates != "parameters"
        header = [f"z[{i}]" for i in range(len(names))] if in_new_coordinates else names
        files["recommended_proposal.npy"] = npy_bytes(result.recommended_proposal)
        files["recommended_proposal.csv"] = csv_bytes(result.recommended_proposal, header)
    if result.reparam is not None:
        files["sampling_map.json"] = json_bytes(result.reparam.to_dict())
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


def _recommended_proposal(payload: dict) -> tuple:
    """The recommended option's name, covariance, coordinates and (for a diagonal one) step sizes."""
    recommended = payload.get("recommended") or {}
    if recommended.get("proposal_covariance") is None:
        raise WalktuneError("this advice.json holds no recommended proposal (written by an older walktune, or by "
                            "an inspection); export the tuned covariance without --recommended.")
    cov = np.asarray(recommended["proposal_covariance"], dtype=float)
    diagonal = np.allclose(cov, np.diag(np.diag(cov)))
    steps = np.sqrt(np.diag(cov)).tolist() if diagonal else None
    return recommended["proposal"], cov, recommended.get("coordinates", "parameters"), steps


def export_advice(source, destination, fmt: str, recommended: bool = False) -> Path:
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
    recommended : bool, default=False
        Export the recommended option's proposal (advice.json ``recommended``)
        instead of the tuned covariance; the json and python forms then also name
        it and the coordinates it runs in (``sampling_map.json`` for the new coordinates,
        whose columns are ``z[i]``). Step sizes are given only for a diagonal proposal.
    """
    if fmt not in EXPORT_FORMATS:
        raise WalktuneError(f"unknown export format {fmt!r}; choose one of {', '.join(EXPORT_FORMATS)}.")
    payload = load_advice(source)
    names = payload["parameter_names"]
    proposal, coordinates = "tuned-covariance", "parameters"
    if recommended:
        proposal, cov, coordinates, steps = _recommended_proposal(payload)
        if coordinates != "parameters":
            names = [f"z[{i}]" for i in range(len(names))]
    else:
        cov = np.asarray(payload["proposal_covariance"], dtype=float)
        steps = payload.get("step_sizes")
    if fmt == "npy":
        data = npy_bytes(cov)
    elif fmt == "csv":
        data = csv_bytes(cov, names)
    elif fmt == "json":
        extra = {"proposal": proposal, "coordinates": coordinates} if recommended else {}
        data = json_bytes({"parameter_names": names, **extra, "proposal_covariance": cov.tolist(), "step_sizes": steps})
    else:
        what = (f"The {proposal} proposal walktune recommends, in the coordinates of {coordinates}"
                if recommended else "Proposal tuned by walktune")
        data = (
            f'"""{what}: propose theta + N(0, PROPOSAL_COVARIANCE)."""\n\n'
            f"PARAMETER_NAMES = {names!r}\n"
            f"PROPOSAL_COVARIANCE = {cov.tolist()!r}\n"
            f"STEP_SIZES = {steps!r}\n"
        ).encode()
    destination = Path(destination)
    write_folder(destination.parent, {destination.name: data})
    return destination
