"""Demo: firing shrinkage of clay tiles in six kilns, a regression with kiln intercepts (a funnel).

Tiles are fired two to four times in each of six kilns (16 firings in all);
a firing's shrinkage (%) rises with the firing temperature, with the same
slope everywhere, and each kiln shifts it by its own offset:

    shrinkage_i = a_kiln(i) + slope * (temperature_i - 1200 C) / 100 + noise_i,   noise_i ~ N(0, 1.5^2)
    a_k ~ N(mu, tau^2)

The firing-to-firing sd (1.5 %) is taken as known from the works' records.
The kilns differ little against that noise, so the data say little about the
spread tau of the kiln offsets: as log tau falls the offsets are squeezed
together, and in the centred form (the offsets a_k themselves) the posterior
is a funnel along log_tau. The non-centred form samples standardised offsets
z_k with a_k = mu + tau z_k (Papaspiliopoulos, Roberts and Sköld 2007), which
removes it. The firings are invented by a seeded generator below.

Priors (chosen for this demo): mu ~ N(6, 3^2) %, slope ~ N(0, 2^2) % per
100 C, tau ~ exponential with mean 1 % (sampled as log tau, Jacobian included).

Run:  walktune tune demo_models/kiln_shrinkage.py:log_posterior_centred
      walktune tune demo_models/kiln_shrinkage.py:log_posterior_noncentred
"""

import numpy as np

_rng = np.random.default_rng(5150)
N_KILNS = 6
KILN = np.repeat(np.arange(N_KILNS), [3, 2, 4, 2, 3, 2])  # repeated firings per kiln
TEMPERATURE_C = np.array([1150, 1200, 1260, 1180, 1240, 1140, 1190, 1230, 1270, 1170, 1220, 1160, 1210, 1250,
                          1175, 1235.0])
NOISE_SD = 1.5
_X = (TEMPERATURE_C - 1200.0) / 100.0
_TRUE_OFFSETS = 6.5 + 0.4 * _rng.standard_normal(N_KILNS)
SHRINKAGE_PCT = _TRUE_OFFSETS[KILN] + 1.4 * _X + NOISE_SD * _rng.standard_normal(KILN.size)

NAMES = ["mu", "log_tau", "slope"] + [f"kiln_{k + 1}" for k in range(N_KILNS)]
PARAMETERS = dict(zip(NAMES, [6.0, 0.0, 1.0] + [6.0] * N_KILNS))


def _log_prior_shared(mu, log_tau, slope):
    log_prior_tau = -np.exp(log_tau) + log_tau  # exponential(mean 1) on tau, Jacobian of log tau
    return -0.5 * ((mu - 6.0) / 3.0) ** 2 - 0.5 * (slope / 2.0) ** 2 + log_prior_tau


def _log_likelihood(offsets, slope):
    residual = SHRINKAGE_PCT - offsets[KILN] - slope * _X
    return -0.5 * np.sum((residual / NOISE_SD) ** 2)


def log_posterior_centred(theta):
    mu, log_tau, slope, offsets = theta[0], theta[1], theta[2], theta[3:]
    if not -30.0 < log_tau < 30.0:
        return -np.inf
    log_prior_offsets = -N_KILNS * log_tau - 0.5 * np.sum((offsets - mu) ** 2) * np.exp(-2.0 * log_tau)
    return _log_likelihood(offsets, slope) + log_prior_offsets + _log_prior_shared(mu, log_tau, slope)


def log_posterior_noncentred(theta):
    # The parameters after slope are standardised offsets z_k; kiln offset a_k = mu + tau z_k.
    mu, log_tau, slope, z = theta[0], theta[1], theta[2], theta[3:]
    if not -30.0 < log_tau < 30.0:
        return -np.inf
    offsets = mu + np.exp(log_tau) * z
    return _log_likelihood(offsets, slope) - 0.5 * np.sum(z**2) + _log_prior_shared(mu, log_tau, slope)
