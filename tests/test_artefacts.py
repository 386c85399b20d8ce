"""Tests of errbudget.estimates.artefacts: the regimes of explicit Euler on the logistic law
(May 1976) detected against an accurate solution, and the flags written for the budget."""

from __future__ import annotations

import json

import numpy as np
import pytest

from errbudget.estimates.artefacts import MESSAGES, detect, flags
from errbudget.laws.models import built_in, stable_equilibria
from errbudget.solve.tableaux import SCHEMES, integrate

LOGISTIC = built_in("logistic")
CAPACITY = 100.0  # K [population]
START = 10.0  # N0 [population], below K
STEP = 1.0  # [time]; r = (r h) / h
N_STEPS = 200  # long enough for the damped regime (|1 - r h| <= 0.8) to die out
FINE_DIVISIONS = 20  # RK4 substeps per coarse step for the accurate solution
CODES = ("divergence", "negative", "overshoot", "oscillation", "sustained")


def _fine(kind: str, n0: np.ndarray, params: dict, n_steps: int) -> np.ndarray:
    """Accurate solution at the coarse grid times: exact (Verhulst 1838) or RK4 at h/20."""
    if kind == "exact":
        return LOGISTIC.exact(np.arange(n_steps + 1)[:, None] * STEP, n0, params)
    states = integrate(
        LOGISTIC.rate, n0, params, STEP / FINE_DIVISIONS, n_steps * FINE_DIVISIONS, SCHEMES["rk4"]
    )
    return states[::FINE_DIVISIONS]


def _euler_masks(
    rh: list[float], n0: list[float] | None = None, n_steps: int = N_STEPS, fine: str = "exact"
) -> dict[str, np.ndarray]:
    rh = np.asarray(rh, float)
    n0 = np.full(rh.size, START) if n0 is None else np.asarray(n0, float)
    params = {"r": rh / STEP, "K": np.full(rh.size, CAPACITY)}
    coarse = integrate(LOGISTIC.rate, n0, params, STEP, n_steps, SCHEMES["euler"])
    levels = [eq.value for eq in stable_equilibria(LOGISTIC, params)]
    masks = detect(coarse, _fine(fine, n0, params, n_steps), levels, n_steps)
    assert set(masks) == set(CODES)
    for mask in masks.values():
        assert mask.dtype == bool and mask.shape == rh.shape
    return masks


@pytest.mark.parametrize("fine", ["exact", "rk4"])
def test_no_artefact_for_rh_at_most_one(fine):
    # May 1976: for r h <= 1 Euler rises monotonically to K, as the exact solution does.
    masks = _euler_masks([0.5, 0.9, 1.0], fine=fine)
    for code in CODES:
        assert not masks[code].any(), code


@pytest.mark.parametrize("fine", ["exact", "rk4"])
def test_damped_oscillation_for_rh_between_one_and_two(fine):
    # May 1976: for 1 < r h < 2 Euler overshoots K and oscillates about it with damping
    # (multiplier 1 - r h at K), so in a long run the oscillation is not sustained.
    masks = _euler_masks([1.3, 1.8], fine=fine)
    assert masks["overshoot"].all()
    assert masks["oscillation"].all()
    assert not masks["sustained"].any()
    assert not masks["divergence"].any() and not masks["negative"].any()


@pytest.mark.parametrize("fine", ["exact", "rk4"])
def test_period_two_for_rh_above_two(fine):
    # May 1976: r h > 2 (mu = 1 + r h > 3) replaces K by a period-2 cycle; below r h = 3
    # (mu = 4) the map keeps [0, 1], so the Euler solution stays bounded.
    masks = _euler_masks([2.3, 2.5], fine=fine)
    assert masks["oscillation"].all()
    assert masks["sustained"].all()
    assert masks["overshoot"].all()
    assert not masks["divergence"].any() and not masks["negative"].any()


