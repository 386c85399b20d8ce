"""Tests of errbudget.solve.trajectory: values on and off the grid (cubic Hermite), crossing times
and extrema, against exact solutions, with the orders the schemes promise."""

from __future__ import annotations

import math

import numpy as np
import pytest

from errbudget.case.load import QuantitySpec
from errbudget.laws.models import built_in
from errbudget.solve.tableaux import SCHEMES, integrate
from errbudget.solve.trajectory import Trajectory, evaluate, extremum, time_to

ORDER_TOLERANCE = 0.15  # |observed - formal| order allowed (from the assignment, no source)
OFF_GRID = 0.37  # the value is read this share of a step past a grid point

LOGISTIC = built_in("logistic")
# Ensemble: two rising members and one falling from above K.
PARAMS = {"r": np.array([0.5, 0.8, 0.3]), "K": np.array([100.0, 50.0, 20.0])}
N0 = np.array([5.0, 10.0, 45.0])
HORIZON = 6.0  # [time]
LADDER = np.array([0.4, 0.2, 0.1, 0.05, 0.025])  # steps [time]: 4 halvings


def _trajectory(
    step: float,
    scheme: str = "rk4",
    horizon: float = HORIZON,
    params: dict | None = None,
    n0: np.ndarray | None = None,
) -> Trajectory:
    params = PARAMS if params is None else params
    n0 = N0 if n0 is None else n0
    n_steps = math.ceil(horizon / step - 1e-9)
    states = integrate(LOGISTIC.rate, n0, params, step, n_steps, SCHEMES[scheme])
    return Trajectory(states, step, horizon, LOGISTIC.rate, params)


def _slopes(steps: np.ndarray, errors: list[np.ndarray]) -> np.ndarray:
    """Least-squares slope of log error against log step, per member."""
    return np.polyfit(np.log(steps), np.log(np.array(errors)), 1)[0]


def _exact_crossing(level: float, params: dict = PARAMS, n0: np.ndarray = N0) -> np.ndarray:
    # Logistic solution (Verhulst 1838) solved for N(t*) = L: t* = ln((K/N0 - 1)/(K/L - 1))/r.
    with np.errstate(invalid="ignore"):
        return np.log((params["K"] / n0 - 1) / (params["K"] / level - 1)) / params["r"]


# ---------------------------------------------------------------------------------- value_at


def test_value_on_the_grid_is_the_state():
    traj = _trajectory(0.1)
    for k in (0, 1, 17, 60):
        value, off = traj.value_at(k * 0.1)
        assert off is False
        np.testing.assert_array_equal(value, traj.states[k])
    value, _ = traj.value_at(0.0)
    np.testing.assert_array_equal(value, N0)


def test_hermite_reproduces_a_cubic():
    # Cubic Hermite interpolation is exact for polynomials of degree <= 3 (any numerical
    # analysis text, e.g. Burden & Faires, Numerical Analysis, Hermite interpolation; recalled).
    coefficients = np.array([[2.0, -1.0, 0.5, 0.25], [7.0, 3.0, -2.0, 0.1]]).T  # (4, S)
    step, horizon = 0.3, 3.0
    times = np.arange(11)[:, None] * step

    def cubic(t):
        return sum(coefficients[j] * t**j for j in range(4))

    def rate(t, n, p):
        return sum(j * coefficients[j] * np.asarray(t) ** (j - 1) for j in range(1, 4))

    traj = Trajectory(cubic(times), step, horizon, rate, {})
    for t in (0.05, 0.31, 1.234, 2.99):
        value, off = traj.value_at(t)
        assert off is True
        np.testing.assert_allclose(value, cubic(t), rtol=1e-13)


@pytest.mark.parametrize("scheme", ["euler", "heun", "rk4"])
def test_value_off_the_grid_keeps_the_scheme_order(scheme):
    # The Hermite interpolant's O(h^4) error does not lower the global order p of the scheme
    # (Hairer, Norsett & Wanner 1993, sec. II.6, dense output); exact logistic (Verhulst 1838).
    errors = []
    for step in LADDER:
        traj = _trajectory(step, scheme)
        at = (round(2.0 / step) + OFF_GRID) * step
        value, off = traj.value_at(at)
        assert off is True
        errors.append(np.abs(value - LOGISTIC.exact(at, N0, PARAMS)))
    order = SCHEMES[scheme].order
    for slope in _slopes(LADDER, errors):
        assert abs(slope - order) < ORDER_TOLERANCE  # Hairer, Norsett & Wanner 1993


# ----------------------------------------------------------------------------------- time_to

LEVEL = 30.0  # crossed upward by members 0 and 1 and downward by member 2


