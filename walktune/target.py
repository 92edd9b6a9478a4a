"""Load a user's log-density from ``path/to/file.py:function`` or ``package.module:function``.

A model file may declare, beside the function, module-level settings that the
command line uses unless its options override them:

``PARAMETERS``
    A list of names, or a dict ``{name: start value}``.
``START``
    Start values (a list in the order of ``PARAMETERS``), when ``PARAMETERS`` is a list.
``BOUNDS``
    ``{name: (low, high)}``; use ``None`` or ``float("inf")`` for an open side.
``VECTORIZED``
    True when the function takes an (n, d) batch and returns (n,) values.
``LOG_PRIOR``
    The name of a function in the same file giving the log-prior; the target
    function is then the log-likelihood (enables the likelihood-informed
    subspace and the reduced-basis sampler).
``PRIOR``
    Instead of ``LOG_PRIOR``: ``{name: ("normal", mean, sd) or ("uniform", low, high)}``;
    the target function is then the log-likelihood.
``TRANSFORMS``
    ``{name: kind}`` forcing a transform (identity, log, neglog, logit).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from .errors import TargetError


@dataclass
class ModelSpec:
    """A loaded log-density and what its module declares about it."""

    function: Callable
    label: str
    names: list | None = None
    start: np.ndarray | None = None
    bounds: dict = field(default_factory=dict)
    vectorized: bool = False
    log_prior: Callable | None = None
    prior: dict | None = None
    transforms: dict = field(default_factory=dict)
    #: The target with a file path made absolute, so that it names the same model from any folder.
    canonical: str = ""
    #: SHA-256 of the model's source file (None when it has none), to tell whether a model changed.
    source_digest: str | None = None
    #: The model's source file (absolute; None when it has none).
    source_file: str | None = None


def _import_file(path: Path):
    if not path.exists():
        raise TargetError(f"model file {path} does not exist; check the path before ':'.")
    if path.suffix != ".py":
        raise TargetError(f"model file {path} must be a Python file ending in .py.")
    # A stable module name per file, registered so the function can be pickled by reference.
    digest = hashlib.sha1(str(path.resolve()).encode()).hexdigest()[:10]
    name = f"walktune_model_{path.stem}_{digest}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    folder = str(path.resolve().parent)
    added = folder not in sys.path
    if added:
        sys.path.insert(0, folder)
    try:
        spec.loader.exec_module(module)
    except Exception as error:
        sys.modules.pop(name, None)
        raise TargetError(f"importing {path} failed: {_where(error)}; fix the model file.") from None
    finally:
        if added:
            sys.path.remove(folder)
    return module


def _where(error: BaseException) -> str:
    frames = traceback.extract_tb(error.__traceback__)
    line = f" (line {frames[-1].lineno} of {Path(frames[-1].filename).name})" if frames else ""
    return f"{type(error).__name__}: {error}{line}"


def _start_values(values, setting: str, where: str) -> np.ndarray:
    """Start values declared in a model file, as numbers (a one-line error names the setting otherwise)."""
    try:
        return np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise TargetError(
            f"{setting} in {where} must give a number as each start value; got {values!r}."
        ) from None


def load_target(target: str) -> ModelSpec:
    """Load ``file.py:function`` or ``package.module:function`` and its declared settings."""
    if ":" not in target:
        raise TargetError(
            f"target {target!r} must look like path/to/model.py:function or package.module:function."
        )
    where, _, function_name = target.rpartition(":")
    if not where or not function_name.isidentifier():
        raise TargetError(f"target {target!r} must name a function after ':', e.g. model.py:log_posterior.")
    if where.endswith(".py") or "/" in where or "\\" in where:
        module = _import_file(Path(where))
    else:
        try:
            module = importlib.import_module(where)
        except ModuleNotFoundError as error:
            raise TargetError(f"cannot import module {where!r} ({error}); is it installed or on PYTHONPATH?") from None
        except Exception as error:
            raise TargetError(f"importing {where} failed: {_where(error)}; fix the module.") from None
    function = getattr(module, function_name, None)
    if function is None:
        available = sorted(n for n, v in vars(module).items() if callable(v) and not n.startswith("_"))
        hint = f" (callables there: {', '.join(available[:8])})" if available else ""
        raise TargetError(f"{where} has no function {function_name!r}{hint}.")
    if not callable(function):
        raise TargetError(f"{where}:{function_name} is not a function.")
    spec = ModelSpec(function=function, label=target, canonical=target)
    source = getattr(module, "__file__", None)
    if source and Path(source).is_file():
        spec.source_digest = hashlib.sha256(Path(source).read_bytes()).hexdigest()
        spec.source_file = str(Path(source).resolve())
    if where.endswith(".py") or "/" in where or "\\" in where:
        spec.canonical = f"{Path(where).resolve()}:{function_name}"
    parameters = getattr(module, "PARAMETERS", None)
    if isinstance(parameters, dict):
        spec.names = [str(k) for k in parameters]
        spec.start = _start_values(list(parameters.values()), "PARAMETERS", where)
    elif parameters is not None:
        spec.names = [str(k) for k in parameters]
    start = getattr(module, "START", None)
    if start is not None:
        spec.start = np.atleast_1d(_start_values(start, "START", where))
    spec.bounds = dict(getattr(module, "BOUNDS", {}) or {})
    spec.vectorized = bool(getattr(module, "VECTORIZED", False))
    prior_name = getattr(module, "LOG_PRIOR", None)
    if prior_name is not None:
        spec.log_prior = getattr(module, str(prior_name), None)
        if not callable(spec.log_prior):
            raise TargetError(f"LOG_PRIOR names {prior_name!r}, which is not a function in {where}.")
    spec.prior = getattr(module, "PRIOR", None)
    spec.transforms = dict(getattr(module, "TRANSFORMS", {}) or {})
    return spec
