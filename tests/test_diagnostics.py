"""Diagnostics against closed forms and published behaviour.

Sources:
- AR(1) x_t = phi x_{t-1} + e_t has lag-k autocorrelation phi^k and integrated
  autocorrelation time (1 + phi) / (1 - phi) (textbook result, e.g. Sokal 1997).
- Rank-normalised split R-hat, bulk and tail ESS: Vehtari, Gelman, Simpson,
  Carpenter and Bürkner (2021), Bayesian Analysis 16(2); R-hat < 1.01 recommended there.
  The same paper computes every ESS on split chains (also the one behind the
  MCSE of a mean) and bounds tau below by 1/log10(S), S the total number of
  draws (recalled from the paper: treat the exact form as approximate).
- Geyer (1992), Statistical Science 7(4): the initial monotone sequence
  estimator, written out independently in this file (`reference_ess`).
"""

import numpy as np
import pytest
from scipy import stats

from conftest import ar1
from walktune import diagnostics as D
from walktune.errors import WalktuneError


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8, 0.95])
def test_iact_of_ar1_matches_closed_form(ar1_factory, phi):
    # Source: AR(1) closed form tau = (1 + phi) / (1 - phi).
    x = ar1_factory(phi, chains=4, n=250_000, seed=11)[..., None]
    tau = (1 + phi) / (1 - phi)
    estimate = D.iact(x)
    # The Geyer estimator's relative standard error is about sqrt(2 (2K+1) / (M N))
    # for a window of K lags (Sokal 1997); K <= 10 tau here, so 4% is > 3 sigma.
    assert estimate[0] == pytest.approx(tau, rel=0.04)
    assert not estimate.any_too_short


def test_autocorrelation_of_ar1_is_geometric(ar1_factory):
    # Source: AR(1) lag-k autocorrelation phi^k.
    x = ar1_factory(0.7, chains=4, n=200_000, seed=3)[..., None]
    rho = D.autocorrelation(x, max_lag=5)[:, 0]
    np.testing.assert_allclose(rho, 0.7 ** np.arange(6), atol=0.01)


def test_mcse_of_ar1_mean(ar1_factory):
    # Source: Var(mean) = sigma^2 tau / N with sigma^2 = 1 / (1 - phi^2) for AR(1).
    phi = 0.9
    x = ar1_factory(phi, chains=4, n=200_000, seed=5)[..., None]
    expected = np.sqrt(1 / (1 - phi**2) * (1 + phi) / (1 - phi) / x.size)
    assert D.mean_mcse(x)[0] == pytest.approx(expected, rel=0.05)


def test_iid_draws_have_ess_near_n_and_rhat_near_one():
    # Source: for independent draws tau = 1, ESS = N (definition); Vehtari et al. (2021): R-hat < 1.01.
    rng = np.random.default_rng(2)
    x = np.stack(
        [
            stats.norm.rvs(size=(4, 5000), random_state=rng),
            stats.gamma(a=2.0).rvs(size=(4, 5000), random_state=rng),
            stats.t(df=3).rvs(size=(4, 5000), random_state=rng),
        ],
        axis=-1,
    )
    n = 4 * 5000
    for estimate in (D.ess(x), D.bulk_ess(x), D.tail_ess(x)):
        # The sd of an ESS estimate for iid draws is roughly 5% of N at this length.
        assert np.all(np.abs(np.asarray(estimate) / n - 1) < 0.15), estimate
    assert np.all(D.rhat(x) < 1.01)


def test_rhat_flags_a_shifted_chain():
    # Source: Gelman and Rubin (1992); Vehtari et al. (2021) recommend R-hat < 1.01.
    rng = np.random.default_rng(4)
    x = rng.standard_normal((4, 2000, 2))
    x[0, :, 0] += 2.0  # one chain in a different region for parameter 0 only
    r = D.rhat(x)
    assert r[0] > 1.1
    assert r[1] < 1.01


def test_folded_rhat_catches_different_spread():
    # Source: Vehtari et al. (2021), section 4.2: folding detects chains with
    # equal location but different scale, which bulk R-hat misses.
    rng = np.random.default_rng(8)
    x = rng.standard_normal((4, 4000, 1))
    x[0] *= 3.0
    assert D.split_rhat(x)[0] < 1.05
    assert D.rhat(x)[0] > 1.05


