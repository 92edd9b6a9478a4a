"""The mode search's finite differences in batches: the Hessian against closed forms and against the central
differences written out point by point, the batched gradient of L-BFGS-B, and stop requests between blocks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from walktune import mode
from walktune.checkpoint import Checkpoint, Interrupted, active
from walktune.evaluators import InProcessEvaluator
from walktune.mode import finite_difference_hessian, find_mode
from walktune.posterior import CountedEvaluator
from conftest import raised_in


def _spd(dim: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(dim, dim))
    return a @ a.T / dim + np.diag(np.linspace(0.5, 3.0, dim))


def _pointwise_hessian(evaluate, point, scales):
    """Central differences as the textbook writes them (e.g. Nocedal and Wright, Numerical Optimization, 2nd ed.,
    section 8.1, from memory), one evaluation at a time: the reference the batched assembly must equal."""
    d = point.shape[0]
    h = mode.FD_STEP * np.maximum(np.abs(point), scales)
    f0 = evaluate(point)

    def f(*shifts):
        x = point.copy()
        for i, s in shifts:
            x[i] += s * h[i]
        return evaluate(x)

    hess, gradient = np.empty((d, d)), np.empty(d)
    for i in range(d):
        plus, minus = f((i, 1)), f((i, -1))
        hess[i, i] = (plus - 2 * f0 + minus) / h[i] ** 2
        gradient[i] = (plus - minus) / (2 * h[i])
        for j in range(i):
            hess[i, j] = hess[j, i] = (f((i, 1), (j, 1)) - f((i, 1), (j, -1)) - f((i, -1), (j, 1))
                                       + f((i, -1), (j, -1))) / (4 * h[i] * h[j])
    return hess, gradient


class _Counting:
    """A one-point log-density and a batch evaluator of the same function (a loop: same values bit for bit)."""

    def __init__(self, log_density):
        self.log_density = log_density
        self.points = 0
        self.batches = []

    def one(self, x):
        self.points += 1
        return float(self.log_density(x))

    def batch(self, points):
        self.batches.append(points.shape[0])
        return np.array([self.one(x) for x in points])


@pytest.fixture
def small_blocks(monkeypatch):
    # Blocks of 5 points, so that the Hessian's points of d = 7 (98) span many blocks.
    monkeypatch.setattr(mode, "FD_BLOCK_BYTES", 8 * 7 * 5)


def test_batched_hessian_of_a_quadratic_is_its_matrix_and_the_pointwise_one(small_blocks):
    # Closed form: log p(x) = -(x - m)' A (x - m) / 2 has Hessian -A everywhere and gradient -A (x - m).
    d = 7
    a, centre = _spd(d, 1), np.linspace(-1.0, 2.0, d)
    target = _Counting(lambda x: -0.5 * (x - centre) @ a @ (x - centre))
    point, scales = np.full(d, 0.3), np.ones(d)
    hess, gradient = finite_difference_hessian(target.one, point, scales, with_gradient=True,
                                               evaluate_batch=target.batch)
    assert target.points == 2 * d * d + 1
    assert max(target.batches) == 5 and len(target.batches) > 2
    reference, reference_gradient = _pointwise_hessian(target.one, point, scales)
    np.testing.assert_array_equal(hess, reference)
    np.testing.assert_array_equal(gradient, reference_gradient)
    # Central differences are exact on a quadratic up to rounding: about eps |f| / h^2 (|f| ~ 10, h = 1e-4).
    np.testing.assert_allclose(hess, -a, atol=1e-5 * np.abs(a).max())
    np.testing.assert_allclose(gradient, -a @ (point - centre), atol=1e-6)


def test_batched_hessian_of_a_multivariate_t_matches_the_analytic_one(small_blocks):
    # scipy.stats.multivariate_t: log p = c - (nu + d)/2 log(1 + q / nu), q = r' S^-1 r, r = x - mu, so with
    # g = S^-1 r the Hessian is -(nu + d)/(nu + q) S^-1 + 2 (nu + d)/(nu + q)^2 g g' (differentiated by hand).
    d, nu = 7, 4.0
    shape, loc = _spd(d, 2), np.linspace(0.5, -0.5, d)
    dist = stats.multivariate_t(loc=loc, shape=shape, df=nu)
    target = _Counting(dist.logpdf)
    point, scales = loc + np.linspace(-1.0, 1.5, d), np.ones(d)
    hess = finite_difference_hessian(target.one, point, scales, evaluate_batch=target.batch)
    np.testing.assert_array_equal(hess, _pointwise_hessian(target.one, point, scales)[0])
    precision = np.linalg.inv(shape)
    r = point - loc
    q, g = r @ precision @ r, precision @ r
    exact = -(nu + d) / (nu + q) * precision + 2 * (nu + d) / (nu + q) ** 2 * np.outer(g, g)
    # Truncation error h^2 f'''' / 12 with h ~ 1e-4 (1e-9) and rounding eps |f| / h^2 (2e-8 for |f| ~ 10).
    np.testing.assert_allclose(hess, exact, atol=1e-6 * np.abs(exact).max())


def test_batched_gradient_of_lbfgsb_gives_the_same_search_bit_for_bit():
    # Fed one point at a time or in batches (same values), L-BFGS-B's forward differences see the same numbers.
    d = 12
    a, centre = _spd(d, 3), np.linspace(-2.0, 2.0, d)

    def log_density(x):
        r = x - centre
        return -0.5 * r @ a @ r - 0.1 * np.sum(r**4)  # not a quadratic: the search takes several iterations

    start, bounds, scales = np.zeros(d), np.tile([-np.inf, np.inf], (d, 1)), np.ones(d)
    one, many = _Counting(log_density), _Counting(log_density)
    fit_one = find_mode(one.one, start, bounds, scales, 5000)
    fit_many = find_mode(many.one, start, bounds, scales, 5000, evaluate_batch=many.batch)
    np.testing.assert_array_equal(fit_one.mode, fit_many.mode)
    np.testing.assert_array_equal(fit_one.hessian, fit_many.hessian)
    assert fit_one.message == fit_many.message and one.points == many.points
    if mode.LBFGSB_WORKERS:
        assert d in many.batches  # whole gradients in one batch


def test_hessians_allowed_bound_the_search_and_none_gives_no_laplace_covariance():
    d = 5
    a = _spd(d, 4)
    start, bounds, scales = np.ones(d), np.tile([-np.inf, np.inf], (d, 1)), np.ones(d)
    counts = {}
    for hessians in (0, 1, 3):
        target = _Counting(lambda x: -0.5 * x @ a @ x)
        fit = find_mode(target.one, start, bounds, scales, 2000, hessians=hessians)
        counts[hessians] = target.points, fit
    assert counts[0][1].laplace_covariance is None and "no Hessian taken" in counts[0][1].message
    np.testing.assert_allclose(counts[1][1].laplace_covariance, np.linalg.inv(a), rtol=1e-6)
    # One Hessian more (2 d^2 + 1) plus at most the Newton step's evaluation; three at most three.
    assert counts[1][0] - counts[0][0] <= 2 * d * d + 2
    assert counts[3][0] - counts[0][0] <= 3 * (2 * d * d + 1) + 2


def test_stop_request_during_the_hessian_is_honoured_between_blocks(tmp_path, small_blocks):
    d = 7
    a = _spd(d, 5)
    checkpoint = Checkpoint(tmp_path, {"test": "hessian"}, every=0)
    counted = CountedEvaluator(InProcessEvaluator(lambda x: -0.5 * np.einsum("ij,jk,ik->i", x, a, x), True),
                               np.tile([-np.inf, np.inf], (d, 1)), checkpoint)
    asked = {}

    def batch(points):
        values = counted.finite_values(points)
        if len(asked) == 0 and counted.count > 20:
            asked["count"] = checkpoint.evaluations
            checkpoint.request_stop()
        return values

    with active(checkpoint), pytest.raises(Interrupted) as stop:
        finite_difference_hessian(counted.scalar, np.ones(d), np.ones(d), evaluate_batch=batch)
    assert checkpoint.evaluations == asked["count"] < 2 * d * d + 1  # no evaluation after the request
    frames = raised_in(stop.value)
    assert "stop_point" in frames and "evaluate" not in frames


def test_a_vectorised_log_prior_gives_its_covariance_from_a_batched_hessian():
    # Closed form: log pi(theta) = -theta' Q theta / 2 has covariance Q^-1; one-point and batched Hessians agree.
    from walktune.posterior import PriorTerms

    d = 6
    q = _spd(d, 6)
    names, bounds = [f"w{i}" for i in range(d)], np.tile([-np.inf, np.inf], (d, 1))
    calls = []

    def batched(theta):
        theta = np.atleast_2d(theta)
        calls.append(theta.shape[0])
        return -0.5 * np.array([t @ q @ t for t in theta])  # row by row: the same values either way

    vectorised = PriorTerms(batched, None, names, bounds, vectorized=True).covariance(np.full(d, 0.2), np.ones(d))
    one_point = PriorTerms(lambda t: -0.5 * t @ q @ t, None, names, bounds, vectorized=False).covariance(
        np.full(d, 0.2), np.ones(d))
    assert max(calls) > 1  # the shifted points went in batches
    np.testing.assert_array_equal(vectorised, one_point)
    np.testing.assert_allclose(vectorised, np.linalg.inv(q), rtol=1e-5)
