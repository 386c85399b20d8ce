"""Tests of errbudget.solve.tableaux: Butcher tableaux, stability functions, observed orders of the
ensemble stepper against exact solutions, and explicit Euler as the logistic map."""

from __future__ import annotations

import numpy as np
import pytest

from errbudget.errors import InputError
from errbudget.laws.models import built_in
from errbudget.solve.tableaux import SCHEMES, Scheme, get_scheme, integrate

ORDER_TOLERANCE = 0.15  # |observed - formal| order allowed (from the assignment, no source)
HORIZON = 2.0  # [time]; r T <= 2.4 keeps every member in the asymptotic range
# Steps per horizon for the ladder of each formal order: 4 halvings, coarse enough that the
# finest RK4 error stays far above round-off and fine enough for the asymptotic range.
LADDERS = {1: (64, 128, 256, 512, 1024), 2: (32, 64, 128, 256, 512), 4: (16, 32, 64, 128, 256)}
SAMPLE_POINTS = 8  # the error is the largest over t = k T / 8, k = 0..8 (common grid points)
UNIT_ROUNDOFF = 2.0**-53  # binary64 (IEEE 754-2008)

# Three parameter sets integrated together as one ensemble.
ENSEMBLE = {"r": np.array([0.5, 0.8, 1.2]), "K": np.array([100.0, 50.0, 1000.0])}
ENSEMBLE_N0 = np.array([5.0, 10.0, 100.0])

# Formal global orders (Hairer, Norsett & Wanner 1993, Solving ODEs I, sec. II.1 and II.2).
FORMAL_ORDER = {"euler": 1, "heun": 2, "midpoint": 2, "rk4": 4}

# Stability polynomials R(z) = sum g_j z^j (Hairer, Norsett & Wanner 1993, sec. IV.2):
# explicit Euler 1 + z; the two-stage order-2 schemes 1 + z + z^2/2; classical RK4
# 1 + z + z^2/2 + z^3/6 + z^4/24.
STABILITY_POLYNOMIAL = {
    "euler": [1.0, 1.0],
    "heun": [1.0, 1.0, 0.5],
    "midpoint": [1.0, 1.0, 0.5],
    "rk4": [1.0, 1.0, 1 / 2, 1 / 6, 1 / 24],
}


def _tableau(scheme: Scheme) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return np.array(scheme.a, float), np.array(scheme.b, float), np.array(scheme.c, float)


# ------------------------------------------------------------------------------- tableaux


def test_every_formal_order_is_listed():
    assert set(SCHEMES) == set(FORMAL_ORDER)
    for name, scheme in SCHEMES.items():
        assert scheme.order == FORMAL_ORDER[name]  # Hairer, Norsett & Wanner 1993
        assert scheme.name == name


@pytest.mark.parametrize("name", list(SCHEMES))
def test_tableau_consistency(name):
    a, b, c = _tableau(SCHEMES[name])
    s = SCHEMES[name].stages
    assert a.shape == (s, s) and b.shape == (s,) and c.shape == (s,)
    # Consistency: sum b = 1 and row sums of A = c (CHECKS.md; Hairer, Norsett & Wanner
    # 1993, sec. II.1)
    assert b.sum() == pytest.approx(1.0, abs=1e-15)
    np.testing.assert_allclose(a.sum(axis=1), c, atol=1e-15)
    # Explicit scheme: A strictly lower triangular (same source, sec. II.1)
    assert np.all(np.triu(a) == 0.0)


@pytest.mark.parametrize("name", list(SCHEMES))
def test_order_conditions(name):
    """Butcher's order conditions up to order 4 hold to the formal order and fail just above.

    Conditions recalled from Hairer, Norsett & Wanner 1993, sec. II.2 (order conditions):
    p=1: sum b = 1; p=2: b.c = 1/2; p=3: b.c^2 = 1/3, b.Ac = 1/6;
    p=4: b.c^3 = 1/4, b.(c*Ac) = 1/8, b.Ac^2 = 1/12, b.AAc = 1/24.
    """
    a, b, c = _tableau(SCHEMES[name])
    conditions = {
        1: [(b.sum(), 1.0)],
        2: [(b @ c, 1 / 2)],
        3: [(b @ c**2, 1 / 3), (b @ a @ c, 1 / 6)],
        4: [
            (b @ c**3, 1 / 4),
            (b @ (c * (a @ c)), 1 / 8),
            (b @ a @ c**2, 1 / 12),
            (b @ a @ a @ c, 1 / 24),
        ],
    }
    order = SCHEMES[name].order
    for p in range(1, order + 1):
        for got, want in conditions[p]:
            assert got == pytest.approx(want, abs=1e-14), (name, p)
    if order < 4:
        violated = [abs(got - want) > 1e-3 for got, want in conditions[order + 1]]
        assert any(violated), f"{name} would have order above {order}"


