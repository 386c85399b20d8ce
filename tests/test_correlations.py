"""Correlated inputs: the [correlations] table, the Gaussian copula and its Sobol group.

References named beside the assertions: Spearman's rho of a Gaussian copula,
(6 / pi) asin(rho / 2) (Kruskal 1958, J. Am. Stat. Assoc. 53:814; CHECKS.md), and an
independent Monte Carlo with the same copula written with numpy and scipy.stats only.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import CRAYFISH as BUILTIN
from conftest import CRAYFISH_COUNTS as COUNTS
from conftest import MARSH_COUNTS
from conftest import assert_refused_without_writing as _assert_refused_without_writing
from scipy import stats

from errbudget.case.distributions import Distribution
from errbudget.case.load import describe, load_case
from errbudget.errors import InputError
from errbudget.uncertainty.design import (
    GaussianCopula,
    copulas_for_case,
    design_for_case,
    sample_design,
)
from errbudget.uncertainty.spread import sobol_for_function

R = Distribution("normal", 0.06, sd=0.01)  # [1/day]
K = Distribution("uniform", 9000.0, low=7500.0, high=10500.0)  # [crayfish]
N0 = Distribution("normal", 400.0, sd=50.0)  # [crayfish]


def _copula(rho: float) -> GaussianCopula:
    return GaussianCopula(("r", "K"), (R, K), np.array([[1.0, rho], [rho, 1.0]]))


def reference_draws(rho: float, n: int = 1_000_000, seed: int = 12345):
    """Independent Monte Carlo of the same copula: numpy normal draws, scipy marginals."""
    rng = np.random.default_rng(seed)
    z = rng.multivariate_normal([0.0, 0.0], [[1.0, rho], [rho, 1.0]], size=n)
    u = stats.norm.cdf(z)
    r = stats.norm(0.06, 0.01).ppf(u[:, 0])
    k = stats.uniform(7500.0, 3000.0).ppf(u[:, 1])
    n0 = rng.normal(400.0, 50.0, n)
    return r, k, n0


@pytest.mark.parametrize("rho", [-0.7, 0.3, 0.9])
def test_rank_correlation_of_the_design_is_kruskals(rho):
    design = sample_design({"N0": N0}, None, 4096, 1, correlated=[_copula(rho)])
    rows = design.independent_rows
    r, k = design.values["r"][rows], design.values["K"][rows]
    expected = 6.0 / math.pi * math.asin(rho / 2.0)  # Kruskal 1958
    # 8192 draws: the sd of a Spearman estimate is below (1 - rho_s^2) / sqrt(n) < 0.011.
    assert stats.spearmanr(r, k).statistic == pytest.approx(expected, abs=0.02)
    # The marginals are the stated ones (Kolmogorov-Smirnov against scipy.stats).
    assert stats.kstest(r, stats.norm(0.06, 0.01).cdf).pvalue > 1e-3
    assert stats.kstest(k, stats.uniform(7500.0, 3000.0).cdf).pvalue > 1e-3
    # Independent input untouched: uncorrelated with r (rank correlation within 0.04).
    assert abs(stats.spearmanr(r, design.values["N0"][rows]).statistic) < 0.04


def stock(values):
    """A simple forecast: growth r K plus the initial stock [crayfish / day + crayfish]."""
    return 100.0 * values["r"] * values["K"] + values["N0"]


def test_spread_of_correlated_inputs_matches_an_independent_monte_carlo():
    result = sobol_for_function(stock, {"N0": N0}, 4096, 3, correlated=[_copula(-0.7)])
    r, k, n0 = reference_draws(-0.7)
    y = 100.0 * r * k + n0
    spread = result["_spread"]
    # Reference: 1e6 plain Monte Carlo draws (sd known to 0.1 %); the design has 8192.
    assert spread["sd"] == pytest.approx(np.std(y), rel=0.02)
    assert spread["mean"] == pytest.approx(np.mean(y), rel=0.002)
    low, high = np.quantile(y, [0.05, 0.95])
    assert spread["low"] == pytest.approx(low, rel=0.01)
    assert spread["high"] == pytest.approx(high, rel=0.01)
    # The correlation matters here: without it the sd would be over 20 % larger.
    r0, k0, _ = reference_draws(0.0)
    assert np.std(100.0 * r0 * k0 + n0) > 1.2 * np.std(y)


def test_correlated_inputs_form_one_sobol_group():
    result = sobol_for_function(stock, {"N0": N0}, 4096, 3, correlated=[_copula(-0.7)])
    assert {k for k in result if not k.startswith("_")} == {"N0", "r+K"}
    # The output is additive across the two groups, so the first-order index of a group is
    # its share of the variance: Var(100 r K) / Var(y) from the independent Monte Carlo.
    r, k, n0 = reference_draws(-0.7)
    share = np.var(100.0 * r * k) / np.var(100.0 * r * k + n0)
    group = result["r+K"]
    assert group["first"] == pytest.approx(share, abs=max(0.03, 2 * group["first_conf"]))
    assert group["total"] == pytest.approx(share, abs=max(0.03, 2 * group["total_conf"]))
    assert result["N0"]["first"] == pytest.approx(1 - share, abs=0.03)


CORRELATED = BUILTIN.replace("[budget]", "[correlations]\nr.K = -0.7\n\n[budget]")


def test_case_reads_and_describes_correlations(tmp_path):
    path = tmp_path / "pond.toml"
    path.write_text(CORRELATED)
    case = load_case(path)
    assert case.correlations == (("r", "K", -0.7),)
    text = describe(case)
    assert "  correlations (of normal scores, Gaussian copula):" in text
    assert "    r, K: -0.7 (rank correlation -0.683)" in text
    (copula,) = copulas_for_case(case)
    assert copula.names == ("r", "K") and copula.group == "r+K"
    design = design_for_case(case, None, 64, 1)
    assert design.groups == ("N0", "r+K", "r+K")
    assert design.names == ("N0", "r", "K")
    # Without correlations the design is the one the case had before.
    plain = design_for_case(load_case(_write(tmp_path, BUILTIN)), None, 64, 1)
    before = sample_design(load_case(_write(tmp_path, BUILTIN)).uncertain(), None, 64, 1)
    assert plain.groups == before.groups
    for name in before.names:
        np.testing.assert_array_equal(plain.values[name], before.values[name])


def _write(tmp_path, text):
    path = tmp_path / "plain.toml"
    path.write_text(text)
    return path


def test_three_linked_inputs_make_one_group(tmp_path):
    text = BUILTIN.replace("[budget]", "[correlations]\nr.K = -0.5\nK.N0 = 0.4\n\n[budget]")
    case = load_case(_write(tmp_path, text))
    (copula,) = copulas_for_case(case)
    assert copula.names == ("r", "K", "N0")
    np.testing.assert_array_equal(
        copula.correlation, [[1.0, -0.5, 0.0], [-0.5, 1.0, 0.4], [0.0, 0.4, 1.0]]
    )


# (extra [correlations] lines, base, where the message must point, fragment)
BAD = {
    "unknown-name": ("x.K = 0.5", BUILTIN, "correlations.x", "'x' is not a parameter"),
    "unknown-second": ("r.Kk = 0.5", BUILTIN, "correlations.r.Kk", 'did you mean "K"?'),
    "fixed": ("r.E = 0.5", BUILTIN, "correlations.r.E", "E is fixed; accepted: uncertain"),
    "fitted": ("r.K = 0.5", COUNTS, "correlations.r", "r is fitted from the counts"),
    "itself": ("r.r = 0.5", BUILTIN, "correlations.r.r", "r is paired with itself"),
    "twice": (
        "r.K = 0.5\nK.r = 0.5",
        BUILTIN,
        "correlations.K.r",
        "already given as correlations.r.K; accepted: each pair once",
    ),
    "one": ("r.K = 1.0", BUILTIN, "correlations.r.K", "strictly between -1 and 1"),
    "minus-one": ("r.K = -1", BUILTIN, "correlations.r.K", "strictly between -1 and 1"),
    "text": ('r.K = "0.5"', BUILTIN, "correlations.r.K", "'0.5' is not a correlation"),
    "boolean": ("r.K = true", BUILTIN, "correlations.r.K", "True is not a correlation"),
    "not-a-pair": ("r = 0.5", BUILTIN, "correlations.r", "write a pair as r.OTHER = value"),
    "not-definite-without-a-pair": (
        "r.K = 0.9\nr.N0 = 0.9",
        BUILTIN,
        "correlations.r.N0",
        "smallest eigenvalue -0.273",
    ),
    "not-definite": (
        "r.K = 0.9\nr.N0 = 0.9\nK.N0 = -0.9",
        BUILTIN,
        "correlations.K.N0",
        "the correlations of r, K, N0 cannot hold together (with unlisted pairs at 0 the matrix",
    ),
}


@pytest.mark.parametrize("item", BAD.values(), ids=BAD.keys())
def test_bad_correlations_are_refused(item, tmp_path):
    lines, base, where, fragment = item
    (tmp_path / "marsh-counts.csv").write_text(MARSH_COUNTS)
    path = tmp_path / "bad.toml"
    path.write_text(base.replace("[budget]", f"[correlations]\n{lines}\n\n[budget]"))
    with pytest.raises(InputError) as caught:
        load_case(path)
    assert caught.value.where == where
    assert fragment in caught.value.message, caught.value.message


def test_bad_correlation_exits_2_through_the_cli(capsys, tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(CORRELATED.replace("r.K = -0.7", "r.K = 1.5"))
    line = _assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    assert line == (
        f"errbudget: error: {path}, correlations.r.K: 1.5 is not a correlation; accepted: a "
        "number strictly between -1 and 1"
    )


def test_a_later_pair_can_complete_a_valid_matrix(tmp_path):
    # r.K = r.N0 = 0.9 alone is not positive definite (K.N0 = 0), with K.N0 = 0.8 it is.
    lines = "[correlations]\nr.K = 0.9\nr.N0 = 0.9\nK.N0 = 0.8\n"
    text = BUILTIN.replace("[budget]", lines + "[budget]")
    case = load_case(_write(tmp_path, text))
    assert len(case.correlations) == 3
