"""Tests of errbudget.laws.models: right-hand sides, derivatives, exact solutions, equilibria and
their stability for every built-in law."""

from __future__ import annotations

import numpy as np
import pytest

from errbudget.errors import InputError
from errbudget.laws.models import BUILT_IN, FORMS, GrowthModel, built_in, stable_equilibria

FD_STEP = 1e-5  # relative step of the central differences
FD_TOLERANCE = 1e-6  # central differences are O(step^2) ~ 1e-10, plus cancellation ~1e-11

# Two or three parameter sets per law, in P and T; N0 is kept separately.
PARAMS = {
    "exponential": {"r": np.array([0.3, -0.2, 1.1])},
    "logistic": {"r": np.array([0.5, 1.3, 0.05]), "K": np.array([100.0, 9000.0, 3.0])},
    "gompertz": {"r": np.array([0.5, 1.3, 0.05]), "K": np.array([100.0, 9000.0, 3.0])},
    "theta-logistic": {
        "r": np.array([0.5, 1.3, 0.05]),
        "K": np.array([100.0, 9000.0, 3.0]),
        "theta": np.array([0.5, 1.0, 2.5]),
    },
    "logistic-harvest": {
        "r": np.array([0.5, 1.3, 0.05]),
        "K": np.array([100.0, 9000.0, 3.0]),
        "E": np.array([0.1, 0.0, 0.08]),
    },
    "logistic-removal": {
        "r": np.array([0.5, 1.3, 0.05]),
        "K": np.array([100.0, 9000.0, 3.0]),
        "H": np.array([5.0, 100.0, 0.01]),
    },
    "allee": {
        "r": np.array([0.5, 1.3, 0.05]),
        "K": np.array([100.0, 9000.0, 3.0]),
        "A": np.array([10.0, 500.0, 1.0]),
    },
}
# Sample populations as fractions of a scale (K where the law has one).
FRACTIONS = np.array([0.05, 0.3, 0.5, 0.8, 1.0, 1.4, 2.2])


def _scale(params: dict) -> np.ndarray:
    return params.get("K", np.array([50.0, 20.0, 3.0]))


def _law_params(form: str) -> dict:
    return PARAMS[form]


def test_every_built_in_law_is_covered():
    assert set(PARAMS) == set(BUILT_IN)
    assert (*BUILT_IN, "custom") == FORMS
    for form in BUILT_IN:
        model = built_in(form)
        assert isinstance(model, GrowthModel)
        assert model.form == form
        assert set(model.parameter_names) == set(PARAMS[form])


def test_unknown_form():
    with pytest.raises(InputError) as info:
        built_in("logistc")
    assert 'did you mean "logistic"' in info.value.message
    assert info.value.where == "model.form"
    assert "custom" in info.value.message


@pytest.mark.parametrize("form", list(BUILT_IN))
def test_d_dn_matches_central_differences(form):
    model = built_in(form)
    params = _law_params(form)
    n = FRACTIONS[:, None] * _scale(params)[None, :]
    delta = FD_STEP * n
    numeric = (model.rate(0.0, n + delta, params) - model.rate(0.0, n - delta, params)) / (
        2 * delta
    )
    analytic = model.d_dn(0.0, n, params)
    assert np.shape(analytic) == n.shape
    # Central difference f'(N) = (f(N + d) - f(N - d)) / 2d + O(d^2) (any numerical text).
    scale = np.abs(numeric).max(axis=0) + np.abs(params["r"])
    assert np.all(np.abs(analytic - numeric) < FD_TOLERANCE * scale[None, :])


@pytest.mark.parametrize("form", list(BUILT_IN))
def test_equilibria_are_zeros_of_the_rate(form):
    model = built_in(form)
    params = _law_params(form)
    equilibria = model.equilibria(params)
    assert equilibria, "every built-in law has at least one closed-form equilibrium"
    for eq in equilibria:
        value = np.broadcast_to(eq.value, params["r"].shape)
        present = np.isfinite(value)
        assert present.any(), eq.name
        rate = model.rate(0.0, np.where(present, value, 1.0), params)
        size = np.abs(params["r"]) * np.where(present, np.maximum(np.abs(value), 1.0), 1.0)
        assert np.all(np.abs(rate[present]) <= 1e-12 * size[present]), eq.name


