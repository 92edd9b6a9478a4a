"""Adaptive pilot: fixed-proposal stages in growing windows, adapted between stages.

Each stage is an ordinary random-walk Metropolis run with a fixed proposal
``c^2 * scale(d)^2 * C``; between stages

* ``C`` is re-estimated from pooled stage draws with Ledoit-Wolf shrinkage
  (Ledoit and Wolf 2004) done in the coordinates whitened by the current
  ``C``, so the estimate shrinks towards the current shape and respects each
  parameter's scale (a full-matrix version of "standardise, shrink, rescale").
  The new estimate is adopted only when it differs from ``C`` by more than
  estimates from as many independent draws of a target of shape ``C`` would
  by chance (:func:`noise_slowdown`): a good start such as an exact Laplace
  covariance is not replaced by a noisier one;
* the global factor ``c`` is steered towards the optimal acceptance rate.
  The step is walktune's own: it inverts the diffusion-limit relation
  ``a = 2 Phi(-c sqrt(J) / 2)`` (Roberts, Gelman and Gilks 1997) once per
  stage, moving ``c`` to where that relation puts the target acceptance given
  the acceptance just measured (at most 4-fold either way). It is not the
  Robbins-Monro (stochastic-approximation) steering of ``log c`` by
  diminishing steps that Andrieu and Thoms (2008) describe, though it serves
  the same end;
* each parameter's own scale is checked by a component-wise probe, a short
  fixed-kernel Metropolis-within-Gibbs pass that proposes one parameter at a
  time with the 1-d optimal step ``2.4 s_i`` (``s_i = 1 / sqrt(P_ii)``, the
  conditional sd under ``C``, ``P = C^{-1}``). For a Gaussian conditional of sd
  ``k s_i`` the acceptance rate of that proposal is ``(2 / pi) arctan(2 / (2.4 / k))``
  (derived here by integrating the Metropolis ratio over the stationary
  distribution; checked by simulation in tests/test_poor_start.py), so
  ``k = 1.2 tan(pi a / 2)``; a parameter whose ``k`` is far from 1 has its row
  and column of ``C`` rescaled by ``k`` (taken at the end of its 90% interval
  nearest 1, so as not to overshoot; component-wise adaptive scaling:
  Haario, Saksman and Tamminen 2005; Andrieu and Thoms 2008, Sec. 5; Roberts
  and Rosenthal 2009). This is what lets a direction that a poor Laplace start
  gave tiny steps grow: its draws alone would take many stages to show its
  width. Probing stops once a probe finds every parameter in range; once a
  probe has rescaled anything, the start has proved wrong and every later
  estimate from the draws of a stage run at corrected scales is adopted (the
  draws win).

A stage counts towards settling only when its estimate rests on enough roughly
independent draws that its noise level is at most :data:`SETTLED_NOISE`: with
fewer, "the change is within noise" says little (the noise level is then a
several-fold slow-down). The chains of such a slow stage may not have crossed
the posterior yet: their draws can be narrower than the posterior but not,
beyond noise, wider. So while the stages are slow, and no probe has faulted the
start, the pilot grows the covariance from all the draws so far, as adaptive
Metropolis does (Haario, Saksman and Tamminen 2001), keeping only the
directions in which the draws are wider than ``C``
(:func:`expanded_covariance`), adopted when the growth is beyond noise. (Holding
the global factor meanwhile, as adaptive Metropolis does, was tried: it kept
the chains of a centred hierarchical model further from its funnel's neck, and
the funnel went unreported.) A pilot whose draws have changed its covariance and
that has not settled when its budget ends takes the extension once, as a poor
start does (a start whose shape the draws confirm does not).

Adaptation happens only between stages; nothing measured after the pilot comes
from an adapting chain.

The pilot keeps its stages' draws within :data:`PILOT_DRAWS_MEMORY`: when its
whole budget would keep more, each stage stores every k-th state
(:func:`pilot_thinning`; at least :data:`MIN_KEPT_PER_STAGE` per chain). The
chains are those of an unthinned pilot; the estimates above use the stored
states, their autocorrelation times counted in stored states (k is far below
the IACT, so the count of roughly independent draws is the same).

References
----------
Haario, H., Saksman, E. and Tamminen, J. (2001). An adaptive Metropolis algorithm. Bernoulli, 7(2), 223-242.
Andrieu, C. and Thoms, J. (2008). A tutorial on adaptive MCMC. Statistics and Computing, 18, 343-373.
Haario, H., Saksman, E. and Tamminen, J. (2005). Componentwise adaptation for high dimensional MCMC.
Computational Statistics, 20(2), 265-273.
Roberts, G. O. and Rosenthal, J. S. (2009). Examples of adaptive MCMC. Journal of Computational and
Graphical Statistics, 18(2), 349-367.
Ledoit, O. and Wolf, M. (2004). A well-conditioned estimator for large-dimensional
covariance matrices. Journal of Multivariate Analysis, 88(2), 365-411.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, stats
from sklearn.covariance import ledoit_wolf_shrinkage

from . import theory
from .checkpoint import stop_point
from .engine import Chains, sample, thinning_for
from .evaluators import InProcessEvaluator
from .shrinkage import shrunk_covariance

#: One-parameter proposals per parameter and chain in a component-wise probe.
PROBE_SWEEPS = 5
#: A probe rescales a parameter only when its count of accepted proposals is
#: this improbable (either tail) under a right scale, whose acceptance is
#: ``(2 / pi) arctan(2 / 2.4) = 0.4395`` (binomial; one false alarm in about
#: 10^4 parameters probed). With 4 chains x 5 sweeps that is 17 or more, or 1
#: or fewer, of 20 accepted: scales off by more than about 5x and 10x.
PROBE_FALSE_ALARM = 1e-4
RIGHT_SCALE_ACCEPTANCE = 2.0 / np.pi * np.arctan(2.0 / 2.4)
#: Largest rescaling one probe applies (an all-accepted probe says only "much wider").
PROBE_LIMIT = 10.0
#: A stage counts towards settling only when the noise level of its estimate (:func:`noise_slowdown`, the
#: 99% quantile of the slow-down an estimate from as many independent draws shows by chance) is at most
#: this: "the change is within noise" then means "within a 2-fold slow-down". From 16 independent draws
#: the level is below 2 in every dimension (1.8 at d = 3, 1.5 at d = 20); from 4 draws it is 2.2-9.7.
SETTLED_NOISE = 2.0
#: Bytes of draws one pilot keeps at most over all its stages, as much as three proof runs
#: (:data:`walktune.stages.PROOF_DRAWS_MEMORY`): a pilot whose budget would keep more keeps every k-th state of
#: each stage (:func:`pilot_thinning`). d = 100 at the default budget keeps every state (at most 0.33 GB);
#: d = 300 every 22nd.
PILOT_DRAWS_MEMORY = 3 * 2**27
#: A thinned stage still keeps at least this many states per chain (a shorter stage: every state), so that the
#: later half of even the first stage has enough draws for an autocorrelation time.
MIN_KEPT_PER_STAGE = 200


@dataclass
class PilotStage:
    """What one fixed-proposal stage did."""

    steps: int
    proposal_cov: np.ndarray
    acceptance_rate: float
    evaluations: int
    shrinkage: float
    change: float
    noise_level: float
    adopted: bool
    probe_acceptance: np.ndarray | None = None
    component_scaling: np.ndarray | None = None
    coordinates: str = "parameters"
    #: Roughly independent draws the stage's estimate rests on, and whether that was too few to settle on.
    independent_draws: int = 0
    slow: bool = False
    #: Steps per stored draw of this stage (1: every state kept; :func:`pilot_thinning`).
    kept_every: int = 1


@dataclass
class PilotResult:
    """Outcome of the pilot.

    Attributes
    ----------
    covariance : ndarray of shape (d, d)
        Shrinkage estimate of the posterior covariance from pooled stage draws.
    scale_factor : float
        Global factor ``c`` found for the proposal ``c^2 scale(d)^2 C``.
    states : ndarray of shape (chains, d)
        The chains' final states.
    stages : list of PilotStage
    draws : ndarray of shape (chains, n, d)
        The draws pooled for the last covariance estimate.
    all_draws : list of ndarray of shape (chains, n_i, d)
        Each stage's stored draws, in order: every ``stages[i].kept_every``-th state.
    evaluations : int
    converged : bool
        Whether the covariance and acceptance settled before the budget ran out.
    """

    covariance: np.ndarray
    scale_factor: float
    states: np.ndarray
    state_log_density: np.ndarray | None = None
    stages: list = field(default_factory=list)
    draws: np.ndarray | None = None
    all_draws: list = field(default_factory=list)
    evaluations: int = 0
    converged: bool = False


def _lw_estimate(white: np.ndarray) -> np.ndarray:
    sample_cov = np.atleast_2d(np.cov(white, rowvar=False))
    s = float(ledoit_wolf_shrinkage(white, assume_centered=True))
    d = white.shape[1]
    return (1 - s) * sample_cov + s * np.trace(sample_cov) / d * np.eye(d)


#: Replicates of the noise simulation. With the order statistic of rank
#: ``0.99 (R + 1)`` the 99% quantile's coverage ``F(X_(k))`` is Beta-distributed
#: with mean 0.99 and sd ``sqrt(0.99 * 0.01 / (R + 2))``: 0.005 for R = 399.
#: (100 replicates gave the 99th of 100 values: coverage 0.98 +/- 0.014.)
NOISE_REPLICATES = 399


def noise_slowdown(dim: int, n_draws: int, rng: np.random.Generator, replicates: int = NOISE_REPLICATES,
                   quantile: float = 0.99, grow_only: bool = False) -> float:
    """How far a shrinkage estimate from ``n_draws`` independent draws strays by chance.

    The ``quantile`` of ``direction_slowdown(estimate, truth)`` when the truth
    is the identity and the estimate is the Ledoit-Wolf covariance of
    ``n_draws`` standard normal draws (a parametric bootstrap under "the
    current shape is right"). A pilot estimate that differs from the current
    shape by less than this is noise and is not adopted.

    The quantile is the order statistic of rank ``quantile * (replicates + 1)``
    (numpy's "weibull" method), whose coverage has mean ``quantile`` and sd
    ``sqrt(quantile (1 - quantile) / (replicates + 2))`` (the Beta distribution of
    uniform order statistics): 0.990 +/- 0.005 with the defaults.

    With ``grow_only`` the estimate's eigenvalues below 1 are raised to 1
    first, as :func:`expanded_covariance` does: the noise of a grown shape.
    """
    if n_draws < 2:
        return np.inf
    values = []
    for _ in range(replicates):
        stop_point()
        white = rng.standard_normal((n_draws, dim))
        estimate = _lw_estimate(white - white.mean(axis=0))
        if grow_only:
            eigenvalues, vectors = np.linalg.eigh(estimate)
            estimate = (vectors * np.maximum(eigenvalues, 1.0)) @ vectors.T
        values.append(_slowdown_against_identity(estimate))
    return float(np.quantile(values, quantile, method="weibull"))


def _slowdown_against_identity(estimate: np.ndarray) -> float:
    """``theory.direction_slowdown(estimate, I)`` from the smallest eigenvalue alone: ``mean(lambda) / lambda_min``.

    With ``S = I`` the ``mu`` of :func:`walktune.theory.relative_variances` are
    ``1 / lambda`` (``lambda``: eigenvalues of ``estimate``), so ``mu_max * mean(1 / mu)``
    is ``mean(lambda) / lambda_min``: one eigenvalue instead of a generalised
    eigenproblem, the same value to rounding (about 1e-15), 10-40 times faster
    at d = 300 (what made the noise level cost minutes per pilot stage there).
    """
    smallest = linalg.eigvalsh(estimate, subset_by_index=[0, 0])[0]
    return float(np.trace(estimate) / estimate.shape[0] / smallest)


@dataclass(frozen=True)
class ComponentProbe:
    """What a component-wise probe measured.

    Attributes
    ----------
    acceptance : ndarray of shape (d,)
        Acceptance rate of the one-parameter proposals, per parameter.
    ratio : ndarray of shape (d,)
        Estimated conditional sd over the one the covariance implies, per parameter.
    states : ndarray of shape (chains, d)
    log_density : ndarray of shape (chains,)
        The chains' states and log-densities after the probe (it moves them).
    evaluations : int
    trials : int
        One-parameter proposals per parameter (sweeps x chains).
    """

    acceptance: np.ndarray
    ratio: np.ndarray
    states: np.ndarray
    log_density: np.ndarray
    evaluations: int
    trials: int

    @property
    def cautious_ratio(self) -> np.ndarray:
        """The ratio at the end of the 90% Clopper-Pearson interval of the acceptance nearest a right scale, shape (d,).

        The point estimate overshoots when nearly every proposal was accepted
        (or none): 20 of 20 accepted happens with probability 0.5% at a scale
        3x too small. Rescaling by the cautious ratio seldom overshoots; the
        next probe takes the rest.
        """
        count = np.rint(self.acceptance * self.trials)
        lower = np.where(count > 0, stats.beta.ppf(0.05, count, self.trials - count + 1), 0.0)
        upper = np.where(count < self.trials, stats.beta.ppf(0.95, count + 1, self.trials - count), 1.0)
        nearest = np.where(self.acceptance > RIGHT_SCALE_ACCEPTANCE, np.maximum(lower, RIGHT_SCALE_ACCEPTANCE),
                           np.minimum(upper, RIGHT_SCALE_ACCEPTANCE))
        return scale_ratio(nearest)

    @property
    def off(self) -> np.ndarray:
        """Parameters whose acceptance is too improbable under a right scale (:data:`PROBE_FALSE_ALARM`), shape (d,)."""
        count = np.rint(self.acceptance * self.trials)
        high = stats.binom.sf(count - 1, self.trials, RIGHT_SCALE_ACCEPTANCE)
        low = stats.binom.cdf(count, self.trials, RIGHT_SCALE_ACCEPTANCE)
        return (high < PROBE_FALSE_ALARM) | (low < PROBE_FALSE_ALARM)


def scale_ratio(acceptance) -> np.ndarray:
    """Conditional sd over the assumed one, from the acceptance of 1-d steps ``2.4 x`` the assumed sd.

    Inverts ``a = (2 / pi) arctan(2 / sigma)`` (``sigma``: step over the true
    sd of a Gaussian) at ``sigma = 2.4 / k``: ``k = 1.2 tan(pi a / 2)``, clipped
    to ``[1 / PROBE_LIMIT, PROBE_LIMIT]``. Shape of ``acceptance``.
    """
    a = np.clip(np.asarray(acceptance, dtype=float), 0.0, 1.0)
    with np.errstate(over="ignore"):
        ratio = 1.2 * np.tan(0.5 * np.pi * a)
    return np.clip(np.where(a >= 1.0, PROBE_LIMIT, ratio), 1.0 / PROBE_LIMIT, PROBE_LIMIT)


def probe_components(evaluate, states: np.ndarray, log_density: np.ndarray, covariance: np.ndarray,
                     rng: np.random.Generator, sweeps: int = PROBE_SWEEPS) -> ComponentProbe:
    """Metropolis-within-Gibbs sweeps with fixed 1-d steps ``2.4 / sqrt(P_ii)``; measures each parameter's acceptance.

    Parameters
    ----------
    evaluate : callable
        Takes points (chains, d), returns a BatchResult.
    states : ndarray of shape (chains, d)
    log_density : ndarray of shape (chains,)
    covariance : ndarray of shape (d, d)
        ``C``; the step of parameter ``i`` is ``2.4 / sqrt((C^{-1})_ii)``.
    rng : Generator
    sweeps : int
        Passes over the parameters; each proposes every parameter once per chain.
    """
    n_chains, dim = states.shape
    step = 2.4 / np.sqrt(np.diag(np.linalg.inv(covariance)))
    current, current_lp = states.copy(), np.asarray(log_density, dtype=float).copy()
    accepted = np.zeros(dim)
    for _ in range(sweeps):
        for i in range(dim):
            proposal = current.copy()
            proposal[:, i] += step[i] * rng.standard_normal(n_chains)
            values = np.asarray(evaluate(proposal).values, dtype=float)
            values = np.where(np.isnan(values), -np.inf, values)
            accept = np.log(rng.random(n_chains)) < values - current_lp
            current[accept], current_lp[accept] = proposal[accept], values[accept]
            accepted[i] += accept.sum()
    acceptance = accepted / (sweeps * n_chains)
    return ComponentProbe(acceptance, scale_ratio(acceptance), current, current_lp, sweeps * dim * n_chains,
                          sweeps * n_chains)


def expanded_covariance(covariance: np.ndarray, draws: np.ndarray, reference: np.ndarray,
                        overwrite: bool = False) -> tuple[np.ndarray, int]:
    """``C`` grown where ``draws`` are wider than it, and kept where they are narrower.

    The shrinkage estimate ``S`` of ``draws`` (:func:`shrunk_covariance`, shrunk
    towards ``reference``) is whitened by ``C``, ``W = L^{-1} S L^{-T}``
    (``C = L L^T``); eigenvalues of ``W`` below 1 are raised to 1 and the
    result mapped back, so the new matrix is at least ``C`` in every direction
    (Loewner order). Returns it and the number of roughly independent draws.

    Parameters
    ----------
    covariance, reference : ndarray of shape (d, d)
    draws : ndarray of shape (chains, n, d)
    overwrite : bool, default=False
        Whiten ``draws`` in place (:func:`shrunk_covariance`).
    """
    estimate, _, n_independent = shrunk_covariance(draws, reference, overwrite=overwrite)
    chol = np.linalg.cholesky(covariance)
    white = np.linalg.solve(chol, np.linalg.solve(chol, estimate).T)
    values, vectors = np.linalg.eigh(0.5 * (white + white.T))
    grown = chol @ ((vectors * np.maximum(values, 1.0)) @ vectors.T) @ chol.T
    return 0.5 * (grown + grown.T), n_independent


def _all_since_warmup(history: list) -> np.ndarray:
    """Every stage's draws, less the first half of the first stage (warm-up), shape (chains, n, d); a new array."""
    return np.concatenate([history[0][:, history[0].shape[1] // 2 :]] + history[1:], axis=1)


def pilot_thinning(chains: int, steps: int, dim: int, memory: int) -> int:
    """Steps per stored draw of every pilot stage: the least ``k`` keeping ``steps`` per chain (the whole
    budget's) within ``memory`` bytes (:func:`walktune.engine.thinning_for`, as proof runs are thinned).

    A thinned chain's draws estimate a covariance as well as the full chain's
    when ``k`` is well below its autocorrelation time: an optimally tuned random
    walk has an IACT of about ``d / 0.33`` steps (Roberts, Gelman and Gilks
    1997), and the default pilot budget gives ``k ~ d^3 / 1.3 10^6`` (d = 300:
    22 against an IACT near 900).
    """
    return thinning_for(chains, steps, dim, memory)


def _stage_thinning(kept_every: int, steps: int) -> int:
    """A stage's steps per stored draw: ``kept_every``, but keeping at least :data:`MIN_KEPT_PER_STAGE` per chain."""
    return max(1, min(kept_every, steps // MIN_KEPT_PER_STAGE))


def _scale_step(factor: float, acceptance: float, target: float) -> float:
    """New global factor so that the diffusion-limit acceptance hits ``target``."""
    acceptance = min(max(acceptance, 0.01), 0.95)
    ratio = stats.norm.ppf(target / 2) / stats.norm.ppf(acceptance / 2)
    return factor * float(np.clip(ratio, 0.25, 4.0))


def _pooled(history: list, stage_index: int, fresh: bool) -> np.ndarray:
    """The newest draws: this stage and the later half of the one before.

    In the first stage, or after a probe rescaled the proposal (the stage
    before ran with the old scales), only this stage's later half: the early
    part is warm-up.
    """
    draws = history[-1]
    if stage_index == 0 or fresh:
        return draws[:, draws.shape[1] // 2 :]
    previous = history[-2]
    return np.concatenate([previous[:, previous.shape[1] // 2 :], draws], axis=1)


def _probe_and_rescale(evaluate, result: PilotResult, stage: PilotStage, rng: np.random.Generator) -> int:
    """Probe each parameter's scale at the chains' states; rescale ``result.covariance`` where it is off.

    Moves the chains (the probe is a Metropolis-within-Gibbs pass), records
    the acceptance and the scaling applied in ``stage``, and returns the
    evaluations spent.
    """
    found = probe_components(evaluate, result.states, result.state_log_density, result.covariance, rng)
    result.states, result.state_log_density = found.states, found.log_density
    scaling = np.where(found.off, found.cautious_ratio, 1.0)
    result.covariance = result.covariance * np.outer(scaling, scaling)
    stage.probe_acceptance, stage.component_scaling = found.acceptance, scaling
    return found.evaluations


def run_pilot(
    log_density,
    states: np.ndarray,
    covariance: np.ndarray,
    budget: int,
    seed: np.random.SeedSequence,
    *,
    evaluator=None,
    vectorized: bool = False,
    first_window: int | None = None,
    progress=None,
    state_log_density: np.ndarray | None = None,
    within_chains: bool = False,
    on_stage=None,
    probe: bool = True,
    extension: int = 0,
    draws_memory: int | None = None,
) -> PilotResult:
    """Adapt the proposal in stages of doubling length until it settles or the budget ends.

    Parameters
    ----------
    log_density : callable
    states : ndarray of shape (chains, d)
        Start points (overdispersed around the mode).
    covariance : ndarray of shape (d, d)
        First guess of the posterior covariance (Laplace or diagonal).
    budget : int
        Evaluations the pilot may spend.
    seed : SeedSequence
        Each stage gets its own spawned child.
    state_log_density : ndarray of shape (chains,), optional
        The log-density at ``states``, when known.
    within_chains : bool, default=False
        Estimate the covariance within chains (for chains started in separate modes).
    on_stage : callable, optional
        Called with the :class:`PilotResult` so far after each stage.
    probe : bool, default=True
        Probe each parameter's scale after a stage (:func:`probe_components`)
        until a probe finds every parameter in range.
    extension : int, default=0
        Evaluations added to ``budget`` once: the first time a probe rescales a
        parameter (the start was poor, and the pilot needs more stages), or when
        the draws have changed the covariance, the pilot has not settled, and
        the budget would not hold the next stage.
    draws_memory : int, optional
        Bytes of stage draws the pilot keeps at most (default
        :data:`PILOT_DRAWS_MEMORY`): when ``budget + extension`` evaluations
        would keep more, every stage keeps every k-th state
        (:func:`pilot_thinning`; ``PilotStage.kept_every``). The chains, their
        random numbers and acceptances are those of an unthinned pilot.
    """
    n_chains, dim = states.shape
    target = theory.target_acceptance(dim)
    scale = theory.optimal_scale(dim)
    window = first_window or max(50, 10 * dim)
    factor = 1.0
    result = PilotResult(covariance=covariance, scale_factor=factor, states=states, state_log_density=state_log_density)
    history: list[np.ndarray] = []
    noise_seed = seed.spawn(1)[0]
    noise_rng = np.random.default_rng(noise_seed)
    probe_rng = np.random.default_rng(noise_seed.spawn(1)[0])  # apart from the stages' seeds
    evaluate = evaluator if evaluator is not None else InProcessEvaluator(log_density, vectorized)
    probe_cost = PROBE_SWEEPS * dim * n_chains
    memory = PILOT_DRAWS_MEMORY if draws_memory is None else draws_memory
    kept_every = pilot_thinning(n_chains, (budget + extension) // n_chains, dim, max(1, memory))
    spent = 0
    stage_index = 0
    settled = 0
    rescaled = False
    trust_start = True
    reshaped = False  # a stage's draws have changed the covariance
    while True:
        steps = window * 2 ** min(stage_index, 6)
        remaining = budget - spent
        if remaining < n_chains * min(steps, window):
            break
        steps = min(steps, remaining // n_chains)
        proposal = (factor * scale) ** 2 * result.covariance
        thin = _stage_thinning(kept_every, steps)
        chains: Chains = sample(
            log_density, result.states, proposal, steps,
            seed=seed.spawn(1)[0], vectorized=vectorized, evaluator=evaluator,
            start_log_density=result.state_log_density, thin=thin,
        )
        spent += chains.evaluations
        result.states = chains.last
        result.state_log_density = chains.log_density[:, -1]
        history.append(chains.draws)
        result.all_draws.append(chains.draws)
        pooled_draws = _pooled(history, stage_index, rescaled)
        # Once the start has proved wrong, shrink towards the draws' own scales rather than towards it.
        reference = result.covariance if trust_start else np.diag(np.var(pooled_draws.reshape(-1, dim), axis=0))
        try:
            new_cov, shrinkage, n_independent = shrunk_covariance(pooled_draws, reference, within_chains)
            np.linalg.cholesky(new_cov)
        except np.linalg.LinAlgError:
            new_cov, shrinkage, n_independent = result.covariance, 1.0, 0
        acceptance = chains.acceptance_rate
        noise = noise_slowdown(dim, n_independent, noise_rng)
        slow, stage_draws = noise > SETTLED_NOISE, n_independent
        # Grow only a shape no probe has faulted: once one has, the draws win as they are (they may be narrower).
        growing = slow and trust_start and not within_chains and acceptance > 0
        if growing:
            # Too few independent draws to confirm a shape: grow it from every draw so far.
            try:
                new_cov, n_independent = expanded_covariance(result.covariance, _all_since_warmup(history), reference,
                                                             overwrite=True)
            except np.linalg.LinAlgError:
                new_cov, n_independent = result.covariance, 0
            noise = noise_slowdown(dim, n_independent, noise_rng, grow_only=True)
        change = theory.direction_slowdown(new_cov, result.covariance)
        significant = change > noise
        # Once a probe has shown the start wrong, the draws win even when the change is within
        # noise; but not the draws of a stage that ran with scales a probe has just corrected.
        adopted = acceptance > 0 and (significant or not (trust_start or rescaled))
        if adopted:
            result.covariance = new_cov
        stage = PilotStage(steps, proposal, acceptance, chains.evaluations, shrinkage, change, noise, adopted,
                           independent_draws=int(stage_draws), slow=bool(slow), kept_every=thin)
        # Probe only when a stage can follow to use (and test) a rescaled proposal.
        rescaled = False
        if probe and budget - spent >= probe_cost + n_chains * window:
            spent += _probe_and_rescale(evaluate, result, stage, probe_rng)
            rescaled = probe = bool(np.any(stage.component_scaling != 1.0))
            if rescaled:
                trust_start = False
                budget, extension = budget + extension, 0  # a poor start: take the extra allowance once
        if acceptance == 0 and not rescaled:
            result.covariance = result.covariance / 10.0  # nothing moved and no probe said why: much smaller steps
        result.stages.append(stage)
        # A new shape moves the optimal factor; adjust the factor for the stage just seen.
        factor = _scale_step(factor, acceptance, target)
        result.draws = pooled_draws
        good_acceptance = 0.6 * target <= acceptance <= 1.6 * target
        steady = not significant and not rescaled and good_acceptance and stage_index >= 1 and not slow
        reshaped = reshaped or adopted
        if reshaped and not steady and extension and budget - spent < n_chains * window * 2 ** min(stage_index + 1, 6):
            budget, extension = budget + extension, 0  # still changing as the budget ends: take the extra allowance once
        settled = settled + 1 if steady else 0
        stage_index += 1
        if on_stage is not None:
            on_stage(result)
        if progress is not None:
            progress(spent, budget)
        if settled >= 2:
            result.converged = True
            break
    result.scale_factor = factor
    result.evaluations = spent
    return result
