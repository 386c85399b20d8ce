"""Tests of errbudget.estimates.stability: real-axis limits of the stability functions and step
limits at the stable equilibria of the laws, checked against May (1976) and against the behaviour
of the schemes themselves."""

from __future__ import annotations

import numpy as np
import pytest

from errbudget.estimates.stability import real_axis_limits, step_limits
from errbudget.laws.models import built_in
from errbudget.solve.tableaux import SCHEMES, integrate

# Recalled value: the real-axis stability boundary of classical RK4 is 2.7853 (Hairer &
# Wanner 1996, Solving ODEs II, sec. IV.2; recalled).
RK4_REAL_LIMIT = 2.785


def test_euler_real_axis_limits():
    # R(z) = 1 + z: |R(-x)| <= 1 for x <= 2, R(-x) >= 0 for x <= 1 (May 1976; Hairer &
    # Wanner 1996, sec. IV.2).
    stable, monotone = real_axis_limits(SCHEMES["euler"])
    assert stable == pytest.approx(2.0, abs=1e-9)
    assert monotone == pytest.approx(1.0, abs=1e-9)


@pytest.mark.parametrize("name", ["heun", "midpoint"])
def test_second_order_real_axis_limits(name):
    # R(-x) = 1 - x + x^2/2: equals 1 at x = 2 and has no real root (discriminant 1 - 2 < 0),
    # so the stable interval is [0, 2] and the step never makes the approach alternate.
    stable, monotone = real_axis_limits(SCHEMES[name])
    assert stable == pytest.approx(2.0, abs=1e-9)
    assert monotone is None


def test_rk4_real_axis_limits():
    stable, monotone = real_axis_limits(SCHEMES["rk4"])
    assert round(stable, 3) == RK4_REAL_LIMIT  # recalled value (see RK4_REAL_LIMIT)
    # Independent: R(-x) = 1 reduces to x^3/24 - x^2/6 + x/2 - 1 = 0 (Hairer, Norsett &
    # Wanner 1993, R(z) of classical RK4); its real root is the boundary.
    roots = np.roots([1 / 24, -1 / 6, 1 / 2, -1])
    real_root = float(roots[np.abs(roots.imag) < 1e-12].real[0])
    assert stable == pytest.approx(real_root, abs=1e-9)
    # R(-x) is the degree-4 Taylor polynomial of exp(-x), which has no real zero (an
    # even-degree Taylor polynomial of exp is positive), so no monotonicity limit.
    assert monotone is None


def test_stable_limit_is_where_one_step_stops_damping():
    # One step multiplies a deviation by R(-x): just inside the limit |R| <= 1, just outside
    # |R| > 1 (definition; Hairer & Wanner 1996, sec. IV.2).
    for scheme in SCHEMES.values():
        stable, _ = real_axis_limits(scheme)
        assert abs(scheme.stability(-(stable - 1e-6))) <= 1.0
        assert abs(scheme.stability(-(stable + 1e-6))) > 1.0


# --------------------------------------------------------------------------- step_limits

R = np.array([0.05, 0.4, 2.0])  # [1/time]
K = np.array([100.0, 9000.0, 1.0])  # [population]


def test_logistic_euler_step_limits_per_member():
    # May 1976, Nature 261:459: Euler on the logistic law is stable at K for h < 2/r and
    # approaches K without alternating for h <= 1/r.
    limits = step_limits(built_in("logistic"), SCHEMES["euler"], {"r": R, "K": K})
    np.testing.assert_allclose(limits["stable"], 2 / R, rtol=1e-9)
    np.testing.assert_allclose(limits["monotone"], 1 / R, rtol=1e-9)
    assert limits["equilibrium"] == "K"


