"""Demo: an offset seen through a power detector (two separated modes).

A detector reports the power of a signal, (gain x offset)^2 plus a background,
so an offset and its mirror image explain the data equally well: the
posterior has two separated modes, at about +0.9 and -0.9, and a random walk
started in one will almost never visit the other. The readings are invented
by a seeded generator below (true offset 0.9, background 0.3).

Run:  walktune tune demo_models/mirror_sensor.py:log_posterior
"""

import numpy as np

_rng = np.random.default_rng(5)
GAIN = np.linspace(0.5, 2.0, 30)
READING = (GAIN * 0.9) ** 2 + 0.3 + 0.05 * _rng.standard_normal(30)
NOISE = 0.05

PARAMETERS = {"offset": 0.2, "background": 0.0}


def log_posterior(theta):
    offset, background = theta
    model = (GAIN * offset) ** 2 + background
    # Weak priors: offset ~ N(0, 2^2), background ~ N(0, 1).
    return -0.5 * np.sum((READING - model) ** 2) / NOISE**2 - 0.5 * (offset / 2.0) ** 2 - 0.5 * background**2
