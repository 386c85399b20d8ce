"""The Saltelli design over the uncertain inputs, and the joint distributions sampled in it.

The uncertain inputs are sampled once on the unit hypercube with the Saltelli design of
SALib (Herman & Usher 2017) and mapped to parameter values through each input's inverse
cumulative distribution function. Parameters fitted together from counts are correlated;
they are drawn as one multivariate normal (on each parameter's estimation scale) and
resampled together as one SALib group, so the indices speak of "the fitted parameters"
rather than pretending each is independent. Inputs correlated in the case's
``[correlations]`` are drawn through a Gaussian copula over their stated distributions and
form one group per set of linked inputs, named by their names joined with "+".

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
Herman, J., Usher, W. (2017). SALib: An open-source Python library for sensitivity
    analysis. Journal of Open Source Software 2(9), 97. https://doi.org/10.21105/joss.00097
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
from SALib.sample import sobol as salib_sample
from scipy import stats

from errbudget.case.distributions import Distribution
from errbudget.case.limits import SMALLEST_DESIGN_PROBABILITY
from errbudget.errors import InputError
from errbudget.uncertainty.scales import LINEAR, LN, Scale

# Smallest base sample accepted: below 16 the bootstrap intervals are meaningless and the
# half-sample convergence check would use 8 points or fewer (common practice, no source).
MIN_BASE_SAMPLES = 16
UNIT_CLIP = SMALLEST_DESIGN_PROBABILITY  # inverse CDFs give -inf / +inf at 0 and 1


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
    log_scale : tuple of bool or Scale, optional
        Per name, the scale the normal is on: True for ln(value) (value = exp(draw)), False
        for the value itself, or a :class:`errbudget.uncertainty.scales.Scale` (e.g. a logit
        scale that keeps a fitted parameter inside its prior's range). Stored as Scales.
    """

    names: tuple[str, ...]
    mean: np.ndarray
    cov: np.ndarray
    group: str = "fitted"
    log_scale: tuple[bool | Scale, ...] | None = None

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
        log_scale = None if self.log_scale is None else tuple(map(_as_scale, self.log_scale))
        if log_scale is not None and len(log_scale) != k:
            raise ValueError(f"JointNormal log_scale needs {k} entries, got {len(log_scale)}")
        mean.flags.writeable = False
        cov.flags.writeable = False
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "mean", mean)
        object.__setattr__(self, "cov", cov)
        object.__setattr__(self, "log_scale", log_scale)

    @property
    def scales(self) -> tuple[Scale, ...]:
        """The scale of each entry (linear where none was given)."""
        return self.log_scale or (LINEAR,) * len(self.names)

    def scaled(self, factor: float) -> JointNormal:
        """The same distribution with its covariance multiplied by ``factor``."""
        return replace(self, cov=self.cov * factor)

    def cholesky(self) -> np.ndarray:
        """Lower Cholesky factor ``L`` with ``L L^T = cov``."""
        try:
            return np.linalg.cholesky(self.cov)
        except np.linalg.LinAlgError:
            raise ValueError(
                f"the covariance of group {self.group!r} {self.names} is not positive definite"
            ) from None


def _as_scale(entry) -> Scale:
    if isinstance(entry, Scale):
        return entry
    return LN if bool(entry) else LINEAR


