"""Tests of errbudget.estimates.convergence: Celik et al. (2008) worked example, exact solutions,
behaviour classification, safety factors, misuse, and the vectorised ensemble helpers."""

from __future__ import annotations

import itertools
import json
import math
import warnings

import numpy as np
import pytest

from errbudget.estimates.convergence import GridConvergence, grid_convergence
from errbudget.estimates.richardson import behaviour_of, observed_order, richardson

# Celik et al. (2008), "Procedure for estimation and reporting of uncertainty due to
# discretization in CFD applications", J. Fluids Eng. 130(7):078001, Table 1, column 1.
CELIK_CELLS = np.array([18000.0, 8000.0, 4500.0])
CELIK_STEPS = CELIK_CELLS ** (-0.5)  # two-dimensional grids: h = N^(-1/2)
CELIK_VALUES = [6.063, 5.972, 5.863]


def _no_nan_json(result: GridConvergence) -> dict:
    """to_dict() must survive strict JSON (no NaN, no infinity)."""
    data = result.to_dict()
    json.dumps(data, allow_nan=False)
    return data


# ----------------------------------------------------------------------- Celik et al. 2008


@pytest.mark.parametrize("perm", list(itertools.permutations(range(3))))
def test_celik_table1_first_column(perm):
    values = [CELIK_VALUES[i] for i in perm]
    steps = [CELIK_STEPS[i] for i in perm]
    g = grid_convergence(values, steps)
    # Celik et al. 2008, Table 1, column 1: r21 = 1.5, r32 = 1.333
    assert round(g.ratios[0], 3) == 1.5
    assert round(g.ratios[1], 3) == 1.333
    assert g.values == tuple(CELIK_VALUES)  # sorted finest first whatever the input order
    # Celik et al. 2008, Table 1, column 1: p = 1.53, phi_ext21 = 6.1685
    assert round(g.observed_order, 2) == 1.53
    assert round(g.extrapolated, 4) == 6.1685
    # Celik et al. 2008, Table 1, column 1: e_a21 = 1.5 %, e_ext21 = 1.7 %, GCI_fine21 = 2.2 %
    assert round(100 * g.approx_rel_error, 1) == 1.5
    assert round(100 * g.extrapolated_rel_error, 1) == 1.7
    assert round(100 * g.gci_fine, 1) == 2.2
    assert g.behaviour == "monotone"
    assert g.order_trusted
    assert g.safety_factor == 1.25  # Roache 1998: three levels, trusted observed order


def test_celik_absolute_errors_match_relative_ones():
    g = grid_convergence(CELIK_VALUES, CELIK_STEPS)
    assert g.gci_fine_abs == pytest.approx(g.gci_fine * abs(g.values[0]), rel=1e-12)
    assert g.error_fine == pytest.approx(abs(g.extrapolated - g.values[0]), rel=1e-12)


def test_asymptotic_ratio_with_observed_order_is_phi1_over_phi2():
    # Derived in the grid_convergence docstring: Celik's p fits all three levels, so for a
    # monotone triplet Roache's GCI_32 / (r21^p GCI_21) reduces to |phi1/phi2|.
    g = grid_convergence(CELIK_VALUES, CELIK_STEPS)
    assert g.asymptotic_ratio == pytest.approx(6.063 / 5.972, rel=1e-10)
    assert g.in_asymptotic_range


# ---------------------------------------------------------------------- exact solutions


@pytest.mark.parametrize("steps", [(0.1, 0.2, 0.4), (0.1, 0.15, 0.4), (0.4, 0.1, 0.15)])
def test_exact_quadratic_error_gives_order_two_and_exact_extrapolation(steps):
    # phi(h) = 1 + 0.3 h^2 is exactly Richardson's error model (Richardson 1911): the
    # order is 2 and the extrapolation recovers phi(0) = 1 for any ratios.
    values = [1.0 + 0.3 * h**2 for h in steps]
    g = grid_convergence(values, steps)
    assert g.observed_order == pytest.approx(2.0, abs=1e-10)
    assert g.extrapolated == pytest.approx(1.0, abs=1e-12)
    assert g.behaviour == "monotone"
    assert g.order_trusted
    true_error = abs(g.values[0] - 1.0)
    assert g.error_fine == pytest.approx(true_error, rel=1e-9)
    # GCI = Fs |phi_ext - phi1| when the error model is exact (Roache 1994, J. Fluids Eng.
    # 116:405, the GCI as Fs times the Richardson error estimate)
    assert g.gci_fine_abs == pytest.approx(1.25 * true_error, rel=1e-9)


