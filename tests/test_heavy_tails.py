"""Heavy tails: the kurtosis reported as a lower indication, and Hill's tail index against known tails.

Sources (named beside each check):
- scipy.stats Student-t: moments of order below nu are finite (nu = 3: finite variance, infinite
  fourth moment; nu = 5: finite fourth moment, excess kurtosis 6 / (nu - 4) = 6).
- scipy.stats log-normal: every moment finite; excess kurtosis exp(4 s^2) + 2 exp(3 s^2) + 3 exp(2 s^2) - 6
  (closed form; scipy.stats.lognorm(s).stats(moments="k")).
- Hill (1975), Annals of Statistics 3(5): the tail-index estimator and its asymptotic standard error
  alpha / sqrt(k), checked against the spread of the estimate over simulated samples.
"""

import numpy as np
import pytest
from scipy import stats

from walktune.geometry import heavy_tail_findings, hill_tail_index

N = 20_000


def _finding(sample, name="x"):
    found = heavy_tail_findings(sample.reshape(1, -1, 1), np.array([float(sample.size)]), [name])
    assert [f.kind for f in found] == ["heavy-tails"]
    return found[0]


def test_student_t3_fourth_moment_flagged_variance_not():
    # scipy: t(3) has variance 3 and infinite kurtosis.
    assert stats.t(3).var() == pytest.approx(3.0) and not np.isfinite(stats.t(3).stats(moments="k"))
    finding = _finding(stats.t(3).rvs(N, random_state=np.random.default_rng(1)))
    assert finding.evidence["moments"] == "infinite-fourth-moment"
    assert "fourth moment is likely infinite" in finding.message and "variance may be infinite" not in finding.message
    # The kurtosis is worded as a lower indication beside the Gaussian null, not as an estimate with its error.
    assert "at least about" in finding.message and "a Gaussian would give 0 +/- " in finding.message


def test_student_t5_and_log_normal_not_called_infinite():
    # scipy: t(5) has excess kurtosis 6; a log-normal has every moment finite.
    assert stats.t(5).stats(moments="k") == pytest.approx(6.0)
    for sample in (stats.t(5).rvs(N, random_state=np.random.default_rng(2)),
                   stats.lognorm(0.5).rvs(N, random_state=np.random.default_rng(3))):
        finding = _finding(sample)
        assert finding.evidence["moments"] not in ("infinite-fourth-moment", "infinite-variance"), finding.message


def test_hill_standard_error_against_simulation():
    # Over 200 simulated samples of |t| (one heavy tail, so the heavier of the two is always the same one):
    # the reported standard error matches the spread of the estimate (Hill's asymptotic alpha / sqrt(k);
    # 200 replicates give that sd to about 5%, so 20% allows 4 of its standard errors).
    rng = np.random.default_rng(4)
    for nu in (3, 5):
        estimates = np.array([hill_tail_index(np.abs(stats.t(nu).rvs(4000, random_state=rng)), 4000.0)
                              for _ in range(200)], dtype=object)
        assert set(estimates[:, 2]) == {"upper"}
        alpha, se = estimates[:, 0].astype(float), estimates[:, 1].astype(float)
        assert np.std(alpha) == pytest.approx(np.mean(se), rel=0.2)
    # Autocorrelated draws: with an ESS a quarter of n the standard error doubles.
    x = stats.t(3).rvs(N, random_state=rng)
    assert hill_tail_index(x, N / 4)[1] == pytest.approx(2 * hill_tail_index(x, N)[1])


def test_gaussian_raises_no_heavy_tail_finding():
    sample = np.random.default_rng(5).standard_normal(N)
    assert heavy_tail_findings(sample.reshape(1, -1, 1), np.array([float(N)]), ["z"]) == []
