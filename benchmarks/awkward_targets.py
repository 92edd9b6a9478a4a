"""Awkward posteriors with exact answers, for benchmarking walktune where tuning is hard.

Every target is an invented scenario from a field of science or engineering
with seeded data, and comes with the exact posterior mean and standard
deviation of every parameter, obtained one of three ways:

* closed form (scipy.stats distributions, conjugate updates, truncated normals);
* quadrature on a fine grid (a 1-d or 2-d integral after integrating the rest
  out analytically);
* a long reference run of a plain random-walk sampler in log coordinates,
  checked by R-hat, cached in ``benchmarks/awkward_reference.npz`` by
  ``benchmarks/make_awkward_reference.py`` (the script that made it); their
  log-densities are in ``benchmarks/awkward_models.py``.

Each target also gives independent draws from the exact posterior (or from the
cached reference draws), so that benchmark chains can start in stationarity.

Log-densities take one point of shape (d,) and return a float, or a batch of
shape (n, d) and return shape (n,); ``-inf`` outside the support.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Callable

import numpy as np
from scipy import stats

from awkward_models import (  # noqa: F401 - re-exported for the reference script
    REFERENCE_SPECS,
    batched as _batched,
    reference_log_density,
    tumour_logistic_log_density,
)

REFERENCE_FILE = Path(__file__).resolve().parent / "awkward_reference.npz"

__all__ = ["Target", "TARGET_NAMES", "build", "REFERENCE_FILE"]


@dataclass(frozen=True)
class Target:
    """One awkward posterior and its exact answers.

    Attributes
    ----------
    name, description : str
    names : list of str, length d
    log_density : callable
        (d,) -> float or (n, d) -> (n,).
    start : ndarray of shape (d,)
        A start a user would plausibly give.
    bounds : dict
        ``{name: (low, high)}`` for bounded parameters, as walktune.tune takes them.
    mean, sd : ndarray of shape (d,)
        Exact posterior means and standard deviations.
    mean_error, sd_error : ndarray of shape (d,)
        Monte Carlo standard errors of ``mean`` and ``sd`` (zero for closed
        forms and quadrature).
    source : str
        Where the exact answers come from.
    exact_draws : callable
        ``exact_draws(n, rng) -> ndarray of shape (n, d)``, independent draws.
    positive : ndarray of bool, shape (d,)
        Parameters bounded below by zero (sampled on the log scale by the reference runs).
    fixed_can_mix : bool
        False where no fixed proposal can mix (a funnel): there, a finding naming
        the problem and the fix is what the issue asks for instead of right numbers.
    extra : dict
        Facts about the target for the docs (e.g. the minor mode's mass).
    """

    name: str
    description: str
    names: list
    log_density: Callable
    start: np.ndarray
    bounds: dict
    mean: np.ndarray
    sd: np.ndarray
    source: str
    exact_draws: Callable
    positive: np.ndarray
    mean_error: np.ndarray = None
    sd_error: np.ndarray = None
    fixed_can_mix: bool = True
    extra: dict = field(default_factory=dict)

    @property
    def dim(self) -> int:
        return len(self.names)


# --------------------------------------------------------------------------- helpers


def _conjugate_regression(design, y, noise_sd, prior_sd):
    """Gaussian posterior of ``beta`` in ``y = design @ beta + N(0, noise_sd^2)``, prior ``N(0, diag(prior_sd^2))``.

    Returns the mean (p,) and covariance (p, p): ``S = (X^T X / s^2 + L0^-1)^-1``, ``m = S X^T y / s^2``
    (the conjugate normal update; e.g. Gelman et al., Bayesian Data Analysis, ch. 14).
    """
    precision = design.T @ design / noise_sd**2 + np.diag(1.0 / np.asarray(prior_sd, float) ** 2)
    cov = np.linalg.inv(precision)
    return cov @ design.T @ y / noise_sd**2, cov


def _grid_draws(grid, weights, n, rng):
    """Draws from a 1-d density given on a fine uniform grid: a cell by weight, then uniform inside it."""
    h = grid[1] - grid[0]
    cells = rng.choice(grid.size, size=n, p=weights / weights.sum())
    return grid[cells] + (rng.random(n) - 0.5) * h


def _gaussian_log_density(mean, cov):
    precision = np.linalg.inv(cov)
    return lambda x: -0.5 * np.einsum("ij,jk,ik->i", x - mean, precision, x - mean)


def _trapezoid_weights(grid):
    w = np.full(grid.size, grid[1] - grid[0])
    w[[0, -1]] *= 0.5
    return w


# --------------------------------------------------------------------------- closed forms


def glider_fix() -> Target:
    """Acoustic position fix of an underwater glider with heavy-tailed ranging errors.

    The posterior of (east, north, depth, clock offset) is a multivariate
    Student-t with 3 degrees of freedom: mean ``loc``, covariance ``3 * shape``
    (scipy.stats.multivariate_t; marginals are scaled Student-t).
    """
    rng = np.random.default_rng(20261)
    loc = np.array([1520.0, -480.0, 31.5, 0.8])
    scale = np.array([2.0, 3.5, 0.6, 0.05])
    a = rng.normal(size=(4, 4))
    corr = a @ a.T + 2.0 * np.eye(4)
    corr /= np.sqrt(np.outer(np.diag(corr), np.diag(corr)))
    shape = corr * np.outer(scale, scale)
    dist = stats.multivariate_t(loc=loc, shape=shape, df=3)
    return Target(
        "glider_fix", "glider position fix, multivariate Student-t (3 dof)", ["east_m", "north_m", "depth_m", "clock_s"],
        _batched(dist.logpdf), loc + np.array([1.0, -1.0, 0.3, 0.02]), {}, loc, np.sqrt(3.0 * np.diag(shape)),
        "closed form: multivariate Student-t, covariance nu/(nu-2) * shape (scipy.stats.multivariate_t)",
        lambda n, rng: np.atleast_2d(dist.rvs(size=n, random_state=rng)), np.zeros(4, bool),
    )


def _magnitude_calibration():
    """Local vs reference magnitudes of 15 seeded earthquakes: conjugate line with known scatter 0.1."""
    rng = np.random.default_rng(20262)
    reference = rng.uniform(2.0, 4.0, 15)
    local = 0.3 + 0.9 * reference + rng.normal(0, 0.1, 15)
    design = np.column_stack([np.ones(15), reference])
    return _conjugate_regression(design, local, 0.1, [10.0, 10.0])


def quiet_fault() -> Target:
    """A quiet fault: no magnitude-5 events in 12 years, and a magnitude calibration line.

    Rate: Poisson count 0 in 12 years with the Jeffreys prior Gamma(1/2) gives
    Gamma(shape 0.5, rate 12): unbounded density at 0 (scipy.stats.gamma).
    Calibration: conjugate normal line with an uncentred covariate, correlated.
    """
    rate = stats.gamma(0.5, scale=1 / 12.0)
    m, cov = _magnitude_calibration()
    gauss = _gaussian_log_density(m, cov)

    def batch(x):
        with np.errstate(divide="ignore", invalid="ignore"):
            lr = np.where(x[:, 0] > 0, rate.logpdf(np.maximum(x[:, 0], 1e-300)), -np.inf)
        return lr + gauss(x[:, 1:])

    def draws(n, rng):
        return np.column_stack([rate.rvs(size=n, random_state=rng), rng.multivariate_normal(m, cov, size=n)])

    return Target(
        "quiet_fault", "event rate Gamma(0.5) (shape < 1) beside a correlated calibration line",
        ["rate_per_year", "mag_offset", "mag_slope"], _batched(batch), np.array([0.1, 0.0, 1.0]),
        {"rate_per_year": (0.0, None)}, np.concatenate([[rate.mean()], m]),
        np.concatenate([[rate.std()], np.sqrt(np.diag(cov))]),
        "closed form: gamma marginal (scipy.stats.gamma) and a conjugate normal line", draws,
        np.array([True, False, False]),
    )


def inspection_line() -> Target:
    """A production line: 0 defects in 340 parts, 57 of 59 first-pass yields, 372 arrivals in 8 hours.

    Jeffreys priors give Beta(0.5, 340.5) (unbounded at 0), Beta(57.5, 2.5)
    (mass near 1) and Gamma(372.5, rate 8) (scipy.stats.beta, scipy.stats.gamma).
    """
    parts = [stats.beta(0.5, 340.5), stats.beta(57.5, 2.5), stats.gamma(372.5, scale=1 / 8.0)]

    def batch(x):
        inside = (x[:, 0] > 0) & (x[:, 0] < 1) & (x[:, 1] > 0) & (x[:, 1] < 1) & (x[:, 2] > 0)
        safe = np.where(inside[:, None], x, [[0.01, 0.9, 40.0]])
        total = sum(p.logpdf(safe[:, i]) for i, p in enumerate(parts))
        return np.where(inside, total, -np.inf)

    return Target(
        "inspection_line", "beta marginals at both bounds (a < 1) beside a gamma rate",
        ["defect_prob", "yield_prob", "arrivals_per_hour"], _batched(batch), np.array([0.01, 0.9, 40.0]),
        {"defect_prob": (0.0, 1.0), "yield_prob": (0.0, 1.0), "arrivals_per_hour": (0.0, None)},
        np.array([p.mean() for p in parts]), np.array([p.std() for p in parts]),
        "closed form: beta and gamma marginals (scipy.stats.beta, scipy.stats.gamma)",
        lambda n, rng: np.column_stack([p.rvs(size=n, random_state=rng) for p in parts]),
        np.array([True, True, True]),
    )


def twisted_ridge(b: float = 0.08) -> Target:
    """The twisted Gaussian of Haario, Saksman and Tamminen (1999), with a third untwisted coordinate.

    ``y ~ N(0, diag(100, 1, 1))``, ``x1 = y1``, ``x2 = y2 + b (y1^2 - 100)``, ``x3 = y3``:
    E[x] = 0, var(x1) = 100, var(x2) = 1 + 2 b^2 10^4, var(x3) = 1.
    """

    def batch(x):
        return -0.5 * (x[:, 0] ** 2 / 100.0 + (x[:, 1] - b * (x[:, 0] ** 2 - 100.0)) ** 2 + x[:, 2] ** 2)

    def draws(n, rng):
        y = rng.standard_normal((n, 3)) * [10.0, 1.0, 1.0]
        y[:, 1] += b * (y[:, 0] ** 2 - 100.0)
        return y

    return Target(
        "twisted_ridge", f"twisted (banana) Gaussian, b = {b}", ["x1", "x2", "x3"], _batched(batch),
        np.array([1.0, 1.0, 1.0]), {}, np.zeros(3), np.sqrt([100.0, 1 + 2 * b**2 * 1e4, 1.0]),
        "closed form: Haario et al. (1999) twisted Gaussian moments", draws, np.zeros(3, bool),
    )


def xrf_background() -> Target:
    """An X-ray fluorescence line on a background that must be >= 0 (half-normal prior, sd 5).

    Counts (Gaussian, sd 2) in 40 channels: amplitude of a known line shape, a
    background level and a drift slope. The posterior is a Gaussian truncated to
    background >= 0: the background's marginal is a truncated normal
    (scipy.stats.truncnorm) and the other parameters are linear in it given it,
    so their moments follow by the laws of total mean and variance.
    """
    rng = np.random.default_rng(20263)
    energy = np.linspace(5.0, 9.0, 40)
    shape = np.exp(-0.5 * ((energy - 7.0) / 0.15) ** 2)
    design = np.column_stack([shape, np.ones(40), energy - 7.0])
    counts = design @ [30.0, 0.0, 0.4] + rng.normal(0, 2.0, 40)
    m, cov = _conjugate_regression(design, counts, 2.0, [100.0, 5.0, 10.0])
    gauss = _gaussian_log_density(m, cov)
    sd_b = np.sqrt(cov[1, 1])
    background = stats.truncnorm(-m[1] / sd_b, np.inf, loc=m[1], scale=sd_b)
    slope = cov[[0, 2], 1] / cov[1, 1]
    rest_cov = cov[np.ix_([0, 2], [0, 2])] - np.outer(slope, slope) * cov[1, 1]
    mean = np.array([m[0] + slope[0] * (background.mean() - m[1]), background.mean(),
                     m[2] + slope[1] * (background.mean() - m[1])])
    var = np.array([rest_cov[0, 0] + slope[0] ** 2 * background.var(), background.var(),
                    rest_cov[1, 1] + slope[1] ** 2 * background.var()])

    def batch(x):
        return np.where(x[:, 1] >= 0, gauss(x), -np.inf)

    def draws(n, rng):
        b = background.rvs(size=n, random_state=rng)
        rest = m[[0, 2]] + np.outer(b - m[1], slope) + rng.multivariate_normal(np.zeros(2), rest_cov, size=n)
        return np.column_stack([rest[:, 0], b, rest[:, 1]])

    return Target(
        "xrf_background", "mass at a bound: background >= 0 with a half-normal prior",
        ["line_amplitude", "background", "drift_slope"], _batched(batch), np.array([25.0, 1.0, 0.0]),
        {"background": (0.0, None)}, mean, np.sqrt(var),
        "closed form: Gaussian truncated at the bound (scipy.stats.truncnorm marginal, linear conditionals)",
        draws, np.array([False, True, False]), extra={"unconstrained_background_mean": float(m[1]),
                                                      "unconstrained_background_sd": float(sd_b)},
    )


# --------------------------------------------------------------------------- quadrature


def interlab_centred() -> Target:
    """An inter-laboratory comparison: 10 labs measure lead in one reference material (centred, natural scale).

    ``y_j ~ N(theta_j, s_j^2)`` with known standard uncertainties ``s_j``,
    ``theta_j ~ N(mu, tau^2)``, ``mu ~ N(20, 10^2)``, ``tau ~ half-normal(2)``.
    Integrating the lab means out gives ``y_j ~ N(mu, s_j^2 + tau^2)``, so
    ``p(mu, tau | y)`` is computed on a fine 2-d grid; given (mu, tau, y) each
    ``theta_j`` is normal, which gives its exact moments.
    """
    rng = np.random.default_rng(20264)
    labs = 10
    s = rng.uniform(0.8, 2.5, labs)
    y = 25.0 + 0.4 * rng.standard_normal(labs) + s * rng.standard_normal(labs)
    names = ["mu", "tau"] + [f"lab_{j + 1}" for j in range(labs)]

    def batch(x):
        mu, tau, theta = x[:, 0], x[:, 1], x[:, 2:]
        with np.errstate(divide="ignore", invalid="ignore"):
            safe_tau = np.where(tau > 0, tau, 1.0)
            lp = -0.5 * ((mu - 20.0) / 10.0) ** 2 - 0.5 * (tau / 2.0) ** 2
            lp = lp - labs * np.log(safe_tau) - 0.5 * np.sum(((theta - mu[:, None]) / safe_tau[:, None]) ** 2, axis=1)
            lp = lp - 0.5 * np.sum(((y - theta) / s) ** 2, axis=1)
        return np.where(tau > 0, lp, -np.inf)

    mu_grid = np.linspace(np.mean(y) - 6.0, np.mean(y) + 6.0, 801)
    tau_grid = np.linspace(0.0, 12.0, 801)
    total_var = s[None, None, :] ** 2 + tau_grid[None, :, None] ** 2
    resid = y[None, None, :] - mu_grid[:, None, None]
    log_post = (-0.5 * ((mu_grid[:, None] - 20.0) / 10.0) ** 2 - 0.5 * (tau_grid[None, :] / 2.0) ** 2
                - 0.5 * np.sum(np.log(total_var) + resid**2 / total_var, axis=2))
    weights = np.exp(log_post - log_post.max()) * np.outer(_trapezoid_weights(mu_grid), _trapezoid_weights(tau_grid))
    weights /= weights.sum()
    mu_mesh, tau_mesh = np.meshgrid(mu_grid, tau_grid, indexing="ij")
    # theta_j | mu, tau, y ~ N((y_j tau^2 + mu s_j^2) / (s_j^2 + tau^2), s_j^2 tau^2 / (s_j^2 + tau^2)).
    cond_mean = (y * tau_mesh[..., None] ** 2 + mu_mesh[..., None] * s**2) / (s**2 + tau_mesh[..., None] ** 2)
    cond_var = s**2 * tau_mesh[..., None] ** 2 / (s**2 + tau_mesh[..., None] ** 2)
    w = weights[..., None]
    theta_mean = np.sum(w * cond_mean, axis=(0, 1))
    theta_var = np.sum(w * (cond_var + cond_mean**2), axis=(0, 1)) - theta_mean**2
    mu_mean, tau_mean = np.sum(weights * mu_mesh), np.sum(weights * tau_mesh)
    mu_var = np.sum(weights * mu_mesh**2) - mu_mean**2
    tau_var = np.sum(weights * tau_mesh**2) - tau_mean**2
    h_mu, h_tau = mu_grid[1] - mu_grid[0], tau_grid[1] - tau_grid[0]

    def draws(n, rng):
        cells = rng.choice(weights.size, size=n, p=weights.ravel())
        i, j = np.unravel_index(cells, weights.shape)
        mu = mu_grid[i] + (rng.random(n) - 0.5) * h_mu
        tau = np.abs(tau_grid[j] + (rng.random(n) - 0.5) * h_tau)
        var = s**2 * tau[:, None] ** 2 / (s**2 + tau[:, None] ** 2)
        mean = (y * tau[:, None] ** 2 + mu[:, None] * s**2) / (s**2 + tau[:, None] ** 2)
        return np.column_stack([mu, tau, mean + np.sqrt(var) * rng.standard_normal((n, labs))])

    return Target(
        "interlab_centred", "centred hierarchical model, natural scale, 10 groups, tau near zero", names,
        _batched(batch), np.concatenate([[np.mean(y), 1.0], y]), {"tau": (0.0, None)},
        np.concatenate([[mu_mean, tau_mean], theta_mean]), np.sqrt(np.concatenate([[mu_var, tau_var], theta_var])),
        "quadrature: 2-d grid over (mu, tau) with the lab means integrated out analytically", draws,
        np.array([False, True] + [False] * labs), fixed_can_mix=False,
        extra={"y": y, "s": s},
    )


def fatigue_basquin() -> Target:
    """Basquin's law for fatigue lives: log-life linear in log-stress amplitude (uncentred covariate).

    14 seeded specimens at 180-320 MPa; ``log N = a + b log S + N(0, sigma^2)``,
    ``a ~ N(0, 100^2)``, ``b ~ N(0, 20^2)``, ``sigma ~ half-normal(1)``.
    Given sigma, (a, b) is normal in closed form (conjugate update); the
    marginal of sigma, ``p(sigma) N(y; 0, sigma^2 I + X L0 X^T)``, is
    integrated on a fine 1-d grid, which gives exact moments of everything.
    """
    rng = np.random.default_rng(20265)
    stress = np.sort(rng.uniform(180.0, 320.0, 14))
    design = np.column_stack([np.ones(14), np.log(stress)])
    log_life = design @ [40.0, -5.5] + rng.normal(0, 0.35, 14)
    prior_var = np.array([100.0, 20.0]) ** 2

    def batch(x):
        sigma = x[:, 2]
        safe = np.where(sigma > 0, sigma, 1.0)
        resid = log_life[None, :] - x[:, :2] @ design.T
        lp = -14 * np.log(safe) - 0.5 * np.sum(resid**2, axis=1) / safe**2
        lp = lp - 0.5 * np.sum(x[:, :2] ** 2 / prior_var, axis=1) - 0.5 * sigma**2
        return np.where(sigma > 0, lp, -np.inf)

    grid = np.linspace(1e-3, 3.0, 30001)
    marginal_cov = grid[:, None, None] ** 2 * np.eye(14) + (design * prior_var) @ design.T
    _, logdet = np.linalg.slogdet(marginal_cov)
    quad = np.einsum("i,gij,j->g", log_life, np.linalg.inv(marginal_cov), log_life)
    log_w = -0.5 * grid**2 - 0.5 * logdet - 0.5 * quad
    weights = np.exp(log_w - log_w.max()) * _trapezoid_weights(grid)
    weights /= weights.sum()
    precision = design.T @ design / grid[:, None, None] ** 2 + np.diag(1 / prior_var)
    cond_cov = np.linalg.inv(precision)
    cond_mean = np.einsum("gij,j->gi", cond_cov, design.T @ log_life) / grid[:, None] ** 2
    mean_ab = weights @ cond_mean
    var_ab = weights @ (np.diagonal(cond_cov, axis1=1, axis2=2) + cond_mean**2) - mean_ab**2
    mean_s = weights @ grid
    var_s = weights @ grid**2 - mean_s**2

    def draws(n, rng):
        sigma = _grid_draws(grid, weights, n, rng)
        prec = design.T @ design / sigma[:, None, None] ** 2 + np.diag(1 / prior_var)
        cov = np.linalg.inv(prec)
        mean = np.einsum("gij,j->gi", cov, design.T @ log_life) / sigma[:, None] ** 2
        ab = mean + np.einsum("gij,gj->gi", np.linalg.cholesky(cov), rng.standard_normal((n, 2)))
        return np.column_stack([ab, sigma])

    return Target(
        "fatigue_basquin", "regression with an uncentred covariate (log-stress 5.2-5.8) and unknown noise",
        ["intercept", "slope", "sigma"], _batched(batch), np.array([30.0, -4.0, 0.5]), {"sigma": (0.0, None)},
        np.concatenate([mean_ab, [mean_s]]), np.sqrt(np.concatenate([var_ab, [var_s]])),
        "quadrature: 1-d grid over sigma, coefficients normal given sigma (conjugate update)", draws,
        np.array([False, False, True]),
    )


def reflection_sign() -> Target:
    """A crystallographic structure factor whose sign the data cannot see (a minor mode far below the main one).

    Six repeated intensity measurements ``I_k ~ N(F^2, 1)`` and a prior on F
    from a partial structure, ``N(2.3, 1)``: the likelihood is symmetric in F,
    the prior makes the negative mode lower by about 14 in log-density (mass
    about 1e-6). Beside it, a Wilson-plot line (log scale, B-factor), normal in
    closed form. F's moments come from a fine 1-d grid.
    """
    rng = np.random.default_rng(20266)
    intensities = 9.0 + rng.normal(0, 1.0, 6)
    s2 = np.linspace(0.02, 0.25, 12)
    design = np.column_stack([np.ones(12), -2.0 * s2])
    log_mean_intensity = design @ [0.7, 12.0] + rng.normal(0, 0.05, 12)
    m, cov = _conjugate_regression(design, log_mean_intensity, 0.05, [10.0, 100.0])
    gauss = _gaussian_log_density(m, cov)

    def log_f(f):
        return -0.5 * (f - 2.3) ** 2 - 0.5 * np.sum((intensities[None, :] - f[:, None] ** 2) ** 2, axis=1)

    grid = np.linspace(-6.0, 6.0, 600001)
    lf = np.concatenate([log_f(chunk) for chunk in np.array_split(grid, 20)])
    weights = np.exp(lf - lf.max()) * _trapezoid_weights(grid)
    weights /= weights.sum()
    f_mean = weights @ grid
    f_sd = np.sqrt(weights @ grid**2 - f_mean**2)

    def draws(n, rng):
        return np.column_stack([_grid_draws(grid, weights, n, rng), rng.multivariate_normal(m, cov, size=n)])

    return Target(
        "reflection_sign", "a minor mode (sign of F) 14 below the main one, start between them",
        ["F", "log_scale", "b_factor"], _batched(lambda x: log_f(x[:, 0]) + gauss(x[:, 1:])),
        np.array([0.5, 0.0, 10.0]), {}, np.concatenate([[f_mean], m]), np.concatenate([[f_sd], np.sqrt(np.diag(cov))]),
        "quadrature: 1-d grid over F; Wilson line closed form (conjugate update)", draws, np.zeros(3, bool),
        extra={"minor_mode_mass": float(weights[grid < 0].sum())},
    )



@lru_cache(maxsize=None)
def _reference_file():
    if not REFERENCE_FILE.exists():
        raise FileNotFoundError(f"{REFERENCE_FILE} is missing: run benchmarks/make_awkward_reference.py first.")
    with np.load(REFERENCE_FILE) as data:
        return {key: data[key] for key in data.files}


def reference_target(name: str) -> Target:
    """A target whose exact answers come from the cached long reference run."""
    spec = REFERENCE_SPECS[name]
    ref = _reference_file()
    pool = ref[f"{name}/draws"]
    positive = np.array(spec["positive"])

    def draws(n, rng):
        return pool[rng.integers(0, pool.shape[0], n)]

    bounds = {nm: (0.0, None) for nm, pos in zip(spec["names"], positive) if pos}
    return Target(
        name, spec["description"], spec["names"], reference_log_density(name), np.array(spec["start"], float), bounds,
        ref[f"{name}/mean"], ref[f"{name}/sd"],
        f"reference run: plain random-walk Metropolis in log coordinates, {int(ref[f'{name}/draws_total'])} draws, "
        f"max R-hat {float(ref[f'{name}/max_rhat']):.4f}, min ESS {float(ref[f'{name}/min_ess']):.0f}",
        draws, positive, mean_error=ref[f"{name}/mean_mcse"], sd_error=ref[f"{name}/sd_mcse"],
    )


# --------------------------------------------------------------------------- registry


_CLOSED = {
    "glider_fix": glider_fix,
    "quiet_fault": quiet_fault,
    "inspection_line": inspection_line,
    "twisted_ridge": twisted_ridge,
    "xrf_background": xrf_background,
    "interlab_centred": interlab_centred,
    "fatigue_basquin": fatigue_basquin,
    "reflection_sign": reflection_sign,
}

TARGET_NAMES = list(_CLOSED) + list(REFERENCE_SPECS)


@lru_cache(maxsize=None)
def build(name: str) -> Target:
    """The target called ``name`` (one of :data:`TARGET_NAMES`), with its exact answers."""
    if name in _CLOSED:
        target = _CLOSED[name]()
    elif name in REFERENCE_SPECS:
        target = reference_target(name)
    else:
        raise KeyError(f"unknown target {name!r}; known: {', '.join(TARGET_NAMES)}")
    zeros = np.zeros(target.dim)
    if target.mean_error is None:
        object.__setattr__(target, "mean_error", zeros)
    if target.sd_error is None:
        object.__setattr__(target, "sd_error", zeros)
    return target
