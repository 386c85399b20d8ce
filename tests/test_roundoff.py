"""Tests of errbudget.estimates.roundoff: the measured round-off of a small case in binary32,
binary64 and long double, the a-priori bound, and an mpmath reference for the explicit Euler
value."""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from errbudget.case.load import load_case
from errbudget.estimates import roundoff
from errbudget.estimates.roundoff import UNIT_ROUNDOFF, measure, wide_type
from errbudget.laws.models import built_in
from errbudget.solve.tableaux import SCHEMES, integrate

MP_DIGITS = 50  # decimal digits of the mpmath reference
U64 = 2.0**-53  # binary64 unit roundoff (IEEE 754-2008)
U32 = 2.0**-24  # binary32 unit roundoff (IEEE 754-2008)

CASE = """
title = "round-off test: voles in a meadow (invented)"

[model]
form = "logistic"
unit = "voles"

[parameters]
r = "0.1 / day"
K = "1000 voles"
N0 = "10 voles"

[simulation]
scheme = "euler"
step = "1 day"
horizon = "40 day"

[[quantity]]
name = "voles at day 40"
kind = "value"
at = "40 day"

[[quantity]]
name = "days to 300 voles"
kind = "time-to"
level = "300 voles"

[[quantity]]
name = "peak"
kind = "peak"
"""


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    path = tmp_path_factory.mktemp("roundoff") / "voles.toml"
    path.write_text(CASE, encoding="utf-8")
    return load_case(path)


@pytest.fixture(scope="module")
def result(case):
    return measure(case, case.step)


def _mp_euler(case) -> mpmath.mpf:
    """Explicit Euler on the logistic law done in mpmath, from the case's binary64 inputs
    (converted exactly), so it is the Euler recursion without round-off to 1e-50."""
    nominal = case.nominal()
    with mpmath.workdps(MP_DIGITS):
        r, k, n = (mpmath.mpf(nominal[name]) for name in ("r", "K", "N0"))
        h = mpmath.mpf(case.step)
        for _ in range(round(case.horizon / case.step)):
            n = n + h * (r * n * (1 - n / k))
        return n


def test_unit_roundoffs():
    # IEEE 754-2008: binary64 2^-53, binary32 2^-24.
    assert UNIT_ROUNDOFF[np.float64] == U64 == np.finfo(np.float64).eps / 2
    assert UNIT_ROUNDOFF[np.float32] == U32 == float(np.finfo(np.float32).eps) / 2


def test_measure_returns_finite_values(case, result):
    assert result["n_steps"] == 40
    for key in ("float32", "float64", "wide", "measured", "bound"):
        values = np.asarray(result[key], float)
        assert values.shape == (3,), key
        assert np.all(np.isfinite(values)), key
    assert result["wide_is_wider"] == wide_type()[1]
    assert result["wide_digits"] == np.finfo(np.longdouble).precision
    # The value at the horizon of a rising logistic is also its peak (monotone solution).
    assert result["float64"][2] == result["float64"][0]


def test_measured_roundoff_is_below_the_bound(result):
    # Higham 2002, Accuracy and Stability of Numerical Algorithms, ch. 4: a recursion of n
    # steps accumulates at most about n u max|N|.
    assert np.all(result["measured"] <= result["bound"])
    assert np.all(result["bound"] > 0)
    np.testing.assert_allclose(result["bound"][[0, 2]], 40 * U64 * result["float64"][0], rtol=1e-12)
    assert result["bound"][1] == pytest.approx(40 * U64 * result["float64"][1], rel=1e-12)


def test_float32_difference_exceeds_the_binary64_roundoff(result):
    # binary32 rounds 2^29 times more coarsely than binary64 (IEEE 754-2008).
    difference32 = np.abs(result["float32"] - result["float64"])
    assert np.all(difference32 > result["measured"])
    assert np.all(difference32 > 0)
    # and stays within the binary32 version of the same bound (Higham 2002, ch. 4)
    assert np.all(difference32 <= result["bound"] * (U32 / U64))


def _exact(value) -> mpmath.mpf:
    """A binary float (any width) as an mpmath number, without rounding."""
    numerator, denominator = value.as_integer_ratio()
    return mpmath.mpf(numerator) / denominator


def test_wide_euler_value_against_mpmath(case, result):
    wide, wider = wide_type()
    if not wider:
        pytest.skip("long double is binary64 on this platform")
    nominal = case.nominal()
    params = {"r": np.array([nominal["r"]]), "K": np.array([nominal["K"]])}
    states = integrate(
        built_in("logistic").rate,
        np.array([nominal["N0"]]),
        params,
        case.step,
        40,
        SCHEMES["euler"],
        dtype=wide,
    )
    u_wide = float(np.finfo(wide).eps) / 2
    with mpmath.workdps(MP_DIGITS):
        reference = _mp_euler(case)
        scale = float(reference)
        error_wide = float(abs(_exact(states[-1, 0]) - reference))
        error_stored = float(abs(_exact(result["wide"][0]) - reference))
        error64 = float(abs(_exact(result["float64"][0]) - reference))
    # Higham 2002, ch. 4: at most about n u_wide max|N|, far below binary64 resolution.
    assert error_wide <= 40 * u_wide * scale
    assert error_wide < U64 * scale
    # The budget stores the wide value as binary64: within one binary64 rounding of the truth.
    assert error_stored <= U64 * scale + error_wide
    # The binary64 run obeys the bound (Higham 2002, ch. 4), and the measured round-off is
    # its distance from the reference to within the rounding of the stored wide value.
    assert error64 <= 40 * U64 * scale
    assert abs(result["measured"][0] - error64) <= U64 * scale + error_wide


def test_binary64_run_against_mpmath_directly(case):
    reference = float(_mp_euler(case))
    nominal = case.nominal()
    states = integrate(
        built_in("logistic").rate,
        np.array([nominal["N0"]]),
        {"r": np.array([nominal["r"]]), "K": np.array([nominal["K"]])},
        case.step,
        40,
        SCHEMES["euler"],
    )
    assert states[-1, 0] == pytest.approx(reference, rel=40 * U64)  # Higham 2002, ch. 4
    # Mid-transition, far from the fixed point K where the rounding could cancel out.
    assert 100 < reference < 900


def test_fallback_when_long_double_is_not_wider(case, monkeypatch):
    # Without a wider type the binary64 round-off is estimated from the binary32 difference
    # scaled by u64/u32 = 2^-29 (IEEE 754-2008 unit roundoffs).
    monkeypatch.setattr(roundoff, "wide_type", lambda: (np.longdouble, False))
    fallback = measure(case, case.step)
    assert fallback["wide_is_wider"] is False
    expected = np.abs(fallback["float64"] - fallback["float32"]) * 2.0**-29
    np.testing.assert_allclose(fallback["measured"], expected, rtol=1e-15)
    assert "binary32" in fallback["method"]
    assert np.all(fallback["measured"] <= fallback["bound"])
