"""What better data would buy without counts: each input's sd halved, by reweighting.

The reweighted spread is checked against a fresh design drawn from the halved distribution
(an independent computation of the same quantity), and the halved distributions against
their closed-form standard deviations.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import errbudget
from errbudget.budget.better_data import effective_draws, halved, weighted_spread, weights
from errbudget.budget.passes import Candidates, ensemble_for, reference_pass
from errbudget.case.distributions import Distribution
from errbudget.solve.ensemble import ensemble_params
from errbudget.uncertainty.design import sample_design

CRAYFISH = Path(__file__).resolve().parents[1] / "cases" / "crayfish-pond.toml"


@pytest.mark.parametrize(
    "dist",
    [
        Distribution("normal", 5.0, sd=1.0),
        Distribution("lognormal", 5.0, sd=2.0),
        Distribution("uniform", 5.0, low=2.0, high=8.0),
        Distribution("triangular", 4.0, low=1.0, high=10.0, mode=4.0),
        Distribution("truncated-normal", 5.0, sd=1.0, low=3.0, high=9.0),
    ],
    ids=lambda d: d.kind,
)
def test_halved_distributions_halve_the_sd(dist):
    ratio = halved(dist).spread() / dist.spread()
    if dist.kind == "truncated-normal":  # the bounds stay: close to, not exactly, a half
        assert 0.45 < ratio < 0.55
    else:
        assert ratio == pytest.approx(0.5, rel=1e-9)  # scipy.stats closed forms


def test_weights_reproduce_the_halved_distribution():
    dist = Distribution("normal", 10.0, sd=2.0)
    draws = dist.ppf((np.arange(20_000) + 0.5) / 20_000)
    w = weights(dist, draws)
    mean = np.sum(w * draws)
    sd = np.sqrt(np.sum(w * (draws - mean) ** 2))
    assert mean == pytest.approx(10.0, abs=1e-6)
    assert sd == pytest.approx(1.0, rel=2e-3)
    assert 0.5 * 20_000 < effective_draws(w) < 0.7 * 20_000  # 2 sqrt(2)/3 of the draws, about


def test_reweighted_spread_matches_a_design_drawn_with_the_halved_sd():
    case = errbudget.load_case(CRAYFISH)
    data = errbudget.run_case(case, samples=1024).to_dict()
    reweighted = data["better_data"]["inputs"]["r"]["parameter_sd"]
    independent = dict(case.uncertain())
    independent["r"] = halved(independent["r"])
    design = sample_design(independent, None, 1024, 99)
    ensemble = ensemble_for(case, ensemble_params(case, design.values), design.independent_rows)
    steps = data["run"]["reference_steps"]
    again = reference_pass(case, ensemble, 1, steps[0]["value"], steps[1]["value"])
    for q, spec in enumerate(case.quantities):
        direct = np.std(again.reference[q, design.independent_rows], ddof=1)
        assert reweighted[spec.name] == pytest.approx(direct, rel=0.05), spec.name
    assert "With the sd of r halved" in data["better_data"]["statement"]


def test_weighted_spread_without_members_is_empty():
    spread = weighted_spread(np.array([np.nan, 1.0]), np.array([1.0, 0.0]), 0.9)
    assert spread["sd"] is None


def test_the_weighted_percentile_equals_numpys_with_one_sort_shared():
    # Reference: numpy.percentile(values, q, weights=w, method="inverted_cdf") (numpy 2.x),
    # on values with ties and weights with zeros, including zero weights first in order.
    rng = np.random.default_rng(5)
    values = np.round(rng.lognormal(size=5000), 2)
    view = object.__new__(Candidates)
    view.orders = {}
    for trial in range(6):
        w = rng.random(values.size)
        w[rng.random(values.size) < 0.3] = 0.0
        if trial == 0:
            w[np.argsort(values)[:50]] = 0.0
        view.weights = w
        for q in (0, 5, 50, 90, 95, 100):
            expected = np.percentile(values, q, weights=w, method="inverted_cdf")
            assert view.percentile(values, q) == expected
    assert len(view.orders) == 1  # the values were sorted once for all the weights
