"""Reading the command line's option values: counts, lists, bounds, a current proposal, tune()'s arguments.

Each function raises :class:`walktune.errors.WalktuneError` with a one-line
message on bad input; the command line turns it into its error line.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import numpy as np

from .errors import WalktuneError


def parse_count(text: Optional[str], flag: str) -> Optional[int]:
    """A whole number given as 20000, 2e4 or 20_000."""
    if text is None:
        return None
    try:
        value = float(text)
    except ValueError:
        raise WalktuneError(f"{flag} {text!r} must be a whole number, e.g. 20000 or 2e4.") from None
    if not np.isfinite(value) or not value.is_integer() or value < 1:
        raise WalktuneError(f"{flag} {text!r} must be a whole number >= 1.")
    return int(text) if text.strip().lstrip("+").replace("_", "").isdigit() else int(value)


def split_list(text: Optional[str], what: str) -> Optional[list]:
    if text is None:
        return None
    parts = [p.strip() for p in text.replace(";", ",").split(",") if p.strip()]
    if not parts:
        raise WalktuneError(f"--{what} is empty; give comma-separated values.")
    return parts


def parse_bound(text: str) -> tuple:
    name, sep, rng = text.partition("=")
    low, colon, high = rng.partition(":")
    if not sep or not colon or not name.strip():
        raise WalktuneError(f"--bound {text!r} must look like NAME=LOW:HIGH (use -inf or inf for an open side).")
    try:
        lo = float(low) if low.strip() else -np.inf
        hi = float(high) if high.strip() else np.inf
    except ValueError:
        raise WalktuneError(f"--bound {text!r}: LOW and HIGH must be numbers, -inf or inf.") from None
    return name.strip(), (lo, hi)


def read_proposal(path: Path) -> np.ndarray:
    if not path.exists():
        raise WalktuneError(f"current proposal file {path} does not exist.")
    try:
        if path.suffix == ".npy":
            return np.load(path, allow_pickle=False)
        if path.suffix == ".json":
            payload = json.loads(path.read_text())
            if isinstance(payload, dict):
                for key in ("proposal_covariance", "covariance", "step_sizes"):
                    if key in payload:
                        return np.asarray(payload[key], dtype=float)
                raise WalktuneError(
                    f"{path} must hold a list, or an object with 'proposal_covariance', 'covariance' or 'step_sizes'."
                )
            return np.asarray(payload, dtype=float)
        if path.suffix in (".csv", ".txt", ".tsv"):
            delimiter = "\t" if path.suffix == ".tsv" else ","
            lines = path.read_text().strip().splitlines()
            try:
                [float(v) for v in lines[0].split(delimiter)]
                skip = 0
            except ValueError:
                skip = 1  # a header row of names
            return np.loadtxt(path, delimiter=delimiter, skiprows=skip, ndmin=1)
    except (ValueError, OSError) as error:
        raise WalktuneError(f"cannot read the current proposal from {path}: {error}") from None
    raise WalktuneError(f"current proposal {path} must be a .npy, .csv or .json file.")


def tune_arguments(options: dict, spec) -> dict:
    """The library's tune() arguments from the command line's options and the model file's settings."""
    names_list = split_list(options["names"], "names") or spec.names
    if options["start"] is not None:
        try:
            start_values = np.asarray([float(v) for v in split_list(options["start"], "start")])
        except ValueError:
            raise WalktuneError(f"--start {options['start']!r} must be comma-separated numbers.") from None
    else:
        start_values = spec.start
    if start_values is None:
        raise WalktuneError(
            "no start values: give --start 1.0,2.0,... or declare PARAMETERS/START in the model file (see docs/models.md)."
        )
    if names_list is not None and len(names_list) != len(start_values):
        raise WalktuneError(
            f"{len(start_values)} start values for {len(names_list)} parameters ({', '.join(names_list)}); "
            "give one start value per parameter."
        )
    # Bounds declared in the model file follow the model's own names; key them by
    # position so that --names can rename the parameters.
    bound_map = {}
    for key, pair in spec.bounds.items():
        if spec.names is not None and key in spec.names:
            key = spec.names.index(key)
        bound_map[key] = pair
    for text in options["bound"]:
        key, pair = parse_bound(text)
        bound_map[key] = pair
    if names_list is not None:
        unknown = [k for k in bound_map if isinstance(k, str) and k not in names_list]
        if unknown:
            raise WalktuneError(f"bounds name unknown parameter {unknown[0]!r}; known: {', '.join(names_list)}.")
    forced = dict(spec.transforms)
    for text in options["transform"]:
        key, sep, kind = text.partition("=")
        if not sep or not key.strip() or not kind.strip():
            raise WalktuneError(f"--transform {text!r} must look like NAME=KIND (identity, log, neglog or logit).")
        forced[key.strip()] = kind.strip()
    proposal = options["current_proposal"]
    return dict(
        start=start_values, names=names_list, bounds=bound_map or None,
        current_proposal=np.asarray(proposal, dtype=float) if proposal is not None else None,
        budget=options["budget"], seed=options["seed"], vectorized=spec.vectorized,
        target_ess=400 if options["target_ess"] is None else options["target_ess"],
        log_prior=spec.log_prior, prior=spec.prior, transforms=forced or None,
        forbid_transforms=list(options["no_transform"]) or None,
    )
