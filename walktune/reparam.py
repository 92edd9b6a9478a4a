"""Reparameterisation: per-parameter transforms, a rotated basis, and the informed split.

The sampler coordinates are

    u = T(theta)                      (per-parameter transforms)
    v = B(u)                          (bends taken out of a curved ridge, :mod:`walktune.bends`; often none)
    z = Q^T W^{-1} (v - m)            (whitened, then rotated)
    theta = T^{-1}(B^{-1}(m + W Q z))

with ``m`` the posterior mean and ``W`` the lower Cholesky factor of the
posterior covariance of ``v``, and ``Q`` an orthogonal matrix (the identity,
or the likelihood-informed basis: its first ``r`` columns span the directions
the data inform). The density of ``z`` is

    log p_z(z) = log p(theta(z)) + sum_i log |d theta_i / d u_i| + log |det W|.

Transforms and their inverse and log-Jacobian ``log |d theta / d u|``:

=========  =======================  ==============================  ===========================================
kind       for bounds               u = T(theta)                    log |d theta / d u|
=========  =======================  ==============================  ===========================================
identity   any                      theta                           0
log        (low, inf)               log(theta - low)                u
neglog     (-inf, high)             log(high - theta)               u
logit      (low, high)              log((theta-low)/(high-theta))   log(high-low) - softplus(u) - softplus(-u)
=========  =======================  ==============================  ===========================================

The transforms are chosen, in the spirit of Box and Cox (1964), by the
profile log-likelihood of a Gaussian fitted to the transformed pilot draws,
with the Jacobian counted: per parameter
``-0.5 log(2 pi e var(u)) - mean(log |d theta / d u|)`` to start, then jointly
``-0.5 log det(2 pi e S_u) - mean(sum_i log |d theta_i / d u_i|)`` (a
multivariate Gaussian), which rewards transforms that straighten a curved
ridge between parameters.

The informed split (:mod:`walktune.informed`) chooses ``Q``: its first ``r``
columns are the directions where the posterior variance is markedly below the
prior's, a variant of the likelihood-informed subspace of Cui et al. (2014).

References
----------
Box, G. E. P. and Cox, D. R. (1964). An analysis of transformations. JRSS B, 26(2), 211-252.
Cui, T., Martin, J., Marzouk, Y. M., Solonen, A. and Spantini, A. (2014). Likelihood-informed
dimension reduction for nonlinear inverse problems. Inverse Problems, 30, 114015.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import special

from .bends import bend_back, read_bends, straighten
from .checkpoint import stop_point
from .errors import WalktuneError
from .informed import PRIOR_DOMINATED, informed_split, informed_threshold  # noqa: F401 (re-exported)

SCHEMA = "walktune.sampling-map/2"
#: Versions this walktune reads: /1 files have no bends.
READABLE_SCHEMAS = ("walktune.sampling-map/1", SCHEMA)
KINDS = ("identity", "log", "neglog", "logit")


# --------------------------------------------------------------------------- transforms


def candidates(low: float, high: float) -> list:
    """Transforms allowed by the bounds (identity always)."""
    out = ["identity"]
    if np.isfinite(low) and np.isfinite(high):
        out.append("logit")
    elif np.isfinite(low):
        out.append("log")
    elif np.isfinite(high):
        out.append("neglog")
    return out


def forward(kind: str, theta, low: float, high: float):
    """u = T(theta), elementwise."""
    theta = np.asarray(theta, dtype=float)
    if kind == "identity":
        return theta
    if kind == "log":
        return np.log(theta - low)
    if kind == "neglog":
        return np.log(high - theta)
    if kind == "logit":
        return np.log(theta - low) - np.log(high - theta)
    raise WalktuneError(f"unknown transform {kind!r}; choose one of {', '.join(KINDS)}.")


def inverse(kind: str, u, low: float, high: float):
    """theta = T^{-1}(u), elementwise."""
    u = np.asarray(u, dtype=float)
    if kind == "identity":
        return u
    if kind == "log":
        return low + np.exp(u)
    if kind == "neglog":
        return high - np.exp(u)
    if kind == "logit":
        return low + (high - low) * special.expit(u)
    raise WalktuneError(f"unknown transform {kind!r}; choose one of {', '.join(KINDS)}.")


def log_jacobian(kind: str, u, low: float, high: float):
    """log |d theta / d u|, elementwise."""
    u = np.asarray(u, dtype=float)
    if kind == "identity":
        return np.zeros_like(u)
    if kind in ("log", "neglog"):
        return u.copy()
    if kind == "logit":
        return np.log(high - low) - np.logaddexp(0.0, u) - np.logaddexp(0.0, -u)
    raise WalktuneError(f"unknown transform {kind!r}; choose one of {', '.join(KINDS)}.")


def transform_score(kind: str, draws: np.ndarray, low: float, high: float) -> float:
    """Mean log-density a Gaussian in u-space gives the draws in theta-space (Box-Cox style)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        u = forward(kind, draws, low, high)
    if not np.all(np.isfinite(u)):
        return -np.inf
    variance = np.var(u)
    if not variance > 0:
        return -np.inf
    return float(-0.5 * np.log(2 * np.pi * np.e * variance) - np.mean(log_jacobian(kind, u, low, high)))