@dataclass(frozen=True, eq=False)
class GaussianCopula:
    """Inputs with their own distributions whose normal scores are correlated, one group.

    A draw maps k uniform columns u to z = Phi^-1(u), correlates them, z_c = L z with
    L L^T = C (Cholesky), and gives x_i = F_i^-1(Phi(z_c,i)): each input keeps its stated
    distribution F_i and the normal scores have correlation matrix C (Nelsen 2006, An
    Introduction to Copulas, 2nd ed., Springer, sec. 2.9). Spearman's rank correlation of
    inputs i, j is (6 / pi) asin(C_ij / 2) (Kruskal 1958, J. Am. Stat. Assoc. 53:814).

    Attributes
    ----------
    names : tuple of str
        The inputs, in the order of ``correlation``.
    marginals : tuple of Distribution
        Each input's distribution [internal unit of the input].
    correlation : numpy.ndarray, shape (k, k)
        Correlation of the normal scores: symmetric, unit diagonal, positive definite.
    group : str
        Name of the group in the Sobol indices (default: the names joined by "+").
    """

    names: tuple[str, ...]
    marginals: tuple[Distribution, ...]
    correlation: np.ndarray
    group: str = ""

    def __post_init__(self):
        names = tuple(self.names)
        matrix = np.array(self.correlation, dtype=float)
        k = len(names)
        if k < 2 or len(set(names)) != k or len(self.marginals) != k:
            raise ValueError(f"a GaussianCopula needs 2 or more distinct names, got {names}")
        if matrix.shape != (k, k) or not np.allclose(np.diag(matrix), 1.0, rtol=0, atol=1e-12):
            raise ValueError(f"the correlation of {names} must be ({k}, {k}) with unit diagonal")
        if not np.allclose(matrix, matrix.T, rtol=0, atol=1e-12):
            raise ValueError(f"the correlation of {names} must be symmetric")
        try:
            np.linalg.cholesky(matrix)
        except np.linalg.LinAlgError:
            raise ValueError(f"the correlation of {names} is not positive definite") from None
        matrix.flags.writeable = False
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "marginals", tuple(self.marginals))
        object.__setattr__(self, "correlation", matrix)
        object.__setattr__(self, "group", self.group or "+".join(names))

    def values(self, unit: np.ndarray) -> dict[str, np.ndarray]:
        """Input values for uniform columns ``unit`` (n, k) in (0, 1)."""
        z = stats.norm.ppf(unit) @ np.linalg.cholesky(self.correlation).T
        u = np.clip(stats.norm.cdf(z), UNIT_CLIP, 1.0 - UNIT_CLIP)
        return {
            name: np.asarray(marginal.ppf(u[:, j]), dtype=float)
            for j, (name, marginal) in enumerate(zip(self.names, self.marginals, strict=True))
        }


def copulas_for_case(case) -> list[GaussianCopula]:
    """One GaussianCopula per group of inputs linked by the case's ``[correlations]``."""
    from errbudget.case.correlations import components, correlation_matrix

    return [
        GaussianCopula(
            names,
            tuple(case.parameters[n].dist for n in names),
            correlation_matrix(names, case.correlations),
        )
        for names in components(case.correlations)
    ]


def design_for_case(case, joint: JointNormal | None, n_base: int, seed: int) -> Design | None:
    """The Saltelli design of a case: independent inputs, correlated groups, fitted group.

    Inputs in ``joint`` (the fit) and in the case's correlations are drawn by their group;
    every other uncertain parameter independently. None when nothing is uncertain.
    """
    copulas = copulas_for_case(case)
    taken = set(joint.names if joint is not None else ()).union(*(c.names for c in copulas))
    independent = {k: v for k, v in case.uncertain().items() if k not in taken}
    if not independent and joint is None and not copulas:
        return None
    return sample_design(independent, joint, n_base, seed, correlated=copulas)


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
        return len(unique_in_order(self.groups)) + 2


def unique_in_order(items) -> list[str]:
    """Distinct items in order of first appearance (the order SALib uses for groups)."""
    return list(dict.fromkeys(items))


def _unit_design(problem: dict, n_base: int, seed: int) -> np.ndarray:
    """SALib's Saltelli rows on the unit hypercube, shape (n_base (D + 2), k), off 0 and 1."""
    n_cols, groups = problem["num_vars"], problem["groups"]
    # SALib mutates the problem it is given (adds "sample_scaled"): hand it a copy.
    unit = salib_sample.sample(dict(problem), n_base, calc_second_order=False, seed=seed)
    n_groups = len(unique_in_order(groups))
    if n_groups == 1 and n_cols > 1:
        # SALib ignores a single group spanning several columns (util._check_groups) and
        # swaps them one at a time; the one-group design is A, AB = B, B per base sample.
        per_block = unit.reshape(n_base, n_cols + 2, n_cols)
        unit = per_block[:, [0, n_cols + 1, n_cols + 1], :].reshape(-1, n_cols)
    block = n_groups + 2
    if unit.shape[0] != n_base * block:
        raise RuntimeError(f"SALib returned {unit.shape[0]} rows, expected {n_base * block}")
    # ppf(0) = -inf and ppf(1) = +inf for unbounded inputs: keep the design inside.
    return np.clip(unit, UNIT_CLIP, 1.0 - UNIT_CLIP)


