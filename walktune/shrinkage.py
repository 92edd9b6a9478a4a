"""Covariance of random-walk draws, shrunk towards a reference shape, within bounded memory.

In the coordinates whitened by the reference ``R = L L^T``, ``w = L^{-1} (x - centre)``,

    shrunk = (1 - s) S_w + s (tr S_w / d) I,        covariance = L shrunk L^T,

with ``S_w`` the sample covariance of the whitened draws and ``s`` the
Ledoit-Wolf intensity (Ledoit and Wolf 2004; scikit-learn's
``ledoit_wolf_shrinkage``) of draws thinned to about one per autocorrelation
time. Shrinking in whitened coordinates shrinks towards the reference's shape
and respects each parameter's scale ("standardise, shrink, rescale" with a
full matrix).

Large draws (a long pilot stage at d = 300) are whitened in place in blocks of
rows, their covariance summed block by block and their autocorrelation times
found a few parameters at a time, so that the estimate makes at most one copy
of them; small ones are worked on whole, as numpy does.

References
----------
Ledoit, O. and Wolf, M. (2004). A well-conditioned estimator for large-dimensional
covariance matrices. Journal of Multivariate Analysis, 88(2), 365-411.
"""

from __future__ import annotations

import numpy as np
from sklearn.covariance import ledoit_wolf_shrinkage

from .checkpoint import stop_point
from .diagnostics import iact


def shrunk_covariance(draws: np.ndarray, reference: np.ndarray, within_chains: bool = False,
                      overwrite: bool = False) -> tuple[np.ndarray, float, int]:
    """Covariance of ``draws`` (chains, n, d), shrunk towards the shape of ``reference``.

    With ``within_chains`` the pooled within-chain covariance is used: chains
    started in separate modes must not make the proposal span the gap between
    them (a random walk cannot jump it).

    The draws are whitened by the Cholesky factor of ``reference``; the
    Ledoit-Wolf intensity is estimated on draws thinned to about one per
    autocorrelation time (the estimator assumes independent rows), and the
    shrunk matrix ``(1 - s) S + s (tr S / d) I`` is mapped back.

    The draws may be stored every k-th step (:func:`run_pilot` thins long
    stages): the autocorrelation time is then measured in stored draws, and the
    count of roughly independent draws, stored draws over it, is the same.

    Memory: draws up to :data:`_WHOLE_BYTES` are worked on whole (numpy's
    ``np.cov``, one solve, one IACT call: a few copies of them); larger ones
    make one whitened copy (none with ``overwrite``: the caller's array is
    whitened in place), worked through in blocks of rows and of parameters. The
    two ways agree to rounding (tests/test_pilot_memory.py).

    Returns the covariance, the shrinkage intensity ``s`` and the number of
    thinned (about independent) draws it rests on.
    """
    m, n, d = draws.shape
    chol = np.linalg.cholesky(reference)
    if draws.nbytes <= _WHOLE_BYTES:
        centre = draws.mean(axis=1, keepdims=True) if within_chains else draws.reshape(-1, d).mean(axis=0)
        white = np.linalg.solve(chol, (draws - centre).reshape(-1, d).T).T.reshape(m, n, d)
        sample_cov = np.atleast_2d(np.cov(white.reshape(-1, d), rowvar=False))
        tau = np.asarray(iact(white)) if n >= 20 else np.ones(1)
    else:
        centre = draws.mean(axis=1, keepdims=True) if within_chains else _pooled_mean(draws)
        white = draws if overwrite else np.array(draws, dtype=float)
        _whiten_in_place(white, centre, chol)
        sample_cov = _blocked_covariance(white)
        tau = _blocked_iact(white) if n >= 20 else np.ones(1)
    # A direction in which no chain moved has no autocorrelation time (NaN); with none
    # known, keep one draw per chain.
    tau = float(np.max(tau[np.isfinite(tau)])) if np.any(np.isfinite(tau)) else float(n)
    step = max(1, int(np.ceil(tau)))
    thinned = white[:, ::step].reshape(-1, d)
    shrinkage = float(ledoit_wolf_shrinkage(thinned, assume_centered=True)) if thinned.shape[0] > 1 else 1.0
    shrinkage = min(max(shrinkage, 0.0), 1.0)
    target = np.trace(sample_cov) / d * np.eye(d)
    shrunk = (1 - shrinkage) * sample_cov + shrinkage * target
    cov = chol @ shrunk @ chol.T
    return 0.5 * (cov + cov.T), shrinkage, thinned.shape[0]


#: Bytes of one block of rows or parameters that :func:`shrunk_covariance` works on at a time.
_BLOCK_BYTES = 2**23
#: Draws up to this many bytes :func:`shrunk_covariance` estimates from whole, as numpy does (and as walktune did
#: before the blocks: the same figures to the last bit); larger ones in blocks.
_WHOLE_BYTES = 2**25


def _pooled_mean(draws: np.ndarray) -> np.ndarray:
    """Mean of all draws (chains, n, d), shape (d,), without copying a non-contiguous view."""
    if draws.flags.c_contiguous:
        return draws.reshape(-1, draws.shape[2]).mean(axis=0)
    return draws.mean(axis=(0, 1))


def _whiten_in_place(draws: np.ndarray, centre, chol: np.ndarray) -> None:
    """``draws`` (chains, n, d) becomes ``L^{-1} (x - centre)`` row by row, in blocks of rows."""
    m, n, d = draws.shape
    rows = max(1, _BLOCK_BYTES // (8 * d))
    centre = np.broadcast_to(centre, (m, 1, d))
    for c in range(m):
        for start in range(0, n, rows):
            stop_point()
            block = draws[c, start : start + rows]
            block -= centre[c]
            block[...] = np.linalg.solve(chol, block.T).T


def _blocked_covariance(white: np.ndarray) -> np.ndarray:
    """``np.cov`` of the rows of ``white`` (chains, n, d) pooled, summed over blocks of rows (no copy of ``white``)."""
    m, n, d = white.shape
    mean = _pooled_mean(white)
    rows = max(1, _BLOCK_BYTES // (8 * d))
    total = np.zeros((d, d))
    for c in range(m):
        for start in range(0, n, rows):
            stop_point()
            block = white[c, start : start + rows] - mean
            total += block.T @ block
    return np.atleast_2d(total / (m * n - 1))


def _blocked_iact(white: np.ndarray) -> np.ndarray:
    """:func:`walktune.diagnostics.iact` of each parameter of ``white`` (chains, n, d), a few parameters at a time
    (the FFT's work arrays are several times the draws they transform)."""
    m, n, d = white.shape
    width = max(1, _BLOCK_BYTES // (8 * m * n))
    out = []
    for start in range(0, d, width):
        stop_point()
        out.append(np.asarray(iact(white[:, :, start : start + width])))
    return np.concatenate(out)
