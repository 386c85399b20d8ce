"""'What would better data buy?': the budget recomputed as if the counts were doubled."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

import errbudget

CASES = Path(__file__).resolve().parent.parent / "cases"


@pytest.fixture(scope="module")
def perch():
    case = errbudget.load_case(CASES / "perch-reservoir.toml")
    return errbudget.run_case(case, samples=128).to_dict()


def test_doubling_the_counts_narrows_the_spread_by_root_two(perch):
    # All uncertain inputs of this case are fitted, so halving their covariance scales the
    # forecast spread by 1/sqrt(2) to first order (linear propagation of a covariance; any
    # text on the delta method, e.g. Casella & Berger 2002, sec. 5.5.4 -- recalled).
    better = perch["better_data"]
    for quantity in perch["quantities"]:
        ratio = better["parameter_sd"][quantity["name"]] / quantity["parameter"]["sd"]
        assert ratio == pytest.approx(1 / math.sqrt(2), rel=0.1)


def test_better_data_never_allow_a_coarser_step(perch):
    now = perch["verdict"]["recommended_step"]["value"]
    then = perch["better_data"]["recommended_step"]["value"]
    assert then is not None and now is not None
    assert then <= now
    assert perch["better_data"]["statement"].startswith("With twice as many counts")


def test_without_counts_each_input_is_halved_in_turn():
    case = errbudget.load_case(CASES / "mussel-bed.toml")
    better = errbudget.run_case(case, samples=16).to_dict()["better_data"]
    assert set(better["inputs"]) == set(case.uncertain())
    for name, item in better["inputs"].items():
        assert item["recommended_step"]["unit"] == "week"
        assert item["effective_draws"] > 0
        assert f"With the sd of {name} halved" in item["statement"]
