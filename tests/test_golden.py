"""The pinned budgets: every demo case and golden case gives today's numbers.

The files in ``tests/golden/pinned`` were written by ``tests/golden/pin.py`` from the code
before the streaming redesign; a change of layout or engine must leave every number as it
was (clock readings, paths and chunking excepted, see ``pin.VOLATILE``).
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent / "golden"))
import pin  # noqa: E402

from errbudget import load_case, run_case  # noqa: E402

RTOL = 1e-9  # the same arithmetic in the same order; only libm may differ in the last bit


def _differences(expected, actual, where: str = "") -> list[str]:
    if isinstance(expected, dict) and isinstance(actual, dict):
        found = []
        for key in sorted(set(expected) | set(actual)):
            if key not in actual or key not in expected:
                found.append(f"{where}.{key}: {'missing' if key not in actual else 'new'}")
                continue
            found += _differences(expected[key], actual[key], f"{where}.{key}")
        return found
    if isinstance(expected, list) and isinstance(actual, list):
        if len(expected) != len(actual):
            return [f"{where}: length {len(actual)} instead of {len(expected)}"]
        found = []
        for i, (e, a) in enumerate(zip(expected, actual, strict=True)):
            found += _differences(e, a, f"{where}[{i}]")
        return found
    numbers = (int, float)
    if (
        isinstance(expected, numbers)
        and isinstance(actual, numbers)
        and not isinstance(expected, bool)
        and not isinstance(actual, bool)
    ):
        if math.isclose(expected, actual, rel_tol=RTOL, abs_tol=1e-300):
            return []
        return [f"{where}: {actual!r} instead of {expected!r}"]
    return [] if expected == actual else [f"{where}: {actual!r} instead of {expected!r}"]


@pytest.mark.parametrize("path", pin.cases(), ids=lambda p: p.stem)
def test_budget_numbers_are_as_pinned(path):
    expected = json.loads(pin.pinned_path(path).read_text(encoding="utf-8"))
    actual = pin.stable_part(run_case(load_case(path)).to_dict())
    differences = _differences(expected, actual)
    assert not differences, "\n".join(differences[:20])
