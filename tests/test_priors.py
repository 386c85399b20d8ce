"""Priors in the fit: posterior mode, Laplace approximation, importance sampling, bounded supports.

References named beside the assertions: the gamma-Poisson conjugate posterior (Gelman et al.
2013, Bayesian Data Analysis, 3rd ed., sec. 2.6), a brute-force quadrature of the posterior on
a grid (scipy.stats densities, no package code), and the exact logistic solution (Verhulst
1838; CHECKS.md).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from errbudget.budget.run import run_case
from errbudget.case.distributions import Distribution
from errbudget.case.load import load_case
from errbudget.uncertainty.calibrate import fit_flags, fit_from_counts, joint_from_fit
from errbudget.uncertainty.design import sample_design
from errbudget.uncertainty.fitting import fit_counts

# Early growth of a logistic population (invented): K = 1350 kg, counted only while the
# stock rises from N0 to K/4, the first quarter of the growth.
K_TRUE, R_TRUE, N0_TRUE = 1350.0, 0.08, 60.0  # [kg], [1/day], [kg]
T_QUARTER = math.log((K_TRUE / N0_TRUE - 1.0) / 3.0) / R_TRUE  # N(T) = K/4 [day]
EARLY_TIMES = np.linspace(0.0, T_QUARTER, 12)
K_LOW, K_HIGH = 1100.0, 1600.0  # the uniform prior's range [kg]
PRIORS = (
    Distribution("normal", 0.1, sd=0.03),
    Distribution("uniform", 1350.0, low=K_LOW, high=K_HIGH),
    Distribution("normal", 50.0, sd=15.0),
)
START = (0.1, 1350.0, 50.0)


def logistic(times):
    """Exact logistic N(t) = K / (1 + (K/N0 - 1) exp(-r t)) for theta rows (r, K, N0)."""
    t = np.asarray(times, dtype=float)[None, :]

    def simulate(theta):
        r, capacity, start = theta[:, 0:1], theta[:, 1:2], theta[:, 2:3]
        return capacity / (1.0 + (capacity / start - 1.0) * np.exp(-r * t))

    return simulate


def early_counts(seed: int = 5) -> np.ndarray:
    mu = logistic(EARLY_TIMES)(np.array([[R_TRUE, K_TRUE, N0_TRUE]]))[0]
    return np.random.default_rng(seed).poisson(mu).astype(float)


@pytest.fixture(scope="module")
def early_fit():
    counts = early_counts()
    result = fit_counts(
        logistic(EARLY_TIMES), ("r", "K", "N0"), START, EARLY_TIMES, counts, priors=PRIORS
    )
    return counts, result


def grid_posterior(counts):
    """Posterior moments and the K quantiles by quadrature on a 121^3 grid (scipy densities).

    Independent of the package: Poisson log-pmf of the counts under the exact logistic, plus
    the normal priors of r and N0; the uniform prior of K is the grid's range.
    """
    r = np.linspace(0.06, 0.11, 121)
    k = np.linspace(K_LOW, K_HIGH, 121)
    n0 = np.linspace(40.0, 80.0, 121)
    grids = np.meshgrid(r, k, n0, indexing="ij")
    theta = np.column_stack([g.ravel() for g in grids])
    mu = logistic(EARLY_TIMES)(theta)
    log_post = stats.poisson.logpmf(counts[None, :], mu).sum(axis=1)
    log_post += stats.norm.logpdf(theta[:, 0], 0.1, 0.03) + stats.norm.logpdf(theta[:, 2], 50, 15)
    w = np.exp(log_post - log_post.max())
    w /= w.sum()
    mean = w @ theta
    sd = np.sqrt(w @ (theta - mean) ** 2)
    order = np.argsort(theta[:, 1])
    cumulative = np.cumsum(w[order])
    k_low, k_high = (theta[order, 1][np.searchsorted(cumulative, q)] for q in (0.05, 0.95))
    return mean, sd, (k_low, k_high)


def test_uniform_prior_keeps_k_and_its_interval_inside_the_range(early_fit):
    counts, result = early_fit
    assert result.converged, result.message
    assert result.uncertainty_method in ("Laplace", "importance sampling")
    assert K_LOW < result.values[1] < K_HIGH
    low, high = result.interval[1]
    assert K_LOW < low < high < K_HIGH
    assert result.scales[1].kind == "logit"
    # Every member of the design drawn from the handed-on distribution lies in the range.
    flags: list[dict] = []
    joint = _joint(result, flags)
    design = sample_design({}, joint, 256, 3)
    assert design.values["K"].min() > K_LOW and design.values["K"].max() < K_HIGH
    # ... and so does the forecast: the logistic never exceeds K when N0 < K (Verhulst 1838).
    late = logistic([300.0])(np.column_stack([design.values[n] for n in ("r", "K", "N0")]))
    assert late.max() < K_HIGH


def _joint(result, flags):
    from types import SimpleNamespace

    fit = SimpleNamespace(result=result, units={"r": "1 / day", "K": "kg", "N0": "kg"})
    return joint_from_fit(fit, flags)


def test_posterior_moments_match_a_brute_force_quadrature(early_fit):
    counts, result = early_fit
    mean, sd, (k_low, k_high) = grid_posterior(counts)
    summary = result.posterior["parameters"]
    for j, name in enumerate(("r", "K", "N0")):
        # Reference: quadrature of likelihood x prior on a grid (scipy.stats densities). The
        # handed-on normal on the estimation scale is an approximation: its mean within 0.1
        # posterior sd, its sd within 10 % (common practice, no source).
        assert abs(summary[name]["posterior_mean"] - mean[j]) < 0.1 * sd[j], name
        assert summary[name]["posterior_sd"] == pytest.approx(sd[j], rel=0.10), name
    # The 90 % interval of K against the grid's 5 % and 95 % quantiles, within 5 % of the
    # prior's width (common practice, no source).
    width = K_HIGH - K_LOW
    assert result.interval[1][0] == pytest.approx(k_low, abs=0.05 * width)
    assert result.interval[1][1] == pytest.approx(k_high, abs=0.05 * width)


def test_counts_of_early_growth_barely_inform_k(early_fit):
    _, result = early_fit
    # The grid reference gives a posterior sd of K of about 144 kg, the uniform prior's
    # (500 / sqrt(12) = 144.3 kg): the counts leave K where the prior put it.
    assert result.weak == ("K",)
    entry = result.posterior["parameters"]["K"]
    assert entry["prior_sd"] == pytest.approx(500.0 / math.sqrt(12.0), rel=1e-6)
    from types import SimpleNamespace

    fit = SimpleNamespace(result=result, units={"r": "1 / day", "K": "kg", "N0": "kg"})
    flags = fit_flags(fit)
    assert [f["code"] for f in flags] == ["weakly-informed"]
    assert flags[0]["message"].startswith("the counts barely inform K (posterior sd ")
    assert "kg" in flags[0]["message"]


def test_laplace_matches_the_gamma_poisson_conjugate_posterior():
    # Poisson counts with a constant rate lambda and a Gamma(a, b) prior: the posterior is
    # Gamma(a + sum y, b + n) (Gelman et al. 2013, Bayesian Data Analysis, sec. 2.6). On the
    # ln scale z = ln lambda its density is proportional to exp(alpha z - beta e^z), with mode
    # ln(alpha / beta) and curvature alpha there, so the Laplace approximation is exactly
    # N(ln(alpha / beta), 1 / alpha).
    a, b = 3.0, 0.5
    counts = np.array([12, 9, 15, 11, 8, 14, 10, 13, 12, 9], dtype=float)
    alpha, beta = a + counts.sum(), b + counts.size

    def constant(theta):
        return np.repeat(theta[:, :1], counts.size, axis=1)

    result = fit_counts(
        constant,
        ("lam",),
        (5.0,),
        np.arange(counts.size, dtype=float),
        counts,
        priors=[stats.gamma(a, scale=1.0 / b)],
    )
    assert result.uncertainty_method == "Laplace", result.message
    assert result.scales[0].is_ln
    assert result.center[0] == pytest.approx(math.log(alpha / beta), abs=1e-7)
    assert result.values[0] == pytest.approx(alpha / beta, rel=1e-7)
    # Central differences with a 1e-3 step: the curvature to about 1e-6 relative.
    assert result.cov_log[0, 0] == pytest.approx(1.0 / alpha, rel=1e-5)
    # The importance-sampling check agrees, so the Laplace result was kept.
    assert "confirmed by importance sampling" in result.message
    assert result.posterior["effective_sample_size"] > 1000


def test_without_priors_the_fit_stays_maximum_likelihood():
    counts = early_counts()
    simulate = logistic(EARLY_TIMES)
    plain = fit_counts(simulate, ("r", "K", "N0"), START, EARLY_TIMES, counts)
    none = fit_counts(simulate, ("r", "K", "N0"), START, EARLY_TIMES, counts, priors=[None] * 3)
    assert plain.uncertainty_method == "observed information"
    assert plain.posterior is None and none.posterior is None
    np.testing.assert_array_equal(plain.values, none.values)
    # Maximum likelihood: no nearby parameter set has a higher Poisson log-likelihood
    # (scipy.stats reference).
    rng = np.random.default_rng(4)
    nearby = plain.values * np.exp(0.01 * rng.standard_normal((200, 3)))
    loglik = stats.poisson(simulate(nearby)).logpmf(counts).sum(axis=1)
    assert np.all(loglik <= plain.loglik + 1e-9)


def test_a_start_outside_the_prior_is_refused():
    from errbudget.errors import InputError

    with pytest.raises(InputError, match="start value 1700 of K is outside the support"):
        fit_counts(
            logistic(EARLY_TIMES),
            ("r", "K", "N0"),
            (0.1, 1700.0, 50.0),
            EARLY_TIMES,
            early_counts(),
            priors=PRIORS,
        )


def test_negative_binomial_dispersion_stays_inside_its_support():
    # Poisson counts fitted with the negative binomial: nothing is over-dispersed, so the
    # dispersion k goes to its upper bound (1e4 x the largest count) and is held there,
    # instead of running off (the issue saw 7.6e59).
    times = np.linspace(1.0, 24.0, 20)
    simulate = logistic(times)
    truth = np.array([[0.3, 500.0, 20.0]])
    counts = np.random.default_rng(2).poisson(simulate(truth)[0]).astype(float)
    start = (0.2, 400.0, 30.0)
    result = fit_counts(simulate, ("r", "K", "N0"), start, times, counts, "negative-binomial")
    assert result.converged, result.message
    assert result.held == ("dispersion",)
    assert result.nuisance["dispersion"] == pytest.approx(1e4 * counts.max(), rel=1e-9)
    assert "dispersion is held at the upper end of its support" in result.message
    assert result.uncertainty_method == "observed information"
    # The negative binomial tends to the Poisson as k grows (Hilbe 2011, NB2): at the bound
    # the estimates are those of the Poisson fit to 1e-3.
    poisson = fit_counts(simulate, ("r", "K", "N0"), start, times, counts, "poisson")
    np.testing.assert_allclose(result.values, poisson.values, rtol=1e-3)
    np.testing.assert_allclose(result.sd, poisson.sd, rtol=1e-2)
    body = json.loads(json.dumps(result.to_dict({}), allow_nan=False))
    assert body["held_at_bound"] == ["dispersion"]


CASE = """
title = "Early growth of a pond's carp stock (invented)"
[model]
form = "logistic"
unit = "kg"
[parameters]
r  = {{ value = "0.1 / day", sd = "0.03 / day" }}
K  = {{ low = "1100 kg", high = "1600 kg" }}
N0 = {{ value = "50 kg", sd = "15 kg" }}
[simulation]
scheme = "heun"
step = "5 day"
horizon = "150 day"
[[quantity]]
name = "stock at day 150"
kind = "value"
at = "150 day"
[budget]
samples = 32
seed = 2
[counts]
file = "counts.csv"
time = "day"
count = "kg"
error = "poisson"
fit = ["r", "K", "N0"]
"""


@pytest.fixture(scope="module")
def early_case(tmp_path_factory):
    folder = tmp_path_factory.mktemp("early")
    rows = "\n".join(f"{t:.6g},{c:g}" for t, c in zip(EARLY_TIMES, early_counts(), strict=True))
    (folder / "counts.csv").write_text("day,kg\n" + rows + "\n")
    (folder / "case.toml").write_text(CASE.format())
    return load_case(folder / "case.toml")


def test_case_distributions_are_the_priors(early_case):
    fit = fit_from_counts(early_case)
    assert fit.result.posterior is not None
    body = fit.to_dict()
    assert body["parameters"]["K"]["scale"] == "logit on (1100, 1600)"
    assert K_LOW < body["parameters"]["K"]["low"] < body["parameters"]["K"]["high"] < K_HIGH
    assert body["weakly_informed"] == ["K"]


def test_run_keeps_the_forecast_inside_the_prior_range(early_case):
    data = run_case(early_case).to_dict()
    k = data["fit"]["parameters"]["K"]
    assert K_LOW < k["value"] < K_HIGH
    spread = data["quantities"][0]["parameter"]
    # The stock at day 150 is close to K (logistic, r t ~ 12): its interval stays below the
    # prior's upper bound, unlike the unbounded fit the issue saw (24-6400 kg).
    assert 0.0 < spread["low"] < spread["high"] < K_HIGH
    codes = [f["code"] for f in data["flags"]]
    assert "weakly-informed" in codes
    message = next(f["message"] for f in data["flags"] if f["code"] == "weakly-informed")
    assert message.startswith("the counts barely inform K")


def test_counts_that_contradict_the_prior_are_flagged(tmp_path):
    # All-zero counts of a stock whose priors say r ~ N(0.06, 0.01) /day and N0 ~ 400 +- 80:
    # the posterior must move r and N0 far into their priors' tails (zero counts need a tiny
    # stock), which the flag reports instead of a silent fit.
    from conftest import CRAYFISH_COUNTS as COUNTS

    (tmp_path / "marsh-counts.csv").write_text("day,count\n0,0\n28,0\n56,0\n84,0\n112,0\n")
    (tmp_path / "pond.toml").write_text(COUNTS)
    fit = fit_from_counts(load_case(tmp_path / "pond.toml"))
    assert fit.result.converged, fit.result.message
    flags = {flag["code"]: flag["message"] for flag in fit_flags(fit)}
    assert fit.result.posterior["prior_conflict"] == ["r", "N0"]
    assert flags["prior-conflict"].startswith("the counts contradict the stated distribution of r")
    moved = fit.result.posterior["parameters"]["N0"]["moved"]
    assert moved > 3.0