# Sixteen rising members (K = 100) and sixteen falling ones (K = 20) whose crossings of LEVEL
# fall at all positions inside a step; the largest error over each group (the envelope)
# removes the dependence of the Hermite error on that position.
SPREAD = 16
SPREAD_PARAMS = {
    "r": np.r_[np.full(SPREAD, 0.5), np.full(SPREAD, 0.3)],
    "K": np.r_[np.full(SPREAD, 100.0), np.full(SPREAD, 20.0)],
}
SPREAD_N0 = np.r_[np.linspace(4.0, 8.0, SPREAD), np.linspace(40.0, 60.0, SPREAD)]


@pytest.mark.parametrize("scheme", ["euler", "heun", "rk4"])
def test_time_to_converges_at_the_scheme_order(scheme):
    exact = _exact_crossing(LEVEL, SPREAD_PARAMS, SPREAD_N0)
    assert np.all((exact > 1) & (exact < HORIZON - 1))
    errors = []
    for step in LADDER:
        result = time_to(_trajectory(step, scheme, params=SPREAD_PARAMS, n0=SPREAD_N0), LEVEL)
        assert np.all(np.isfinite(result))
        error = np.abs(result - exact)
        errors.append([error[:SPREAD].max(), error[SPREAD:].max()])
    order = SCHEMES[scheme].order
    for slope in _slopes(LADDER, errors):  # rising group, falling group
        assert abs(slope - order) < ORDER_TOLERANCE  # Hairer, Norsett & Wanner 1993


def test_time_to_unreached_level_is_nan():
    # The logistic solution from 0 < N0 < K never exceeds K (Verhulst 1838): level > K.
    params = {"r": np.array([0.5, 1.0]), "K": np.array([100.0, 300.0])}
    traj = _trajectory(0.1, params=params, n0=np.array([5.0, 5.0]))
    result = time_to(traj, 150.0)
    assert np.isnan(result[0])
    assert result[1] == pytest.approx(
        _exact_crossing(150.0, params, np.array([5.0, 5.0]))[1], abs=1e-5
    )


def test_time_to_level_equal_to_n0_is_zero():
    traj = _trajectory(0.1, n0=np.array([30.0, 10.0, 60.0]))
    result = time_to(traj, 30.0)
    assert result[0] == 0.0
    assert np.all(result[1:] > 0)


def test_time_to_after_the_horizon_is_nan():
    exact = _exact_crossing(LEVEL)  # about 4.19, 2.24, 1.70
    horizon = 3.0
    result = time_to(_trajectory(0.1, horizon=horizon), LEVEL)
    assert np.isnan(result[0])
    np.testing.assert_allclose(result[1:], exact[1:], atol=1e-5)
    # Horizon inside the last step: the grid reaches past the crossing but the horizon does
    # not. Member 1 crosses at about 2.240; the grid of step 0.3 runs to 2.4.
    horizon = float(exact[1]) - 0.02
    traj = _trajectory(0.3, horizon=horizon)
    assert traj.states.shape[0] - 1 == math.ceil(horizon / 0.3)
    assert np.isnan(time_to(traj, LEVEL)[1])
    # The same grid with the horizon just after the crossing finds it.
    traj = _trajectory(0.3, horizon=float(exact[1]) + 0.02)
    assert traj.states.shape[0] - 1 == math.ceil(horizon / 0.3)
    assert time_to(traj, LEVEL)[1] == pytest.approx(exact[1], abs=1e-3)


# ---------------------------------------------------------------------------------- extremum

# N(t) = 5 + a sin(t + phi), rate a cos(t + phi): one interior peak at t_p in [1, 2) and one
# interior minimum at t_p + pi, with the end values far from both on [0, 6.2].
WAVES = 16
PEAK_TIMES = 1 + np.arange(WAVES) / WAVES
WAVE_PARAMS = {"a": np.linspace(0.5, 2.0, WAVES), "phi": np.pi / 2 - PEAK_TIMES}
WAVE_HORIZON = 6.2
WAVE_DIVISIONS = (10, 20, 40, 80, 160)


def _wave(t, p=WAVE_PARAMS):
    return 5 + p["a"] * np.sin(t + p["phi"])


def _wave_rate(t, n, p):
    return p["a"] * np.cos(t + p["phi"])


def _wave_trajectory(divisions: int, exact_states: bool) -> Trajectory:
    step = WAVE_HORIZON / divisions
    if exact_states:
        states = _wave(np.arange(divisions + 1)[:, None] * step)
    else:
        states = integrate(_wave_rate, _wave(0.0), WAVE_PARAMS, step, divisions, SCHEMES["rk4"])
    return Trajectory(states, step, WAVE_HORIZON, _wave_rate, WAVE_PARAMS)