@dataclass(frozen=True)
class TransformChoice:
    """The transform chosen for one parameter, with every candidate's score."""

    name: str
    kind: str
    low: float
    high: float
    scores: dict


def joint_score(kinds: list, draws: np.ndarray, bounds: np.ndarray) -> float:
    """Mean log-density a multivariate Gaussian in u-space gives the draws (n, d) in theta-space.

    ``-0.5 log det(2 pi e S_u) - mean sum_i log |d theta_i / d u_i|``: the joint
    version of the Box-Cox criterion, so that transforms which straighten a
    curved ridge score higher than ones that only fix the marginals.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        u = np.column_stack([forward(k, draws[:, i], bounds[i, 0], bounds[i, 1]) for i, k in enumerate(kinds)])
    if not np.all(np.isfinite(u)):
        return -np.inf
    cov = np.atleast_2d(np.cov(u.T))
    sign, logdet = np.linalg.slogdet(2 * np.pi * np.e * cov)
    if sign <= 0:
        return -np.inf
    jac = sum(np.mean(log_jacobian(k, u[:, i], bounds[i, 0], bounds[i, 1])) for i, k in enumerate(kinds))
    return float(-0.5 * logdet - jac)


def choose_transforms(draws: np.ndarray, names: list, bounds: np.ndarray, force=None, forbid=None) -> list:
    """Choose a transform per parameter from pilot draws (n, d).

    Starts from each parameter's best marginal score (:func:`transform_score`)
    and improves the joint score (:func:`joint_score`) one parameter at a time
    until no change helps. ``force`` maps names to a kind; ``forbid`` is a list
    of kinds (or ``{name: [kinds]}``) never to use. The scores reported per
    candidate are joint scores with the other parameters at their final choice.

    Only parameters with a choice are scored: an unbounded parameter (the
    identity is its only candidate) gets no scores (an empty dict), and when no
    parameter has a choice nothing is scored at all. A joint score costs
    ``O(n d^2)``; scoring every parameter would cost ``O(n d^3)`` for nothing.
    """
    force = dict(force or {})
    unknown = [k for k in force if k not in names]
    if unknown:
        raise WalktuneError(f"a transform is forced for unknown parameter {unknown[0]!r}; known: {', '.join(names)}.")
    bounds = np.asarray(bounds, dtype=float)
    options = []
    for i, name in enumerate(names):
        low, high = float(bounds[i, 0]), float(bounds[i, 1])
        allowed = candidates(low, high)
        if name in force:
            kind = force[name]
            if kind not in KINDS:
                raise WalktuneError(f"unknown transform {kind!r} for {name}; choose one of {', '.join(KINDS)}.")
            if kind not in allowed:
                raise WalktuneError(
                    f"transform {kind!r} for {name} conflicts with its bounds ({low:g}, {high:g}); "
                    f"allowed: {', '.join(allowed)}."
                )
            options.append([kind])
            continue
        banned = forbid.get(name, []) if isinstance(forbid, dict) else list(forbid or [])
        options.append([k for k in allowed if k not in banned] or ["identity"])
    kinds = [opts[0] if len(opts) == 1 else
             max(opts, key=lambda k: transform_score(k, draws[:, i], bounds[i, 0], bounds[i, 1]))
             for i, opts in enumerate(options)]
    choosing = [i for i, opts in enumerate(options) if len(opts) > 1]
    scored = [i for i in range(len(names)) if len(candidates(bounds[i, 0], bounds[i, 1])) > 1]
    best = joint_score(kinds, draws, bounds) if choosing else -np.inf
    for _ in range(3 if choosing else 0):
        changed = False
        for i in choosing:
            for kind in options[i]:
                stop_point()
                trial = kinds[:i] + [kind] + kinds[i + 1 :]
                score = joint_score(trial, draws, bounds)
                if score > best + 1e-9:
                    kinds, best, changed = trial, score, True
        if not changed:
            break
    scores = {}
    for i in scored:
        stop_point()
        scores[i] = {kind: joint_score(kinds[:i] + [kind] + kinds[i + 1 :], draws, bounds)
                     for kind in candidates(bounds[i, 0], bounds[i, 1])}
    return [TransformChoice(name, kinds[i], float(bounds[i, 0]), float(bounds[i, 1]), scores.get(i, {}))
            for i, name in enumerate(names)]


# --------------------------------------------------------------------------- the map


@dataclass
class SamplingMap:
    """The map between a user's parameters theta and sampler coordinates z.

    Attributes
    ----------
    parameter_names : list of str
    transforms : list of TransformChoice
    mean : ndarray of shape (d,)
        ``m``, the posterior mean of u.
    chol : ndarray of shape (d, d)
        ``W``, lower Cholesky factor of the posterior covariance of u.
    rotation : ndarray of shape (d, d)
        ``Q``, orthogonal; its first ``informed`` columns span the informed directions.
    informed : int
        Number of informed directions (``d`` when no prior was given).
    prior_variance_ratio : ndarray of shape (d,) or None
        ``1 / c``: posterior over prior variance along each column of ``Q``.
    notes : list of str
    bends : list of walktune.bends.Bend
        Quadratic shears taken out of curved ridges before whitening (``mean``
        and ``chol`` are then those of ``v``, the straightened ``u``).
    """

    parameter_names: list
    transforms: list
    mean: np.ndarray
    chol: np.ndarray
    rotation: np.ndarray
    informed: int
    prior_variance_ratio: np.ndarray | None = None
    notes: list = field(default_factory=list)
    bends: list = field(default_factory=list)

    def __post_init__(self):
        self._kinds = [t.kind for t in self.transforms]
        self._low = np.array([t.low for t in self.transforms])
        self._high = np.array([t.high for t in self.transforms])
        self._logdet = float(np.sum(np.log(np.abs(np.diag(self.chol)))))
        self._map = self.chol @ self.rotation  # u = m + A z
        self._map_t = np.ascontiguousarray(self._map.T)
        self._unmap = np.linalg.inv(self._map)
        self._groups = {kind: np.array([i for i, k in enumerate(self._kinds) if k == kind], dtype=int) for kind in KINDS}
        logit = self._groups["logit"]
        self._constant = self._logdet + float(np.sum(np.log(self._high[logit] - self._low[logit])))
        self._identity = all(k == "identity" for k in self._kinds)

    @property
    def dim(self) -> int:
        return self.mean.shape[0]

    def _apply(self, function, values):
        out = np.empty_like(values)
        for kind, index in self._groups.items():
            if index.size:
                out[..., index] = function(kind, values[..., index], self._low[index], self._high[index])
        return out

    def to_sampler(self, theta) -> np.ndarray:
        """z for theta, shape (..., d)."""
        theta = np.asarray(theta, dtype=float)
        u = self._apply(forward, theta)
        return (straighten(u, self.bends) - self.mean) @ self._unmap.T

    def straightened(self, theta) -> np.ndarray:
        """``v``, the transformed parameters with the bends taken out, for theta of shape (..., d)."""
        return straighten(self._apply(forward, np.asarray(theta, dtype=float)), self.bends)

    def from_sampler_with_jacobian(self, z):
        """theta for z and ``log |det d theta / d z|``, in one pass (the sampler's hot path)."""
        z = np.asarray(z, dtype=float)
        u = z @ self._map_t
        u += self.mean
        u = bend_back(u, self.bends)  # unit Jacobian: nothing to add
        if self._identity:
            return u, np.full(u.shape[:-1], self._logdet)
        theta = u.copy()
        jac = np.full(u.shape[:-1], self._constant)
        group = self._groups["log"]
        if group.size:
            part = u[..., group]
            theta[..., group] = self._low[group] + np.exp(part)
            jac += part.sum(axis=-1)
        group = self._groups["neglog"]
        if group.size:
            part = u[..., group]
            theta[..., group] = self._high[group] - np.exp(part)
            jac += part.sum(axis=-1)
        group = self._groups["logit"]
        if group.size:
            part = u[..., group]
            theta[..., group] = self._low[group] + (self._high[group] - self._low[group]) * special.expit(part)
            jac -= (np.logaddexp(0.0, part) + np.logaddexp(0.0, -part)).sum(axis=-1)
        return theta, jac

    def from_sampler(self, z) -> np.ndarray:
        """theta for z, shape (..., d)."""
        return self.from_sampler_with_jacobian(z)[0]

    def log_jacobian(self, z) -> np.ndarray:
        """log |det d theta / d z| at z, shape (...)."""
        return self.from_sampler_with_jacobian(z)[1]

    def log_density_in_sampler_space(self, log_density, vectorized: bool = False):
        """A log-density of z for a log-density of theta: ``log p(theta(z)) + log_jacobian(z)``."""

        def log_density_z(z):
            z = np.asarray(z, dtype=float)
            with np.errstate(over="ignore", invalid="ignore"):
                theta = self.from_sampler(z)
                jac = self.log_jacobian(z)
            if vectorized or z.ndim == 2:
                values = np.asarray(log_density(theta), dtype=float) if vectorized else np.array([log_density(t) for t in theta])
                return np.where(np.isfinite(jac), values + jac, -np.inf)
            if not (np.all(np.isfinite(theta)) and np.isfinite(jac)):
                return -np.inf
            return float(log_density(theta)) + float(jac)

        return log_density_z

    def refit(self, mean_z: np.ndarray, cov_z: np.ndarray, prior_covariance=None, n_independent=None) -> "SamplingMap":
        """The same transforms and bends with the v-space mean and covariance re-estimated from z draws.

        With z draws of mean ``mean_z`` and covariance ``cov_z``, v has mean
        ``m + A mean_z`` and covariance ``A cov_z A^T`` (``A = W Q``).
        """
        mean_u = self.mean + self._map @ mean_z
        cov_u = self._map @ cov_z @ self._map.T
        return fit_map(self.parameter_names, self.transforms, mean_u, cov_u, prior_covariance, n_independent,
                       bends=self.bends)

    def to_dict(self) -> dict:
        return {
            "schema": SCHEMA,
            "parameter_names": self.parameter_names,
            "transforms": [
                {"name": t.name, "kind": t.kind, "low": _num(t.low), "high": _num(t.high),
                 "scores": {k: _num(v) for k, v in t.scores.items()}}
                for t in self.transforms
            ],
            "mean": self.mean.tolist(),
            "W": self.chol.tolist(),
            "Q": self.rotation.tolist(),
            "informed_dimension": self.informed,
            "posterior_over_prior_variance": None if self.prior_variance_ratio is None else self.prior_variance_ratio.tolist(),
            "notes": self.notes,
            "bends": [bend.to_dict() for bend in self.bends],
        }


def _num(x: float):
    return float(x) if np.isfinite(x) else ("inf" if x > 0 else "-inf")


def _float(x) -> float:
    if isinstance(x, str):
        return {"inf": np.inf, "-inf": -np.inf}.get(x, np.nan)
    return float(x)


def load_sampling_map(path, names=None) -> SamplingMap:
    """Read a sampling_map.json (or the folder holding one); check version, W and names.

    Parameters
    ----------
    path : path
    names : list of str, optional
        The model's parameter names; an error if they differ from the file's.
    """
    path = Path(path)
    if path.is_dir():
        path = path / "sampling_map.json"
    if not path.exists():
        raise WalktuneError(f"no sampling_map.json at {path}; run `walktune tune` on a model with bounds or a prior first.")
    try:
        payload = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise WalktuneError(f"{path} is not valid JSON.") from None
    if not isinstance(payload, dict) or payload.get("schema") not in READABLE_SCHEMAS:
        found = payload.get("schema") if isinstance(payload, dict) else None
        raise WalktuneError(f"{path} has schema {found!r}; this walktune reads {', '.join(READABLE_SCHEMAS)}.")
    file_names = list(payload["parameter_names"])
    if names is not None and list(names) != file_names:
        raise WalktuneError(f"{path} is for parameters {file_names}, not the model's {list(names)}.")
    try:
        transforms = [
            TransformChoice(t["name"], t["kind"], _float(t["low"]), _float(t["high"]), t.get("scores", {}))
            for t in payload["transforms"]
        ]
        mean = np.asarray(payload["mean"], dtype=float)
        chol = np.asarray(payload["W"], dtype=float)
        rotation = np.asarray(payload["Q"], dtype=float)
        informed = int(payload["informed_dimension"])
        bends = read_bends(payload.get("bends", []), file_names)
    except (KeyError, TypeError, ValueError) as error:
        raise WalktuneError(f"{path} is incomplete or malformed ({error}).") from None
    d = len(file_names)
    if any(t.kind not in KINDS for t in transforms) or len(transforms) != d:
        raise WalktuneError(f"{path}: transforms must be one per parameter, each one of {', '.join(KINDS)}.")
    if mean.shape != (d,) or chol.shape != (d, d) or rotation.shape != (d, d):
        raise WalktuneError(f"{path}: mean, W and Q must have shapes ({d},), ({d}, {d}), ({d}, {d}).")
    if not np.all(np.isfinite(chol)) or abs(np.linalg.det(chol)) < 1e-300 or np.linalg.cond(chol) > 1e14:
        raise WalktuneError(f"{path}: W is not invertible.")
    if not np.allclose(rotation.T @ rotation, np.eye(d), atol=1e-8):
        raise WalktuneError(f"{path}: Q is not orthogonal.")
    ratio = payload.get("posterior_over_prior_variance")
    return SamplingMap(file_names, transforms, mean, chol, rotation, informed,
                   None if ratio is None else np.asarray(ratio, dtype=float), list(payload.get("notes", [])), bends)


def build_reparam(
    draws: np.ndarray,
    names: list,
    bounds: np.ndarray,
    *,
    prior_covariance=None,
    force=None,
    forbid=None,
    covariance=None,
    n_independent=None,
) -> SamplingMap:
    """Fit the map from pilot draws (n, d): transforms, mean, Cholesky factor, and the informed split.

    ``prior_covariance`` (d, d) is the prior covariance of theta; with it the
    informed subspace is computed (in u-space the prior covariance is mapped
    through the transforms' derivatives at the posterior mean, exact for
    identity transforms). ``covariance``, a better estimate of the posterior
    covariance of theta than the draws' (e.g. the pilot's shrinkage
    estimate), is used when every transform is the identity.
    ``n_independent`` (roughly independent draws behind the covariance) sets
    the informed split's threshold so that sampling noise alone calls few
    directions informed (:func:`informed_threshold`).
    """
    choices = choose_transforms(draws, names, bounds, force, forbid)
    kinds = [c.kind for c in choices]
    low = np.array([c.low for c in choices])
    high = np.array([c.high for c in choices])
    u = np.column_stack([forward(k, draws[:, i], low[i], high[i]) for i, k in enumerate(kinds)])
    if not np.all(np.isfinite(u)):
        raise WalktuneError("pilot draws lie on a bound, where a transform is infinite; move the start off the bound.")
    if covariance is not None and all(k == "identity" for k in kinds):
        cov_u = np.asarray(covariance, dtype=float)
    else:
        cov_u = np.atleast_2d(np.cov(u.T))
    return fit_map(list(names), choices, u.mean(axis=0), cov_u, prior_covariance, n_independent)


def fit_map(names: list, choices: list, mean: np.ndarray, cov: np.ndarray, prior_covariance=None, n_independent=None,
            bends=None) -> SamplingMap:
    """The map for given transforms (and bends), v-space mean and covariance, and (optionally) the prior covariance of theta.

    The prior covariance is mapped into ``v`` by the transforms' derivatives at
    the mean; a bend's derivative there is zero up to the offset of ``m`` from
    its centre, and is left out.
    """
    kinds = [c.kind for c in choices]
    low = np.array([c.low for c in choices])
    high = np.array([c.high for c in choices])
    cov = 0.5 * (cov + cov.T) + 1e-12 * np.diag(np.diag(cov))
    chol = np.linalg.cholesky(cov)
    d = len(names)
    rotation, informed, ratio, notes = np.eye(d), d, None, []
    if prior_covariance is not None:
        # du/dtheta at the mean maps the prior covariance into u-space (delta method).
        theta_mean = np.array([inverse(k, mean[i], low[i], high[i]) for i, k in enumerate(kinds)])
        slope = np.exp(-np.array([log_jacobian(k, mean[i], low[i], high[i]) for i, k in enumerate(kinds)]))
        prior_u = np.asarray(prior_covariance) * np.outer(slope, slope)
        split = informed_split(chol, prior_u, n_independent)
        rotation, informed, ratio = split.rotation, split.informed, split.ratio
        notes.append(f"likelihood-informed subspace: {informed} of {d} directions "
                     f"(posterior/prior variance < {split.threshold:.2f}); "
                     f"prior covariance mapped at theta = {np.array2string(theta_mean, precision=4)}")
    return SamplingMap(list(names), list(choices), mean, chol, rotation, informed, ratio, notes, list(bends or []))


# --------------------------------------------------------------------------- curved ridges


def curvature_measure(draws: np.ndarray, limit: int = 3000, seed: int = 0) -> np.ndarray:
    """How much better a flexible regression predicts each parameter from the others than a linear one.

    Per parameter, predicted from the five others most correlated with it: the
    share of the variance a linear model leaves unexplained that a quadratic
    model (polynomial features of degree 2 with ridge) explains, both by 3-fold cross-validated R^2, on at most ``limit`` draws:
    ``(R2_quadratic - R2_linear) / (1 - R2_linear)``. Near 0 for a Gaussian
    (whose conditional means are linear); near 1 on a thin curved ridge.
    """
    from sklearn.linear_model import LinearRegression, RidgeCV
    from sklearn.model_selection import cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler

    n, d = draws.shape
    if d < 2:
        return np.zeros(d)
    rows = draws[:: max(1, n // limit)]
    corr = np.nan_to_num(np.atleast_2d(np.corrcoef(rows.T)))
    out = np.zeros(d)
    for j in range(d):
        stop_point()
        # Predict from the (at most 5) most correlated others: a ridge bends between a few parameters,
        # and the quadratic features of all d - 1 would cost O(d^2) columns.
        others = [k for k in np.argsort(-np.abs(corr[j])) if k != j][:5]
        x = rows[:, others]
        y = rows[:, j]
        linear = cross_val_score(make_pipeline(StandardScaler(), LinearRegression()), x, y, cv=3, scoring="r2").mean()
        flexible = cross_val_score(
            make_pipeline(StandardScaler(), PolynomialFeatures(2), RidgeCV(alphas=np.logspace(-6, 2, 9))),
            x, y, cv=3, scoring="r2",
        ).mean()
        linear = min(max(linear, 0.0), 1.0 - 1e-12)
        out[j] = max(0.0, (flexible - linear) / (1.0 - linear))
    return out


#: Curvature measure above which a parameter is on a curved ridge (common practice: a third of the unexplained
#: variance explained by the quadratic terms is far beyond a Gaussian's sampling noise on thousands of draws).
CURVED = 0.3


def curved_ridge_findings(draws: np.ndarray, reparam: SamplingMap, names: list, threshold: float = CURVED,
                          before: np.ndarray | None = None) -> list:
    """``curved-ridge`` where a quadratic regression predicts a parameter much better than a linear one.

    Reports the curvature measure and the strongest correlation of the
    parameters involved before and after the chosen transforms and bends
    (``before``: the draws' curvature measure, when already computed).
    """
    from .findings import Finding

    before = curvature_measure(draws) if before is None else before
    if not np.any(before > threshold):
        return []
    u = reparam.straightened(draws)
    after = curvature_measure(u)
    involved = [i for i in range(len(names)) if before[i] > threshold]
    corr_before = np.corrcoef(draws.T)
    corr_after = np.corrcoef(u.T)
    # The partner a parameter bends along: the other most correlated with it, linearly or through its square
    # (a symmetric bend, as in the twisted Gaussian, has no linear correlation at all).
    centred = draws - draws.mean(axis=0)
    squares = np.corrcoef(draws.T, (centred**2).T)[: len(names), len(names):]
    pairs = []
    for i in involved:
        others = [j for j in range(len(names)) if j != i]
        j = max(others, key=lambda k: max(abs(corr_before[i, k]), abs(np.nan_to_num(squares[i, k]))))
        pairs.append((i, j))
    partners = sorted({k for pair in pairs for k in pair})
    chosen = ", ".join([f"{t.name}: {t.kind}" for t in reparam.transforms if t.kind != "identity"]
                       + [f"{b.name} bent along {b.along_name}, {b.name} -> {b.describe()}" for b in reparam.bends])
    chosen = chosen or "none"
    straightened = bool(np.max(after[involved]) < threshold)
    details = "; ".join(
        f"{names[i]} ~ {names[j]}: curvature {before[i]:.2f} -> {after[i]:.2f}, correlation "
        f"{corr_before[i, j]:+.3f} -> {corr_after[i, j]:+.3f}"
        for i, j in pairs
    )
    return [
        Finding(
            "curved-ridge",
            "warn",
            [names[k] for k in partners],
            f"the posterior bends: a quadratic predicts {', '.join(names[i] for i in involved)} from the others much "
            f"better than a straight line ({details}). Chosen transforms{' and bends' if reparam.bends else ''} ({chosen}) "
            + (("straighten it: sample in the coordinates of sampling_map.json." if not reparam.bends else
                "take its quadratic part out: the transformed-rotated run is a random walk in the coordinates of "
                "sampling_map.json.") if straightened else
               "do not straighten it: a fixed Gaussian proposal still mixes, but slowly along the bend (its steps "
               "must stay short across the ridge while the ridge is long), and its covariance must come from "
               "draws that have reached the ends of the bend."),
            {"curvature_before": {names[i]: float(before[i]) for i in involved},
             "curvature_after": {names[i]: float(after[i]) for i in involved},
             "straightened": straightened, "bends": [bend.to_dict() for bend in reparam.bends]},
        )
    ]
