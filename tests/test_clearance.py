"""Removal campaigns that clear a population, harvests that collapse a stock, and the defects
issue 11 found (nominal stability limit, long many-step cases, the schema).

Zero is absorbing: the clearance date is a time-to level 0, read with the same interpolation
as any other level, and values after it are 0.
"""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from scipy import integrate

import errbudget

REPO = Path(__file__).resolve().parents[1]
SCHEMA = json.loads((REPO / "errbudget" / "outputs" / "schema" / "budget-1.json").read_text())

# Logistic with constant removal above its largest growth rK/4 = 1200 carp/year: the rate
# is negative for every N, and the population is cleared in finite time.
R, K, H, N0 = 0.8, 6000.0, 2500.0, 3000.0
CLEARANCE = f"""
title = "Removal test: trapping out a carp stock (invented)"
[model]
form = "logistic-removal"
unit = "carp"
[parameters]
r  = {{ value = "{R} / year", sd = "0.1 / year" }}
K  = "{K} carp"
H  = {{ value = "{H} carp / year", sd = "200 carp / year" }}
N0 = "{N0} carp"
[simulation]
scheme = "rk4"
step = "0.25 year"
horizon = "4 year"
[[quantity]]
name = "years to clearance"
kind = "time-to"
level = "0 carp"
[[quantity]]
name = "carp after 3 years"
kind = "value"
at = "3 year"
[budget]
samples = 256
seed = 4
"""


def clearance_time(r: float, k: float, h: float, n0: float) -> float:
    """T = integral from 0 to N0 of dN / (H - r N (1 - N/K)) (separation of variables; any
    ODE text; CHECKS.md), by scipy.integrate.quad."""
    value, _ = integrate.quad(lambda n: 1.0 / (h - r * n * (1.0 - n / k)), 0.0, n0)
    return value


@pytest.fixture(scope="module")
def cleared(tmp_path_factory):
    path = tmp_path_factory.mktemp("clear") / "carp.toml"
    path.write_text(CLEARANCE, encoding="utf-8")
    case = errbudget.load_case(path)
    return case, errbudget.run_case(case).to_dict()


def test_clearance_time_matches_the_separated_variables_integral(cleared):
    _, data = cleared
    quantity = data["quantities"][0]
    exact = clearance_time(R, K, H, N0)  # about 1.69 years
    assert quantity["reference"] == pytest.approx(exact, rel=1e-6)
    assert quantity["value"] == pytest.approx(exact, rel=1e-3)  # RK4 at a quarter year
    # Values after the clearance are zero, not negative.
    assert data["quantities"][1]["reference"] == 0.0
    assert data["quantities"][1]["parameter"]["low"] == 0.0


def test_clearance_spread_matches_an_independent_monte_carlo(cleared):
    _, data = cleared
    rng = np.random.default_rng(12)
    r = rng.normal(R, 0.1, 20_000)
    h = rng.normal(H, 200.0, 20_000)
    times = np.array([clearance_time(a, K, b, N0) for a, b in zip(r[:4000], h[:4000], strict=True)])
    spread = data["quantities"][0]["parameter"]
    # Standard error of an sd from 4000 draws is about 1.1 %; the design is quasi-random.
    assert spread["sd"] == pytest.approx(np.std(times, ddof=1), rel=0.05)
    assert spread["mean"] == pytest.approx(np.mean(times), rel=0.01)


def test_the_whole_ensemble_is_cleared_as_an_outcome_not_an_artefact(cleared):
    _, data = cleared
    assert data["clearance"]["share"] == 1.0
    codes = [flag["code"] for flag in data["flags"]]
    assert "negative" not in codes  # the accurate solution clears too


def test_a_collapsed_stock_is_judged_against_half_an_individual(tmp_path):
    # Harvest far above growth (E = 0.3/day against r = 0.06/day): the stock decays to about
    # 2e-20 crayfish; its spread is as small, so relative errors mean nothing.
    text = (REPO / "cases" / "crayfish-pond.toml").read_text()
    text = text.replace('E  = "0.004 / day"', 'E  = "0.3 / day"').replace(
        "samples = 1024", "samples = 64"
    )
    path = tmp_path / "collapse.toml"
    path.write_text(text)
    data = errbudget.run_case(errbudget.load_case(path)).to_dict()
    stock = data["quantities"][0]
    assert stock["collapsed"] is True
    assert stock["allowance"] == 0.5 and stock["resolution"]["value"] == 0.5
    assert stock["adequate"] is True
    assert "collapsed" in [flag["code"] for flag in data["flags"]]
    assert data["verdict"]["ratio"] < 1
    assert "e+1" not in data["verdict"]["reason"]  # no "4.4e+18 times the allowance"


def test_nominal_stability_limit_is_two_over_r_minus_e(tmp_path):
    # Explicit Euler at the harvested level: multiplier 1 + h f'(N*), f'(N*) = -(r - E);
    # stable for h < 2 / (r - E) (May 1976; CHECKS.md).
    path = REPO / "cases" / "crayfish-pond.toml"
    data = errbudget.run_case(errbudget.load_case(path), samples=16).to_dict()
    assert data["stability"]["stable_step_nominal"]["value"] == pytest.approx(
        2 / (0.06 - 0.004), rel=1e-9
    )


def test_a_long_many_step_case_has_five_levels_and_meets_the_schema(tmp_path):
    # 70,080 steps at the case's own step: the ladder still reaches its five levels.
    text = (REPO / "cases" / "crayfish-pond.toml").read_text()
    text = (
        text.replace('step = "7 day"', 'step = "1 hour"')
        .replace('horizon = "210 day"', 'horizon = "2920 day"')
        .replace('at = "210 day"', 'at = "2920 day"')
        .replace("samples = 1024", "samples = 16")
    )
    path = tmp_path / "long.toml"
    path.write_text(text)
    data = errbudget.run_case(errbudget.load_case(path), patient=True).to_dict()
    assert len(data["run"]["ladder"]) >= 5
    jsonschema.validate(data, SCHEMA)
    for flag in data["flags"]:
        assert flag["code"] != "ladder-capped" or "did not settle" in flag["message"]


def test_clearance_level_zero_is_accepted_and_negative_levels_are_not(tmp_path):
    path = tmp_path / "carp.toml"
    path.write_text(CLEARANCE.replace('level = "0 carp"', 'level = "-1 carp"'))
    with pytest.raises(errbudget.InputError) as caught:
        errbudget.load_case(path)
    assert caught.value.where == "quantity[1].level"