def test_extremum_of_exact_states_within_hermite_bound():
    # |max p - max N| <= max |p - N| <= h^4 max|N''''| / 384 for the cubic Hermite
    # interpolant p (error term N''''(xi) s^2 (1-s)^2 h^4 / 24; Burden & Faires, Numerical
    # Analysis, Hermite interpolation error; recalled). Here max|N''''| = a.
    a = WAVE_PARAMS["a"]
    for divisions in WAVE_DIVISIONS:
        traj = _wave_trajectory(divisions, exact_states=True)
        bound = traj.step**4 * a / 384 * (1 + 1e-9) + 1e-13
        assert np.all(np.abs(extremum(traj, largest=True) - (5 + a)) <= bound)
        assert np.all(np.abs(extremum(traj, largest=False) - (5 - a)) <= bound)


@pytest.mark.parametrize("exact_states", [True, False], ids=["exact-states", "rk4"])
def test_extremum_converges_at_order_four(exact_states):
    # Interior extremum read off the Hermite cubic keeps order 4 (Hairer, Norsett & Wanner
    # 1993, sec. II.6); the envelope over the 16 phases removes the dependence of the error on
    # where the peak falls inside its step.
    a = WAVE_PARAMS["a"]
    peaks, minima = [], []
    for divisions in WAVE_DIVISIONS:
        traj = _wave_trajectory(divisions, exact_states)
        peaks.append((np.abs(extremum(traj, largest=True) - (5 + a)) / a).max())
        minima.append((np.abs(extremum(traj, largest=False) - (5 - a)) / a).max())
    steps = WAVE_HORIZON / np.array(WAVE_DIVISIONS, float)
    assert abs(_slopes(steps, peaks) - 4) < ORDER_TOLERANCE  # Hairer, Norsett & Wanner 1993
    assert abs(_slopes(steps, minima) - 4) < ORDER_TOLERANCE


def test_extremum_finds_interior_peak_beaten_on_the_grid_by_an_end_value():
    p = {"a": np.array([1.0]), "phi": np.array([np.pi / 2 + 0.1])}
    step, divisions = 0.35, 20
    states = _wave(np.arange(divisions + 1)[:, None] * step, p)
    traj = Trajectory(states, step, divisions * step, _wave_rate, p)
    # Peak 5 + a at t = 2 pi - 0.1 (inside [0, 7]); Hermite bound h^4 a / 384 (see above).
    assert abs(extremum(traj, largest=True)[0] - 6.0) <= step**4 / 384 * (1 + 1e-9)


def test_extremum_of_monotone_solution_is_at_the_ends():
    # Solutions of a scalar autonomous law are monotone: for the rising logistic the peak is
    # N(horizon) and the minimum N0 (Verhulst 1838). The horizon 5.9 is off the grid of step
    # 0.4, so the peak must come from the interpolant at the horizon, not the last state.
    params = {"r": np.array([0.5, 0.8]), "K": np.array([100.0, 50.0])}
    n0 = np.array([5.0, 10.0])
    traj = _trajectory(0.4, params=params, n0=n0, horizon=5.9)
    assert traj.states.shape[0] - 1 == 15  # the grid runs to 6.0
    peak = extremum(traj, largest=True)
    np.testing.assert_array_equal(peak, traj.value_at(5.9)[0])
    assert np.all(peak < traj.states[-1])
    np.testing.assert_allclose(peak, LOGISTIC.exact(5.9, n0, params), rtol=1e-4)
    np.testing.assert_array_equal(extremum(traj, largest=False), n0)


def test_extremum_of_diverged_member_is_nan():
    states = np.array([[1.0, 1.0], [2.0, np.inf], [3.0, np.nan]])
    traj = Trajectory(states, 1.0, 2.0, lambda t, n, p: np.ones_like(n), {})
    for largest in (True, False):
        result = extremum(traj, largest)
        assert np.isnan(result[1]) and np.isfinite(result[0])


def test_evaluate_dispatches_on_kind():
    traj = _trajectory(0.1)
    value, off = evaluate(QuantitySpec("v", "value", at=2.05), traj)
    expected, _ = traj.value_at(2.05)
    assert off is True
    np.testing.assert_array_equal(value, expected)
    value, off = evaluate(QuantitySpec("t", "time-to", level=LEVEL), traj)
    assert off is False
    np.testing.assert_array_equal(value, time_to(traj, LEVEL))
    value, _ = evaluate(QuantitySpec("p", "peak"), traj)
    np.testing.assert_array_equal(value, extremum(traj, True))
    value, _ = evaluate(QuantitySpec("m", "minimum"), traj)
    np.testing.assert_array_equal(value, extremum(traj, False))
