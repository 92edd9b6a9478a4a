"""Refactors leave the advice as it was.

The tuning job is deterministic given the seed, the options and the model's
values; tests/golden/make_golden.py recorded advice.json for five cases
(the demo, bounded parameters with transforms, a user's current proposal,
two separated modes, a prior given apart with the reduced-basis run). A change
of layout must reproduce them: every key, string, flag and count exactly, and
every float to 1e-9 relative. The cases run in a child process with the CPU
kernels pinned and the libraries of constraints.txt (make_golden.pinned_env;
without the pin, the same commit gave different chains on two x86-64
machines); the float tolerance leaves room for rounding that the pin does not
reach, far below what a change of behaviour moves. A deliberate change of
behaviour regenerates them (see that script) and says so in its commit.
"""

import json
import math
import sys
from pathlib import Path

import pytest

GOLDEN = Path(__file__).resolve().parent / "golden"
sys.path.insert(0, str(GOLDEN))
import make_golden  # noqa: E402


#: Relative tolerance on floats: far above rounding differences between machines (1e-15), far below any change of
#: behaviour seen (a changed evaluation count or chain moves figures by 1e-3 and more).
REL_TOL = 1e-9
#: Absolute tolerance, for values that are zero up to rounding (a mode at 0 found as 5e-9 on one machine and
#: 5e-9 + 1e-15 on another).
ABS_TOL = 1e-12


def differences(new, old, path="") -> list:
    """Paths where ``new`` and ``old`` differ: keys, lengths, types and values exactly, floats to REL_TOL."""
    if isinstance(new, dict) and isinstance(old, dict):
        out = [f"{path}/{k}: only in one" for k in sorted(set(new) ^ set(old))]
        return out + [d for k in sorted(set(new) & set(old)) for d in differences(new[k], old[k], f"{path}/{k}")]
    if isinstance(new, list) and isinstance(old, list):
        if len(new) != len(old):
            return [f"{path}: length {len(new)} != {len(old)}"]
        return [d for i, (a, b) in enumerate(zip(new, old)) for d in differences(a, b, f"{path}[{i}]")]
    if isinstance(new, float) and isinstance(old, float):
        same = (math.isnan(new) and math.isnan(old)) or math.isclose(new, old, rel_tol=REL_TOL, abs_tol=ABS_TOL)
        return [] if same else [f"{path}: {new!r} != {old!r}"]
    return [] if type(new) is type(old) and new == old else [f"{path}: {new!r} != {old!r}"]


def test_recorded_with_these_libraries():
    recorded = json.loads((GOLDEN / "platform.json").read_text())
    assert make_golden.platform() == recorded, (
        f"tests/golden was recorded with {recorded}; this environment has {make_golden.platform()}: install "
        "constraints.txt (make test does) or regenerate with tests/golden/make_golden.py")


@pytest.mark.parametrize("name", sorted(make_golden.cases()))
def test_advice_is_the_recorded_one(name):
    recorded = json.loads((GOLDEN / f"{name}.json").read_text())
    # Computed in a child process with pinned CPU kernels (make_golden.pinned_env), as recorded.
    new = make_golden.pinned_payloads([name])[name]
    assert not differences(new, recorded), differences(new, recorded)[:10]


def test_the_comparison_sees_a_change_of_behaviour():
    assert differences({"a": [1.0, 2]}, {"a": [1.0 + 1e-12, 2]}) == []
    assert differences({"a": [1.0, 2]}, {"a": [1.0 + 1e-6, 2]}) and differences({"a": [1.0, 3]}, {"a": [1.0, 2]})
    assert differences({"a": 1}, {"a": 1.0}) and differences({"a": "x"}, {"b": "x"})