def test_known_equilibrium_values():
    p = PARAMS["logistic-harvest"]
    levels = {eq.name: eq.value for eq in built_in("logistic-harvest").equilibria(p)}
    # Schaefer 1954: harvested equilibrium K (1 - E/r); the third member has E > r, no level.
    level = levels["harvested level K(1 - E/r)"]
    np.testing.assert_allclose(level[:2], (p["K"] * (1 - p["E"] / p["r"]))[:2])
    assert np.isnan(level[2])
    p = PARAMS["logistic-removal"]
    values = [eq.value for eq in built_in("logistic-removal").equilibria(p)]
    # Roots of r N (1 - N/K) = H: N = K/2 (1 -/+ sqrt(1 - 4H/(rK))) (quadratic formula)
    root = np.sqrt(1 - 4 * p["H"] / (p["r"] * p["K"]))
    np.testing.assert_allclose(values[0], p["K"] / 2 * (1 - root))
    np.testing.assert_allclose(values[1], p["K"] / 2 * (1 + root))
    p = PARAMS["allee"]
    values = sorted(np.asarray(eq.value, float)[0] for eq in built_in("allee").equilibria(p))
    assert values == [0.0, 10.0, 100.0]


def test_missing_equilibria_are_nan():
    # Removal above the maximum sustainable yield rK/4 leaves no equilibrium (Schaefer 1954);
    # harvest faster than r drives the harvested level below zero.
    removal = {
        "r": np.array([0.5, 0.5]),
        "K": np.array([100.0, 100.0]),
        "H": np.array([20.0, 12.5]),
    }
    lower, upper = built_in("logistic-removal").equilibria(removal)
    assert np.isnan(lower.value[0]) and np.isnan(upper.value[0])
    assert lower.value[1] == pytest.approx(50.0) and upper.value[1] == pytest.approx(50.0)
    harvest = {"r": np.array([0.5, 0.5]), "K": np.array([100.0, 100.0]), "E": np.array([0.7, 0.25])}
    levels = {eq.name: eq.value for eq in built_in("logistic-harvest").equilibria(harvest)}
    level = levels["harvested level K(1 - E/r)"]
    assert np.isnan(level[0]) and level[1] == pytest.approx(50.0)


# --------------------------------------------------------------------------- exact solutions

EXACT_FORMS = ["exponential", "logistic", "gompertz", "logistic-harvest"]


def test_which_laws_have_exact_solutions():
    for form in BUILT_IN:
        assert (built_in(form).exact is not None) == (form in EXACT_FORMS), form


@pytest.mark.parametrize("form", EXACT_FORMS)
def test_exact_solution_satisfies_the_law(form):
    # Logistic (Verhulst 1838), Gompertz (1825), exponential, and logistic with harvest
    # (logistic with r - E and K (1 - E/r); Schaefer 1954): N(0) = N0 and dN/dt = f(N).
    model = built_in(form)
    params = _law_params(form)
    n0 = np.array([0.1, 0.4, 1.7]) * _scale(params)
    times = np.array([0.0, 0.3, 1.0, 4.0, 11.0])[:, None]
    np.testing.assert_allclose(model.exact(0.0, n0, params), n0, rtol=1e-14)
    dt = 1e-4
    derivative = (model.exact(times + dt, n0, params) - model.exact(times - dt, n0, params)) / (
        2 * dt
    )
    rate = model.rate(times, model.exact(times, n0, params), params)
    np.testing.assert_allclose(derivative, rate, rtol=1e-6, atol=1e-9 * _scale(params).max())


def test_exact_logistic_formula():
    # Verhulst 1838: N(t) = K / (1 + (K/N0 - 1) exp(-r t)); at t = ln(K/N0 - 1)/r, N = K/2.
    model = built_in("logistic")
    p = {"r": np.array([0.2]), "K": np.array([500.0])}
    t_half = np.log(500.0 / 20.0 - 1) / 0.2
    assert model.exact(t_half, np.array([20.0]), p)[0] == pytest.approx(250.0, rel=1e-14)


