"""Demo: calibrating a strain-gauge bridge (strong linear correlation).

A strain gauge is read at loads far from zero, so the fitted offset and gain
of the linear response trade off strongly: raising the gain and lowering the
offset fits nearly as well. The readings are invented by a seeded generator
below (true offset 0.8 mV, gain 2.05 mV/kN, noise sd 0.12 mV).

Run:  walktune tune demo_models/sensor_calibration.py:log_posterior
"""

import numpy as np

_rng = np.random.default_rng(20261201)
LOAD_KN = np.linspace(40.0, 60.0, 25)
READING_MV = 0.8 + 2.05 * LOAD_KN + _rng.normal(0.0, 0.12, LOAD_KN.size)

PARAMETERS = {"offset_mv": 0.0, "gain_mv_per_kn": 2.0, "log_noise": 0.0}
BOUNDS = {"log_noise": (-10.0, 5.0)}


def log_posterior(theta):
    offset, gain, log_noise = theta
    noise = np.exp(log_noise)
    residual = READING_MV - (offset + gain * LOAD_KN)
    log_like = -LOAD_KN.size * log_noise - 0.5 * np.sum(residual**2) / noise**2
    # Weak priors: offset ~ N(0, 10^2), gain ~ N(2, 1), log_noise flat on its bounds.
    log_prior = -0.5 * (offset / 10.0) ** 2 - 0.5 * (gain - 2.0) ** 2
    return log_like + log_prior
