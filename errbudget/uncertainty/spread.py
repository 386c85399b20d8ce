"""The forecast spread and the Sobol indices of one quantity over the Saltelli design.

The design itself (rows, groups, joint distributions) is built in
:mod:`errbudget.uncertainty.design`; its names are re-exported here for existing callers.

References
----------
Sobol', I. M. (2001). Global sensitivity indices for nonlinear mathematical models and
    their Monte Carlo estimates. Mathematics and Computers in Simulation 55, 271-280.
    https://doi.org/10.1016/S0378-4754(00)00270-6
Saltelli, A., Annoni, P., Azzini, I., Campolongo, F., Ratto, M., Tarantola, S. (2010).
    Variance based sensitivity analysis of model output. Design and estimator for the
    total sensitivity index. Computer Physics Communications 181(2), 259-270.
    https://doi.org/10.1016/j.cpc.2009.09.018
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence

import numpy as np

from errbudget.case.distributions import Distribution
from errbudget.uncertainty import saltelli
from errbudget.uncertainty.design import (
    MIN_BASE_SAMPLES,
    Design,
    GaussianCopula,
    JointNormal,
    check_seed,
    sample_design,
    unique_in_order,
)

__all__ = [
    "MIN_BASE_SAMPLES",
    "Design",
    "GaussianCopula",
    "JointNormal",
    "sample_design",
    "sobol_for_function",
    "sobol_indices",
    "spread_summary",
]

# An output whose range is below this share of its magnitude is round-off noise, not
# sensitivity: report zero indices instead of normalising by a near-zero variance.
CONSTANT_RTOL = 1e-12
# Floor of the N/2-vs-N agreement tolerance on an index (common practice, no source).
CONVERGENCE_FLOOR = 0.02
_INDEX_KEYS = ("first", "first_conf", "total", "total_conf")


def spread_summary(y: np.ndarray, level: float = 0.9) -> dict:
    """Mean, standard deviation and central interval of a forecast ensemble.

    Parameters
    ----------
    y : numpy.ndarray, shape (n,)
        Values of one quantity over draws of the inputs [unit of the quantity].
    level : float
        Probability held by the central interval, in (0, 1).

    Returns
    -------
    dict
        ``mean``, ``sd`` (ddof = 1), ``low`` and ``high`` (empirical quantiles at
        ``(1 - level)/2`` and ``(1 + level)/2``, linear interpolation) of the finite values
        [unit of the quantity]; ``level``; ``n`` finite values used; ``n_nonfinite``
        dropped. With no finite value the four statistics are None; with one, ``sd`` is 0.
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie in (0, 1), got {level}")
    y = np.asarray(y, dtype=float)
    if y.ndim != 1:
        raise ValueError(f"y must be one-dimensional, got shape {y.shape}")
    finite = y[np.isfinite(y)]
    n = int(finite.size)
    out = {"mean": None, "sd": None, "low": None, "high": None}
    if n:
        low, high = np.quantile(finite, [(1.0 - level) / 2.0, (1.0 + level) / 2.0])
        out = {
            "mean": float(np.mean(finite)),
            "sd": float(np.std(finite, ddof=1)) if n > 1 else 0.0,
            "low": float(low),
            "high": float(high),
        }
    return {**out, "level": float(level), "n": n, "n_nonfinite": int(y.size - n)}


def _is_constant(y: np.ndarray) -> bool:
    spread = float(np.ptp(y))
    return spread == 0.0 or spread <= CONSTANT_RTOL * float(np.max(np.abs(y)))


def _analyze(problem: dict, y: np.ndarray, conf_level: float, n_resamples: int, seed: int):
    """Indices per group (SALib's estimators); zeros for a constant output.

    Returns (indices, names whose estimate was not finite).
    """
    group_names = unique_in_order(problem["groups"])
    if _is_constant(y):
        return {g: dict.fromkeys(_INDEX_KEYS, 0.0) for g in group_names}, []
    # SALib's estimators with the work shared between groups (uncertainty.saltelli); the seed
    # is shifted by one because SALib falls back to the global NumPy state for seed 0.
    res = saltelli.indices(y, len(group_names), conf_level, n_resamples, seed + 1)
    indices, replaced = {}, []
    for i, g in enumerate(group_names):
        raw = (res["S1"][i], res["S1_conf"][i], res["ST"][i], res["ST_conf"][i])
        if not all(math.isfinite(v) for v in raw):
            replaced.append(g)
        indices[g] = {
            k: float(v) if math.isfinite(v) else 0.0 for k, v in zip(_INDEX_KEYS, raw, strict=True)
        }
    return indices, replaced