def test_unequal_ratios_that_shrink_differences_slowly_are_still_monotone():
    # phi = 1 + h on steps 0.01, 0.1, 0.11: eps21/eps32 = 9 > 1, yet the data converge with
    # order 1. Own derivation (see convergence._classify): Celik's order equation has a
    # positive root iff eps21/eps32 < ln r21 / ln r32 (= 24.2 here).
    steps = (0.01, 0.1, 0.11)
    g = grid_convergence([1.0 + h for h in steps], steps)
    assert g.behaviour == "monotone"
    assert g.observed_order == pytest.approx(1.0, abs=1e-10)
    assert g.extrapolated == pytest.approx(1.0, abs=1e-12)


def test_longer_ladder_reports_every_triplet():
    steps = [0.1, 0.2, 0.4, 0.8]
    g = grid_convergence([2.0 - 0.5 * h**2 + 0.4 * h**3 for h in steps], steps)
    assert len(g.orders_by_triplet) == 2
    assert g.observed_order == g.orders_by_triplet[0]
    # the cubic term matters more on the coarse triplet, so the order drifts from 2
    assert abs(g.orders_by_triplet[0] - 2.0) < abs(g.orders_by_triplet[1] - 2.0)
    pure = grid_convergence([2.0 - 0.5 * h**2 for h in steps], steps)
    assert pure.orders_by_triplet == pytest.approx((2.0, 2.0), abs=1e-9)


def test_explicit_euler_logistic_order_one_and_gci_bounds_true_error():
    r, k, n0, horizon = 0.5, 100.0, 5.0, 10.0  # [1/day], [animals], [animals], [day]

    def euler(step):
        n = n0
        for _ in range(round(horizon / step)):
            n += step * r * n * (1.0 - n / k)
        return n

    steps = [0.1, 0.05, 0.025]
    g = grid_convergence([euler(h) for h in steps], steps, formal_order=1)
    exact = k / (1.0 + (k / n0 - 1.0) * math.exp(-r * horizon))  # Verhulst 1838
    # explicit Euler is first order (Hairer, Norsett & Wanner 1993, Solving ODEs I)
    assert abs(g.observed_order - 1.0) < 0.15
    assert g.gci_fine_abs > abs(exact - g.values[0])
    assert abs(g.extrapolated - exact) < abs(g.values[0] - exact)
    assert g.order_trusted and g.in_asymptotic_range


# ---------------------------------------------------------------------------- behaviour


def test_oscillatory_convergence():
    # phi = 1 + (-1)^k 0.3 h^2 on h = 0.1, 0.2, 0.4: alternating differences, R = -1/4
    steps = [0.1, 0.2, 0.4]
    values = [1.0 + 0.3 * h**2 * (-1) ** i for i, h in enumerate(steps)]
    g = grid_convergence(values, steps)
    data = _no_nan_json(g)
    assert g.behaviour == "oscillatory"
    # constant ratio: q = 0 in Celik et al. (2008) eq. 3, p = ln|eps32/eps21| / ln r = 2
    assert g.observed_order == pytest.approx(2.0, abs=1e-10)
    assert not g.order_trusted
    assert g.safety_factor == 3.0  # Roache 1998: observed order not trusted
    assert all(math.isfinite(data[key]) for key in ("extrapolated", "gci_fine", "gci_fine_abs"))
    assert "oscillatory" in g.note


def test_oscillatory_unequal_ratios_use_celik_sign_term():
    # phi_k = 1 + (-1)^k 0.3 h_k^2 gives |eps32/eps21| = r21^p (r32^p + 1)/(r21^p + 1): exactly
    # Celik et al. (2008) eq. 3 with s = -1, so the sign term must recover p = 2.
    steps = [0.1, 0.15, 0.4]
    values = [1.0 + 0.3 * h**2 * (-1) ** i for i, h in enumerate(steps)]
    g = grid_convergence(values, steps)
    assert g.behaviour == "oscillatory"
    assert g.observed_order == pytest.approx(2.0, abs=1e-10)


