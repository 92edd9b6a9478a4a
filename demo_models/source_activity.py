"""Demo: a radioactive source behind a detector of uncertain efficiency (curved ridge).

Counts depend on activity x efficiency only, so the data pin the product of
two positive parameters and leave their ratio to the priors: the posterior is
a curved (hyperbolic) ridge in (activity, efficiency). The counts are invented
by a seeded generator below (activity 40 kBq, efficiency 0.25).

Run:  walktune tune demo_models/source_activity.py:log_posterior
"""

import numpy as np
from scipy import special

_rng = np.random.default_rng(7)
LIVE_TIME_S = np.array([10.0, 20.0, 30.0, 40.0, 60.0, 90.0])
COUNTS = _rng.poisson(40.0 * 0.25 * LIVE_TIME_S)  # activity [kBq] x efficiency -> counts per ms scale

PARAMETERS = {"activity_kbq": 30.0, "efficiency": 0.3}
BOUNDS = {"activity_kbq": (0.0, float("inf")), "efficiency": (0.0, 1.0)}


def log_posterior(theta):
    activity, efficiency = theta
    if activity <= 0 or not 0 < efficiency < 1:
        return -np.inf
    rate = activity * efficiency * LIVE_TIME_S
    log_like = np.sum(COUNTS * np.log(rate) - rate - special.gammaln(COUNTS + 1))
    # Priors: activity log-normal around 40 kBq (factor 2), efficiency Beta(5, 15) (mean 0.25).
    log_prior = -0.5 * (np.log(activity / 40.0) / np.log(2.0)) ** 2 - np.log(activity)
    log_prior += 4 * np.log(efficiency) + 14 * np.log1p(-efficiency)
    return log_like + log_prior