def test_rh_beyond_three_leaves_the_bounds_and_is_absorbed_at_zero():
    # May 1976: for mu > 4 (r h > 3) the map leaves [0, 1]; a step below zero would then run
    # away to minus infinity, but zero is absorbing: the population is cleared and stays at
    # zero, which the accurate solution never does. From N0 = 2K with r h = 5 the first step
    # already lands at -8K.
    masks = _euler_masks([3.2, 5.0], n0=[START, 2 * CAPACITY], n_steps=60)
    assert masks["negative"].all()
    assert not masks["divergence"].any()
    found = flags(masks, "at the case's step")
    assert "negative" in [f["code"] for f in found]
    json.dumps(found, allow_nan=False)  # no NaN or infinity reaches the budget
    negative = next(f for f in found if f["code"] == "negative")
    assert negative["count"] == 2 and negative["share"] == 1.0


def test_a_step_below_zero_is_absorbed_and_flagged():
    # From N0 = 2K with r h = 1.2 Euler would jump to -0.4 K; it stops at zero and stays
    # there, so no runaway follows however long the run. The exact solution decreases to K
    # and stays positive (Verhulst 1838).
    for n_steps in (4, 60):
        masks = _euler_masks([1.2, 0.5], n0=[2 * CAPACITY, 2 * CAPACITY], n_steps=n_steps)
        np.testing.assert_array_equal(masks["negative"], [True, False])
        np.testing.assert_array_equal(masks["divergence"], [False, False])
        np.testing.assert_array_equal(masks["overshoot"], [True, False])


def test_feature_shared_by_the_accurate_solution_is_not_an_artefact():
    # Both solutions go below zero and both cross the level 5: no negative, no overshoot.
    coarse = np.array([[10.0], [4.0], [-1.0], [-2.0]])
    fine = np.array([[10.0], [4.5], [-0.5], [-1.5]])
    masks = detect(coarse, fine, [np.array([5.0])], 3)
    assert not masks["negative"][0] and not masks["overshoot"][0]
    # Equal numbers of turns in both: no oscillation artefact.
    coarse = np.array([[1.0], [3.0], [2.0], [4.0]])
    fine = np.array([[1.0], [2.9], [2.1], [3.9]])
    assert not detect(coarse, fine, [], 3)["oscillation"][0]


def test_only_the_grid_up_to_the_horizon_counts():
    coarse = np.array([[10.0], [20.0], [30.0], [np.inf]])
    fine = np.array([[10.0], [20.0], [30.0], [40.0]])
    assert not detect(coarse, fine, [], 2)["divergence"][0]
    assert detect(coarse, fine, [], 3)["divergence"][0]


def test_nothing_flagged_where_the_accurate_solution_fails():
    coarse = np.array([[10.0], [np.inf], [np.nan]])
    fine = np.array([[10.0], [np.inf], [np.nan]])
    masks = detect(coarse, fine, [np.array([5.0])], 2)
    for code in CODES:
        assert not masks[code][0], code


def test_nan_level_is_ignored():
    # A member without the equilibrium (NaN level) is never flagged for crossing it.
    coarse = np.array([[10.0, 10.0], [120.0, 120.0], [90.0, 90.0]])
    fine = np.array([[10.0, 10.0], [80.0, 80.0], [95.0, 95.0]])
    masks = detect(coarse, fine, [np.array([100.0, np.nan])], 2)
    np.testing.assert_array_equal(masks["overshoot"], [True, False])


def test_flags_text_and_shares():
    masks = _euler_masks([0.5, 1.3, 2.5, 0.9])
    found = flags(masks, "at the case's step of 1 day")
    json.dumps(found, allow_nan=False)
    by_code = {f["code"]: f for f in found}
    assert set(by_code) == {"overshoot", "oscillation"}
    oscillation = by_code["oscillation"]
    assert oscillation["count"] == 2 and oscillation["share"] == pytest.approx(0.5)
    assert oscillation["message"].startswith(MESSAGES["oscillation"])
    assert "2 of 4 parameter sets (50.0%) at the case's step of 1 day" in oscillation["message"]
    assert "period-2" in oscillation["message"]  # r h = 2.5 is sustained
    damped = flags(_euler_masks([1.3]), "here")
    assert "period-2" not in {f["code"]: f for f in damped}["oscillation"]["message"]
    assert flags(_euler_masks([0.5, 0.9]), "here") == []