@pytest.mark.parametrize(
    "values",
    [
        [1.0 + 0.3 / h for h in (0.1, 0.2, 0.4)],  # differences double as the step halves
        [1.0, 1.2, 1.1],  # oscillation growing as the step shrinks (Stern et al. 2001)
        [1.0, 1.1, 1.1],  # the coarse pair agrees, the fine one does not
    ],
)
def test_divergent_ladder_gives_no_extrapolation(values):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g = grid_convergence(values, [0.1, 0.2, 0.4])
    data = _no_nan_json(g)
    assert g.behaviour == "divergent"
    assert g.extrapolated is None and g.gci_fine is None and g.gci_fine_abs is None
    assert g.observed_order is None
    assert data["approx_rel_error"] == pytest.approx(abs(values[1] - values[0]) / values[0])
    assert "divergent" in g.note


@pytest.mark.parametrize("level", [0.0, 3.7, -1e-300, 1e300])
def test_equal_values_are_exact_without_warnings(level):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g = grid_convergence([level] * 4, [0.1, 0.2, 0.4, 0.8], formal_order=2)
        data = _no_nan_json(g)
    assert g.behaviour == "exact"
    assert g.observed_order is None
    assert g.extrapolated == level
    assert (g.error_fine, g.gci_fine_abs) == (0.0, 0.0)
    if level != 0.0:
        assert (g.approx_rel_error, g.gci_fine) == (0.0, 0.0)
    assert data["orders_by_triplet"] == [None, None]


def test_roundoff_sized_differences_count_as_exact():
    # 64 eps max|phi| (common practice, no source): 1 ulp apart is no discretisation error
    g = grid_convergence([1.0, 1.0 + 2.0**-52, 1.0], [0.1, 0.2, 0.4])
    assert g.behaviour == "exact"


def test_finest_pair_equal_is_converged_not_nan():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g = grid_convergence([2.0, 2.0, 2.5], [0.1, 0.2, 0.4], formal_order=1)
    _no_nan_json(g)
    assert g.behaviour == "monotone"
    assert g.observed_order is None
    assert g.extrapolated == 2.0 and g.gci_fine == 0.0 and g.error_fine == 0.0
    assert "two finest levels agree" in g.note


# ------------------------------------------------------------------------ safety factor


def test_safety_factor_falls_back_to_formal_order_and_three():
    g = grid_convergence(CELIK_VALUES, CELIK_STEPS, formal_order=2)
    assert not g.order_trusted  # 1.53 is not within 10 % of 2
    assert g.safety_factor == 3.0  # Roache 1998: formal order assumed, Fs = 3
    assert g.observed_order == pytest.approx(1.534, abs=1e-3)  # still reported
    e_a = abs((6.063 - 5.972) / 6.063)
    assert g.gci_fine == pytest.approx(3.0 * e_a / (1.5**2 - 1.0), rel=1e-9)
    assert "formal order 2" in g.note
    assert abs(g.asymptotic_ratio - 1.0) > 0.1  # the formal order does not fit these data


def test_safety_factor_trusted_when_near_formal_order():
    g = grid_convergence(CELIK_VALUES, CELIK_STEPS, formal_order=1.5)
    assert g.order_trusted and g.safety_factor == 1.25
    assert "observed order" in g.note


def test_explicit_safety_factor_overrides():
    base = grid_convergence(CELIK_VALUES, CELIK_STEPS)
    g = grid_convergence(CELIK_VALUES, CELIK_STEPS, safety_factor=2.0, formal_order=2)
    assert g.safety_factor == 2.0
    e_a = abs((6.063 - 5.972) / 6.063)
    assert g.gci_fine == pytest.approx(2.0 * e_a / (1.5**2 - 1.0), rel=1e-9)  # formal order
    h = grid_convergence(CELIK_VALUES, CELIK_STEPS, safety_factor=3.0)
    assert h.gci_fine == pytest.approx(base.gci_fine * 3.0 / 1.25, rel=1e-12)


# -------------------------------------------------------------------------------- misuse


@pytest.mark.parametrize(
    ("values", "steps", "message"),
    [
        ([1.0, 2.0], [0.1, 0.2], "at least 3 steps"),
        ([1.0, 2.0, 3.0], [0.1, 0.2], "pair up"),
        ([1.0, 2.0, 3.0], [0.1, 0.2, 0.1], "differ"),
        ([1.0, 2.0, 3.0], [0.1, -0.2, 0.4], "positive"),
        ([1.0, 2.0, 3.0], [0.0, 0.2, 0.4], "positive"),
        ([1.0, 2.0, 3.0], [0.1, 0.2, math.inf], "finite"),
        ([1.0, math.nan, 3.0], [0.1, 0.2, 0.4], "values must be finite"),
        ([[1.0, 2.0, 3.0]], [[0.1, 0.2, 0.4]], "one-dimensional"),
    ],
)
def test_misuse_raises_value_error(values, steps, message):
    with pytest.raises(ValueError, match=message):
        grid_convergence(values, steps)


