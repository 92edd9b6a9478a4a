"""Bends taken out of a curved ridge (walktune/bends.py): exact inverse, unit Jacobian, the twisted Gaussian undone.

Sources:
- Log-Jacobian against numerical derivatives (scipy.differentiate.derivative).
- The twisted Gaussian of Haario, Saksman and Tamminen (1999): ``x1 ~ N(0, 100)``,
  ``x2 = y2 + b (x1^2 - 100)`` with ``y2 ~ N(0, 1)`` independent of x1. The
  least-squares coefficient of ``(x1 - a)^2`` then estimates ``b`` with the
  textbook standard error ``sigma sqrt([(X^T X)^-1]_33)`` (sigma = 1, the
  conditional sd of x2). x2's skewness is that of ``8 (chi^2_1 - 1)`` plus an
  independent N(0, 1): third central moment ``8^3 * 8``, variance 129, skewness
  ``4096 / 129^1.5 = 2.80``; the straightened coordinate is Gaussian (skewness
  0, standard error ``sqrt(6 / n)`` for a normal sample).
"""

import json

import numpy as np
import pytest
from scipy import differentiate, stats

from walktune.bends import Bend, bend_ridges, straighten
from walktune.errors import WalktuneError
from walktune.reparam import TransformChoice, curvature_measure, fit_map, load_sampling_map

B = 0.08


def twisted_draws(n, seed):
    rng = np.random.default_rng(seed)
    y = rng.standard_normal((n, 3)) * [10.0, 1.0, 1.0]
    y[:, 1] += B * (y[:, 0] ** 2 - 100.0)
    return y


def identity_map(draws, names=("x1", "x2", "x3")):
    choices = [TransformChoice(name, "identity", -np.inf, np.inf, {}) for name in names]
    return fit_map(list(names), choices, draws.mean(axis=0), np.cov(draws.T))


def bent_map(seed=0):
    """A map with a log and a logit transform and a bend of the logit coordinate along the log one."""
    rng = np.random.default_rng(seed)
    names = ["a", "b", "c"]
    choices = [TransformChoice("a", "identity", -np.inf, np.inf, {}), TransformChoice("b", "log", 2.0, np.inf, {}),
               TransformChoice("c", "logit", -1.0, 3.0, {})]
    m = rng.standard_normal((3, 3))
    bends = [Bend("c", "b", 2, 1, 0.7, 0.3)]
    return fit_map(names, choices, rng.standard_normal(3), m @ m.T + np.eye(3), bends=bends), rng


def test_bent_map_round_trips_and_its_jacobian_is_the_transforms_alone():
    reparam, rng = bent_map()
    z = rng.standard_normal((6, 3))
    theta = reparam.from_sampler(z)
    np.testing.assert_allclose(reparam.to_sampler(theta), z, atol=1e-10)
    for point in z[:3]:
        jac = np.empty((3, 3))
        for i in range(3):
            for k in range(3):
                def entry(t, i=i, k=k):
                    return reparam.from_sampler(point + np.multiply.outer(np.asarray(t), np.eye(3)[k]))[..., i]
                jac[i, k] = differentiate.derivative(entry, 0.0).df
        assert reparam.log_jacobian(point) == pytest.approx(np.log(abs(np.linalg.det(jac))), abs=1e-7)


def test_bent_map_json_round_trip_and_version_1_files(tmp_path):
    reparam, rng = bent_map()
    (tmp_path / "sampling_map.json").write_text(json.dumps(reparam.to_dict()))
    loaded = load_sampling_map(tmp_path, names=reparam.parameter_names)
    z = rng.standard_normal((5, 3))
    np.testing.assert_allclose(loaded.from_sampler(z), reparam.from_sampler(z), atol=1e-12)
    # A file written before bends existed (schema /1, no "bends") still reads, as an unbent map.
    old = reparam.to_dict()
    old.update(schema="walktune.sampling-map/1")
    del old["bends"]
    (tmp_path / "sampling_map.json").write_text(json.dumps(old))
    assert load_sampling_map(tmp_path).bends == []


def test_a_bend_along_a_bent_parameter_is_refused(tmp_path):
    reparam, _ = bent_map()
    payload = reparam.to_dict()
    payload["bends"].append({"parameter": "b", "along": "a", "coefficient": 1.0, "centre": 0.0})
    (tmp_path / "sampling_map.json").write_text(json.dumps(payload))
    with pytest.raises(WalktuneError, match="malformed"):
        load_sampling_map(tmp_path)


def test_bend_undoes_the_twisted_gaussian():
    """From exact draws the bend's coefficient is b within 4 standard errors, and the straightened x2 is Gaussian."""
    n = 20_000
    draws = twisted_draws(n, 3)
    before = curvature_measure(draws)
    assert before[1] > 0.3  # the curved ridge the finding reports
    reparam = bend_ridges(identity_map(draws), draws, before)
    assert len(reparam.bends) == 1
    bend = reparam.bends[0]
    assert (bend.name, bend.along_name) == ("x2", "x1")
    x = draws[:, 0] - bend.centre
    design = np.column_stack([np.ones(n), x, x**2])
    standard_error = np.sqrt(np.linalg.inv(design.T @ design)[2, 2])
    assert abs(bend.coefficient - B) <= 4 * standard_error
    # Checked on fresh draws (the map was fitted on the first ones): the straightened x2 has no skew left, and
    # z is uncorrelated with unit variances (standard errors sqrt(2 / n) of a variance, 1 / sqrt(n) of a
    # correlation, normal theory).
    fresh = twisted_draws(n, 4)
    skew_se = np.sqrt(6.0 / n)
    assert stats.skew(fresh[:, 1]) > 2.0  # the twisted x2 itself: skewness 2.80 (closed form above)
    assert abs(stats.skew(straighten(fresh, reparam.bends)[:, 1])) <= 4 * skew_se
    z = reparam.to_sampler(fresh)
    assert abs(stats.skew(z[:, 1])) <= 4 * skew_se
    np.testing.assert_allclose(np.cov(z.T), np.eye(3), atol=4 * np.sqrt(2.0 / n))


def test_no_bend_on_a_gaussian():
    """A correlated Gaussian has linear conditional means: no curvature, no bend, the map unchanged."""
    rng = np.random.default_rng(5)
    cov = np.array([[4.0, 1.8, 0.0], [1.8, 1.0, 0.3], [0.0, 0.3, 2.0]])
    draws = rng.multivariate_normal(np.zeros(3), cov, size=5000)
    reparam = identity_map(draws)
    assert bend_ridges(reparam, draws, curvature_measure(draws)) is reparam


def test_forbidding_bends_leaves_the_twisted_gaussian_unbent():
    """``forbid_transforms=["bend"]``: the ridge is reported and not straightened (no other map can: unbounded)."""
    import walktune

    def twisted(theta):
        y2 = theta[..., 1] - B * (theta[..., 0] ** 2 - 100.0)
        return -0.5 * (theta[..., 0] ** 2 / 100.0 + y2**2)

    result = walktune.tune(twisted, np.zeros(2), seed=1, budget=12_000, forbid_transforms=["bend"])
    ridge = [f for f in result.findings if f.kind == "curved-ridge"]
    assert ridge and not ridge[0].evidence["straightened"] and not ridge[0].evidence["bends"]
    assert "still mixes, but slowly along the bend" in ridge[0].message
    # "Slowly" as measured: the tuned run's largest IACT above the diffusion-limit prediction for a Gaussian.
    assert ridge[0].evidence["iact_measured"] > ridge[0].evidence["iact_gaussian"]
    assert result.reparam.bends == []
