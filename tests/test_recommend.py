"""The recommended step on a case whose true error is known: explicit Euler, logistic law.

The exact logistic solution N(t) = K / (1 + (K/N0 - 1) exp(-r t)) (Verhulst 1838) gives the
true discretisation error of every member of the ensemble at any step, so the recommendation
can be checked against the truth rather than against errbudget's own estimate.
"""

from __future__ import annotations

import numpy as np
import pytest

import errbudget
from errbudget.budget.search import Judged, why_none
from errbudget.solve.ensemble import ensemble_params, quantity_values, solve
from errbudget.uncertainty.spread import sample_design

CASE = """
title = "Known-answer check: logistic growth, explicit Euler"

[model]
form = "logistic"
unit = "fish"

[parameters]
r  = { value = "0.2 / day", sd = "0.02 / day" }
K  = { value = "1000 fish", sd = "50 fish" }
N0 = "50 fish"

[simulation]
scheme = "euler"
step = "2 day"
horizon = "40 day"

[[quantity]]
name = "fish on day 20"
kind = "value"
at = "20 day"

[budget]
fraction = 0.1
samples = 256
seed = 5
"""


@pytest.fixture(scope="module")
def known(tmp_path_factory):
    path = tmp_path_factory.mktemp("known") / "logistic-euler.toml"
    path.write_text(CASE, encoding="utf-8")
    case = errbudget.load_case(path)
    return case, errbudget.run_case(case).to_dict()


def _true_ratio(case, step: float) -> float:
    """95th-percentile true error over the design / sd of the exact values."""
    design = sample_design(case.uncertain(), None, case.budget.samples, case.budget.seed)
    params = ensemble_params(case, design.values)
    values, _ = quantity_values(case, solve(case, params, step))
    law = {k: v for k, v in params.items() if k != "N0"}
    at = case.quantities[0].at
    exact = case.model.exact(at, params["N0"], law)
    error = np.percentile(np.abs(values[0] - exact), case.budget.percentile)
    spread = np.std(exact[design.independent_rows], ddof=1)
    return float(error / spread)


def test_recommended_step_meets_the_rule_against_the_exact_solution(known):
    case, data = known
    step = data["verdict"]["recommended_step"]["value"]
    assert step is not None
    # The rule of DESIGN.md: numerical error at the 95th percentile <= fraction x spread.
    assert _true_ratio(case, step) <= case.budget.fraction


def test_next_coarser_candidate_fails_the_rule_against_the_exact_solution(known):
    case, data = known
    step = data["verdict"]["recommended_step"]["value"]
    tried = [t["step"]["value"] for t in data["recommendation"]["tried"]]
    coarser = [s for s in tried if s > step]
    assert coarser, "the search must have tried steps coarser than the recommendation"
    next_coarser = min(coarser)
    assert _true_ratio(case, next_coarser) > case.budget.fraction


def test_half_of_the_recommended_step_was_checked(known):
    _, data = known
    half = data["recommendation"]["half_step_check"]
    assert half["step"]["value"] == pytest.approx(data["verdict"]["recommended_step"]["value"] / 2)
    assert half["adequate"] is True


def _no_step_case(tmp_path, *, r_spread: str, fraction: float = 0.1):
    path = tmp_path / "no-step.toml"
    path.write_text(
        CASE.replace('r  = { value = "0.2 / day", sd = "0.02 / day" }', f"r  = {r_spread}")
        .replace('K  = { value = "1000 fish", sd = "50 fish" }', 'K  = "1000 fish"')
        .replace("fraction = 0.1", f"fraction = {fraction}"),
        encoding="utf-8",
    )
    return errbudget.load_case(path)


def test_without_parameter_spread_the_reason_says_so(tmp_path):
    case = _no_step_case(tmp_path, r_spread='{ value = "0.2 / day", sd = "0.02 / day" }')
    tried = [Judged(0.5, False, 2.0)]
    reference = np.full((1, 4), 500.0)
    reason = why_none(case, tried, [0.0], reference, 1000.0)
    assert '"fish on day 20" has no parameter spread' in reason
    assert reason.startswith("no candidate step down to 0.5 days meets the rule")


def test_roundoff_first_is_named_as_the_reason(tmp_path):
    case = _no_step_case(tmp_path, r_spread='{ value = "0.2 / day", sd = "0.02 / day" }')
    tried = [Judged(0.5, False, 2.0)]
    # 80 steps x 2^-53 x 1000 fish = 8.9e-12 fish exceeds an allowance of 1e-12 fish.
    reason = why_none(case, tried, [1e-12], np.full((1, 4), 500.0), 1000.0)
    assert "round-off would dominate" in reason


def test_artefacts_everywhere_are_named_as_the_reason(tmp_path):
    case = _no_step_case(tmp_path, r_spread='{ value = "0.2 / day", sd = "0.02 / day" }')
    tried = [
        Judged(1.0, False, 0.05, artefacts=["oscillation"]),
        Judged(0.5, False, 0.04, artefacts=["negative"]),
    ]
    reason = why_none(case, tried, [10.0], np.full((1, 4), 500.0), 1000.0)
    assert "every candidate shows artefacts (negative, oscillation)" in reason
