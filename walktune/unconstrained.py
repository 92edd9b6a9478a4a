"""The pilot's coordinates for bounded parameters whose mode or mass lies near a bound.

A random walk on ``theta`` near a bound wastes its proposals beyond it, and a
mode on the bound leaves the Laplace approximation meaningless there (its
variance is whatever the curvature at the bound says, often tiny). The usual
remedy is to sample ``u = T(theta)`` with ``T`` the log (lower bound), negated
log (upper bound) or logit (both) of :mod:`walktune.reparam`, on the density

    log p_u(u) = log p(T^{-1}(u)) + log |d theta / d u|,

whose mode lies inside and whose shape near the bound is that of a log scale
(e.g. Gelman 2006 on scale parameters with mass near zero). Here the pilot
itself runs in ``u`` when the mode, or the mass around it, is near a bound;
what it learns is mapped back to ``theta`` for the fixed-proposal stages that
follow in the user's parameters.

A parameter counts as near its bound when the mode is within
:data:`NEAR_SDS` sds of it, or when the log-density, moving that parameter
alone from the mode towards the bound (halfway, and to 1% of the distance),
drops by less than :data:`NEAR_DROP`: then the posterior still has mass
between the mode and the bound.

References
----------
Gelman, A. (2006). Prior distributions for variance parameters in hierarchical models.
Bayesian Analysis, 1(3), 515-534.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .mode import ModeFit, find_mode
from . import pilot as pilot_module
from .pilot import PilotResult, run_pilot, shrunk_covariance
from .posterior import SamplerSpaceEvaluator
from .reparam import SamplingMap, TransformChoice, candidates

#: The mode within this many sds of a bound is near it.
NEAR_SDS = 3.0
#: Log-density drop towards a bound below which mass reaches the bound (a density ratio of e^-3, about 5%).
NEAR_DROP = 3.0
#: Shares of the mode's distance to the bound where the log-density is probed.
PROBE_FRACTIONS = (0.5, 0.01)


def near_bound(evaluate, mode: np.ndarray, mode_value: float, sd: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Which parameters have their mode, or mass beside the mode, near a finite bound.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(theta) -> float``, the log-density (-inf outside).
    mode : ndarray of shape (d,)
    mode_value : float
        Log-density at ``mode``.
    sd : ndarray of shape (d,)
        Sds of the start covariance (Laplace or a guess).
    bounds : ndarray of shape (d, 2)

    Returns
    -------
    ndarray of bool, shape (d,)
    """
    near = np.zeros(mode.shape[0], dtype=bool)
    for i, (low, high) in enumerate(bounds):
        for bound in (low, high):
            if not np.isfinite(bound):
                continue
            distance = abs(mode[i] - bound)
            if not distance >= NEAR_SDS * sd[i]:  # also when sd is NaN
                near[i] = True
                break
            for fraction in PROBE_FRACTIONS:
                point = mode.copy()
                point[i] = bound + fraction * (mode[i] - bound)
                if evaluate(point) > mode_value - NEAR_DROP:
                    near[i] = True
                    break
            if near[i]:
                break
    return near


def pilot_map(names: list, bounds: np.ndarray, near: np.ndarray) -> SamplingMap:
    """The map ``z = u = T(theta)``: the bounds' transform for parameters near a bound, the identity elsewhere."""
    choices = []
    for i, name in enumerate(names):
        low, high = float(bounds[i, 0]), float(bounds[i, 1])
        kind = candidates(low, high)[-1] if near[i] else "identity"
        choices.append(TransformChoice(name, kind, low, high, {}))
    dim = len(names)
    return SamplingMap(list(names), choices, np.zeros(dim), np.eye(dim), np.eye(dim), dim,
                   notes=["pilot coordinates: bounded parameters near a bound on an unbounded scale"])


@dataclass(frozen=True)
class UnconstrainedStart:
    """Where the pilot starts in unconstrained coordinates ``u`` (see :func:`pilot_map`).

    Attributes
    ----------
    reparam : SamplingMap
        ``u = T(theta)``.
    near : ndarray of bool, shape (d,)
        Parameters sampled on a transformed scale.
    fit : ModeFit
        Mode and Laplace covariance of ``log p_u``.
    covariance : ndarray of shape (d, d)
        The pilot's first covariance in ``u``.
    states, values : ndarray of shape (chains, d) and (chains,)
        Starting states in ``u`` and ``log p_u`` there.
    """

    reparam: SamplingMap
    near: np.ndarray
    fit: ModeFit
    covariance: np.ndarray
    states: np.ndarray
    values: np.ndarray


