"""Equilibria of custom laws found numerically: the same as the built-in laws' closed forms.

References named beside the assertions: the built-in laws' closed-form equilibria
(errbudget.laws.models, checked in tests/test_models.py), the Euler limit 2 / (r - E) of
logistic harvest (May 1976, Nature 261:459; CHECKS.md), the classical RK4 limit on the
negative real axis (root of R(z) = 1, Hairer & Wanner 1996, computed with numpy.roots) and
the roots of a cubic by numpy.roots.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from errbudget.budget.run import run_case
from errbudget.case.load import load_case
from errbudget.estimates.stability import step_limits
from errbudget.laws.equilibria import numeric_equilibria, roots
from errbudget.laws.models import RATE_TEXT, stable_equilibria
from errbudget.solve.tableaux import SCHEMES

CASE = """
title = "equilibria check (invented)"
[model]
form = "{form}"
unit = "fish"
{rate}
[parameters]
{parameters}
N0 = {{ value = "150 fish", sd = "20 fish" }}
[simulation]
scheme = "euler"
step = "5 day"
horizon = "200 day"
[[quantity]]
name = "fish at day 200"
kind = "value"
at = "200 day"
"""
PARAMETERS = {
    "exponential": 'r = { value = "0.06 / day", sd = "0.01 / day" }',
    "gompertz": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }',
    "logistic": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }',
    "logistic-harvest": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }\n'
    'E = { value = "0.05 / day", low = "0.02 / day", high = "0.09 / day" }',
    "allee": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }\n'
    'A = { value = "300 fish", low = "100 fish", high = "600 fish" }',
    "logistic-removal": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }\n'
    'H = { value = "25 fish / day", low = "10 fish / day", high = "40 fish / day" }',
    "theta-logistic": 'r = { value = "0.06 / day", sd = "0.01 / day" }\n'
    'K = { value = "2000 fish", sd = "150 fish" }\n'
    'theta = { value = "1.5", low = "0.5", high = "3" }',
}


def _pair(tmp_path, form):
    """The built-in law and the same law written as a custom rate, loaded from case files."""
    built = tmp_path / f"{form}-built-in.toml"
    built.write_text(CASE.format(form=form, rate="", parameters=PARAMETERS[form]))
    custom = tmp_path / f"{form}-custom.toml"
    custom.write_text(
        CASE.format(form="custom", rate=f'rate = "{RATE_TEXT[form]}"', parameters=PARAMETERS[form])
    )
    return load_case(built), load_case(custom)


def _members(case, size=400, seed=7):
    rng = np.random.default_rng(seed)
    law = {}
    for name, p in case.parameters.items():
        if name != "N0":
            law[name] = p.dist.ppf(rng.uniform(0.001, 0.999, size))
    return law


def _table(equilibria, size):
    """Equilibria as rows of a (n, size) table."""
    return np.array([np.broadcast_to(np.asarray(e.value, float), (size,)) for e in equilibria])


def _stable_sets(model, law):
    """Per member, the sorted stable equilibria."""
    size = next(iter(law.values())).size
    return np.sort(_table(stable_equilibria(model, law), size), axis=0)


@pytest.mark.parametrize("form", list(PARAMETERS))
def test_custom_law_has_the_built_in_equilibria_and_step_limits(tmp_path, form):
    built, custom = _pair(tmp_path, form)
    law = _members(built)
    # All equilibria inside the search range: reference = the built-in closed forms.
    size = law["r"].size
    reference = _table(built.model.equilibria(law), size)
    found = _table(custom.model.equilibria(law), size)
    for s in range(size):
        expected = np.sort(reference[:, s][np.isfinite(reference[:, s]) & (reference[:, s] >= 0)])
        actual = np.sort(found[:, s][np.isfinite(found[:, s])])
        np.testing.assert_allclose(actual, expected, rtol=1e-9, atol=1e-9)
    # Stable ones and the step limits of every scheme: the same to 1e-9 relative.
    np.testing.assert_allclose(
        _stable_sets(custom.model, law), _stable_sets(built.model, law), rtol=1e-9, atol=1e-9
    )
    for scheme in SCHEMES.values():
        expected = step_limits(built.model, scheme, law)
        actual = step_limits(custom.model, scheme, law)
        for key in ("stable", "monotone"):
            np.testing.assert_allclose(actual[key], expected[key], rtol=1e-9)


def test_euler_and_rk4_limits_of_a_custom_harvest_law(tmp_path):
    _, custom = _pair(tmp_path, "logistic-harvest")
    r, k, e = np.array([0.06, 0.08]), np.array([2000.0, 1500.0]), np.array([0.02, 0.05])
    law = {"r": r, "K": k, "E": e}
    # Explicit Euler at the harvested level K (1 - E/r): stable for h < 2 / (r - E), monotone
    # for h <= 1 / (r - E) (May 1976; CHECKS.md).
    euler = step_limits(custom.model, SCHEMES["euler"], law)
    np.testing.assert_allclose(euler["stable"], 2.0 / (r - e), rtol=1e-9)
    np.testing.assert_allclose(euler["monotone"], 1.0 / (r - e), rtol=1e-9)
    assert pytest.approx(50.0) == 2.0 / (0.06 - 0.02)
    # Classical RK4: R(z) = 1 at the negative real root of 1 + z/2 + z^2/6 + z^3/24 = 0
    # (Hairer & Wanner 1996), about -2.7853.
    z = np.roots([1 / 24, 1 / 6, 1 / 2, 1])
    edge = -float(z[np.abs(z.imag) < 1e-12].real[0])
    assert edge == pytest.approx(2.7853, abs=1e-4)
    rk4 = step_limits(custom.model, SCHEMES["rk4"], law)
    np.testing.assert_allclose(rk4["stable"], edge / (r - e), rtol=1e-8)


def test_roots_of_a_cubic_rate_match_numpy_roots():
    # f(N) = c (N - a)(N - b)(N - d) with roots spread over five decades, one near zero.
    a = np.array([0.05, 2.0, 30.0])
    b = np.array([40.0, 400.0, 700.0])
    d = np.array([900.0, 950.0, 990.0])

    def rate(t, n, p):
        return -1e-6 * (n - p["a"]) * (n - p["b"]) * (n - p["d"])

    found = roots(rate, {"a": a, "b": b, "d": d}, np.full(3, 4000.0))
    assert len(found) == 3
    for s in range(3):
        expected = np.sort(np.roots(np.poly([a[s], b[s], d[s]])).real)  # numpy.roots reference
        np.testing.assert_allclose([f[s] for f in found], expected, rtol=1e-12)


def test_members_with_different_numbers_of_roots():
    # Removal above r K / 4 has no equilibrium; below it two (CHECKS.md).
    def rate(t, n, p):
        return p["r"] * n * (1 - n / p["K"]) - p["H"]

    law = {"r": np.array([0.1, 0.1]), "K": np.array([1000.0, 1000.0]), "H": np.array([10.0, 30.0])}
    found = numeric_equilibria(rate, law, np.full(2, 4000.0))
    values = np.array([e.value for e in found])
    disc = math.sqrt(1 - 4 * 10.0 / (0.1 * 1000.0))
    np.testing.assert_allclose(values[:, 0], [500 * (1 - disc), 500 * (1 + disc)], rtol=1e-12)
    assert np.isnan(values[:, 1]).all()
    assert [e.name for e in found] == ["equilibrium 1", "equilibrium 2"]


def test_a_law_that_depends_on_time_has_no_equilibria(tmp_path):
    path = tmp_path / "seasonal.toml"
    path.write_text(
        CASE.format(
            form="custom",
            rate='rate = "r*N*(1 - N/K) - E*N*t/T"',
            parameters='r = "0.06 / day"\nK = "2000 fish"\nE = "0.01 / day"\nT = "100 day"',
        )
    )
    case = load_case(path)
    assert case.model.equilibria({"r": np.array([0.06])}) == []


def test_overshoot_and_limits_of_a_custom_logistic_match_the_built_in(tmp_path):
    # The golden overshoot case (Euler at r h = 1.5) with the logistic written as a custom
    # rate: the same stability block and the same artefact flags as the built-in law.
    golden = Path(__file__).parent / "golden" / "cases" / "overshoot-euler.toml"
    custom_path = tmp_path / "overshoot-custom.toml"
    custom_path.write_text(
        golden.read_text().replace('form = "logistic"', 'form = "custom"\nrate = "r*N*(1 - N/K)"')
    )
    built = run_case(load_case(golden), samples=16).to_dict()
    custom = run_case(load_case(custom_path), samples=16).to_dict()
    assert [f["code"] for f in custom["flags"]] == [f["code"] for f in built["flags"]]
    assert "overshoot" in [f["code"] for f in custom["flags"]]
    assert custom["stability"]["equilibrium"] == "equilibrium 1"
    for key in ("stable_step", "stable_step_nominal", "monotone_step"):
        assert custom["stability"][key]["value"] == pytest.approx(
            built["stability"][key]["value"], rel=1e-9
        )


def test_close_roots_are_separated():
    # Removal just below r K / 4: the equilibria K/2 (1 -+ sqrt(1 - 4H/(rK))) (CHECKS.md) lie
    # 1e-1 to 1e-5 of K apart, far closer than the first scan's spacing of N_max / 96.
    gap = np.array([1e-2, 1e-6, 1e-10])  # 1 - 4H/(rK)
    r, k = np.full(3, 0.1), np.full(3, 1000.0)
    h = (1 - gap) * r * k / 4

    def rate(t, n, p):
        return p["r"] * n * (1 - n / p["K"]) - p["H"]

    found = roots(rate, {"r": r, "K": k, "H": h}, np.full(3, 4000.0))
    assert len(found) == 2
    root = np.sqrt(gap)
    np.testing.assert_allclose(found[0], k / 2 * (1 - root), rtol=1e-9)
    np.testing.assert_allclose(found[1], k / 2 * (1 + root), rtol=1e-9)