def test_logistic_rk4_step_limits():
    limits = step_limits(built_in("logistic"), SCHEMES["rk4"], {"r": R, "K": K})
    # Jacobian -r at K; stable while r h <= 2.785 (recalled RK4 boundary, see above).
    np.testing.assert_allclose(limits["stable"] * R, RK4_REAL_LIMIT, atol=5e-4)
    assert np.all(np.isinf(limits["monotone"]))


def test_logistic_harvest_step_limit():
    # Jacobian at K (1 - E/r) is -(r - E) (Schaefer 1954 model, linearised): h < 2/(r - E);
    # once E > r extinction is the stable state with Jacobian r - E: h < 2/(E - r).
    params = {
        "r": np.array([0.5, 0.5, 0.06]),
        "K": np.array([100.0, 100.0, 9000.0]),
        "E": np.array([0.1, 0.8, 0.004]),
    }
    limits = step_limits(built_in("logistic-harvest"), SCHEMES["euler"], params)
    want = 2 / np.abs(params["r"] - params["E"])
    np.testing.assert_allclose(limits["stable"], want, rtol=1e-9)
    np.testing.assert_allclose(limits["monotone"], want / 2, rtol=1e-9)


def test_logistic_removal_step_limit_at_upper_root():
    # Jacobian at N+ = K/2 (1 + s), s = sqrt(1 - 4H/(rK)), is r (1 - 2N+/K) = -r s.
    params = {"r": np.array([0.5, 1.0]), "K": np.array([100.0, 40.0]), "H": np.array([5.0, 6.0])}
    s = np.sqrt(1 - 4 * params["H"] / (params["r"] * params["K"]))
    limits = step_limits(built_in("logistic-removal"), SCHEMES["euler"], params)
    np.testing.assert_allclose(limits["stable"], 2 / (params["r"] * s), rtol=1e-9)


def test_allee_step_limit_is_the_tighter_of_zero_and_k():
    # Jacobians: -r at 0 and -r (K/A - 1) at K (differentiating r N (1 - N/K)(N/A - 1)).
    params = {"r": np.array([0.5, 0.5]), "K": np.array([100.0, 100.0]), "A": np.array([10.0, 80.0])}
    limits = step_limits(built_in("allee"), SCHEMES["euler"], params)
    fastest = np.maximum(params["r"], params["r"] * (params["K"] / params["A"] - 1))
    np.testing.assert_allclose(limits["stable"], 2 / fastest, rtol=1e-9)
    assert "K" in limits["equilibrium"] and "extinction" in limits["equilibrium"]


def test_no_stable_equilibrium_gives_no_limit():
    limits = step_limits(built_in("exponential"), SCHEMES["euler"], {"r": np.array([0.3, 1.0])})
    assert np.all(np.isinf(limits["stable"])) and np.all(np.isinf(limits["monotone"]))
    # Decay r < 0: 0 is stable with Jacobian r: h < 2/|r| for Euler.
    limits = step_limits(built_in("exponential"), SCHEMES["euler"], {"r": np.array([-0.5])})
    np.testing.assert_allclose(limits["stable"], [4.0])


@pytest.mark.parametrize("name", list(SCHEMES))
def test_step_limit_separates_convergence_from_loss_of_k(name):
    """Behaviour on both sides of the computed limit: just below, the scheme settles on K
    from a start near K; just above, the deviation grows (linear stability, Hairer & Wanner
    1996, sec. IV.2; for Euler May 1976)."""
    params = {"r": np.array([0.5, 0.5]), "K": np.array([100.0, 100.0])}
    stable = step_limits(built_in("logistic"), SCHEMES[name], params)["stable"][0]
    model = built_in("logistic")
    n0 = np.array([99.0, 99.0])
    for step, settles in ((0.97 * stable, True), (1.03 * stable, False)):
        states = integrate(model.rate, n0, params, step, 600, SCHEMES[name])
        deviation = abs(states[-1, 0] - 100.0)
        if settles:
            assert deviation < 1e-6, (name, step)
        else:
            assert not deviation < 0.5, (name, step)