def unconstrained_mode(evaluate_u, reparam: SamplingMap, fit: ModeFit, start: np.ndarray, covariance: np.ndarray,
                       near: np.ndarray, budget: int) -> tuple[ModeFit, np.ndarray]:
    """The mode of ``log p_u`` and a first covariance there.

    The search starts from the mode in ``theta`` with the parameters near a
    bound set to the user's start (strictly inside). The covariance is the
    Laplace covariance in ``u`` when ``-H`` is positive definite there; else the
    start covariance for the untransformed parameters and unit variance (one
    e-fold) for the transformed ones.

    Parameters
    ----------
    evaluate_u : callable
        ``evaluate_u(u) -> float``.
    start, covariance : ndarray of shape (d,) and (d, d)
        The user's start and the start covariance in ``theta``.
    near : ndarray of bool, shape (d,)
    budget : int
        Evaluations of the search (the Hessian comes on top).
    """
    theta0 = np.where(near, start, fit.mode)
    u0 = reparam.to_sampler(theta0)
    sd = np.sqrt(np.diag(covariance))
    scales = np.where(near, 1.0, np.maximum(sd, 1e-12))
    unbounded = np.tile([-np.inf, np.inf], (u0.shape[0], 1))
    fit_u = find_mode(evaluate_u, u0, unbounded, scales, budget)
    if fit_u.laplace_covariance is not None:
        return fit_u, fit_u.laplace_covariance
    guess = np.where(np.outer(near, near), np.eye(u0.shape[0]), np.where(np.outer(~near, ~near), covariance, 0.0))
    return fit_u, guess


def to_parameters(reparam: SamplingMap, states_u: np.ndarray, values_u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """States (chains, d) in ``theta`` and ``log p(theta)`` there, from states and ``log p_u`` in ``u``."""
    theta, jacobian = reparam.from_sampler_with_jacobian(states_u)
    return theta, values_u - jacobian


def run_unconstrained_pilot(counted, start: UnconstrainedStart, available: int, minimum: int, seed, tracker,
                            within: bool) -> PilotResult:
    """The pilot in unconstrained coordinates, then in the user's parameters; one PilotResult in ``theta``.

    The first 60% of ``available`` evaluations run in ``u``; the rest, from
    where those chains ended and with the covariance of their draws mapped
    back (shrunk in the draws' own scales), in ``theta``, whose proposal the
    job recommends. The stages in ``theta`` do not probe parameters one at a
    time: near a bound the conditional densities are far from Gaussian, so the
    probe's acceptance no longer measures their scale (the stages in ``u`` did).
    When the stages in ``theta`` never found their draws to disagree with the
    covariance they started from, the final covariance comes from all draws of
    both parts after the first stage's warm-up half.

    Parameters
    ----------
    counted : walktune.posterior.CountedEvaluator
    start : UnconstrainedStart
    available : int
        Evaluations of both parts together.
    minimum : int
        Least evaluations of either part (two stages).
    seed : SeedSequence
    tracker : callable
        The job's progress channel (see walktune.tune).
    within : bool
        Estimate covariances within chains (chains started in separate modes).
    """
    reparam = start.reparam
    seed_u, seed_theta = seed.spawn(2)
    # The two parts keep at most PILOT_DRAWS_MEMORY of draws together, shared as their budgets are.
    memory = pilot_module.PILOT_DRAWS_MEMORY
    pilot_u = run_pilot(
        None, start.states, start.covariance, max(int(0.6 * available), minimum), seed_u,
        evaluator=SamplerSpaceEvaluator(counted, reparam), state_log_density=start.values, within_chains=within,
        progress=lambda done, total: tracker("pilot", done, available),
        on_stage=lambda p: tracker.pilot_stage_ended(p, estimate=False), draws_memory=int(0.6 * memory),
    )
    states, values = to_parameters(reparam, pilot_u.states, pilot_u.state_log_density)
    draws = reparam.from_sampler(pilot_u.draws)
    dim = draws.shape[-1]
    covariance, _, _ = shrunk_covariance(draws, np.diag(np.var(draws.reshape(-1, dim), axis=0)), within)
    pilot = run_pilot(
        None, states, covariance, max(available - pilot_u.evaluations, minimum), seed_theta, evaluator=counted,
        state_log_density=values, within_chains=within, probe=False,
        progress=lambda done, total: tracker("pilot", pilot_u.evaluations + done, available),
        on_stage=lambda p: tracker.pilot_stage_ended(p, estimate=True),
        draws_memory=memory - sum(d.nbytes for d in pilot_u.all_draws),
    )
    if not any(stage.adopted for stage in pilot.stages):
        # The draws in theta agreed with the start they were given: estimate the covariance from every
        # draw after the first stage's warm-up, in both coordinates (skewed marginals need many draws).
        first_stage = pilot_u.all_draws[0]
        mapped = [first_stage[:, first_stage.shape[1] // 2 :]] + pilot_u.all_draws[1:]
        pooled = _joined_stages([reparam.from_sampler] * len(mapped) + [None] * len(pilot.all_draws),
                                mapped + pilot.all_draws)
        pilot.covariance, _, _ = shrunk_covariance(pooled, pilot.covariance, within, overwrite=True)
    for stage in pilot_u.stages:
        stage.coordinates = "unconstrained"
    pilot.stages = pilot_u.stages + pilot.stages
    pilot.all_draws = [reparam.from_sampler(d) for d in pilot_u.all_draws] + pilot.all_draws
    pilot.evaluations += pilot_u.evaluations
    return pilot


def _joined_stages(maps: list, stages: list) -> np.ndarray:
    """The stages' draws (chains, n_i, d) one after another in one new array, each through its map (None: as is),
    mapped one stage at a time (no second copy of them all)."""
    m, d = stages[0].shape[0], stages[0].shape[2]
    out = np.empty((m, sum(s.shape[1] for s in stages), d))
    at = 0
    for to_theta, draws in zip(maps, stages):
        out[:, at : at + draws.shape[1]] = draws if to_theta is None else to_theta(draws)
        at += draws.shape[1]
    return out