def _compare_halves(full: dict, half: dict, n_base: int) -> dict:
    """Convergence check: do the indices at N/2 and N agree within their half-widths?

    Two estimates agree when ``|S(N) - S(N/2)| <= max(conf(N) + conf(N/2), 0.02)`` for every
    first-order and total index (the 0.02 floor: common practice, no source).
    """
    agree, max_change = True, 0.0
    for g, now in full.items():
        before = half[g]
        for key in ("first", "total"):
            change = abs(now[key] - before[key])
            tol = max(now[key + "_conf"] + before[key + "_conf"], CONVERGENCE_FLOOR)
            agree = agree and change <= tol
            max_change = max(max_change, change)
    if agree:
        advice = (
            f"indices at N = {n_base // 2} and N = {n_base} agree within their confidence "
            f"half-widths (largest change {max_change:.3f}); budget.samples = {n_base} is enough"
        )
    else:
        advice = (
            f"indices changed by up to {max_change:.3f} between N = {n_base // 2} and "
            f"N = {n_base}; raise budget.samples to {2 * n_base} or more"
        )
    return {"agree": bool(agree), "max_change": float(max_change), "advice": advice}


def sobol_indices(
    design: Design,
    y: np.ndarray,
    *,
    conf_level: float = 0.95,
    n_resamples: int = 200,
    seed: int = 0,
) -> dict:
    """First-order and total Sobol indices of one quantity, per input or group.

    ``S_i = V[E(Y | X_i)] / V(Y)`` and ``S_Ti = E[V(Y | X_~i)] / V(Y)`` (Sobol' 2001),
    estimated by SALib with ``V_i = mean(f(B) (f(AB^i) - f(A)))`` and
    ``V_Ti = mean((f(A) - f(AB^i))^2) / 2`` (Saltelli et al. 2010, Table 2, recalled; the
    estimators of ``SALib.analyze.sobol.first_order`` and ``total_order``).

    Parameters
    ----------
    design : Design
        The design the outputs were computed on.
    y : numpy.ndarray, shape (n_rows,)
        The quantity at every row of the design [any unit; indices are dimensionless].
    conf_level : float
        Level of the bootstrap confidence intervals.
    n_resamples : int
        Bootstrap resamples.
    seed : int
        Seed of the bootstrap, non-negative.

    Returns
    -------
    dict
        ``{name_or_group: {"first", "first_conf", "total", "total_conf"}}`` with ``*_conf``
        the half-width of the normal-approximation bootstrap interval, plus
        ``"_convergence"`` (see :func:`_compare_halves`, computed on the first N/2 base
        samples), ``"_nonfinite"`` (non-finite outputs, replaced by the median of the
        finite ones because the estimators need every row), ``"_constant"`` (True when the
        output has no variance: all indices 0 with conf 0) and ``"_nan_replaced"`` (names
        whose SALib result had NaN, reported as 0.0; expected to stay empty). Raw
        estimates may be slightly negative or above 1; they are not clipped.
    """
    seed = check_seed(seed)
    y = np.array(y, dtype=float).reshape(-1)
    if y.size != design.n_rows:
        raise ValueError(f"y has {y.size} values; the design has {design.n_rows} rows")
    bad = ~np.isfinite(y)
    n_nonfinite = int(bad.sum())
    if n_nonfinite:
        y[bad] = np.median(y[~bad]) if n_nonfinite < y.size else 0.0
    full, replaced = _analyze(design.problem, y, conf_level, n_resamples, seed)
    # The first half of a scrambled Sobol sequence of 2^m points is itself balanced, and
    # the rows of base samples 0 .. N/2 - 1 are the first N/2 blocks.
    half_rows = design.n_base // 2 * design.block
    half, replaced_half = _analyze(design.problem, y[:half_rows], conf_level, n_resamples, seed)
    result: dict = dict(full)
    result["_convergence"] = _compare_halves(full, half, design.n_base)
    result["_nonfinite"] = n_nonfinite
    result["_constant"] = _is_constant(y)
    result["_nan_replaced"] = unique_in_order(replaced + replaced_half)
    return result


def sobol_for_function(
    f: Callable[[dict[str, np.ndarray]], np.ndarray],
    distributions: Mapping[str, Distribution],
    n_base: int,
    seed: int,
    *,
    joint: JointNormal | None = None,
    correlated: Sequence[GaussianCopula] = (),
) -> dict:
    """Sample a design, evaluate ``f`` on it (vectorised) and return its Sobol indices.

    Parameters
    ----------
    f : callable
        ``f(values)`` with ``values`` a dict name -> (n_rows,) array; returns (n_rows,).
    distributions : mapping of str to Distribution
        Independent inputs.
    n_base, seed : int
        As in :func:`sample_design`; ``seed`` also seeds the bootstrap.
    joint : JointNormal, optional
        Correlated inputs sampled as one group.
    correlated : sequence of GaussianCopula, optional
        Groups of inputs with correlated normal scores.

    Returns
    -------
    dict
        The result of :func:`sobol_indices` plus ``"_spread"``: :func:`spread_summary` of
        ``f`` on the ``A`` and ``B`` rows.
    """
    design = sample_design(distributions, joint, n_base, seed, correlated=correlated)
    y = np.asarray(f(design.values), dtype=float)
    result = sobol_indices(design, y, seed=seed)
    result["_spread"] = spread_summary(y.reshape(-1)[design.independent_rows])
    return result
