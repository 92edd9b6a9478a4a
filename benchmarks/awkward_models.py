"""Log-densities of the awkward targets whose exact answers come from long reference runs.

benchmarks/make_awkward_reference.py runs them and caches the answers;
benchmarks/awkward_targets.py turns them into targets. Each log-density takes
one point of shape (d,) and returns a float, or a batch (n, d) and returns (n,).
"""

from __future__ import annotations

import numpy as np
from scipy import special


def batched(batch_log_density):
    """Wrap ``f((n, d)) -> (n,)`` so that it also takes one point (d,) and returns a float."""

    def log_density(theta):
        x = np.asarray(theta, dtype=float)
        if x.ndim == 1:
            return float(np.atleast_1d(batch_log_density(x[None, :]))[0])
        return np.atleast_1d(batch_log_density(x))

    return log_density


def _isotope_data():
    rng = np.random.default_rng(20267)
    t = np.arange(0.0, 60.0, 2.0) + 0.25  # mid-points of 0.5-min counts every 2 minutes
    rate = 900.0 * np.exp(-0.22 * t) + 150.0 * np.exp(-0.035 * t) + 12.0
    counts = rng.poisson(0.5 * rate)
    return t, counts


def isotope_counts_log_density():
    """A mixed sample of two isotopes: Poisson counts of a sum of two decaying exponentials.

    Counts in 0.5-min windows every 2 minutes, mean ``0.5 (A1 e^{-k1 t} + A2
    e^{-k2 t} + 12)`` (background known); log-normal priors (log sd 1.5) on the
    four positive parameters; ``k1 > k2`` keeps the fast isotope first.
    """
    t, counts = _isotope_data()
    centres = np.log([1000.0, 0.2, 100.0, 0.03])

    def batch(x):
        ok = np.all(x > 0, axis=1) & (x[:, 1] > x[:, 3])
        safe = np.where(ok[:, None], x, [[1000.0, 0.2, 100.0, 0.03]])
        mean = 0.5 * (safe[:, [0]] * np.exp(-safe[:, [1]] * t) + safe[:, [2]] * np.exp(-safe[:, [3]] * t) + 12.0)
        log_like = np.sum(counts * np.log(mean) - mean, axis=1) - np.sum(special.gammaln(counts + 1))
        logs = np.log(safe)
        log_prior = np.sum(-0.5 * ((logs - centres) / 1.5) ** 2 - logs, axis=1)
        return np.where(ok, log_like + log_prior, -np.inf)

    return batched(batch)


def _log_denominator(n0, r, k, t):
    """``log(K - N0 + N0 e^{rt})`` for t >= 0 without overflow: the sum of two logs when K >= N0, else a log1p."""
    growth = np.log(n0) + r * t
    with np.errstate(divide="ignore", invalid="ignore"):
        above = np.logaddexp(np.log(np.maximum(k - n0, 0.0)), growth)
        below = growth + np.log1p(-np.minimum((n0 - k) / n0, 1.0) * np.exp(-r * t))
    return np.where(k >= n0, above, below)


def colony_growth_log_density():
    """A bacterial colony's area seen only early in its logistic growth: the capacity's upper tail follows its prior.

    ``N(t) = K N0 e^{rt} / (K + N0 (e^{rt} - 1))``, log-area observed with sd
    0.08 at 10 times while far below the capacity; log-normal priors, the
    capacity's ``K ~ LogNormal(log 2000, 1)``.
    """
    rng = np.random.default_rng(20268)
    t = np.linspace(0.0, 9.0, 10)
    truth = 2.0 * np.exp(0.45 * t) * 3000.0 / (3000.0 + 2.0 * (np.exp(0.45 * t) - 1))
    log_area = np.log(truth) + rng.normal(0, 0.08, t.size)

    def batch(x):
        ok = np.all(x > 0, axis=1)
        n0, r, k = (np.where(ok, x[:, i], 1.0)[:, None] for i in range(3))
        # log N(t) = log K + log N0 + r t - log(K - N0 + N0 e^{rt}), overflow-free.
        model = np.log(k) + np.log(n0) + r * t - _log_denominator(n0, r, k, t)
        log_like = -0.5 * np.sum(((log_area - model) / 0.08) ** 2, axis=1)
        logs = np.log(np.column_stack([n0[:, 0], r[:, 0], k[:, 0]]))
        centres, widths = np.log([2.0, 0.5, 2000.0]), np.array([1.0, 1.0, 1.0])
        log_prior = np.sum(-0.5 * ((logs - centres) / widths) ** 2 - logs, axis=1)
        return np.where(ok, log_like + log_prior, -np.inf)

    return batched(batch)


DOSE_MG = 100.0


def _dose_data():
    rng = np.random.default_rng(20269)
    t = np.array([0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0])  # hours after the dose
    ka, ke, volume = 1.3, 0.16, 22.0
    curve = DOSE_MG * ka / (volume * (ka - ke)) * (np.exp(-ke * t) - np.exp(-ka * t))
    return t, curve + rng.normal(0.0, 0.12, t.size)  # no background in the truth


