"""Structure of a posterior from its covariance: correlations, principal directions, conditioning.

With ``S`` the posterior covariance, ``D = diag(S)^{1/2}`` and ``R = D^{-1} S D^{-1}``
the correlation matrix:

* principal directions are the eigenvectors ``v_k`` of ``R`` with variances
  ``lambda_k``; the combination ``sum_i v_ik theta_i / sd_i`` has spread
  ``sqrt(lambda_k)``. They are unit-free, unlike eigenvectors of ``S``;
* the variance inflation factor ``VIF_i = (R^{-1})_ii`` says how far parameter
  ``i`` is determined by the others: ``R^2_i = 1 - 1 / VIF_i``;
* the effective dimension is the participation ratio
  ``(sum lambda)^2 / sum lambda^2`` of the eigenvalues of ``R``: ``d`` when the
  parameters are uncorrelated, near 1 when one combination carries nearly all
  the (standardised) spread;
* the spectrum spans ``log10(lambda_max / lambda_min)`` decades.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Direction:
    """A principal direction written as a combination of parameters.

    ``sum_i coefficients[i] * theta_i`` has standard deviation ``spread``; the
    coefficients are scaled so that the largest in magnitude is 1. ``weights``
    is the unit eigenvector of the correlation matrix (the same direction in
    standardised parameters), which says how much each parameter takes part.
    """

    coefficients: np.ndarray
    spread: float
    eigenvalue: float
    weights: np.ndarray

    def describe(self, names, min_weight: float = 0.1, max_terms: int = 6) -> str:
        """The combination in words, keeping terms whose standardised weight is at least ``min_weight``."""
        order = np.argsort(-np.abs(self.weights))
        terms = []
        for i in order[:max_terms]:
            c = self.coefficients[i]
            if abs(self.weights[i]) < min_weight:
                break
            sign = "-" if c < 0 else "+"
            terms.append(f"{sign} {abs(c):.3g} {names[i]}")
        text = " ".join(terms)
        text = text[2:] if text.startswith("+ ") else "-" + text[1:]
        if len(order) > len(terms):
            text += " + ..."
        return text


@dataclass(frozen=True)
class Structure:
    """Geometry of a posterior summarised from its covariance.

    Attributes
    ----------
    covariance, correlation : ndarray of shape (d, d)
    sd : ndarray of shape (d,)
    eigenvalues : ndarray of shape (d,)
        Eigenvalues of the correlation matrix, ascending.
    directions : list of Direction
        Principal directions, tightest first.
    decades : float
        ``log10`` of the ratio of the largest to the smallest eigenvalue.
    effective_dimension : float
    vif : ndarray of shape (d,)
        Variance inflation factors.
    strongest_pairs : list of (i, j, rho)
        Pairs by decreasing ``|rho|``.
    """

    covariance: np.ndarray
    correlation: np.ndarray
    sd: np.ndarray
    eigenvalues: np.ndarray
    directions: list
    decades: float
    effective_dimension: float
    vif: np.ndarray
    strongest_pairs: list

    @property
    def determined_by_others(self) -> np.ndarray:
        """``R^2`` of each parameter regressed on the others: ``1 - 1 / VIF``."""
        return 1.0 - 1.0 / self.vif


def analyse(covariance: np.ndarray, max_pairs: int = 10) -> Structure:
    """Summarise the geometry of a posterior from its covariance matrix (d, d)."""
    cov = np.atleast_2d(np.asarray(covariance, dtype=float))
    d = cov.shape[0]
    sd = np.sqrt(np.diag(cov))
    corr = cov / np.outer(sd, sd)
    np.fill_diagonal(corr, 1.0)
    eigenvalues, vectors = np.linalg.eigh(corr)
    eigenvalues = np.maximum(eigenvalues, np.finfo(float).tiny)
    directions = []
    for k in range(d):
        raw = vectors[:, k] / sd  # coefficients on theta itself
        norm = np.max(np.abs(raw))
        sign = np.sign(raw[np.argmax(np.abs(raw))])
        directions.append(
            Direction(sign * raw / norm, float(np.sqrt(eigenvalues[k]) / norm), float(eigenvalues[k]), sign * vectors[:, k])
        )
    decades = float(np.log10(eigenvalues[-1] / eigenvalues[0]))
    effective_dimension = float(eigenvalues.sum() ** 2 / np.sum(eigenvalues**2))
    vif = np.diag(np.linalg.inv(corr)).copy()
    iu = np.triu_indices(d, k=1)
    order = np.argsort(-np.abs(corr[iu]))[:max_pairs]
    pairs = [(int(iu[0][o]), int(iu[1][o]), float(corr[iu][o])) for o in order]
    return Structure(cov, corr, sd, eigenvalues, directions, decades, effective_dimension, vif, pairs)


def r_squared_on_others(draws: np.ndarray) -> np.ndarray:
    """Each parameter's ``R^2`` regressed on all the others, from the sample covariance of ``draws`` (..., d).

    ``R^2_i = 1 - 1 / (S_ii (S^-1)_ii)`` (the same ``1 - 1 / VIF_i`` as :class:`Structure`, from draws instead of a
    shrunk estimate); NaN where the covariance is singular or a parameter did not move.
    """
    flat = draws.reshape(-1, draws.shape[-1])
    dim = flat.shape[1]
    if flat.shape[0] <= dim + 1:
        return np.full(dim, np.nan)
    cov = np.atleast_2d(np.cov(flat, rowvar=False))
    with np.errstate(divide="ignore", invalid="ignore"):
        try:
            precision_diag = np.diag(np.linalg.inv(cov))
        except np.linalg.LinAlgError:
            return np.full(dim, np.nan)
        r2 = 1.0 - 1.0 / (np.diag(cov) * precision_diag)
    return np.where(np.isfinite(r2) & (np.diag(cov) > 0), np.clip(r2, 0.0, 1.0), np.nan)
