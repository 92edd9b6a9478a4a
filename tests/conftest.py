import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter


def ar1(phi: float, chains: int, n: int, seed: int) -> np.ndarray:
    """Stationary AR(1) chains x_t = phi x_{t-1} + e_t, e_t ~ N(0, 1); shape (chains, n)."""
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((chains, n))
    e[:, 0] /= np.sqrt(1 - phi**2)  # start in the stationary distribution
    return lfilter([1.0], [1.0, -phi], e, axis=1)


@pytest.fixture
def ar1_factory():
    return ar1


@pytest.fixture(autouse=True)
def close_figures():
    """Tests that inspect report figures leave them open; close them after each test."""
    yield
    import matplotlib.pyplot as plt

    plt.close("all")


def assert_one_line_error(result, *fragments, code=2):
    """A CLI result (typer's CliRunner) that failed with one line ``error: ...`` holding ``fragments``, no traceback.

    ``code`` is the exit code wanted; None accepts any non-zero one.
    """
    assert (result.exit_code != 0) if code is None else (result.exit_code == code), result.output
    text = result.output.strip()
    assert "Traceback" not in text
    lines = [line for line in text.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), text
    for fragment in fragments:
        assert fragment in text, text
    return text


def load_demo(name: str):
    """Import demo_models/<name>.py as a module (the demos are files, not a package)."""
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parent.parent / "demo_models" / f"{name}.py"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def rotated_gaussian(dim, condition, seed):
    """A Gaussian with a random rotation, variances log-spaced up to ``condition``: (log_density, cov, mean)."""
    rng = np.random.default_rng(seed)
    rotation = stats.ortho_group.rvs(dim, random_state=rng)
    cov = rotation @ np.diag(np.logspace(0, np.log10(condition), dim)) @ rotation.T
    mean = rng.normal(size=dim) * np.sqrt(np.diag(cov))
    precision = np.linalg.inv(cov)

    def log_density(x):
        z = np.atleast_2d(x) - mean
        return -0.5 * np.einsum("ij,jk,ik->i", z, precision, z)

    return log_density, cov, mean


def correlated_gaussian(dim, seed=0):
    """N(0, S) with S = A A^T / d + I (closed form), vectorised: (log_density, S)."""
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((dim, dim))
    cov = a @ a.T / dim + np.eye(dim)
    precision = np.linalg.inv(cov)

    def log_density(x):
        x = np.atleast_2d(x)
        return -0.5 * np.einsum("ij,jk,ik->i", x, precision, x)

    return log_density, cov


def raised_in(error: BaseException) -> list:
    """Names of the functions an exception passed through, outermost first."""
    frames, tb = [], error.__traceback__
    while tb is not None:
        frames.append(tb.tb_frame.f_code.co_name)
        tb = tb.tb_next
    return frames
