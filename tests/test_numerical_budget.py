"""Discretisation budget end to end: GCI against exact solutions, driver naming, divergence."""

from __future__ import annotations

import json

import numpy as np
import pytest

from errbudget import grid_convergence, run_case
from errbudget.case.load import load_case
from errbudget.laws.models import built_in
from errbudget.solve.tableaux import SCHEMES, integrate

R, K, N0, T_END = 1.0, 100.0, 5.0, 6.0  # logistic test problem [1/day, beetle, beetle, day]
BASE_STEPS = (0.5, 0.25, 0.125)  # coarsest step of each three-level ladder [day]


@pytest.mark.parametrize("name", ["euler", "heun", "midpoint", "rk4"])
@pytest.mark.parametrize("h0", BASE_STEPS)
def test_gci_bounds_the_true_error(name, h0):
    law = built_in("logistic")
    params = {"r": np.array([R]), "K": np.array([K])}
    steps = [h0, h0 / 2, h0 / 4]
    values = []
    for h in steps:
        n = round(T_END / h)
        values.append(
            float(integrate(law.rate, np.array([N0]), params, h, n, SCHEMES[name])[-1, 0])
        )
    # Exact solution N(t) = K / (1 + (K/N0 - 1) exp(-r t)) (Verhulst 1838).
    truth = float(law.exact(T_END, np.array([N0]), params)[0])
    result = grid_convergence(values, steps, formal_order=SCHEMES[name].order)
    true_error = abs(values[-1] - truth)
    # GCI_fine is a 95 % band on |phi1 - phi_exact| (Roache 1998; Celik et al. 2008, eq. 6).
    assert result.gci_fine_abs is not None
    assert true_error <= result.gci_fine_abs
    # ... and not a vacuous one: within a factor 10 of the truth (common practice, no source).
    assert result.gci_fine_abs <= 10 * true_error


SPREAD_CASE = """
title = "logistic with a wide growth-rate spread"
[model]
form = "logistic"
unit = "beetle"
[parameters]
r = {{ value = "0.12 / day", cv = {cv}, dist = "lognormal" }}
K = "1000 beetle"
N0 = {{ value = "10 beetle", sd = "0.5 beetle" }}
[simulation]
scheme = "euler"
step = "{step} day"
horizon = "30 day"
[[quantity]]
name = "beetles at day 30"
kind = "value"
at = "30 day"
[budget]
fraction = 0.1
samples = 256
seed = 2
"""


def _case(tmp_path, text, name="case.toml"):
    path = tmp_path / name
    path.write_text(text)
    return load_case(path)


def test_step_fine_at_nominal_but_not_at_the_95th_percentile(tmp_path):
    # Nominal r = 0.12/day is still growing at day 30; the fast members of a wide lognormal r
    # are mid-transition there, where Euler's error is largest, so r drives the error.
    case = _case(tmp_path, SPREAD_CASE.format(cv=0.5, step=0.5))
    budget = run_case(case, samples=256)
    data = budget.to_dict()
    item = data["quantities"][0]
    allowance = item["allowance"]
    assert data["verdict"]["adequate"] is False
    assert item["discretisation"]["error"] <= allowance
    assert item["discretisation"]["error_percentile"] > allowance
    assert item["discretisation"]["driver"]["name"] == "r"


DIVERGENT_CASE = """
title = "explicit Euler past its stability limit from above K"
[model]
form = "logistic"
unit = "beetle"
[parameters]
r = { value = "1.2 / day", cv = 0.4, dist = "lognormal" }
K = "1000 beetle"
N0 = "1500 beetle"
[simulation]
scheme = "euler"
step = "2 day"
horizon = "40 day"
[[quantity]]
name = "beetles at day 40"
kind = "value"
at = "40 day"
[budget]
samples = 64
seed = 5
"""


def test_divergent_ensemble_gives_clean_json_and_a_flag(tmp_path):
    case = _case(tmp_path, DIVERGENT_CASE)
    # r h > 3 for part of the ensemble: beyond Euler's stability limit r h < 2 at K, the
    # logistic map with mu = 1 + r h > 4 leaves [0, 1] (May 1976, Nature 261:459) and the
    # step below zero is absorbed there: a stock wiped out by the step, not by the law.
    budget = run_case(case, samples=64)
    text = json.dumps(budget.to_dict(), allow_nan=False)
    assert "NaN" not in text and "Infinity" not in text
    codes = [flag["code"] for flag in budget.to_dict()["flags"]]
    assert "negative" in codes
    assert budget.adequate is False


RUNAWAY_CASE = (
    DIVERGENT_CASE.replace('form = "logistic"', 'form = "custom"\nrate = "r*N*(1 - N/K)*(1 - N/M)"')
    .replace('K = "1000 beetle"', 'K = "1000 beetle"\nM = "3000 beetle"')
    .replace('N0 = "1500 beetle"', 'N0 = "400 beetle"')
    .replace(
        'r = { value = "1.2 / day", cv = 0.4, dist = "lognormal" }',
        'r = { value = "8 / day", cv = 0.3, dist = "lognormal" }',
    )
)


def test_runaway_past_an_unstable_level_is_divergence(tmp_path):
    # dN/dt = r N (1 - N/K)(1 - N/M), M = 3K: stable at K, unstable at M, growing without
    # bound above M. The accurate solution rises to K; a step long enough to jump past M
    # runs away to infinity, which is flagged as divergence and kept out of the JSON.
    budget = run_case(_case(tmp_path, RUNAWAY_CASE), samples=64)
    text = json.dumps(budget.to_dict(), allow_nan=False)
    assert "NaN" not in text and "Infinity" not in text
    assert "divergence" in [flag["code"] for flag in budget.to_dict()["flags"]]
