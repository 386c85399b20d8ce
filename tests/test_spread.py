"""Tests of errbudget.uncertainty.spread: Saltelli design, forecast spread and Sobol indices."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import stats

from errbudget.case.distributions import Distribution
from errbudget.errors import InputError
from errbudget.uncertainty.spread import (
    Design,
    JointNormal,
    _compare_halves,
    sample_design,
    sobol_for_function,
    sobol_indices,
    spread_summary,
)

ISHIGAMI_A = 7.0
ISHIGAMI_B = 0.1
UNIFORM_PI = Distribution("uniform", 0.0, low=-math.pi, high=math.pi)
STD_NORMAL = Distribution("normal", 0.0, sd=1.0)
CONVERGENCE_LIMIT = 0.05  # N = 4096 vs 8192 on Ishigami (common practice, no source)
INDEX_TOL = 0.03  # tolerance on an index, from the assignment (common practice, no source)


def ishigami(values):
    x1, x2, x3 = values["x1"], values["x2"], values["x3"]
    return np.sin(x1) + ISHIGAMI_A * np.sin(x2) ** 2 + ISHIGAMI_B * x3**4 * np.sin(x1)


def entries(result):
    """The per-input/group entries, without the "_" metadata keys."""
    return {k: v for k, v in result.items() if not k.startswith("_")}


@pytest.fixture(scope="module")
def ishigami_result():
    dists = {"x1": UNIFORM_PI, "x2": UNIFORM_PI, "x3": UNIFORM_PI}
    return sobol_for_function(ishigami, dists, 8192, 1)


@pytest.mark.parametrize(
    ("name", "first", "total"),
    [
        # Ishigami & Homma 1990; analytic values in Sobol' & Levitan 1999, Comput. Phys.
        # Commun. 117:52, and Saltelli et al. 2008, Global Sensitivity Analysis: The Primer
        # (as listed in the shared CHECKS.md, "Sensitivity indices").
        ("x1", 0.3139, 0.5576),
        ("x2", 0.4424, 0.4424),
        ("x3", 0.0, 0.2437),
    ],
)
def test_ishigami_indices(ishigami_result, name, first, total):
    assert ishigami_result[name]["first"] == pytest.approx(first, abs=INDEX_TOL)
    assert ishigami_result[name]["total"] == pytest.approx(total, abs=INDEX_TOL)
    assert 0.0 < ishigami_result[name]["first_conf"] < 0.1
    assert 0.0 < ishigami_result[name]["total_conf"] < 0.1


def test_ishigami_mean_variance_and_metadata(ishigami_result):
    spread = ishigami_result["_spread"]
    # Ishigami & Homma 1990: mean a/2 = 3.5, variance 13.8446 (CHECKS.md, "Sensitivity
    # indices"); "a few percent": 2 % on the mean, 3 % on the variance.
    assert spread["mean"] == pytest.approx(3.5, rel=0.02)
    assert spread["sd"] ** 2 == pytest.approx(13.8446, rel=0.03)
    assert spread["n"] == 2 * 8192
    assert set(entries(ishigami_result)) == {"x1", "x2", "x3"}
    assert ishigami_result["_nonfinite"] == 0
    assert ishigami_result["_constant"] is False
    assert ishigami_result["_nan_replaced"] == []
    conv = ishigami_result["_convergence"]
    assert conv["agree"] is True
    assert 0.0 <= conv["max_change"] < CONVERGENCE_LIMIT
    assert "8192" in conv["advice"]


def test_design_cost_and_row_layout():
    dists = {"a": STD_NORMAL, "b": UNIFORM_PI, "c": STD_NORMAL}
    n_base, k = 64, 3
    design = sample_design(dists, None, n_base, 5)
    # Saltelli et al. 2010, Comput. Phys. Commun. 181:259: N (k + 2) runs for first-order
    # and total indices.
    assert design.n_rows == n_base * (k + 2)
    assert all(v.shape == (n_base * (k + 2),) for v in design.values.values())
    assert design.kind == "saltelli"
    assert design.names == ("a", "b", "c") == design.groups
    x = np.column_stack([design.values[n] for n in design.names]).reshape(n_base, k + 2, k)
    a_rows, b_rows = x[:, 0, :], x[:, -1, :]
    # Block layout A, AB^(1..k), B (SALib/sample/sobol.py): AB^(i) is A with column i of B.
    for i in range(k):
        expected = a_rows.copy()
        expected[:, i] = b_rows[:, i]
        np.testing.assert_array_equal(x[:, 1 + i, :], expected)
    assert np.all(a_rows != b_rows)
    rows = design.independent_rows
    assert rows.size == 2 * n_base
    np.testing.assert_array_equal(rows[0::2], np.arange(n_base) * (k + 2))
    np.testing.assert_array_equal(rows[1::2], np.arange(n_base) * (k + 2) + k + 1)


def test_independent_inputs_follow_their_distribution():
    design = sample_design({"u": UNIFORM_PI, "n": STD_NORMAL}, None, 1024, 2)
    u = design.values["u"][design.independent_rows]
    n = design.values["n"][design.independent_rows]
    assert np.all((u > -math.pi) & (u < math.pi))
    assert np.all(np.isfinite(n))
    # Kolmogorov-Smirnov against the target distributions (scipy.stats.kstest).
    assert stats.kstest(u, UNIFORM_PI.frozen().cdf).pvalue > 0.01
    assert stats.kstest(n, "norm").pvalue > 0.01


def test_single_input_has_first_index_one():
    def square(values):
        return values["x"] ** 2 + 0.0 * values["y"]

    result = sobol_for_function(square, {"x": STD_NORMAL, "y": STD_NORMAL}, 1024, 3)
    # Only x varies the output, so V[E(Y|x)] = V(Y) (Sobol' 2001, definition of S_i).
    assert result["x"]["first"] == pytest.approx(1.0, abs=INDEX_TOL)
    assert result["x"]["total"] == pytest.approx(1.0, abs=INDEX_TOL)
    assert result["y"]["first"] == pytest.approx(0.0, abs=1e-12)
    assert result["y"]["total"] == pytest.approx(0.0, abs=1e-12)

    alone = sobol_for_function(lambda v: np.exp(v["x"]), {"x": STD_NORMAL}, 1024, 3)
    assert set(entries(alone)) == {"x"}
    assert alone["x"]["first"] == pytest.approx(1.0, abs=INDEX_TOL)


def test_linear_model_indices():
    result = sobol_for_function(
        lambda v: 2.0 * v["x1"] + v["x2"], {"x1": STD_NORMAL, "x2": STD_NORMAL}, 4096, 4
    )
    # Linear model with independent inputs: S_i = c_i^2 var_i / sum c_j^2 var_j = 4/5, 1/5
    # (Saltelli et al. 2008, Global Sensitivity Analysis: The Primer, ch. 1); additive,
    # so total = first.
    for name, share in (("x1", 0.8), ("x2", 0.2)):
        assert result[name]["first"] == pytest.approx(share, abs=INDEX_TOL)
        assert result[name]["total"] == pytest.approx(share, abs=INDEX_TOL)


JOINT = JointNormal(("r", "K"), np.array([1.0, 2.0]), np.array([[1.0, 0.6], [0.6, 2.0]]))


def test_joint_normal_sampling_and_group_index():
    n_base = 4096
    design = sample_design({"a": STD_NORMAL}, JOINT, n_base, 7)
    assert design.groups == ("a", "fitted", "fitted")
    # One group for (r, K): D = 2 groups, N (D + 2) rows (Saltelli et al. 2010).
    assert design.n_rows == n_base * 4
    rows = design.independent_rows
    sample = np.vstack([design.values["r"][rows], design.values["K"][rows]])
    n = rows.size
    cov = JOINT.cov
    # Standard error of a sample covariance of normals: sqrt((s_ii s_jj + s_ij^2) / n)
    # (Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd ed., ch. 3,
    # recalled); allow 5 standard errors.
    se = np.sqrt((np.outer(np.diag(cov), np.diag(cov)) + cov**2) / n)
    np.testing.assert_array_less(np.abs(np.cov(sample) - cov), 5 * se)
    np.testing.assert_allclose(sample.mean(axis=1), JOINT.mean, atol=5 * math.sqrt(2.0 / n))
    # Block A, AB^(a), AB^(fitted), B: (r, K) is swapped together from B in row 2 while
    # "a" keeps its A value; row 1 swaps "a" only.
    r = design.values["r"].reshape(n_base, 4)
    k_ = design.values["K"].reshape(n_base, 4)
    a = design.values["a"].reshape(n_base, 4)
    np.testing.assert_array_equal(r[:, 2], r[:, 3])
    np.testing.assert_array_equal(k_[:, 2], k_[:, 3])
    np.testing.assert_array_equal(a[:, 2], a[:, 0])
    np.testing.assert_array_equal(r[:, 1], r[:, 0])
    np.testing.assert_array_equal(k_[:, 1], k_[:, 0])
    np.testing.assert_array_equal(a[:, 1], a[:, 3])
    assert np.all(r[:, 0] != r[:, 3]) and np.all(a[:, 0] != a[:, 3])

    result = sobol_indices(design, design.values["r"] + design.values["K"] + design.values["a"])
    assert set(entries(result)) == {"a", "fitted"}
    # var(r + K) = 1 + 2 + 2 (0.6) = 4.2, var(a) = 1: the group holds 4.2 / 5.2 of the
    # variance (variance of a sum, any probability text).
    assert result["fitted"]["first"] == pytest.approx(4.2 / 5.2, abs=INDEX_TOL)
    assert result["fitted"]["total"] == pytest.approx(4.2 / 5.2, abs=INDEX_TOL)
    assert result["a"]["first"] == pytest.approx(1.0 / 5.2, abs=INDEX_TOL)


def test_joint_normal_alone_and_log_scale():
    joint = JointNormal(
        ("r", "K"),
        [math.log(0.3), math.log(500.0)],
        [[0.01, 0.002], [0.002, 0.04]],
        group="fit",
        log_scale=(True, True),
    )
    design = sample_design({}, joint, 512, 1)
    # A single group: A, AB = B, B per base sample, N (1 + 2) rows (Saltelli et al. 2010).
    assert design.n_rows == 512 * 3
    rows = design.independent_rows
    assert np.all(design.values["r"] > 0.0)
    np.testing.assert_allclose(
        np.log(design.values["K"][rows]).mean(), math.log(500.0), atol=5 * 0.2 / math.sqrt(1024)
    )
    result = sobol_indices(design, design.values["r"] * design.values["K"])
    assert set(entries(result)) == {"fit"}
    # The only group holds all of the variance (Sobol' 2001, definition of S_i).
    assert result["fit"]["first"] == pytest.approx(1.0, abs=INDEX_TOL)
    assert result["fit"]["total"] == pytest.approx(1.0, abs=INDEX_TOL)


def test_joint_normal_validation():
    with pytest.raises(ValueError, match="symmetric"):
        JointNormal(("r", "K"), [1.0, 2.0], [[1.0, 0.5], [0.4, 1.0]])
    with pytest.raises(ValueError, match="shape"):
        JointNormal(("r", "K"), [1.0], [[1.0]])
    bad = JointNormal(("r", "K"), [1.0, 2.0], [[1.0, 2.0], [2.0, 1.0]])
    with pytest.raises(ValueError, match="not positive definite"):
        sample_design({}, bad, 16, 0)
    with pytest.raises(InputError) as err:
        sample_design({"fitted": STD_NORMAL}, JOINT, 16, 0)
    assert str(err.value) == (
        "parameter name 'fitted' collides with the name of the group of fitted parameters; "
        "accepted: any other parameter name"
    )
    with pytest.raises(InputError, match="both fitted"):
        sample_design({"r": STD_NORMAL}, JOINT, 16, 0)


def test_reproducible_design():
    dists = {"x": STD_NORMAL, "y": UNIFORM_PI}
    one, same, other = (sample_design(dists, JOINT, 256, s) for s in (11, 11, 12))
    for name in ("x", "y", "r", "K"):
        np.testing.assert_array_equal(one.values[name], same.values[name])
        assert not np.array_equal(one.values[name], other.values[name])
    y = one.values["x"] * one.values["y"] + one.values["r"]
    assert sobol_indices(one, y, seed=0) == sobol_indices(same, y, seed=0)
    assert sobol_indices(one, y, seed=0)["x"]["first_conf"] != pytest.approx(
        sobol_indices(one, y, seed=1)["x"]["first_conf"], rel=1e-12
    )


@pytest.mark.parametrize("n_base", [1000, 8, 0, -16, 1024.0, True])
def test_bad_base_sample_size(n_base):
    with pytest.raises(InputError) as err:
        sample_design({"x": STD_NORMAL}, None, n_base, 0)
    assert str(err.value) == (
        f"budget.samples = {n_base}: the Sobol design needs a power of two of at least 16; "
        "accepted: a power of two such as 512, 1024"
    )


def test_constant_output_gives_zero_indices_without_warnings():
    design = sample_design({"x": STD_NORMAL, "y": STD_NORMAL}, None, 64, 0)
    for y in (np.full(design.n_rows, 3.0), 5.0 + 1e-14 * design.values["x"]):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            result = sobol_indices(design, y)
        assert result["_constant"] is True
        for entry in entries(result).values():
            assert entry == {"first": 0.0, "first_conf": 0.0, "total": 0.0, "total_conf": 0.0}
        assert result["_convergence"]["agree"] is True


def test_nonfinite_outputs_replaced_and_counted():
    design = sample_design({"x": STD_NORMAL, "y": STD_NORMAL}, None, 256, 0)
    y = 3.0 * design.values["x"] + design.values["y"]
    y[[0, 10, 20]] = [np.nan, np.inf, -np.inf]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = sobol_indices(design, y)
    assert result["_nonfinite"] == 3
    # The caller's array is not modified.
    assert np.isnan(y[0]) and y[10] == np.inf and y[20] == -np.inf
    for entry in entries(result).values():
        assert all(math.isfinite(v) for v in entry.values())
    # Linear model: S_x = 9/10 (Saltelli et al. 2008, ch. 1); three replaced rows barely
    # move it.
    assert result["x"]["first"] == pytest.approx(0.9, abs=0.05)

    all_bad = sobol_indices(design, np.full(design.n_rows, np.nan))
    assert all_bad["_nonfinite"] == design.n_rows
    assert all_bad["_constant"] is True


def test_wrong_output_length():
    design = sample_design({"x": STD_NORMAL}, None, 16, 0)
    with pytest.raises(ValueError, match="the design has 48 rows"):
        sobol_indices(design, np.zeros(47))


def test_compare_halves():
    def entry(first, total, conf):
        return {"first": first, "first_conf": conf, "total": total, "total_conf": conf}

    full = {"a": entry(0.50, 0.60, 0.01), "b": entry(0.30, 0.30, 0.01)}
    close = {"a": entry(0.51, 0.61, 0.01), "b": entry(0.30, 0.29, 0.01)}
    check = _compare_halves(full, close, 1024)
    assert check["agree"] is True
    assert check["max_change"] == pytest.approx(0.01)
    # Differences below the 0.02 floor agree even when the half-widths are tiny.
    tight = {"a": entry(0.515, 0.6, 0.0), "b": entry(0.3, 0.3, 0.0)}
    assert _compare_halves({**full, "a": entry(0.5, 0.6, 0.0)}, tight, 64)["agree"] is True
    far = {"a": entry(0.50, 0.70, 0.02), "b": entry(0.30, 0.30, 0.01)}
    check = _compare_halves(full, far, 1024)
    assert check["agree"] is False
    assert check["max_change"] == pytest.approx(0.1)
    assert "2048" in check["advice"]


def test_spread_summary_of_normal_sample():
    rng = np.random.default_rng(42)
    mean, sd, n = 10.0, 2.0, 200_000
    y = rng.normal(mean, sd, n)
    y[:5] = [np.nan, np.inf, -np.inf, np.nan, np.nan]
    summary = spread_summary(y, level=0.9)
    assert summary["n"] == n - 5
    assert summary["n_nonfinite"] == 5
    assert summary["level"] == 0.9
    assert all(type(summary[k]) is float for k in ("mean", "sd", "low", "high", "level"))
    # Standard error of a sample sd: sd / sqrt(2 (n - 1)) (normal theory, recalled).
    assert summary["sd"] == pytest.approx(sd, abs=5 * sd / math.sqrt(2 * n))
    low, high = stats.norm.interval(0.9, loc=mean, scale=sd)
    # Standard error of the p-quantile: sqrt(p (1 - p) / n) / density at it (asymptotic
    # normality of sample quantiles, recalled); 5 standard errors.
    se_q = math.sqrt(0.05 * 0.95 / n) / stats.norm.pdf(low, loc=mean, scale=sd)
    assert summary["low"] == pytest.approx(low, abs=5 * se_q)
    assert summary["high"] == pytest.approx(high, abs=5 * se_q)
    assert summary["mean"] == pytest.approx(mean, abs=5 * sd / math.sqrt(n))


def test_spread_summary_edge_cases():
    empty = spread_summary(np.array([np.nan, np.inf]))
    assert empty["n"] == 0 and empty["n_nonfinite"] == 2
    assert empty["mean"] is None and empty["sd"] is None
    one = spread_summary(np.array([4.0, np.nan]))
    assert one == {
        "mean": 4.0,
        "sd": 0.0,
        "low": 4.0,
        "high": 4.0,
        "level": 0.9,
        "n": 1,
        "n_nonfinite": 1,
    }
    with pytest.raises(ValueError, match="level"):
        spread_summary(np.ones(3), level=1.0)


def test_design_is_read_only():
    design = sample_design({"x": STD_NORMAL}, None, 16, 0)
    assert isinstance(design, Design)
    with pytest.raises(ValueError):
        design.values["x"][0] = 1.0
