"""Diagnostics against closed forms and published behaviour.

Sources:
- AR(1) x_t = phi x_{t-1} + e_t has lag-k autocorrelation phi^k and integrated
  autocorrelation time (1 + phi) / (1 - phi) (textbook result, e.g. Sokal 1997).
- Rank-normalised split R-hat, bulk and tail ESS: Vehtari, Gelman, Simpson,
  Carpenter and Bürkner (2021), Bayesian Analysis 16(2); R-hat < 1.01 recommended there.
"""

import numpy as np
import pytest
from scipy import stats

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
    assert D.mcse_mean(x)[0] == pytest.approx(expected, rel=0.05)


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
    # Common practice: trust an IACT estimate only with >= ~50 tau per chain (Sokal 1997).
    x = ar1_factory(0.99, chains=2, n=1000, seed=9)[..., None]  # tau = 199
    assert D.iact(x).too_short[0]
    assert D.ess(x).too_short[0]


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


def test_summary_agrees_with_the_single_functions():
    # summary() computes block by block; every field must equal the function of the same name.
    rng = np.random.default_rng(12)
    x = rng.standard_normal((3, 800, 11)).cumsum(axis=1) * 0.1 + rng.standard_normal((3, 800, 11))
    s = D.summary(x, block=4)
    np.testing.assert_allclose(s.ess, D.ess(x))
    np.testing.assert_allclose(s.iact, D.iact(x))
    np.testing.assert_allclose(s.bulk_ess, D.bulk_ess(x))
    np.testing.assert_allclose(s.tail_ess, D.tail_ess(x))
    np.testing.assert_allclose(s.rhat, D.rhat(x))
    np.testing.assert_allclose(s.mcse, D.mcse_mean(x))
    np.testing.assert_array_equal(s.ess_too_short, D.ess(x).too_short)
