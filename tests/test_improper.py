"""Models without a proper posterior are refused in one line, through the command line, naming the parameter.

What is improper here is mathematics, not a recalled value: a log-density that
is constant along a parameter over an infinite range has infinite mass
(the integral of a positive constant over the real line diverges), and a
log-density linear in a parameter, ``theta[0]``, has no maximum and infinite
mass. A constant on a finite interval integrates to a finite number: that
posterior is proper and must still be tuned.
"""

import numpy as np
import pytest
from conftest import assert_one_line_error as one_line_error
from typer.testing import CliRunner

import walktune
from walktune.cli import app
from walktune.evaluators import _to_scalar

runner = CliRunner()

MODELS = '''import numpy as np
PARAMETERS = {"a": 0.0, "b": 1.0}
def flat(x):
    return 0.0
def linear(x):
    return x[0] - 0.5 * x[1] ** 2
def decreasing(x):
    return -x[0] - 0.5 * x[1] ** 2
def unused(x):
    return -0.5 * x[0] ** 2
def text(x):
    return "1.5"
def texts(x):
    return ["1.5"]
def thing(x):
    return object()
def ridge(x):
    return -0.5 * (x[0] - x[1]) ** 2
'''

# Flat along a + b (the log-density depends on a - b only); c has a proper normal factor.
RIDGE3 = '''PARAMETERS = {"a": 0.0, "b": 1.0, "c": 0.5}
def lp(x):
    return -0.5 * (x[0] - x[1]) ** 2 - 0.5 * x[2] ** 2
'''

VECTORISED = '''import numpy as np
PARAMETERS = {"a": 0.0}
VECTORIZED = True
def text(x):
    return np.array(["1.5"] * len(x))
'''

# A half-line bound does not make a flat parameter proper: b > 0, flat in b.
HALF_BOUNDED = '''PARAMETERS = {"a": 0.0, "b": 1.0}
BOUNDS = {"b": (0.0, None)}
def lp(x):
    return -0.5 * x[0] ** 2
'''

# Flat in p on (0, 1): a uniform distribution, proper.
BOUNDED = '''PARAMETERS = {"a": 0.0, "p": 0.5}
BOUNDS = {"p": (0.0, 1.0)}
def lp(x):
    return -0.5 * x[0] ** 2
'''


@pytest.fixture
def models(tmp_path, monkeypatch):
    (tmp_path / "models.py").write_text(MODELS)
    (tmp_path / "vmodels.py").write_text(VECTORISED)
    (tmp_path / "half.py").write_text(HALF_BOUNDED)
    (tmp_path / "bounded.py").write_text(BOUNDED)
    (tmp_path / "ridge3.py").write_text(RIDGE3)
    monkeypatch.chdir(tmp_path)
    return tmp_path




@pytest.mark.parametrize(
    "target, fragments",
    [
        ("models.py:flat", ["does not change when a, b move alone", "flat", "add a prior", "bound"]),
        ("models.py:unused", ["does not change when b moves alone", "add a prior for b", "bound"]),
        ("half.py:lp", ["does not change when b moves alone", "add a prior for b"]),
        ("models.py:linear", ["ran away", "as a moves away", "add a prior for a", "bounds"]),
        ("models.py:decreasing", ["ran away", "as a moves away", "add a prior for a"]),
        ("models.py:ridge", ["not proper", "spread grew", "moves a, b", "stays flat", "add a prior for a, b",
                             "bounds"]),
        ("ridge3.py:lp", ["not proper", "moves a, b,", "add a prior for a, b ("]),
        ("models.py:text", ["returned a str ('1.5')"]),
        ("models.py:texts", ["returned text"]),
        ("models.py:thing", ["returned a object"]),
        ("vmodels.py:text", ["returned text"]),
    ],
)
def test_improper_or_non_numeric_models_end_with_one_line(models, target, fragments):
    result = runner.invoke(app, ["tune", target, "--out", "result", "--seed", "1", "-q"])
    text = one_line_error(result, *fragments)
    if "ran away" in text:
        assert "b=" not in text and "prior for a (" in text  # only the parameter that ran away is named
    if "spread grew" in text:
        # Found at the end of the pilot: its checkpoint may be in the folder, but no result is.
        assert not (models / "result" / "advice.json").exists()
    else:
        assert not (models / "result").exists()


