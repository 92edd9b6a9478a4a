"""How much information a set of Markov chains holds.

The integrated autocorrelation time of a scalar chain is
``tau = 1 + 2 * sum_{t>=1} rho_t`` and the effective sample size of ``M``
chains of ``N`` draws is ``ESS = M N / tau``. The autocorrelations ``rho_t``
are combined over chains as in Vehtari et al. (2021), computed by FFT, and the
sum is truncated by Geyer's (1992) initial monotone sequence estimator;
``tau >= 1 / log10(S)`` with ``S`` the total number of draws (Vehtari et al.
2021), so ``ESS <= S log10(S)``. The MCSE of a mean, ``sd / sqrt(ESS)``, uses
the ESS of split chains (each chain cut in two halves), as Vehtari et al.
(2021) compute every ESS.

Every function takes draws shaped (chains, draws, params), (draws, params) or
(draws,) and returns one value per parameter. Estimates that rest on too few
draws (fewer than :data:`IACTS_FOR_PRECISE_ESS` autocorrelation times over all
chains) come back as a :class:`Estimate` whose ``too_short`` mask flags them.

References
----------
Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science, 7(4), 473-483.
Gelman, A. and Rubin, D. B. (1992). Inference from iterative simulation using multiple
sequences. Statistical Science, 7(4), 457-472.
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved R-hat for assessing
convergence of MCMC. Bayesian Analysis, 16(2), 667-718.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft, special

from .checkpoint import stop_point
from .errors import WalktuneError

#: Window of the IACT estimate below, in autocorrelation times: Geyer's initial
#: monotone sequence on AR(1) chains sums about two (by simulation,
#: tests/test_diagnostics.py); 2.5 to be safe.
WINDOW_PER_IACT = 2.5
#: The relative error (one standard deviation) accepted in an IACT, hence in an ESS.
IACT_RELATIVE_ERROR = 0.2
#: Draws over all chains, in IACTs, for that error. The variance of a windowed
#: IACT estimate is 2 (2M + 1) / S tau^2 for S draws and a window M (Sokal
#: 1997); with M = WINDOW_PER_IACT tau the relative error is below
#: IACT_RELATIVE_ERROR once S >= 4 WINDOW_PER_IACT tau / IACT_RELATIVE_ERROR^2
#: (250 tau). Measured on AR(1) chains with closed-form IACT (1 + phi) / (1 - phi),
#: 1 to 8 chains: 0.18 to 0.20 at 250 IACTs (docs/method.md).
IACTS_FOR_PRECISE_ESS = round(4 * WINDOW_PER_IACT / IACT_RELATIVE_ERROR**2)

__all__ = [
    "Estimate",
    "as_chains",
    "autocorrelation",
    "iact",
    "ess",
    "bulk_ess",
    "tail_ess",
    "rhat",
    "split_rhat",
    "mean_mcse",
    "esjd",
    "acceptance_rate",
    "measure_chains",
    "measure_chain_blocks",
    "ChainMeasures",
    "IACTS_FOR_PRECISE_ESS",
    "IACT_RELATIVE_ERROR",
    "WINDOW_PER_IACT",
]


class Estimate(np.ndarray):
    """One value per parameter, with a flag where the chains are too short.

    Behaves as a float array. ``too_short[i]`` is true when the value for
    parameter ``i`` rests on fewer than ``IACTS_FOR_PRECISE_ESS`` autocorrelation
    times over all chains (or the chains are constant), so its relative error is
    above ``IACT_RELATIVE_ERROR``.
    """

    def __new__(cls, values, too_short):
        obj = np.asarray(values, dtype=float).view(cls)
        obj.too_short = np.asarray(too_short, dtype=bool)
        return obj

    def __array_finalize__(self, obj):
        flags = getattr(obj, "too_short", None)
        self.too_short = flags if flags is not None and flags.shape == self.shape else np.zeros(self.shape, bool)

    @property
    def any_too_short(self) -> bool:
        return bool(np.any(self.too_short))


def as_chains(draws) -> np.ndarray:
    """Return draws as a float array of shape (chains, draws, params).

    A (draws,) array is one chain of one parameter; (draws, params) is one chain.
    """
    try:
        array = np.asarray(draws, dtype=float)
    except (TypeError, ValueError):
        raise WalktuneError("draws must be an array of numbers shaped (chains, draws, params).") from None
    if array.ndim == 1:
        array = array[None, :, None]
    elif array.ndim == 2:
        array = array[None, :, :]
    elif array.ndim != 3:
        raise WalktuneError(
            f"draws must be shaped (chains, draws, params), (draws, params) or (draws,); got {array.ndim} dimensions."
        )
    if array.shape[1] < 4:
        raise WalktuneError(f"each chain needs at least 4 draws for diagnostics; got {array.shape[1]}.")
    if not np.all(np.isfinite(array)):
        raise WalktuneError("draws contain NaN or infinity; remove those draws first.")
    return array


def _split(chains: np.ndarray) -> np.ndarray:
    """Split every chain in two halves (dropping the middle draw of odd chains)."""
    half = chains.shape[1] // 2
    return np.concatenate([chains[:, :half], chains[:, chains.shape[1] - half :]], axis=0)


def _autocovariance(chains: np.ndarray) -> np.ndarray:
    """Biased autocovariance of each chain and parameter, by FFT.

    Takes shape (chains, draws, params) and returns shape (chains, params,
    draws): lag ``t`` of chain ``m`` is ``sum_s (x_s - mean)(x_{s+t} - mean) / N``.
    """
    n = chains.shape[1]
    # Contiguous along the draws axis: the FFT runs over unit strides.
    centred = np.subtract(np.moveaxis(chains, 1, 2), chains.mean(axis=1)[:, :, None], order="C")
    size = fft.next_fast_len(2 * n, real=True)  # zero-pad: no wrap-around
    spectrum = fft.rfft(centred, n=size, axis=-1, workers=-1)
    del centred
    power = np.square(spectrum.real)
    power += np.square(spectrum.imag)
    del spectrum
    return fft.irfft(power, n=size, axis=-1, workers=-1)[..., :n] / n


def _combined_rho(chains: np.ndarray):
    """Autocorrelation combined over chains (Vehtari et al. 2021, eq. 10).

    Returns ``rho`` of shape (params, draws) and a mask of constant parameters.
    """
    m, n, _ = chains.shape
    acov = _autocovariance(chains)
    chain_var = acov[:, :, 0] * n / (n - 1)
    within = chain_var.mean(axis=0)
    var_plus = within * (n - 1) / n
    if m > 1:
        var_plus = var_plus + chains.mean(axis=1).var(axis=0, ddof=1)
    constant = ~(var_plus > 0)
    safe = np.where(constant, 1.0, var_plus)
    rho = acov.mean(axis=0)
    rho -= within[:, None]
    rho /= safe[:, None]
    rho += 1.0
    rho[:, 0] = 1.0
    return rho, constant


def _tau_from_rho(rho: np.ndarray, total_draws: int) -> np.ndarray:
    """Geyer's initial monotone sequence estimate of the IACT.

    ``rho`` has shape (params, lags). Pair sums ``P_k = rho_2k + rho_2k+1``
    are kept while positive (initial positive sequence) and forced
    non-increasing (initial monotone sequence); ``tau = -1 + 2 sum_k P_k``.
    ``total_draws`` is the number of draws over all chains, ``S = M N``.
    """
    n_pairs = rho.shape[1] // 2
    pairs = rho[:, : 2 * n_pairs : 2] + rho[:, 1 : 2 * n_pairs : 2]
    positive = pairs > 0
    # Index of the first non-positive pair sum (or all pairs when none is).
    first_bad = np.where(positive.all(axis=1), n_pairs, np.argmin(positive, axis=1))
    monotone = np.minimum.accumulate(np.where(positive, pairs, 0.0), axis=1)
    keep = np.arange(n_pairs)[None, :] < first_bad[:, None]
    tau = -1.0 + 2.0 * np.sum(np.where(keep, monotone, 0.0), axis=1)
    # Antithetic chains can give a tiny (even negative) tau. Vehtari et al.
    # (2021) bound it below by 1/log10(S) with S the total number of draws over
    # all chains, so that ESS <= S log10(S).
    return np.maximum(tau, 1.0 / np.log10(max(total_draws, 10)))


def _ess_of(chains: np.ndarray) -> Estimate:
    """ESS of the mean for chains of shape (chains, draws, params), as given (split or not)."""
    m, n, _ = chains.shape
    rho, constant = _combined_rho(chains)
    tau = _tau_from_rho(rho, m * n)
    ess_values = np.where(constant, np.nan, m * n / tau)
    too_short = constant | (m * n < IACTS_FOR_PRECISE_ESS * tau)
    return Estimate(ess_values, too_short)


def autocorrelation(draws, max_lag: int | None = None) -> np.ndarray:
    """Autocorrelation at lags ``0..max_lag`` combined over chains.

    Returns
    -------
    ndarray of shape (max_lag + 1, params)
    """
    rho, _ = _combined_rho(as_chains(draws))
    max_lag = rho.shape[1] - 1 if max_lag is None else min(int(max_lag), rho.shape[1] - 1)
    return rho[:, : max_lag + 1].T


def _chains_for_ess(draws, split: bool) -> np.ndarray:
    chains = as_chains(draws)
    return _split(chains) if split else chains


def ess(draws, split: bool = False) -> Estimate:
    """Effective sample size of the mean over all chains (no rank normalisation).

    ``ESS = S / tau`` for ``S`` draws in all, with ``tau`` from Geyer's initial
    monotone sequence on autocorrelations combined over chains.

    Parameters
    ----------
    draws : array-like of shape (chains, draws, params), (draws, params) or (draws,)
    split : bool, default False
        Split every chain in two halves first, as Vehtari et al. (2021) do for
        every ESS: a chain that drifts then disagrees with itself, which lowers
        the ESS. This is the ESS behind :func:`mean_mcse`. Unsplit, the value
        describes a stationary chain's autocorrelation (what the pilot needs).

    Returns
    -------
    Estimate of shape (params,)
    """
    return _ess_of(_chains_for_ess(draws, split))


def iact(draws, split: bool = False) -> Estimate:
    """Integrated autocorrelation time ``tau = S / ESS`` per parameter, shape (params,).

    ``split`` as in :func:`ess`; ``S`` counts the draws the ESS used (split
    chains of odd length drop their middle draw).
    """
    chains = _chains_for_ess(draws, split)
    m, n, _ = chains.shape
    estimate = _ess_of(chains)
    return Estimate(m * n / np.asarray(estimate), estimate.too_short)


def _average_ranks(column: np.ndarray) -> np.ndarray:
    """Ranks 1..N of a 1-D array, ties given their average rank."""
    order = np.argsort(column)
    ordered = column[order]
    new_group = np.empty(ordered.shape[0], dtype=bool)
    new_group[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new_group[1:])
    group = np.cumsum(new_group) - 1
    starts = np.flatnonzero(np.append(new_group, True))
    average = 0.5 * (starts[:-1] + starts[1:] - 1) + 1.0  # mean of 1-based ranks in a group
    ranks = np.empty(ordered.shape[0])
    ranks[order] = average[group]
    return ranks


def _rank_normalise(chains: np.ndarray) -> np.ndarray:
    """Normal scores of the pooled ranks (Vehtari et al. 2021, eq. 14)."""
    m, n, p = chains.shape
    columns = np.ascontiguousarray(chains.reshape(m * n, p).T)
    scores = np.empty((p, m * n))
    for j in range(p):
        scores[j] = _average_ranks(columns[j])
    scores -= 0.375
    scores /= m * n + 0.25
    return special.ndtri(scores, out=scores).T.reshape(m, n, p)


def bulk_ess(draws) -> Estimate:
    """Bulk ESS: ESS of rank-normalised split chains (Vehtari et al. 2021)."""
    return _ess_of(_rank_normalise(_split(as_chains(draws))))


def tail_ess(draws, probabilities=(0.05, 0.95)) -> Estimate:
    """Tail ESS: the smallest ESS of the quantile indicators at ``probabilities``.

    Vehtari et al. (2021), section 4.3: the ESS of ``I(x <= q)`` on split chains
    for the 5% and 95% quantiles.
    """
    chains = _split(as_chains(draws))
    results = []
    for prob in probabilities:
        q = np.quantile(chains.reshape(-1, chains.shape[2]), prob, axis=0)
        results.append(_ess_of((chains <= q[None, None, :]).astype(float)))
    values = np.min(np.stack([np.asarray(r) for r in results]), axis=0)
    too_short = np.any(np.stack([r.too_short for r in results]), axis=0)
    return Estimate(values, too_short)


def _psrf(chains: np.ndarray) -> np.ndarray:
    """Potential scale reduction factor (Gelman and Rubin 1992) per parameter."""
    m, n, _ = chains.shape
    within = chains.var(axis=1, ddof=1).mean(axis=0)
    between = n * chains.mean(axis=1).var(axis=0, ddof=1)
    var_plus = (n - 1) / n * within + between / n
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt(var_plus / within)


def split_rhat(draws, rank: bool = True) -> np.ndarray:
    """Split R-hat, on rank-normalised draws when ``rank`` is true."""
    chains = _split(as_chains(draws))
    return _psrf(_rank_normalise(chains) if rank else chains)


def rhat(draws) -> np.ndarray:
    """Rank-normalised split R-hat, the larger of bulk and folded (Vehtari et al. 2021).

    The folded variant uses ``|x - median|`` and catches chains that differ in
    spread but not in location. Values above 1.01 suggest the chains have not
    mixed (Vehtari et al. 2021 recommend below 1.01).
    """
    chains = _split(as_chains(draws))
    bulk = _psrf(_rank_normalise(chains))
    median = np.median(chains.reshape(-1, chains.shape[2]), axis=0)
    folded = _psrf(_rank_normalise(np.abs(chains - median[None, None, :])))
    return np.fmax(bulk, folded)


def mean_mcse(draws) -> Estimate:
    """Monte Carlo standard error of the posterior mean: ``sd / sqrt(ESS)``, shape (params,).

    ``sd`` is the standard deviation of all draws pooled; ``ESS`` is the ESS
    of split chains (``ess(draws, split=True)``), as in Vehtari et al. (2021):
    unsplit, a slow drift within chains that agree on average goes unseen and
    the MCSE comes out too small.
    """
    chains = as_chains(draws)
    estimate = _ess_of(_split(chains))
    sd = chains.reshape(-1, chains.shape[2]).std(axis=0, ddof=1)
    return Estimate(sd / np.sqrt(np.asarray(estimate)), estimate.too_short)


def esjd(draws) -> np.ndarray:
    """Expected squared jump distance per parameter: mean of ``(x_{t+1} - x_t)^2``."""
    chains = as_chains(draws)
    return np.mean(np.diff(chains, axis=1) ** 2, axis=(0, 1))


def acceptance_rate(draws) -> float:
    """Share of steps at which the state changed, as seen from the draws.

    For a random-walk Metropolis chain stored at every step this estimates the
    acceptance rate (a continuous proposal almost never repeats a state).
    """
    chains = as_chains(draws)
    moved = np.any(np.diff(chains, axis=1) != 0, axis=2)
    return float(np.mean(moved))


@dataclass(frozen=True)
class ChainMeasures:
    """All per-parameter diagnostics of a set of chains, computed in one pass.

    Every array has shape (params,), except ``chain_sd`` (chains, params).
    ``ess``, ``iact`` and ``mcse`` come from split chains (``ess(draws,
    split=True)``), so ``mcse = sd / sqrt(ess)`` and ``iact = S / ess`` agree
    with each other. ``*_too_short`` flag estimates resting on fewer than
    :data:`IACTS_FOR_PRECISE_ESS` autocorrelation times over all chains.
    """

    mean: np.ndarray
    sd: np.ndarray
    mcse: np.ndarray
    ess: np.ndarray
    iact: np.ndarray
    bulk_ess: np.ndarray
    tail_ess: np.ndarray
    rhat: np.ndarray
    ess_too_short: np.ndarray
    bulk_too_short: np.ndarray
    tail_too_short: np.ndarray
    chain_sd: np.ndarray
    n_chains: int
    n_draws: int


def _measure_block(chains: np.ndarray) -> dict:
    split = _split(chains)
    raw = _ess_of(split)  # the ESS of the mean, behind the MCSE and the IACT (split chains)
    ranked = _rank_normalise(split)
    bulk = _ess_of(ranked)
    bulk_rhat = _psrf(ranked)
    del ranked
    pooled = split.reshape(-1, split.shape[2])
    median = np.median(pooled, axis=0)
    folded_rhat = _psrf(_rank_normalise(np.abs(split - median[None, None, :])))
    quantiles = np.quantile(pooled, [0.05, 0.95], axis=0)
    tails = [_ess_of((split <= q[None, None, :]).astype(float)) for q in quantiles]
    everything = chains.reshape(-1, chains.shape[2])  # mean and sd of all draws, as mean_mcse has them
    sd = everything.std(axis=0, ddof=1)
    return dict(
        mean=everything.mean(axis=0),
        sd=sd,
        mcse=sd / np.sqrt(np.asarray(raw)),
        ess=np.asarray(raw),
        iact=split.shape[0] * split.shape[1] / np.asarray(raw),
        bulk_ess=np.asarray(bulk),
        tail_ess=np.minimum(np.asarray(tails[0]), np.asarray(tails[1])),
        rhat=np.fmax(bulk_rhat, folded_rhat),
        ess_too_short=raw.too_short,
        bulk_too_short=bulk.too_short,
        tail_too_short=tails[0].too_short | tails[1].too_short,
        chain_sd=chains.std(axis=1, ddof=1),
    )


def measure_chain_blocks(blocks, n_chains: int, n_draws: int) -> ChainMeasures:
    """:func:`measure_chains` from parameter blocks read one at a time.

    Parameters
    ----------
    blocks : iterable of ndarray of shape (chains, draws, k)
        Consecutive groups of parameters, each with all chains and all draws
        (rank normalisation and the FFT need every draw of a parameter). A block
        may be a reused buffer: it is not kept after the next one is asked for.
    n_chains, n_draws : int

    Returns
    -------
    ChainMeasures
        Per parameter, the same values as ``measure_chains`` of the whole array.
    """
    if n_draws < 4:
        raise WalktuneError(f"each chain needs at least 4 draws for diagnostics; got {n_draws}.")
    parts = []
    for chunk in blocks:
        stop_point()
        if not np.all(np.isfinite(chunk)):
            raise WalktuneError("draws contain NaN or infinity; remove those draws first.")
        parts.append(_measure_block(chunk))
    fields = {key: np.concatenate([part[key] for part in parts], axis=-1) for key in parts[0]}
    return ChainMeasures(n_chains=n_chains, n_draws=n_draws, **fields)


def measure_chains(draws, block: int = 8) -> ChainMeasures:
    """Mean, sd, MCSE, ESS, IACT, bulk and tail ESS and R-hat for every parameter.

    Computes parameters ``block`` at a time, so a large (possibly memory-mapped)
    array is read once, a block at a time, and never copied whole. Each
    statistic equals the one of the function of the same name; ``ess`` and
    ``iact`` those of ``ess(draws, split=True)`` and ``iact(draws, split=True)``.
    """
    if isinstance(draws, np.ndarray) and draws.ndim == 3 and draws.dtype == np.float64:
        source = draws
    else:
        source = as_chains(draws)
    m, n, p = source.shape
    blocks = (np.array(source[:, :, start : start + block], dtype=float) for start in range(0, p, block))
    return measure_chain_blocks(blocks, m, n)
