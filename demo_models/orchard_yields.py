"""Demo: apple yields in eight orchards, a hierarchical model in two forms (a funnel).

Each orchard j has its own mean yield effect theta_j ~ N(mu, tau^2); the
measured yield change y_j ~ N(theta_j, s_j^2) with known measurement sd s_j.
With few, noisy orchards the data say little about tau, and the effects'
spread shrinks to nothing as log tau falls: the centred form is a funnel.
The non-centred form samples standardised effects z_j with
theta_j = mu + tau z_j (Papaspiliopoulos, Roberts and Sköld 2007), which removes
it. The yields are invented by a seeded generator below.

Run:  walktune tune demo_models/orchard_yields.py:log_posterior_centred
      walktune tune demo_models/orchard_yields.py:log_posterior_noncentred
"""

import numpy as np

_rng = np.random.default_rng(88)
MEASUREMENT_SD = np.array([18.0, 15.0, 22.0, 16.0, 14.0, 17.0, 20.0, 24.0])  # t/ha x 100
_TRUE_EFFECTS = 6.0 + 2.0 * _rng.standard_normal(8)
YIELD_CHANGE = _TRUE_EFFECTS + MEASUREMENT_SD * _rng.standard_normal(8)

NAMES = ["mu", "log_tau"] + [f"orchard_{j + 1}" for j in range(8)]
PARAMETERS = dict(zip(NAMES, [5.0, 1.5] + [5.0] * 8))


def _log_hyperprior(mu, log_tau):
    # mu ~ N(0, 20^2); tau half-Cauchy(0, 10) written for log tau (Jacobian tau included).
    tau = np.exp(log_tau)
    return -0.5 * (mu / 20.0) ** 2 - np.log1p((tau / 10.0) ** 2) + log_tau


def log_posterior_centred(theta):
    mu, log_tau, effects = theta[0], theta[1], theta[2:]
    if not -30.0 < log_tau < 30.0:
        return -np.inf
    tau = np.exp(log_tau)
    log_prior_effects = -effects.size * log_tau - 0.5 * np.sum(((effects - mu) / tau) ** 2)
    log_like = -0.5 * np.sum(((YIELD_CHANGE - effects) / MEASUREMENT_SD) ** 2)
    return log_like + log_prior_effects + _log_hyperprior(mu, log_tau)


def log_posterior_noncentred(theta):
    # Parameters after mu and log_tau are standardised effects z_j; effect_j = mu + tau z_j.
    mu, log_tau, z = theta[0], theta[1], theta[2:]
    if not -30.0 < log_tau < 30.0:
        return -np.inf
    effects = mu + np.exp(log_tau) * z
    log_like = -0.5 * np.sum(((YIELD_CHANGE - effects) / MEASUREMENT_SD) ** 2)
    return log_like - 0.5 * np.sum(z**2) + _log_hyperprior(mu, log_tau)