def _absorption_factor(ka, ke, t):
    """``(e^{-ke t} - e^{-ka t}) / (ka - ke)``, symmetric in (ka, ke) and equal to ``t e^{-ke t}`` at ka = ke.

    Written as ``e^{-lo t} (1 - e^{-(hi - lo) t}) / (hi - lo)`` with ``lo, hi`` the smaller and larger
    rate: no cancellation when the rates are close, no overflow when they are far apart.
    """
    lo, hi = np.minimum(ka, ke), np.maximum(ka, ke)
    gap = hi - lo
    close = gap * t < 1e-8
    safe_gap = np.where(close, 1.0, gap)
    return np.exp(-lo * t) * np.where(close, t, -np.expm1(-gap * t) / safe_gap)


def dose_concentration_log_density():
    """A one-compartment oral dose: plasma concentration ``C(t) = D ka / (V (ka - ke)) (e^{-ke t} - e^{-ka t}) + b``.

    A 100 mg dose, 12 samples from 15 min to 24 h with additive normal noise of
    sd ``sigma``; log-normal priors on the absorption rate ``ka ~ LogNormal(log 1,
    1)`` per hour, the elimination rate ``ke ~ LogNormal(log 0.15, 0.7)`` per hour
    and the volume ``V ~ LogNormal(log 20, 0.5)`` litres; half-normal priors on
    the assay background ``b ~ HalfNormal(0.3)`` mg/L, whose posterior mass sits
    against 0 (the data were made without one), and on ``sigma ~
    HalfNormal(0.5)`` mg/L. Without a background constraint the data would put
    it at -0.01 +/- 0.14 mg/L (the mode and Laplace sd with b free), so the
    posterior is a half-bell against b = 0. The curve is unchanged when ka and
    ke swap and V becomes ``V ke / ka`` ("flip-flop"); with these priors the
    swapped side (ka < ke) holds no second mode: its highest point is on
    ka = ke, 8.4 below the mode in log-density (found with Nelder-Mead when
    the target was made).
    """
    t, conc = _dose_data()
    centres, widths = np.log([1.0, 0.15, 20.0]), np.array([1.0, 0.7, 0.5])

    def batch(x):
        ok = np.all(x > 0, axis=1)
        ka, ke, volume, background, sigma = (np.where(ok, x[:, i], 1.0)[:, None] for i in range(5))
        model = DOSE_MG * ka / volume * _absorption_factor(ka, ke, t) + background
        sigma = sigma[:, 0]
        log_like = -t.size * np.log(sigma) - 0.5 * np.sum((conc - model) ** 2, axis=1) / sigma**2
        logs = np.log(np.column_stack([ka[:, 0], ke[:, 0], volume[:, 0]]))
        log_prior = np.sum(-0.5 * ((logs - centres) / widths) ** 2 - logs, axis=1)
        log_prior = log_prior - 0.5 * (background[:, 0] / 0.3) ** 2 - 0.5 * (sigma / 0.5) ** 2
        return np.where(ok, log_like + log_prior, -np.inf)

    return batched(batch)


BREAST_CANCER_FEATURES = ["mean radius", "mean texture", "mean area", "mean smoothness", "worst concavity"]


def tumour_logistic_log_density():
    """Logistic regression on five unstandardised features of scikit-learn's breast-cancer data.

    Features in their own units (area ~ 650, smoothness ~ 0.1) plus an
    intercept; prior ``N(0, 10^2)`` on every coefficient (so the mode equals
    scikit-learn's L2 ``LogisticRegression`` with ``C = 100`` and no separate
    intercept).
    """
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer()
    columns = [list(data.feature_names).index(f) for f in BREAST_CANCER_FEATURES]
    design = np.column_stack([np.ones(data.data.shape[0]), data.data[:, columns]])
    label = data.target.astype(float)

    def batch(x):
        eta = x @ design.T
        return np.sum(label * eta - np.logaddexp(0.0, eta), axis=1) - 0.5 * np.sum(x**2, axis=1) / 100.0

    return batched(batch), design, label


REFERENCE_SPECS = {
    "isotope_counts": dict(
        description="sum of two decaying exponentials, Poisson counts, positive rates",
        names=["amp_fast_cpm", "k_fast_per_min", "amp_slow_cpm", "k_slow_per_min"],
        start=[700.0, 0.3, 100.0, 0.05], positive=[True] * 4,
    ),
    "colony_growth": dict(
        description="capacity's upper tail follows its prior (heavy tail)",
        names=["initial_area", "growth_rate", "capacity"], start=[1.0, 0.3, 500.0], positive=[True] * 3,
    ),
    "tumour_logistic": dict(
        description="logistic regression, breast-cancer data, unstandardised features",
        names=["intercept", "radius", "texture", "area", "smoothness", "worst_concavity"],
        start=[0.0] * 6, positive=[False] * 6,
    ),
    "dose_concentration": dict(
        description="oral-dose concentration curve; background >= 0 against its bound",
        names=["ka_per_h", "ke_per_h", "volume_l", "background_mg_l", "sigma_mg_l"],
        start=[1.0, 0.2, 20.0, 0.1, 0.2], positive=[True] * 5,
    ),
}


def reference_log_density(name):
    return {
        "isotope_counts": isotope_counts_log_density,
        "colony_growth": colony_growth_log_density,
        "tumour_logistic": lambda: tumour_logistic_log_density()[0],
        "dose_concentration": dose_concentration_log_density,
    }[name]()
