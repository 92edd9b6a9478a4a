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