def test_short_chain_is_flagged_not_trusted(ar1_factory):
    # 2 x 1000 draws of a chain with tau = 199 (AR(1) closed form): 10 IACTs in all, far below the threshold.
    x = ar1_factory(0.99, chains=2, n=1000, seed=9)[..., None]
    assert D.iact(x).too_short[0]
    assert D.ess(x).too_short[0]


def test_threshold_follows_sokals_variance_formula():
    # Sokal (1997): var(tau_hat) = 2 (2M + 1) / S tau^2 for a window M and S draws; with
    # M = WINDOW_PER_IACT tau the relative sd reaches IACT_RELATIVE_ERROR at S = IACTS_FOR_PRECISE_ESS tau
    # (up to the +1 of the window, negligible for tau >> 1).
    tau, s = 1000.0, D.IACTS_FOR_PRECISE_ESS * 1000.0
    assert np.sqrt(2 * (2 * D.WINDOW_PER_IACT * tau + 1) / s) == pytest.approx(D.IACT_RELATIVE_ERROR, rel=1e-3)


@pytest.mark.slow
@pytest.mark.parametrize("phi, chains", [(0.5, 1), (0.9, 4), (0.9, 8)])
def test_iact_relative_error_at_the_threshold(ar1_factory, phi, chains):
    # AR(1) chains, closed-form IACT tau = (1 + phi) / (1 - phi), with IACTS_FOR_PRECISE_ESS * tau
    # draws in all: the measured relative sd of the IACT estimate lies between Sokal's formula with
    # the window Geyer's estimator sums on AR(1) chains (about 2 tau, by simulation) and with
    # the safety margin WINDOW_PER_IACT = 2.5 tau, i.e. about 0.18 to IACT_RELATIVE_ERROR = 0.2.
    tau = (1 + phi) / (1 - phi)
    n = int(round(D.IACTS_FOR_PRECISE_ESS * tau / chains))
    replicates = 400
    relative = np.array([
        float(D.iact(ar1_factory(phi, chains=chains, n=n, seed=1000 * chains + r)[..., None])[0]) / tau - 1
        for r in range(replicates)
    ])
    measured = np.sqrt(np.mean(relative**2))
    # Monte Carlo error of an rms over R replicates: sd(e^2) / (2 rms sqrt(R)).
    tolerance = 3 * np.std(relative**2) / (2 * measured * np.sqrt(replicates))
    low = np.sqrt(2 * (2 * 2.0 * tau + 1) / (chains * n))
    assert low - tolerance <= measured <= D.IACT_RELATIVE_ERROR + tolerance, (measured, low, tolerance)
    assert abs(np.mean(relative)) < 0.05 + 3 * np.std(relative) / np.sqrt(replicates)  # no large bias either


def test_constant_chain_gives_nan_and_flag():
    x = np.ones((2, 100, 1))
    e = D.ess(x)
    assert np.isnan(e[0]) and e.too_short[0]


def test_esjd_and_acceptance_from_draws():
    # Definition checks: a chain that moves every other step by +1 has acceptance 0.5
    # and squared jump 0.5 per step on average.
    x = np.repeat(np.arange(50.0), 2)[None, :, None]
    assert D.acceptance_rate(x) == pytest.approx(49 / 99)
    assert D.esjd(x)[0] == pytest.approx(49 / 99)


def test_shapes_are_accepted():
    rng = np.random.default_rng(0)
    one = rng.standard_normal(500)
    assert D.ess(one).shape == (1,)
    assert D.ess(one.reshape(500, 1)).shape == (1,)
    assert D.rhat(rng.standard_normal((3, 500, 4))).shape == (4,)


@pytest.mark.parametrize(
    "bad, message",
    [
        (np.zeros((2, 2, 2, 2)), "dimensions"),
        (np.zeros((2, 2)), "at least 4 draws"),
        (np.array([1.0, np.nan, 2.0, 3.0, 4.0]), "NaN"),
        ([["a", "b"]], "numbers"),
    ],
)
def test_bad_draws_give_clear_errors(bad, message):
    with pytest.raises(WalktuneError, match=message):
        D.ess(bad)