def test_special_cases_reduce_to_the_logistic():
    logistic = built_in("logistic")
    p = {"r": np.array([0.4, 1.2]), "K": np.array([80.0, 30.0])}
    n = np.array([[3.0, 7.0], [60.0, 45.0]])
    # theta-logistic with theta = 1 is the logistic (Gilpin & Ayala 1973)
    theta = built_in("theta-logistic")
    q = {**p, "theta": np.ones(2)}
    np.testing.assert_allclose(theta.rate(0.0, n, q), logistic.rate(0.0, n, p), rtol=1e-14)
    np.testing.assert_allclose(theta.d_dn(0.0, n, q), logistic.d_dn(0.0, n, p), rtol=1e-14)
    # harvest E = 0 and removal H = 0 leave the logistic (Schaefer 1954)
    for form, extra in (("logistic-harvest", "E"), ("logistic-removal", "H")):
        law = built_in(form)
        q = {**p, extra: np.zeros(2)}
        np.testing.assert_allclose(law.rate(0.0, n, q), logistic.rate(0.0, n, p), rtol=1e-14)
        np.testing.assert_allclose(law.d_dn(0.0, n, q), logistic.d_dn(0.0, n, p), rtol=1e-14)


# ---------------------------------------------------------------------- stable equilibria


def _stable(form: str, params: dict) -> dict[str, np.ndarray]:
    return {
        eq.name: np.asarray(eq.value, float) for eq in stable_equilibria(built_in(form), params)
    }


def test_stable_equilibrium_of_logistic_is_k():
    # dN/dt = r N (1 - N/K): f'(0) = r > 0, f'(K) = -r < 0 (Verhulst 1838; any ODE text).
    p = PARAMS["logistic"]
    stable = _stable("logistic", p)
    assert list(stable) == ["K"]
    np.testing.assert_array_equal(stable["K"], p["K"])


def test_stable_equilibrium_of_gompertz_and_theta_logistic_is_k():
    for form in ("gompertz", "theta-logistic"):
        stable = _stable(form, PARAMS[form])
        assert list(stable) == ["K"], form
        np.testing.assert_array_equal(stable["K"], PARAMS[form]["K"])


def test_stable_equilibrium_of_logistic_removal_is_upper_root():
    p = PARAMS["logistic-removal"]
    stable = _stable("logistic-removal", p)
    assert list(stable) == ["upper (stable) level"]
    # f'(N) = r (1 - 2N/K) < 0 only above K/2: the upper root (Schaefer 1954)
    root = np.sqrt(1 - 4 * p["H"] / (p["r"] * p["K"]))
    np.testing.assert_allclose(stable["upper (stable) level"], p["K"] / 2 * (1 + root))


def test_stable_equilibria_of_allee_are_zero_and_k():
    # Strong Allee effect, 0 < A < K: 0 and K stable, A unstable (Courchamp, Berec &
    # Gascoigne 2008, Allee Effects in Ecology and Conservation; recalled).
    p = PARAMS["allee"]
    stable = _stable("allee", p)
    assert set(stable) == {"extinction", "K"}
    np.testing.assert_array_equal(stable["extinction"], np.zeros(3))
    np.testing.assert_array_equal(stable["K"], p["K"])


def test_stability_per_member_harvest_and_exponential():
    # Harvest: K(1 - E/r) stable while E < r, extinction stable once E > r (Schaefer 1954).
    harvest = {"r": np.array([0.5, 0.5]), "K": np.array([100.0, 100.0]), "E": np.array([0.1, 0.7])}
    stable = _stable("logistic-harvest", harvest)
    np.testing.assert_allclose(stable["harvested level K(1 - E/r)"], [80.0, np.nan])
    np.testing.assert_array_equal(stable["extinction"], [np.nan, 0.0])
    # Exponential: 0 is stable only for r < 0.
    stable = _stable("exponential", {"r": np.array([0.3, -0.2])})
    np.testing.assert_array_equal(stable["extinction"], [np.nan, 0.0])
    assert _stable("exponential", {"r": np.array([0.3, 0.1])}) == {}