def test_a_flat_parameter_between_two_bounds_still_runs(models):
    result = runner.invoke(app, ["tune", "bounded.py:lp", "--out", "result", "--seed", "1", "--budget", 20000, "-q"])
    assert result.exit_code == 0, result.output
    assert (models / "result" / "advice.json").exists()


def test_python_api_refuses_an_unused_parameter_before_the_mode_search():
    calls = []

    def log_density(theta):
        calls.append(theta.copy())
        return -0.5 * theta[0] ** 2

    with pytest.raises(walktune.WalktuneError, match="does not change when theta") as error:
        walktune.tune(log_density, start=[0.0, 0.0], names=["alpha", "theta"], seed=0)
    assert "\n" not in str(error.value) and "alpha" not in str(error.value)
    # The start, then -4, -1, 1, 4 scales for each of the two parameters: nothing more.
    assert len(calls) == 1 + 1 + 8


@pytest.mark.parametrize("value", ["1.5", b"1.5", np.array("1.5"), ["1.5"], object(), True])
def test_non_numbers_are_not_converted(value):
    with pytest.raises(TypeError, match="returned"):
        _to_scalar(value)


@pytest.mark.parametrize("value, expected", [(1.5, 1.5), (np.float32(2.0), 2.0), ([3.0], 3.0), (np.int64(-4), -4.0)])
def test_numbers_still_are(value, expected):
    assert _to_scalar(value) == expected


# --------------------------------------------------------------------------- a spread that keeps growing

from scipy import stats  # noqa: E402

from walktune import improper  # noqa: E402


class _Batch:
    def __init__(self, log_density):
        self.log_density = log_density
        self.points = 0

    def __call__(self, points):
        self.points += len(points)
        return type("BatchResult", (), {"values": np.array([self.log_density(p) for p in points])})()


def test_ray_check_finds_a_flat_ridge_and_not_a_wide_proper_one():
    # -0.5 (a - b)^2 is constant along a + b: infinite mass (the integral of a constant over a line).
    # A pilot that ended with its spread along a + b 10^4 times its start, aimed 2 degrees off the ridge:
    # the profile over the other direction finds the ridge again.
    angle = np.deg2rad(47.0)
    direction = np.array([np.cos(angle), np.sin(angle)])
    end = 1e4 * np.outer(direction, direction) + 0.5 * np.eye(2)
    ridge = _Batch(lambda x: -0.5 * (x[0] - x[1]) ** 2)
    found = improper.find_spread_runaway(ridge, np.array([3.0, 3.0]), np.eye(2), end)
    assert found is not None and found.growth > improper.GROWTH_TRIGGER
    assert np.all(found.share > improper.NAMED_SHARE)  # both parameters move along the ridge
    assert "add a prior for a, b" in improper.runaway_message(found, ["a", "b"])
    # The same ridge under a proper N(0, 1000^2) factor along a + b (mass finite): the profile falls by
    # (10^6 x 100)^2 / (2 x 2 x 10^6) over the ray, far more than log 10^6.
    proper = _Batch(lambda x: -0.5 * (x[0] - x[1]) ** 2 - 0.5 * (x[0] + x[1]) ** 2 / (2 * 1e6))
    assert improper.find_spread_runaway(proper, np.array([3.0, 3.0]), np.eye(2), end) is None
    # A bound closes a side: the same proper density on a + b > 0 only (-inf beyond it) is not flat there.
    half = _Batch(lambda x: -0.5 * (x[0] - x[1]) ** 2 - 0.5 * (x[0] + x[1]) ** 2 / (2 * 1e6) if x[0] + x[1] > 0
                  else -np.inf)
    assert improper.find_spread_runaway(half, np.array([3.0, 3.0]), np.eye(2), end) is None
    # No check below the trigger: a 50-fold growth costs no evaluation.
    quiet = _Batch(lambda x: 0.0)
    assert improper.find_spread_runaway(quiet, np.zeros(2), np.eye(2), 50 * np.eye(2)) is None and quiet.points == 0