def test_average_ranks_match_scipy_rankdata():
    # Reference implementation: scipy.stats.rankdata(method="average"); MCMC draws repeat states, so ties matter.
    rng = np.random.default_rng(1)
    column = np.repeat(rng.standard_normal(300), rng.integers(1, 5, size=300))
    rng.shuffle(column)
    np.testing.assert_allclose(D._average_ranks(column), stats.rankdata(column, method="average"))


def test_measure_chains_agrees_with_the_single_functions():
    # measure_chains() computes block by block; every field must equal the function of the same name.
    rng = np.random.default_rng(12)
    x = rng.standard_normal((3, 800, 11)).cumsum(axis=1) * 0.1 + rng.standard_normal((3, 800, 11))
    s = D.measure_chains(x, block=4)
    np.testing.assert_allclose(s.ess, D.ess(x, split=True))
    np.testing.assert_allclose(s.iact, D.iact(x, split=True))
    np.testing.assert_allclose(s.bulk_ess, D.bulk_ess(x))
    np.testing.assert_allclose(s.tail_ess, D.tail_ess(x))
    np.testing.assert_allclose(s.rhat, D.rhat(x))
    np.testing.assert_allclose(s.mcse, D.mean_mcse(x))
    np.testing.assert_array_equal(s.ess_too_short, D.ess(x, split=True).too_short)
    np.testing.assert_allclose(s.mcse, s.sd / np.sqrt(s.ess))  # the numbers shown agree with each other
    np.testing.assert_allclose(s.iact, x.shape[0] * x.shape[1] / s.ess)


# --------------------------------------------------------------------------- MCSE from split chains


def reference_ess(x: np.ndarray, split: bool) -> float:
    """Independent ESS of chains x (chains, draws): direct-sum autocovariances, Geyer's
    (1992) initial monotone sequence, chains combined as in Vehtari et al. (2021),
    tau floored at 1/log10(S) for S draws in all (Vehtari et al. 2021, recalled)."""
    if split:
        half = x.shape[1] // 2
        x = np.concatenate([x[:, :half], x[:, x.shape[1] - half :]])
    m, n = x.shape
    acov = np.array([np.correlate(c - c.mean(), c - c.mean(), "full")[n - 1 :] / n for c in x])
    within = np.mean(acov[:, 0]) * n / (n - 1)
    var_plus = within * (n - 1) / n + np.var(x.mean(axis=1), ddof=1)
    rho = 1 - (within - acov.mean(axis=0)) / var_plus
    rho[0] = 1.0
    pairs = rho[0 : n - 1 : 2] + rho[1:n:2]
    first_bad = np.argmax(pairs <= 0) if np.any(pairs <= 0) else pairs.size
    tau = -1 + 2 * np.sum(np.minimum.accumulate(pairs[:first_bad]))
    return m * n / max(tau, 1 / np.log10(m * n))


def drifting_chains(n=1000, seed=0):
    """AR(1) chains (phi 0.5) that share a transient 3 exp(-5 t / n): not yet stationary (invented)."""
    return ar1(0.5, chains=4, n=n, seed=seed) + 3.0 * np.exp(-5.0 * np.arange(n) / n)


@pytest.mark.parametrize("case", ["ar1-odd-length", "ar1-negative", "drift"])
def test_split_ess_and_mcse_match_an_independent_implementation(ar1_factory, case):
    # Reference: reference_ess above (Geyer 1992 on split chains, Vehtari et al. 2021).
    x = {
        "ar1-odd-length": ar1_factory(0.8, chains=3, n=1201, seed=21),
        "ar1-negative": ar1_factory(-0.5, chains=4, n=600, seed=22),
        "drift": drifting_chains(seed=23),
    }[case]
    split, unsplit = reference_ess(x, split=True), reference_ess(x, split=False)
    draws = x[..., None]
    assert D.ess(draws, split=True)[0] == pytest.approx(split, rel=1e-10)
    assert D.ess(draws)[0] == pytest.approx(unsplit, rel=1e-10)
    assert D.mean_mcse(draws)[0] == pytest.approx(x.std(ddof=1) / np.sqrt(split), rel=1e-10)
    s = D.measure_chains(draws)
    assert s.mcse[0] == pytest.approx(x.std(ddof=1) / np.sqrt(split), rel=1e-10)
    assert s.ess[0] == pytest.approx(split, rel=1e-10)