@pytest.mark.parametrize("name", list(SCHEMES))
def test_stability_function(name):
    scheme = SCHEMES[name]
    coefficients = scheme.stability_coefficients()
    want = STABILITY_POLYNOMIAL[name]
    # Hairer, Norsett & Wanner 1993, sec. IV.2 (see STABILITY_POLYNOMIAL)
    np.testing.assert_allclose(coefficients[: len(want)], want, atol=1e-15)
    assert np.all(coefficients[len(want) :] == 0.0)
    z = np.array([-2.5, -1.0, -0.3, 0.0, 0.7, -1.0 + 1.5j, 0.2 - 2.0j])
    np.testing.assert_allclose(scheme.stability(z), np.polyval(want[::-1], z), rtol=1e-14)


@pytest.mark.parametrize("name", list(SCHEMES))
def test_stability_function_is_one_step_of_the_linear_test_equation(name):
    # y' = lambda y: one step multiplies y by R(h lambda) (Hairer, Norsett & Wanner 1993,
    # sec. IV.2, definition of the stability function).
    scheme = SCHEMES[name]
    lam = np.array([-3.0, -0.4, 0.9])
    step = 0.7
    states = integrate(
        lambda t, n, p: p["lam"] * n, np.ones(3), {"lam": lam}, step, 1, scheme, absorbing=False
    )
    np.testing.assert_allclose(states[1], scheme.stability(step * lam), rtol=1e-14)


# ---------------------------------------------------------------------------- observed order


def _max_relative_error(form: str, scheme: Scheme, divisions: int) -> np.ndarray:
    model = built_in(form)
    params = {name: value for name, value in ENSEMBLE.items() if name in model.kinds}
    step = HORIZON / divisions
    states = integrate(model.rate, ENSEMBLE_N0, params, step, divisions, scheme)
    times = np.arange(divisions + 1)[:, None] * step
    exact = model.exact(times, ENSEMBLE_N0, params)
    every = divisions // SAMPLE_POINTS
    error = np.abs(states - exact)[::every].max(axis=0)
    return error / np.abs(exact).max(axis=0)


@pytest.mark.parametrize("form", ["logistic", "gompertz", "exponential"])
@pytest.mark.parametrize("name", list(SCHEMES))
def test_observed_order_against_exact_solution(form, name):
    # Exact solutions: logistic (Verhulst 1838), Gompertz (1825), exponential (CHECKS.md).
    scheme = SCHEMES[name]
    ladder = LADDERS[scheme.order]
    errors = np.array([_max_relative_error(form, scheme, n) for n in ladder])
    steps = HORIZON / np.array(ladder, float)
    # The finest error must stay well above the accumulated round-off n u (factor 10:
    # common practice, no source).
    assert np.all(errors[-1] > 10 * ladder[-1] * UNIT_ROUNDOFF)
    # Errors fall monotonically along the ladder for every member.
    assert np.all(np.diff(errors, axis=0) < 0)
    slopes = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert slopes.shape == (len(ENSEMBLE_N0),)
    for member, slope in enumerate(slopes):
        # Global order p of the scheme (CHECKS.md; Hairer, Norsett & Wanner 1993, sec. II.3)
        assert abs(slope - scheme.order) < ORDER_TOLERANCE, (form, name, member, slope)


def test_ensemble_members_are_independent():
    """Integrating the ensemble together gives bit-for-bit each member integrated alone."""
    model = built_in("logistic")
    together = integrate(model.rate, ENSEMBLE_N0, ENSEMBLE, 0.1, 30, SCHEMES["rk4"])
    for i in range(len(ENSEMBLE_N0)):
        alone = integrate(
            model.rate,
            ENSEMBLE_N0[i : i + 1],
            {k: v[i : i + 1] for k, v in ENSEMBLE.items()},
            0.1,
            30,
            SCHEMES["rk4"],
        )
        np.testing.assert_array_equal(together[:, i], alone[:, 0])


def test_integrate_shape_dtype_and_inputs_untouched():
    model = built_in("logistic")
    n0 = ENSEMBLE_N0.copy()
    params = {k: v.copy() for k, v in ENSEMBLE.items()}
    for dtype in (np.float32, np.float64, np.longdouble):
        out = integrate(model.rate, n0, params, 0.25, 12, SCHEMES["heun"], dtype=dtype)
        assert out.shape == (13, 3)
        assert out.dtype == dtype
        np.testing.assert_array_equal(out[0], ENSEMBLE_N0.astype(dtype))
    np.testing.assert_array_equal(n0, ENSEMBLE_N0)
    for k in ENSEMBLE:
        np.testing.assert_array_equal(params[k], ENSEMBLE[k])


