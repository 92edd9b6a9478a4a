"""Demo: two-exponential cooling of a furnace lining (spectrum spanning several decades).

The temperature excess of a lining after shut-down is fitted by a sum of two
exponential decays. Such fits are "sloppy": some combinations of amplitudes
and time constants are pinned by the data while others are barely
constrained, so the posterior's principal spreads span several decades. The
readings are invented by a seeded generator below.

Run:  walktune tune demo_models/cooling_curve.py:log_posterior
"""

import numpy as np

_rng = np.random.default_rng(314)
TIME_H = np.linspace(0.0, 12.0, 40)
_TRUE = (300.0, 1.5, 150.0, 6.0)
EXCESS_K = _TRUE[0] * np.exp(-TIME_H / _TRUE[1]) + _TRUE[2] * np.exp(-TIME_H / _TRUE[3])
EXCESS_K = EXCESS_K + _rng.normal(0.0, 2.0, TIME_H.size)
NOISE_K = 2.0

PARAMETERS = {"amp_fast_k": 280.0, "log_tau_fast": 0.5, "amp_slow_k": 160.0, "log_tau_slow": 1.7}


def log_posterior(theta):
    a1, log_t1, a2, log_t2 = theta
    model = a1 * np.exp(-TIME_H / np.exp(log_t1)) + a2 * np.exp(-TIME_H / np.exp(log_t2))
    log_like = -0.5 * np.sum((EXCESS_K - model) ** 2) / NOISE_K**2
    # Weak priors keep the two terms ordered and finite.
    log_prior = -0.5 * ((a1 - 300.0) / 200.0) ** 2 - 0.5 * ((a2 - 150.0) / 200.0) ** 2
    log_prior += -0.5 * ((log_t1 - 0.5) / 2.0) ** 2 - 0.5 * ((log_t2 - 2.0) / 2.0) ** 2
    if log_t1 >= log_t2:
        return -np.inf
    return log_like + log_prior