def _check_disjoint(ind_names, corr_names, joint) -> None:
    """Each input in one group only; group names distinct from parameter names."""
    if len(set(corr_names)) != len(corr_names) or set(corr_names) & set(ind_names):
        raise ValueError("an input is in more than one correlated group or also independent")
    if joint is None:
        return
    both = sorted((set(ind_names) | set(corr_names)) & set(joint.names))
    if both:
        raise InputError(
            f"parameter {both[0]!r} is both fitted from counts and given its own "
            "distribution; accepted: one or the other"
        )
    if joint.group in ind_names or joint.group in joint.names or joint.group in corr_names:
        raise InputError(
            f"parameter name {joint.group!r} collides with the name of the group of "
            "fitted parameters; accepted: any other parameter name"
        )


def _check_base(n_base) -> int:
    is_int = isinstance(n_base, int | np.integer) and not isinstance(n_base, bool)
    if not is_int or n_base < MIN_BASE_SAMPLES or n_base & (n_base - 1):
        raise InputError(
            f"budget.samples = {n_base}: the Sobol design needs a power of two of at least "
            f"{MIN_BASE_SAMPLES}; accepted: a power of two such as 512, 1024"
        )
    return int(n_base)


def check_seed(seed) -> int:
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    return int(seed)


def sample_design(
    independent: Mapping[str, Distribution],
    joint: JointNormal | None,
    n_base: int,
    seed: int,
    *,
    correlated: Sequence[GaussianCopula] = (),
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
    correlated : sequence of GaussianCopula
        Groups of inputs with correlated normal scores, each sampled as one group.

    Returns
    -------
    Design
        ``N (D + 2)`` rows with ``D`` the number of groups (Saltelli et al. 2010).

    Notes
    -----
    Independent input ``x = F^-1(u)``. A joint group maps its ``k`` columns to
    ``z = Phi^-1(u)`` and then ``x = mu + L z`` with ``L L^T = Sigma`` (Cholesky), each
    entry mapped back from its scale (``exp(x)`` for ln-scaled entries). The columns of
    ``z`` are mixed by ``L``, so they have no meaning alone and are resampled together in
    the ``AB`` rows; so are the columns of a correlated group (:class:`GaussianCopula`).
    Column order: independent inputs, correlated groups, the fitted group. Correlated inputs
    are analysed as a group because the Saltelli estimators assume independent columns
    (Jacques, Lavergne & Devictor 2006, Reliab. Eng. Syst. Saf. 91:1126).
    """
    n_base = _check_base(n_base)
    seed = check_seed(seed)
    ind_names = tuple(independent)
    joint_names = () if joint is None else joint.names
    corr_names = tuple(n for c in correlated for n in c.names)
    if not ind_names and not joint_names and not corr_names:
        raise ValueError("sample_design needs at least one uncertain input")
    _check_disjoint(ind_names, corr_names, joint)
    names = ind_names + corr_names + joint_names
    groups = ind_names + tuple(c.group for c in correlated for _ in c.names)
    groups += () if joint is None else (joint.group,) * len(joint_names)
    n_cols = len(names)
    problem = {
        "num_vars": n_cols,
        "names": list(names),
        "bounds": [[0.0, 1.0]] * n_cols,
        "groups": list(groups),
    }
    unit = _unit_design(problem, n_base, seed)
    block = len(unique_in_order(groups)) + 2
    values: dict[str, np.ndarray] = {}
    for i, name in enumerate(ind_names):
        values[name] = np.asarray(independent[name].ppf(unit[:, i]), dtype=float)
    column = len(ind_names)
    for copula in correlated:
        values.update(copula.values(unit[:, column : column + len(copula.names)]))
        column += len(copula.names)
    if joint is not None:
        z = stats.norm.ppf(unit[:, column:])
        x = joint.mean + z @ joint.cholesky().T
        for j, (name, scale) in enumerate(zip(joint_names, joint.scales, strict=True)):
            values[name] = np.asarray(scale.to_natural(x[:, j]), dtype=float)
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
