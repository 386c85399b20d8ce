"""Validation against counts: E = S - D against u_val (ASME V&V 20-2009 comparison approach)."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from errbudget.budget.run import run_case
from errbudget.case.counts import Counts
from errbudget.case.load import load_case
from errbudget.estimates.validation import compare_with_counts, observation_sd

UNITS = SimpleNamespace(population_unit="fish", time_unit="day")


def _counts(times, counts) -> Counts:
    return Counts(np.asarray(times, float), np.asarray(counts, float), "x.csv", "0" * 64, ())


def test_poisson_comparison_by_hand():
    # S, D, u_num, u_input invented; E and u_val worked out by hand from
    # E = S - D and u_val = sqrt(u_num^2 + u_input^2 + u_D^2), u_D = sqrt(S) for Poisson
    # counts (ASME V&V 20-2009, comparison error and validation uncertainty; recalled).
    out = compare_with_counts(
        UNITS,
        _counts([0.0, 10.0, 20.0], [110, 190, 380]),
        reference_at=[100.0, 200.0, 400.0],
        u_input_at=lambda t: np.full(t.shape, 5.0),
        u_num_at=[1.0, 2.0, 3.0],
        error_model="poisson",
        nuisance={},
    )
    assert out["E"] == pytest.approx([-10.0, 10.0, 20.0])
    assert out["u_D"] == pytest.approx([10.0, math.sqrt(200.0), 20.0])
    # by hand: sqrt(1 + 25 + 100), sqrt(4 + 25 + 200), sqrt(9 + 25 + 400)
    assert out["u_val"] == pytest.approx([11.2249722, 15.1327460, 20.8326667], rel=1e-7)
    assert out["exceed"] == [False, False, False]
    assert out["n_exceed"] == 0 and out["flag"] is None
    assert out["unit"] == "fish" and out["time_unit"] == "day"
    assert "V&V 20 comparison approach" in out["statement"]


def test_one_miss_in_three_is_more_than_a_quarter():
    # |E| = 50 > 2 * sqrt(1 + 25 + 400) = 41.3 at the last time only: 1 of 3 > 1/4
    # (k = 2 coverage and the quarter rule: common practice, no source).
    out = compare_with_counts(
        UNITS,
        _counts([0.0, 10.0, 20.0], [110, 190, 350]),
        [100.0, 200.0, 400.0],
        [5.0, 5.0, 5.0],
        [1.0, 1.0, 1.0],
        "poisson",
        {},
    )
    assert out["exceed"] == [False, False, True]
    assert out["flag"]["code"] == "model-form"


def test_observation_sd_of_each_model():
    mu = np.array([100.0, 400.0])
    # Poisson var = mu; NB2 var = mu + mu^2 / k (Hilbe 2011, Negative Binomial Regression).
    assert observation_sd("poisson", mu, {}) == pytest.approx([10.0, 20.0])
    assert observation_sd("negative-binomial", mu, {"dispersion": 100.0}) == pytest.approx(
        [math.sqrt(200.0), math.sqrt(2000.0)]
    )
    assert observation_sd("normal", mu, {"sigma": {"value": 7.0}}) == pytest.approx([7.0, 7.0])
    # lognormal, median mu: sd = mu exp(s^2/2) sqrt(exp(s^2) - 1) (Johnson, Kotz &
    # Balakrishnan 1994, Continuous Univariate Distributions 1, ch. 14; recalled)
    s = 0.1
    expected = mu * math.exp(s * s / 2) * math.sqrt(math.expm1(s * s))
    assert observation_sd("lognormal", mu, {"sigma": s}) == pytest.approx(expected)


CASE = """
title = "synthetic validation case"
[model]
form = "logistic"
unit = "plant"
[parameters]
r  = {{ value = "0.03 / day", sd = "0.01 / day" }}
K  = {{ value = "100000 plant", sd = "20000 plant" }}
N0 = {{ value = "5000 plant", sd = "1000 plant" }}
[simulation]
scheme = "heun"
step = "5 day"
horizon = "250 day"
[[quantity]]
name = "plants at day 250"
kind = "value"
at = "250 day"
[budget]
fraction = 0.1
samples = 64
seed = 3
[counts]
file = "counts.csv"
time = "day"
time_unit = "day"
count = "count"
error = "poisson"
fit = ["r", "K", "N0"]
"""
TIMES = np.arange(0.0, 225.0, 15.0)
K_TRUE, N0_TRUE, R_TRUE = 1.0e5, 5.0e3, 0.03  # invented


def _run(tmp_path, curve) -> dict:
    # Large Poisson counts: a relative sd near 0.3 %, so a wrong law cannot hide in the noise.
    # (A normal or negative binomial model would fit its own spread and absorb the misfit.)
    rng = np.random.default_rng(20260101)
    counts = rng.poisson(curve(TIMES))
    rows = "\n".join(f"{t:g},{c}" for t, c in zip(TIMES, counts, strict=True))
    (tmp_path / "counts.csv").write_text("day,count\n" + rows + "\n")
    (tmp_path / "case.toml").write_text(CASE.format())
    return run_case(load_case(tmp_path / "case.toml"), samples=64).to_dict()


def test_wrong_law_is_flagged(tmp_path):
    # Gompertz solution N = K exp(ln(N0/K) exp(-r t)) (CHECKS.md, exact solutions) fitted
    # with the logistic law.
    data = _run(tmp_path, lambda t: K_TRUE * np.exp(np.log(N0_TRUE / K_TRUE) * np.exp(-R_TRUE * t)))
    validation = data["validation"]
    assert validation["n_exceed"] >= 3
    assert validation["flag"]["code"] == "model-form"
    assert validation["flag"] in data["flags"]
    e, u = np.array(validation["E"]), np.array(validation["u_val"])
    assert validation["exceed"] == list(np.abs(e) > 2 * u)


def test_right_law_is_not_flagged(tmp_path):
    # Logistic solution N = K / (1 + (K/N0 - 1) exp(-r t)) (Verhulst 1838; CHECKS.md).
    data = _run(tmp_path, lambda t: K_TRUE / (1 + (K_TRUE / N0_TRUE - 1) * np.exp(-R_TRUE * t)))
    validation = data["validation"]
    assert validation["flag"] is None
    assert all(f["code"] != "model-form" for f in data["flags"])
    assert len(validation["E"]) == len(TIMES)
    assert all(u > 0 for u in validation["u_input"]) and all(u >= 0 for u in validation["u_num"])
    d = np.array(validation["D"])
    assert np.array(validation["E"]) == pytest.approx(np.array(validation["S"]) - d)
