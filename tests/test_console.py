"""Terminal tables: readable at 80 columns (a piped or narrow terminal) and wide.

A cell rich has to cut shows the ellipsis character; a value kept whole shows
every one of its words. Both are checked on the whole rendered output at 80
and 120 columns, against the cells the tables are built from.
"""

import numpy as np
import pytest
from rich.console import Console
from rich.table import Table
from rich.text import Text

import walktune
from walktune import console as C

from conftest import ar1, load_demo

WIDTHS = (80, 120)


@pytest.fixture(scope="module")
def tuned():
    # Two separated modes: every finding, imprecise speed-ups and a not-converged posterior table.
    model = load_demo("mirror_sensor")
    return walktune.tune(model.log_posterior, list(model.PARAMETERS.values()), names=list(model.PARAMETERS),
                         seed=3, budget=30_000)


@pytest.fixture(scope="module")
def inspected():
    draws = np.stack([ar1(0.97, 4, 3000, seed=s) for s in range(3)], axis=-1)
    draws[1, :, 2] += 3.0  # one chain apart: verdicts with reasons
    return walktune.inspect(draws, ["a_rather_long_parameter_name", "beta", "gamma_sd"])


def cell_words(table: Table) -> list:
    """Every word of every cell and header of ``table`` (laid out side by side)."""
    words = []
    for column in table.columns:
        for cell in [column.header, *column._cells]:
            text = cell.plain if isinstance(cell, Text) else str(cell)
            words.extend(text.split())
    return words


def rendered(width: int, draw) -> str:
    console = Console(width=width, record=True, color_system=None)
    draw(console)
    return console.export_text()


def assert_whole(text: str, tables: list, width: int) -> None:
    assert "\u2026" not in text, "a cell was cut"
    assert max(len(line) for line in text.splitlines()) <= width
    for table in tables:
        for word in cell_words(table):
            assert word in text, f"{word!r} missing at {width} columns"


@pytest.mark.parametrize("width", WIDTHS)
def test_tuning_tables_fit(tuned, width):
    text = rendered(width, lambda c: C.render(c, tuned, "mirror", None))
    wide = [C.comparison_table(tuned), C.posterior_table(tuned)]  # side by side: the reference cells
    assert_whole(text, wide, width)
    for proposal in ("single-step", "step-sizes", "tuned-covariance"):
        assert proposal in text


@pytest.mark.parametrize("width", WIDTHS)
def test_inspection_tables_fit(inspected, width):
    text = rendered(width, lambda c: C.render_inspection(c, inspected, None))
    assert_whole(text, [C.inspection_table(inspected)], width)
    assert "a_rather_long_parameter_name" in text


@pytest.mark.parametrize("name", ["first-row-name", "a-parameter-name-so-long-that-no-other-column-fits-beside-it"])
def test_narrow_layouts_keep_every_value(name):
    # Stacked tables when columns fit beside the first one; one block per row when not even one does.
    columns = [("name", "left")] + [(f"column {i}", "right") for i in range(8)]
    rows = [[name] + [f"{1.23456789 * 10**i:.6g} units" for i in range(8)]]
    wide = C.fitted_table("t", columns, rows, None)
    for width in WIDTHS:
        text = rendered(width, lambda c: c.print(C.fitted_table("t", columns, rows, width)))
        assert_whole(text, [wide], width)


@pytest.mark.parametrize("seconds, text", [(0.00042, "0.42 ms"), (0.0111, "11 ms"), (0.213, "213 ms"), (0.9996, "1 s"), (5.36, "5.36 s"),
                                           (300.0, "5 min"), (36_000.0, "10 h")])
def test_durations_get_a_unit_that_fits(seconds, text):
    # Unit conversions: 1 s = 1000 ms, 1 min = 60 s, 1 h = 3600 s.
    assert C.duration(seconds) == text


@pytest.mark.parametrize("mean, mcse, text", [(1.23456, 0.0123, "1.235 +/- 0.012"), (-0.15373, 0.28, "-0.15 +/- 0.28"),
                                              (123.4, 15.0, "123 +/- 15")])
def test_mean_with_mcse_rounds_to_the_mcse(mean, mcse, text):
    assert C.mean_with_mcse(mean, mcse) == text


def test_short_repr_and_advice_text(tuned, inspected):
    for result in (tuned, inspected):
        text = repr(result)
        assert len(text.splitlines()) <= 5 and len(text) < 600, text
        assert f"{len(result.parameter_names)} parameters" in text
        assert f"findings: {len(result.findings)}" in text
    assert tuned.recommended.proposal in repr(tuned)
    advice = tuned.advice_text()
    assert tuned.recommended.message in advice and "0.0 s" not in advice
    for finding in tuned.findings + inspected.findings:
        assert finding.message in advice or finding.message in inspected.advice_text()
    for name, verdict in zip(inspected.parameter_names, inspected.verdicts):
        assert f"{name}: {verdict.verdict}" in inspected.advice_text()