def test_time_dependent_rate_uses_stage_times():
    # N' = t has N(t) = t^2/2; a scheme of order >= 2 integrates it exactly (its quadrature
    # b.c = 1/2 is exact for linear integrands; Hairer, Norsett & Wanner 1993, sec. II.1).
    for name in ("heun", "midpoint", "rk4"):
        out = integrate(
            lambda t, n, p: t + 0 * n, np.zeros(1), {}, 0.3, 10, SCHEMES[name], absorbing=False
        )
        np.testing.assert_allclose(
            out[:, 0], (0.3 * np.arange(11)) ** 2 / 2, rtol=1e-13, atol=1e-15
        )


def test_overflow_is_returned_not_raised():
    # Euler on the logistic law from N0 = 2K with r h = 5 leaves the basin: stepped as a
    # plain ODE it overflows to minus infinity, without an exception.
    model = built_in("logistic")
    args = (
        model.rate,
        np.array([200.0, 50.0]),
        {"r": np.array([5.0, 0.5]), "K": np.array([100.0, 100.0])},
        1.0,
        40,
        SCHEMES["euler"],
    )
    out = integrate(*args, absorbing=False)
    assert not np.isfinite(out[-1, 0])
    assert np.all(np.isfinite(out[:, 1]))
    # As a population, zero is absorbing: the first step lands at -800 and stops at zero.
    cleared: dict = {}
    out = integrate(*args, cleared=cleared)
    assert out[1, 0] == 0.0 and np.all(out[1:, 0] == 0.0)
    assert cleared["index"].tolist() == [1, -1]
    assert cleared["value"][0] == pytest.approx(200.0 + 5.0 * 200.0 * (1 - 2.0))
    np.testing.assert_array_equal(out[:, 1], integrate(*args, absorbing=False)[:, 1])


def test_get_scheme():
    assert get_scheme("rk4") is SCHEMES["rk4"]
    with pytest.raises(InputError) as info:
        get_scheme("rk5")
    assert info.value.where == "simulation.scheme"
    assert 'did you mean "rk4"' in info.value.message
    for name in SCHEMES:
        assert name in info.value.message


# --------------------------------------------------------------- explicit Euler = logistic map

RH_VALUES = np.array([0.5, 1.5, 2.2, 2.6, 2.9])  # includes r h > 2 (period 2 and beyond)


def test_euler_on_logistic_is_the_logistic_map():
    """May 1976, "Simple mathematical models with very complicated dynamics", Nature 261:459:
    with mu = 1 + r h and x_n = r h N_n / ((1 + r h) K), x_{n+1} = mu x_n (1 - x_n)."""
    step = 0.5
    r = RH_VALUES / step
    k = np.array([100.0, 40.0, 7.0, 1000.0, 250.0])
    n0 = 0.1 * k
    states = integrate(built_in("logistic").rate, n0, {"r": r, "K": k}, step, 60, SCHEMES["euler"])
    mu = 1 + r * step
    x = r * step * states / ((1 + r * step) * k)
    assert np.all((x > 0) & (x < 1))  # mu <= 4 keeps the map on [0, 1] (May 1976)
    predicted = mu * x[:-1] * (1 - x[:-1])
    np.testing.assert_allclose(x[1:], predicted, rtol=1e-12, atol=0)  # May 1976


def test_euler_logistic_map_regimes():
    # May 1976: r h <= 1 rises monotonically to K; 1 < r h < 2 converges to K with damped
    # oscillation; r h > 2 (mu > 3) loses K to a period-2 cycle.
    step = 1.0
    rh = np.array([0.8, 1.0, 1.6, 2.3])
    k = np.full(4, 100.0)
    states = integrate(
        built_in("logistic").rate, np.full(4, 10.0), {"r": rh, "K": k}, step, 400, SCHEMES["euler"]
    )
    increments = np.diff(states, axis=0)
    assert np.all(increments[:, :2] >= 0)
    assert np.all(states[:, :2] <= 100.0 * (1 + 1e-15))
    assert abs(states[-1, 2] - 100.0) < 1e-9
    assert np.any(states[:, 2] > 100.0)
    tail = states[-4:, 3]
    assert abs(tail[0] - tail[2]) < 1e-9 and abs(tail[1] - tail[3]) < 1e-9
    assert abs(tail[0] - tail[1]) > 1.0