@pytest.mark.parametrize("option", [{"safety_factor": 0.0}, {"formal_order": -1.0}])
def test_bad_options_raise(option):
    with pytest.raises(ValueError, match="positive"):
        grid_convergence(CELIK_VALUES, CELIK_STEPS, **option)


# ---------------------------------------------------------------------- vectorised helpers


def _random_ladders(rng, size, ratio=2.0, fine_step=0.05):
    """Ensemble members phi = a + c h^p on steps h, r h, r^2 h (monotone by construction)."""
    a = rng.normal(10.0, 3.0, size)
    c = rng.normal(0.0, 5.0, size)
    p = rng.uniform(0.5, 4.0, size)
    fine, medium, coarse = (a + c * (fine_step * ratio**k) ** p for k in range(3))
    return coarse, medium, fine


def test_vectorised_helpers_agree_with_scalar_function():
    rng = np.random.default_rng(20080701)
    ratio = 2.0
    coarse, medium, fine = _random_ladders(rng, 200, ratio)
    order, valid = observed_order(coarse, medium, fine, ratio)
    extrapolated = richardson(fine, medium, ratio, order)
    behaviours = behaviour_of(coarse, medium, fine)
    assert valid.all()
    for i in range(coarse.size):
        g = grid_convergence([fine[i], medium[i], coarse[i]], [0.05, 0.1, 0.2])
        assert order[i] == pytest.approx(g.observed_order, rel=1e-9)
        assert extrapolated[i] == pytest.approx(g.extrapolated, rel=1e-12)
        assert behaviours[i] == g.behaviour == "monotone"


def test_behaviour_of_agrees_on_mixed_data_and_unequal_ratios():
    rng = np.random.default_rng(7)
    size = 400
    steps = np.array([0.03, 0.07, 0.1])
    coarse, medium, fine = (np.round(rng.normal(1.0, 0.05, size), 2) for _ in range(3))
    out = behaviour_of(coarse, medium, fine, ratios=(steps[1] / steps[0], steps[2] / steps[1]))
    expected = [
        grid_convergence([fine[i], medium[i], coarse[i]], steps).behaviour for i in range(size)
    ]
    assert out.tolist() == expected
    assert set(expected) == {"monotone", "oscillatory", "divergent", "exact"}


def test_vectorised_helpers_never_return_nan():
    coarse = np.array([1.0, 1.0, 1.2, 1.0, np.nan, 1.3])
    medium = np.array([1.0, 1.0, 1.1, 1.1, 1.0, 1.1])
    fine = np.array([1.0, 1.1, 1.1, 1.3, 1.0, 1.2])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        order, valid = observed_order(coarse, medium, fine, 2.0)
        kinds = behaviour_of(coarse, medium, fine)
    assert np.all(np.isfinite(order))
    # members: exact, coarse pair equal, fine pair equal, growing, non-finite, oscillatory
    assert valid.tolist() == [False, False, False, False, False, True]
    assert order[~valid].tolist() == [0.0] * 5
    assert order[5] == pytest.approx(1.0)  # |0.2| / |0.1| with r = 2
    assert kinds.tolist() == [
        "exact",
        "divergent",
        "monotone",
        "divergent",
        "divergent",
        "oscillatory",
    ]


def test_richardson_with_formal_order_fallback_and_array_order():
    fine, coarse = np.array([1.003, 2.0]), np.array([1.012, 2.0])
    order, valid = observed_order(np.array([1.048, 2.0]), coarse, fine, 2.0)
    assert valid.tolist() == [True, False]
    out = richardson(fine, coarse, 2.0, np.where(valid, order, 2.0))
    assert out == pytest.approx([1.0, 2.0], abs=1e-12)
    with pytest.raises(ValueError, match="order"):
        richardson(fine, coarse, 2.0, order)  # the 0.0 fill is not an order
    with pytest.raises(ValueError, match="ratio"):
        observed_order(fine, fine, fine, 1.0)