def test_python_api_refuses_a_flat_ridge_after_the_pilot():
    with pytest.raises(walktune.WalktuneError, match="not proper") as error:
        walktune.tune(lambda x: -0.5 * (x[0] - x[1]) ** 2 - 0.5 * x[2] ** 2, start=[0.0, 1.0, 0.5],
                      names=["a", "b", "c"], seed=2)
    message = str(error.value)
    assert "\n" not in message and "add a prior for a, b (" in message and "c" not in message.split("add a prior")[1][:12]


def _twisted(x, b=0.1):
    # Haario, Saksman and Tamminen (1999): y ~ N(0, diag(100, 1)), x1 = y1, x2 = y2 + b (y1^2 - 100).
    return -0.5 * (x[0] ** 2 / 100 + (x[1] - b * (x[0] ** 2 - 100)) ** 2)


_T3 = stats.multivariate_t(loc=np.zeros(3), shape=[[1.0, 0.5, 0.0], [0.5, 2.0, 0.0], [0.0, 0.0, 0.5]], df=3)


def _funnel(x):
    # Neal (2003), Annals of Statistics 31(3): v ~ N(0, 3^2), x_i | v ~ N(0, exp(v)).
    return stats.norm.logpdf(x[0], 0, 3) + np.sum(stats.norm.logpdf(x[1:], 0, np.exp(x[0] / 2)))


def _laplace_and_normal(x):
    # Proper: a Laplace(0, 1) parameter and a normal one given it (mass 2 * sqrt(2 pi)); its mode has no
    # curvature in theta[0], so the Laplace start is far too narrow and the pilot's spread grows.
    return -abs(x[0]) - 0.5 * (x[1] - x[0]) ** 2


def _smoothed_laplace(x):
    # Proper: exp(-sqrt(1e-8 + y^2)) falls like exp(-|y|); curvature 1e4 at the mode, a Laplace sd 100x too small.
    return -np.sqrt(1e-8 + x[0] ** 2) - 0.5 * x[1] ** 2


def _correlated(seed):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((5, 5))
    precision = np.linalg.inv(a @ a.T + 0.5 * np.eye(5))
    return lambda x: -0.5 * x @ precision @ x


PROPER = {
    "twisted Gaussian": (_twisted, np.zeros(2)),
    "Student-t, 3 dof": (_T3.logpdf, np.ones(3)),
    "funnel": (_funnel, np.ones(5)),
    "Laplace and normal": (_laplace_and_normal, np.ones(2)),
    "smoothed Laplace (poor start)": (_smoothed_laplace, np.ones(2)),
    "correlated Gaussian 1": (_correlated(1), np.ones(5)),
    "correlated Gaussian 2": (_correlated(2), np.ones(5)),
    "correlated Gaussian 3": (_correlated(3), np.ones(5)),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(PROPER))
@pytest.mark.parametrize("seed", [1, 2])
def test_proper_posteriors_that_settle_slowly_are_not_refused(name, seed):
    log_density, start = PROPER[name]
    result = walktune.tune(log_density, start, seed=seed)  # raises if the detector fires
    # The ray check itself, forced past its trigger (a start 1000 times narrower than where the pilot
    # ended), on the real density from where the pilot's chains ended: the profile must fall.
    centre = result.pilot.draws.reshape(-1, len(start)).mean(axis=0)
    forced = improper.find_spread_runaway(_Batch(log_density), centre, result.pilot.covariance / 1e3,
                                          result.pilot.covariance)
    assert forced is None, (name, forced)