def test_split_chains_see_a_common_drift_that_unsplit_chains_miss():
    # Simulation with known behaviour: chains sharing a transient agree with each
    # other, so only the halves of each chain disagree. Over 20 seeds the split ESS
    # is at most 70% of the unsplit one (prototype runs of 400 seeds: medians 29 vs 57),
    # and far below the stationary part's closed-form ESS S (1 - phi) / (1 + phi) = 1333.
    ratios = []
    for seed in range(20):
        draws = drifting_chains(seed=100 + seed)[..., None]
        ratios.append(D.ess(draws, split=True)[0] / D.ess(draws)[0])
        assert D.ess(draws, split=True)[0] < 0.1 * 4000 * (1 - 0.5) / (1 + 0.5)
    assert np.max(ratios) < 0.7


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.9, -0.5])
def test_split_iact_of_ar1_matches_closed_form(ar1_factory, phi):
    # Source: AR(1) closed form tau = (1 + phi) / (1 - phi) (textbook result).
    x = ar1_factory(phi, chains=4, n=250_000, seed=31)[..., None]
    # Relative SE of the Geyer estimate about sqrt(2 (2K + 1) / S) for a window of
    # K lags (Sokal 1997); K <= 10 tau + 10 here, so 4% is beyond 3 SE.
    assert D.iact(x, split=True)[0] == pytest.approx((1 + phi) / (1 - phi), rel=0.04)


def test_iact_floor_uses_the_total_number_of_draws():
    # Vehtari et al. (2021), recalled: tau >= 1/log10(S), S = draws over all chains, so
    # ESS <= S log10(S). An alternating chain (phi = -0.9, tau = 0.053) hits the floor.
    x = ar1(-0.9, chains=4, n=1000, seed=5)[..., None]
    assert D.ess(x)[0] == pytest.approx(4000 * np.log10(4000), rel=1e-12)
    assert D.ess(x, split=True)[0] == pytest.approx(4000 * np.log10(4000), rel=1e-12)


def test_mcse_covers_the_true_mean_of_ar1_chains(ar1_factory):
    # Simulation with known truth: stationary AR(1) chains have mean 0. Over 400
    # replicate runs (4 chains x 2000 draws, phi = 0.9, tau = 19) the interval
    # mean +/- 1.96 MCSE should hold 0 about 95% of the time; the binomial SE of the
    # observed share is sqrt(0.95 * 0.05 / 400) = 0.011, and 3 SE is allowed.
    runs = 400
    covered = 0
    for seed in range(runs):
        x = ar1_factory(0.9, chains=4, n=2000, seed=1000 + seed)[..., None]
        covered += abs(x.mean()) <= 1.96 * D.mean_mcse(x)[0]
    binomial_se = np.sqrt(0.95 * 0.05 / runs)
    assert abs(covered / runs - 0.95) < 3 * binomial_se


def test_thinning_keeps_the_ess_share_it_advises(ar1_factory):
    # Every k-th draw of AR(1) with phi is AR(1) with phi^k (closed form), so the ESS kept is
    # tau / (k tau_k); checked here against the ESS measured on simulated chains.
    from walktune.advice import THINNING_ESS_LOSS, ess_kept_by_thinning, warmup_and_thinning

    phi = 0.9
    tau = (1 + phi) / (1 - phi)
    k = warmup_and_thinning(tau)[1]
    kept = float(ess_kept_by_thinning(tau, k))
    assert kept >= 1 - THINNING_ESS_LOSS > float(ess_kept_by_thinning(tau, k + 1))
    tau_k = (1 + phi**k) / (1 - phi**k)
    assert kept == pytest.approx(tau / (k * tau_k), rel=1e-12)
    x = ar1_factory(phi, chains=8, n=200_000, seed=21)[..., None]
    measured = float(D.ess(x[:, ::k])[0] / D.ess(x)[0])
    # Relative sd of each ESS from Sokal's formula with a window of 2.5 IACTs; 3 sds of the ratio.
    se = np.hypot(np.sqrt(2 * (5 * tau + 1) / x.size), np.sqrt(2 * (5 * tau_k + 1) / (x.size / k)))
    assert measured == pytest.approx(kept, abs=3 * se * kept)
