"""Parameter uncertainty: the Saltelli design, the forecast spread and Sobol indices.

The uncertain inputs are sampled once on the unit hypercube with the Saltelli design of
SALib (Herman & Usher 2017) and mapped to parameter values through each input's inverse
cumulative distribution function. Parameters fitted together from counts are correlated;
they are drawn as one multivariate normal and resampled together as one SALib group, so
the indices speak of "the fitted parameters" rather than pretending each is independent.

Row layout of the design (checked in ``SALib/sample/sobol.py``, SALib 1.6, with
``calc_second_order=False``): for each base sample ``j = 0 .. N-1`` a block of ``D + 2``
consecutive rows

    A_j, AB_j^(1), ..., AB_j^(D), B_j

where ``D`` is the number of groups (the number of inputs when there are no groups),
``A_j`` and ``B_j`` are the two halves of the ``j``-th point of a scrambled Sobol sequence
of dimension ``2 k`` (``k`` columns), and ``AB_j^(i)`` is ``A_j`` with the columns of group
``i`` taken from ``B_j``. ``SALib/analyze/sobol.py`` (``separate_output_values``) reads the
outputs with the same stride. The ``A`` and ``B`` rows are ``2 N`` draws of the joint input
distribution (quasi-random, so their mean converges faster than for independent draws);
they alone serve for the forecast spread.

References
----------
Saltelli, A., Annoni, P., Azzini, I., Campolongo, F., Ratto, M., Tarantola, S. (2010).
    Variance based sensitivity analysis of model output. Design and estimator for the
    total sensitivity index. Computer Physics Communications 181(2), 259-270.
    https://doi.org/10.1016/j.cpc.2009.09.018
Sobol', I. M. (2001). Global sensitivity indices for nonlinear mathematical models and
    their Monte Carlo estimates. Mathematics and Computers in Simulation 55, 271-280.
    https://doi.org/10.1016/S0378-4754(00)00270-6
Herman, J., Usher, W. (2017). SALib: An open-source Python library for sensitivity
    analysis. Journal of Open Source Software 2(9), 97. https://doi.org/10.21105/joss.00097
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
from SALib.analyze import sobol as salib_analyze
from SALib.sample import sobol as salib_sample
from scipy import stats

from errbudget.case.distributions import Distribution
from errbudget.errors import InputError

# Smallest base sample accepted: below 16 the bootstrap intervals are meaningless and the
# half-sample convergence check would use 8 points or fewer (common practice, no source).
MIN_BASE_SAMPLES = 16
# Keep hypercube coordinates off 0 and 1, where inverse CDFs return -inf / +inf.
UNIT_CLIP = 1e-12
# An output whose range is below this share of its magnitude is round-off noise, not
# sensitivity: report zero indices instead of normalising by a near-zero variance.
CONSTANT_RTOL = 1e-12
# Floor of the N/2-vs-N agreement tolerance on an index (common practice, no source).
CONVERGENCE_FLOOR = 0.02
_INDEX_KEYS = ("first", "first_conf", "total", "total_conf")


@dataclass(frozen=True, eq=False)
class JointNormal:
    """Correlated inputs from a fit to counts, sampled together as one group.

    Attributes
    ----------
    names : tuple of str
        Parameter names, in the order of ``mean`` and ``cov``.
    mean : numpy.ndarray, shape (k,)
        Mean of the normal [internal unit of each parameter, or ln of it when log-scaled].
    cov : numpy.ndarray, shape (k, k)
        Covariance, symmetric positive definite [products of the units of ``mean``].
    group : str
        Name of the group in the Sobol indices.
    log_scale : tuple of bool, optional
        Per name: the normal is on ln(value), so value = exp(normal draw).
    """

    names: tuple[str, ...]
    mean: np.ndarray
    cov: np.ndarray
    group: str = "fitted"
    log_scale: tuple[bool, ...] | None = None

    def __post_init__(self):
        names = tuple(self.names)
        mean = np.array(self.mean, dtype=float).reshape(-1)
        cov = np.array(self.cov, dtype=float)
        k = len(names)
        if k == 0 or len(set(names)) != k:
            raise ValueError(f"JointNormal needs distinct names, got {names}")
        if mean.shape != (k,) or cov.shape != (k, k):
            raise ValueError(
                f"JointNormal with {k} names needs mean of shape ({k},) and cov of shape "
                f"({k}, {k}); got {mean.shape} and {cov.shape}"
            )
        if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(cov))):
            raise ValueError("JointNormal mean and cov must be finite")
        if not np.allclose(cov, cov.T, rtol=1e-10, atol=0.0):
            raise ValueError("JointNormal cov must be symmetric")
        log_scale = None if self.log_scale is None else tuple(bool(x) for x in self.log_scale)
        if log_scale is not None and len(log_scale) != k:
            raise ValueError(f"JointNormal log_scale needs {k} entries, got {len(log_scale)}")
        mean.flags.writeable = False
        cov.flags.writeable = False
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "mean", mean)
        object.__setattr__(self, "cov", cov)
        object.__setattr__(self, "log_scale", log_scale)

    def cholesky(self) -> np.ndarray:
        """Lower Cholesky factor ``L`` with ``L L^T = cov``."""
        try:
            return np.linalg.cholesky(self.cov)
        except np.linalg.LinAlgError:
            raise ValueError(
                f"the covariance of group {self.group!r} {self.names} is not positive definite"
            ) from None


@dataclass(frozen=True, eq=False)
class Design:
    """A Saltelli design over the uncertain inputs (see the module docstring for rows)."""

    names: tuple[str, ...]
    values: dict[str, np.ndarray]
    n_base: int
    groups: tuple[str, ...]
    problem: dict
    independent_rows: np.ndarray
    kind: str

    @property
    def n_rows(self) -> int:
        """Number of model evaluations, ``n_base (D + 2)``."""
        return self.n_base * self.block

    @property
    def block(self) -> int:
        """Rows per base sample, ``D + 2`` with ``D`` the number of groups."""
        return len(_unique(self.groups)) + 2


def _unique(items) -> list[str]:
    """Distinct items in order of first appearance (the order SALib uses for groups)."""
    return list(dict.fromkeys(items))


def _check_base(n_base) -> int:
    is_int = isinstance(n_base, int | np.integer) and not isinstance(n_base, bool)
    if not is_int or n_base < MIN_BASE_SAMPLES or n_base & (n_base - 1):
        raise InputError(
            f"budget.samples = {n_base}: the Sobol design needs a power of two of at least "
            f"{MIN_BASE_SAMPLES}; accepted: a power of two such as 512, 1024"
        )
    return int(n_base)


def _check_seed(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    return int(seed)


def sample_design(
    independent: Mapping[str, Distribution],
    joint: JointNormal | None,
    n_base: int,
    seed: int,
) -> Design:
    """Sample the Saltelli design for first-order and total Sobol indices.

    Parameters
    ----------
    independent : mapping of str to Distribution
        Inputs sampled independently, each its own SALib group [internal units].
    joint : JointNormal or None
        Correlated fitted inputs, sampled as one group.
    n_base : int
        Base sample size ``N``, a power of two >= 16 (Sobol sequence balance).
    seed : int
        Seed of the scrambled Sobol sequence; the same seed gives the same design bit
        for bit.

    Returns
    -------
    Design
        ``N (D + 2)`` rows with ``D`` the number of groups (Saltelli et al. 2010).

    Notes
    -----
    Independent input ``x = F^-1(u)``. A joint group maps its ``k`` columns to
    ``z = Phi^-1(u)`` and then ``x = mu + L z`` with ``L L^T = Sigma`` (Cholesky), and
    ``exp(x)`` for log-scaled entries. The columns of ``z`` are mixed by ``L``, so they
    have no meaning alone and are resampled together in the ``AB`` rows.
    """
    n_base = _check_base(n_base)
    seed = _check_seed(seed)
    ind_names = tuple(independent)
    joint_names = () if joint is None else joint.names
    if not ind_names and not joint_names:
        raise ValueError("sample_design needs at least one uncertain input")
    if joint is not None:
        both = sorted(set(ind_names) & set(joint_names))
        if both:
            raise InputError(
                f"parameter {both[0]!r} is both fitted from counts and given its own "
                "distribution; accepted: one or the other"
            )
        if joint.group in ind_names or joint.group in joint_names:
            raise InputError(
                f"parameter name {joint.group!r} collides with the name of the group of "
                "fitted parameters; accepted: any other parameter name"
            )
    names = ind_names + joint_names
    groups = ind_names + (() if joint is None else (joint.group,) * len(joint_names))
    n_cols = len(names)
    problem = {
        "num_vars": n_cols,
        "names": list(names),
        "bounds": [[0.0, 1.0]] * n_cols,
        "groups": list(groups),
    }
    # SALib mutates the problem it is given (adds "sample_scaled"): hand it a copy.
    unit = salib_sample.sample(dict(problem), n_base, calc_second_order=False, seed=seed)
    n_groups = len(_unique(groups))
    if n_groups == 1 and n_cols > 1:
        # SALib ignores a single group spanning several columns (util._check_groups) and
        # swaps them one at a time; the one-group design is A, AB = B, B per base sample.
        per_block = unit.reshape(n_base, n_cols + 2, n_cols)
        unit = per_block[:, [0, n_cols + 1, n_cols + 1], :].reshape(-1, n_cols)
    block = n_groups + 2
    if unit.shape[0] != n_base * block:
        raise RuntimeError(f"SALib returned {unit.shape[0]} rows, expected {n_base * block}")
    # ppf(0) = -inf and ppf(1) = +inf for unbounded inputs: keep the design inside.
    unit = np.clip(unit, UNIT_CLIP, 1.0 - UNIT_CLIP)

    values: dict[str, np.ndarray] = {}
    for i, name in enumerate(ind_names):
        values[name] = np.asarray(independent[name].ppf(unit[:, i]), dtype=float)
    if joint is not None:
        z = stats.norm.ppf(unit[:, len(ind_names) :])
        x = joint.mean + z @ joint.cholesky().T
        log_scale = joint.log_scale or (False,) * len(joint_names)
        for j, name in enumerate(joint_names):
            values[name] = np.exp(x[:, j]) if log_scale[j] else x[:, j]
    for name, column in values.items():
        if not np.all(np.isfinite(column)):
            raise ValueError(f"input {name!r} maps to non-finite values; check its distribution")
        column.flags.writeable = False

    starts = np.arange(n_base) * block
    independent_rows = np.sort(np.concatenate([starts, starts + block - 1]))
    return Design(
        names=names,
        values=values,
        n_base=n_base,
        groups=groups,
        problem=problem,
        independent_rows=independent_rows,
        kind="saltelli",
    )


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
    """Indices per group from SALib; zeros for a constant output. Returns (indices, nan)."""
    group_names = _unique(problem["groups"])
    if _is_constant(y):
        return {g: dict.fromkeys(_INDEX_KEYS, 0.0) for g in group_names}, []
    with warnings.catch_warnings():
        # Bootstrap resamples of a nearly constant output may be constant; SALib then
        # returns 0 for that resample and warns, which is the behaviour we want.
        warnings.filterwarnings("ignore", message="Constant values encountered")
        # SALib tests ``if seed:`` and falls back to the global NumPy state for 0, so a
        # shifted seed keeps every seed (0 included) reproducible.
        res = salib_analyze.analyze(
            dict(problem),
            y,
            calc_second_order=False,
            num_resamples=n_resamples,
            conf_level=conf_level,
            seed=seed + 1,
        )
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
    seed = _check_seed(seed)
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
    result["_nan_replaced"] = _unique(replaced + replaced_half)
    return result


def sobol_for_function(
    f: Callable[[dict[str, np.ndarray]], np.ndarray],
    distributions: Mapping[str, Distribution],
    n_base: int,
    seed: int,
    *,
    joint: JointNormal | None = None,
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

    Returns
    -------
    dict
        The result of :func:`sobol_indices` plus ``"_spread"``: :func:`spread_summary` of
        ``f`` on the ``A`` and ``B`` rows.
    """
    design = sample_design(distributions, joint, n_base, seed)
    y = np.asarray(f(design.values), dtype=float)
    result = sobol_indices(design, y, seed=seed)
    result["_spread"] = spread_summary(y.reshape(-1)[design.independent_rows])
    return result
