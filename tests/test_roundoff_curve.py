"""Total error against step: discretisation C h^p plus round-off D u / h
(errbudget.estimates.roundoff)."""

from __future__ import annotations

import re

import numpy as np
import pytest

from errbudget.case.load import load_case
from errbudget.estimates.roundoff import UNIT_ROUNDOFF, curve_steps, error_curve

# Logistic growth from 1 % of K over 12 e-foldings: near K at the end, where binary32
# increments of h r N (1 - N/K) below u N are lost, so round-off grows as the step shrinks.
LOGISTIC = """
title = "logistic round-off study"
[model]
form = "logistic"
unit = "beetle"
[parameters]
r = "1 / day"
K = "100 beetle"
N0 = "1 beetle"
[simulation]
scheme = "euler"
step = "0.5 day"
horizon = "12 day"
[[quantity]]
name = "beetles at day 12"
kind = "value"
at = "12 day"
"""
FLOAT32_MAX_STEPS = 2**16  # finest binary32 run: far enough to see round-off take over
FLOAT64_MAX_STEPS = 2**14  # binary64 run on the same ladder (round-off measured, not dominant)


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    path = tmp_path_factory.mktemp("curve") / "logistic.toml"
    path.write_text(LOGISTIC)
    return load_case(path)


@pytest.fixture(scope="module")
def curve32(case):
    return error_curve(case, np.float32, curve_steps(case, FLOAT32_MAX_STEPS))


@pytest.fixture(scope="module")
def curve64(case):
    return error_curve(case, np.float64, curve_steps(case, FLOAT64_MAX_STEPS))


def test_unit_roundoffs():
    # IEEE 754-2008: binary32 u = 2^-24 = 5.96e-8, binary64 u = 2^-53 = 1.11e-16.
    assert UNIT_ROUNDOFF[np.float32] == pytest.approx(5.96e-8, rel=1e-3)
    assert UNIT_ROUNDOFF[np.float64] == pytest.approx(1.11e-16, rel=1e-2)


def test_float32_euler_shows_the_u_curve(curve32):
    errors = np.array(curve32["quantities"][0]["errors"], dtype=float)
    steps = np.array(curve32["steps"])
    best = int(np.argmin(errors))
    # The minimum is interior: the error first falls with h, then rises again below some step
    # (standard numerical-analysis result, total error C h^p + D u / h).
    assert 2 <= best <= len(errors) - 3
    assert errors[0] > 10 * errors[best]
    assert errors[-1] > 10 * errors[best]
    # The falling branch has the formal order 1 of explicit Euler (Hairer, Norsett & Wanner
    # 1993, Solving ODEs I): halving h halves the error while round-off is negligible.
    assert errors[0] / errors[1] == pytest.approx(2.0, rel=0.15)
    assert steps[best] < steps[0] / 16


def test_fitted_optimum_matches_the_measured_minimum(curve32):
    part = curve32["quantities"][0]
    errors = np.array(part["errors"], dtype=float)
    measured_best = curve32["steps"][int(np.argmin(errors))]
    u, p = curve32["unit_roundoff"], curve32["order"]
    assert part["C"] > 0 and part["D"] > 0 and not part["D_is_bound"]
    # h* = (D u / (p C))^(1/(p+1)) minimises C h^p + D u / h (standard result; CHECKS.md).
    expected = (part["D"] * u / (p * part["C"])) ** (1 / (p + 1))
    assert part["optimum_step"] == pytest.approx(expected, rel=1e-12)
    # Within a factor of 10 of the measured minimum of the curve (tolerance from the brief:
    # the two-term model is a first-order description).
    assert measured_best / 10 <= part["optimum_step"] <= measured_best * 10
    # Crossover D u / h = C h^p.
    h_x = part["crossover_step"]
    assert part["C"] * h_x**p == pytest.approx(part["D"] * u / h_x, rel=1e-9)


def test_optimum_scales_like_u_to_the_one_over_p_plus_one(curve32, curve64):
    # Fitted separately in binary32 and binary64 on the same case: the best step scales like
    # u^(1/(p+1)) (standard numerical-analysis result), so h*32 / h*64 = (u32/u64)^(1/2) for
    # Euler, unless the round-off constant D itself depends on the arithmetic. Fails if the
    # fitted D of either run is off by more than a factor of 100.
    h32 = curve32["quantities"][0]["optimum_step"]
    h64 = curve64["quantities"][0]["optimum_step"]
    assert h64 is not None and not curve64["quantities"][0]["D_is_bound"]
    expected = (UNIT_ROUNDOFF[np.float32] / UNIT_ROUNDOFF[np.float64]) ** 0.5
    assert expected / 10 <= h32 / h64 <= expected * 10


def test_binary64_statement_is_negligible_with_orders(curve64, case):
    part = curve64["quantities"][0]
    statement = part["statement"]
    assert statement.startswith("round-off is negligible")
    number = re.search(r"(about|at least) (\d+) orders of magnitude", statement)
    assert number is not None
    orders = np.log10(part["C"] * case.step / (part["D"] * UNIT_ROUNDOFF[np.float64] / case.step))
    assert int(number.group(2)) == round(orders)
    # binary64 keeps about 16 digits; Euler's error at h = 0.5 is about 1e-2 of N, so the gap
    # must be many decades (common practice, no source).
    assert int(number.group(2)) >= 8


def test_unknown_dtype_is_refused(case):
    with pytest.raises(ValueError):
        error_curve(case, np.int32, [case.step])
