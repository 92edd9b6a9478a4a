"""Bends taken out of a curved ridge before whitening: a quadratic shear between two coordinates.

Where a parameter ``u_j`` lies along a parabola in another, ``u_k`` (a curved
ridge, :func:`walktune.reparam.curved_ridge_findings`), the sampler
coordinates straighten it first:

    v_j = u_j - c (u_k - a)^2,     every other v_i = u_i,

with ``c`` the coefficient of ``(u_k - a)^2`` in the least-squares fit of
``u_j`` on ``1, u_k - a, (u_k - a)^2`` over the pilot's draws, and ``a`` the
draws' mean of ``u_k``. A coordinate that is bent is never one another bends
along, so the map is undone in one step, ``u_j = v_j + c (v_k - a)^2``; its
Jacobian is triangular with a unit diagonal, so ``log |det dv/du| = 0`` and the
density of ``v`` is that of ``u``. The linear part of the fit is left to the
whitening that follows (:class:`walktune.reparam.SamplingMap`).

A bend is kept only where it straightens: the curvature measure of ``v_j``
(:func:`walktune.reparam.curvature_measure`) falls below the threshold that
raised the finding. The proof then measures a random walk in the new
coordinates against the others (row ``transformed-rotated``); nothing is
recommended on this test alone.

The exactly Gaussian case is the twisted Gaussian of Haario, Saksman and
Tamminen (1999): ``x2 = y2 + b (x1^2 - 100)`` with ``y2 ~ N(0, 1)`` independent
of ``x1``, which this shear with ``c = b`` maps back to a Gaussian.

References
----------
Haario, H., Saksman, E. and Tamminen, J. (1999). Adaptive proposal distribution for random walk
Metropolis algorithm. Computational Statistics, 14(3), 375-395.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Bend:
    """``v[index] = u[index] - coefficient (u[along] - centre)^2``; ``name`` and ``along_name`` are the parameters'."""

    name: str
    along_name: str
    index: int
    along: int
    coefficient: float
    centre: float

    def to_dict(self) -> dict:
        return {"parameter": self.name, "along": self.along_name, "coefficient": float(self.coefficient),
                "centre": float(self.centre)}

    def describe(self) -> str:
        return f"{self.name} - {self.coefficient:.4g} ({self.along_name} - {self.centre:.4g})^2"


def straighten(u: np.ndarray, bends: list) -> np.ndarray:
    """``v`` for ``u`` of shape (..., d): every bend taken out."""
    if not bends:
        return u
    v = np.array(u, dtype=float, copy=True)
    for bend in bends:
        v[..., bend.index] -= bend.coefficient * (u[..., bend.along] - bend.centre) ** 2
    return v


def bend_back(v: np.ndarray, bends: list) -> np.ndarray:
    """``u`` for ``v`` of shape (..., d): the inverse of :func:`straighten` (a coordinate bent along is never bent)."""
    if not bends:
        return v
    u = np.array(v, dtype=float, copy=True)
    for bend in bends:
        u[..., bend.index] += bend.coefficient * (v[..., bend.along] - bend.centre) ** 2
    return u


def read_bends(entries: list, names: list) -> list:
    """Bends from their JSON entries; a parameter bent along must not itself be bent (ValueError otherwise)."""
    bends = [Bend(e["parameter"], e["along"], names.index(e["parameter"]), names.index(e["along"]),
                  float(e["coefficient"]), float(e["centre"])) for e in entries]
    if {b.index for b in bends} & {b.along for b in bends} or len({b.index for b in bends}) < len(bends):
        raise ValueError("a parameter is bent twice, or bent and bent along")
    if not all(np.isfinite([b.coefficient for b in bends] + [b.centre for b in bends])):
        raise ValueError("a bend's coefficient or centre is not finite")
    return bends


def _partner(u: np.ndarray, j: int, excluded: set) -> int | None:
    """The coordinate ``u_j`` is most correlated with through its centred square (None: no candidate)."""
    centred = u - u.mean(axis=0)
    best, best_corr = None, 0.0
    for k in range(u.shape[1]):
        if k == j or k in excluded:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            corr = abs(np.nan_to_num(np.corrcoef(u[:, j], centred[:, k] ** 2)[0, 1]))
        if corr > best_corr:
            best, best_corr = k, corr
    return best


def _fit_bend(u: np.ndarray, j: int, k: int, names: list) -> Bend:
    """The least-squares bend of ``u_j`` along ``u_k``."""
    centre = float(u[:, k].mean())
    x = u[:, k] - centre
    design = np.column_stack([np.ones_like(x), x, x**2])
    coefficients = np.linalg.lstsq(design, u[:, j], rcond=None)[0]
    return Bend(names[j], names[k], j, k, float(coefficients[2]), centre)


def choose_bends(u: np.ndarray, names: list, curvature: np.ndarray, threshold: float, measure) -> list:
    """Bends that straighten the curved coordinates of ``u`` (n, d), given their ``curvature`` (d,).

    Each coordinate whose curvature exceeds ``threshold`` (most curved first)
    is bent along its partner (:func:`_partner`), which must not itself be bent;
    the bends are kept where ``measure`` (the curvature measure) of the
    straightened draws falls below ``threshold``.
    """
    bent, along, candidates = set(), set(), []
    for j in np.argsort(-curvature):
        if curvature[j] <= threshold or j in along:
            continue
        k = _partner(u, int(j), bent | {int(j)})
        if k is None:
            continue
        candidates.append(_fit_bend(u, int(j), k, names))
        bent.add(int(j))
        along.add(k)
    if not candidates:
        return []
    after = measure(straighten(u, candidates))
    return [bend for bend in candidates if after[bend.index] < threshold and np.isfinite(bend.coefficient)]


def bend_ridges(reparam, draws: np.ndarray, before: np.ndarray, prior_covariance=None,
                n_independent=None, threshold: float | None = None):
    """``reparam`` (a SamplingMap) with bends where they straighten a curved ridge its transforms leave.

    ``draws`` (n, d) are the pilot's, ``before`` (d,) their curvature measure;
    the map's mean and covariance are refitted to the straightened draws.
    Returns ``reparam`` itself when no bend straightens anything.
    """
    from .reparam import CURVED, curvature_measure, fit_map

    threshold = CURVED if threshold is None else threshold
    if not np.any(before > threshold):
        return reparam
    with np.errstate(divide="ignore", invalid="ignore"):
        u = reparam.straightened(draws)
    if not np.all(np.isfinite(u)):
        return reparam
    transformed = any(t.kind != "identity" for t in reparam.transforms)
    curvature = curvature_measure(u) if transformed else before
    bends = choose_bends(u, reparam.parameter_names, curvature, threshold, curvature_measure)
    if not bends:
        return reparam
    v = straighten(u, bends)
    return fit_map(reparam.parameter_names, reparam.transforms, v.mean(axis=0), np.atleast_2d(np.cov(v.T)),
                   prior_covariance, n_independent, bends=bends)
