"""Refactors leave the advice bit for bit as it was.

The tuning job is deterministic given the seed, the options and the model's
values; tests/golden/make_golden.py recorded advice.json for five cases
(the demo, bounded parameters with transforms, a user's current proposal,
two separated modes, a prior given apart with the reduced-basis run). A change
of layout must reproduce them exactly; a deliberate change of behaviour
regenerates them (see that script) and says so in its commit.
"""

import json
import sys
from pathlib import Path

import pytest

GOLDEN = Path(__file__).resolve().parent / "golden"
sys.path.insert(0, str(GOLDEN))
import make_golden  # noqa: E402


@pytest.mark.parametrize("name", sorted(make_golden.cases()))
def test_advice_is_bit_for_bit_the_recorded_one(name):
    recorded = json.loads((GOLDEN / f"{name}.json").read_text())
    # Compared as text: NaN equals NaN there, and every float is written exactly.
    assert json.dumps(make_golden.advice_payload(name), sort_keys=True) == json.dumps(recorded, sort_keys=True)
