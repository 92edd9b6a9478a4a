"""Small input checks with messages that state what was expected."""

from __future__ import annotations

import numbers

import numpy as np

from .errors import WalktuneError


def as_float_array(value, name: str) -> np.ndarray:
    """Convert ``value`` to a float64 array or fail with a one-line message."""
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise WalktuneError(
            f"`{name}` must be an array of numbers; got {type(value).__name__} that is not numeric."
        ) from None
    return array


def check_finite(array: np.ndarray, name: str) -> None:
    if not np.all(np.isfinite(array)):
        raise WalktuneError(f"`{name}` must hold finite numbers only; it contains NaN or infinity.")


def check_positive_int(value, name: str, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise WalktuneError(f"`{name}` must be a whole number >= {minimum}; got {value!r}.")
    if value < minimum:
        raise WalktuneError(f"`{name}` must be >= {minimum}; got {value}.")
    return int(value)


def check_seed(seed):
    """A seed is None, a whole number >= 0 or a numpy SeedSequence; returned as a SeedSequence."""
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0):
        raise WalktuneError(f"`seed` must be a whole number >= 0 (or None for a fresh one); got {seed!r}.")
    return np.random.SeedSequence(None if seed is None else int(seed))


def check_positive_number(value, name: str) -> float:
    """A finite number > 0 (bools refused)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not np.isfinite(value) or value <= 0:
        raise WalktuneError(f"`{name}` must be a number > 0; got {value!r}.")
    return float(value)


def as_covariance(value, dim: int, name: str = "proposal_cov") -> np.ndarray:
    """Return a symmetric positive definite (dim, dim) matrix.

    A scalar is taken as a variance for every parameter and a vector of
    length ``dim`` as a diagonal of variances.
    """
    cov = as_float_array(value, name)
    if cov.ndim == 0:
        cov = np.eye(dim) * float(cov)
    elif cov.ndim == 1:
        if cov.shape[0] != dim:
            raise WalktuneError(
                f"`{name}` as a vector of variances must have length {dim} (one per parameter); got {cov.shape[0]}."
            )
        cov = np.diag(cov)
    if cov.shape != (dim, dim):
        raise WalktuneError(
            f"`{name}` must be a ({dim}, {dim}) covariance matrix for {dim} parameters; got shape {cov.shape}."
        )
    check_finite(cov, name)
    if not np.allclose(cov, cov.T, rtol=1e-8, atol=1e-12 * max(1.0, float(np.max(np.abs(cov))))):
        raise WalktuneError(f"`{name}` must be symmetric; it differs from its transpose.")
    cov = 0.5 * (cov + cov.T)
    try:
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise WalktuneError(
            f"`{name}` must be positive definite; its smallest eigenvalue is {np.linalg.eigvalsh(cov)[0]:.3g}."
        ) from None
    return cov
