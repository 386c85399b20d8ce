"""Round-off: measured by rerunning in narrower and wider arithmetic, and bounded a priori.

Measured: the case's scheme and step at nominal parameters in binary32, binary64 and the
platform's long double; the binary64 round-off is |q64 - q_wide|. Bounded: a recursion of n
steps accumulates at most about n u max|N| (Higham 2002, Accuracy and Stability of Numerical
Algorithms, 2nd ed., SIAM, ch. 4 and sec. 3.1, doi:10.1137/1.9780898718027), u = 2^-53 for
binary64 (IEEE 754-2008).
"""

from __future__ import annotations

import numpy as np

from errbudget.case.load import Case
from errbudget.solve.ensemble import n_steps_for, nominal_params, quantity_values, solve

UNIT_ROUNDOFF = {np.float32: 2.0**-24, np.float64: 2.0**-53}


def wide_type() -> tuple[type, bool]:
    """np.longdouble and whether it is really wider than binary64 on this platform."""
    return np.longdouble, np.finfo(np.longdouble).eps < np.finfo(np.float64).eps


def measure(case: Case, step: float) -> dict:
    """Round-off of every quantity at ``step`` and nominal parameters.

    Returns
    -------
    dict
        ``float32``, ``float64``, ``wide`` values (Q,), ``measured`` = |q64 - q_wide| (Q,)
        [quantity units], ``bound`` (Q,), ``wide_is_wider`` (bool), ``wide_digits``,
        ``n_steps``, ``method``, and ``curve``: the binary64 :func:`error_curve` on the
        case's step and its halvings down to ``RUN_CURVE_MAX_STEPS`` steps.
    """
    params = nominal_params(case)
    runs = {}
    for name, dtype in (("float32", np.float32), ("float64", np.float64), ("wide", np.longdouble)):
        traj = solve(case, params, step, dtype=dtype)
        values, _ = quantity_values(case, traj)
        runs[name] = values[:, 0]
        if name == "float64":
            scale = float(np.nanmax(np.abs(traj.states.astype(float))))
    wide, wider = wide_type()
    n_steps = n_steps_for(case.horizon, step)
    with np.errstate(invalid="ignore"):
        measured = (
            np.abs(runs["float64"] - runs["wide"])
            if wider
            else np.abs(runs["float64"] - runs["float32"])
            * (UNIT_ROUNDOFF[np.float64] / UNIT_ROUNDOFF[np.float32])
        )
    bound = []
    for spec, value in zip(case.quantities, runs["float64"], strict=True):
        # A time read off a crossing inherits the state's error divided by the slope; bound it
        # by n u times the time itself (common practice, no source).
        size = abs(value) if spec.kind == "time-to" else scale
        bound.append(n_steps * UNIT_ROUNDOFF[np.float64] * size)
    return {
        **runs,
        "measured": measured,
        "bound": np.array(bound),
        "wide_is_wider": bool(wider),
        "wide_digits": int(np.finfo(wide).precision),
        "n_steps": n_steps,
        "method": "binary64 against long double"
        if wider
        else "binary32 difference scaled by the ratio of unit roundoffs",
        # The binary64 total-error curve, kept cheap: the finest run has RUN_CURVE_MAX_STEPS.
        "curve": error_curve(case, np.float64, curve_steps(case, RUN_CURVE_MAX_STEPS)),
    }


# --- Total-error curve: discretisation C h^p plus round-off D u / h --------------------------

CURVE_MAX_STEPS = 2**20  # steps of the finest run of a curve at most (caps the work)
CURVE_MAX_LEVELS = 24  # halvings of the case's step at most
RUN_CURVE_MAX_STEPS = 2**12  # finest run of the binary64 curve inside a budget run (speed)
REFERENCE_MAX_STEPS = 2**13  # steps of the long-double RK4 reference run at most
REFERENCE_REFINEMENT = 64  # the RK4 reference step is the case's step over this, if affordable
NEGLIGIBLE_ORDERS = 3.0  # round-off this many decades below discretisation is "negligible"


def curve_steps(case: Case, max_steps: int = CURVE_MAX_STEPS) -> list[float]:
    """The case's step and its halvings while the finest run stays within ``max_steps`` [T]."""
    steps = [case.step]
    while len(steps) < CURVE_MAX_LEVELS and n_steps_for(case.horizon, steps[-1] / 2) <= max_steps:
        steps.append(steps[-1] / 2)
    return steps


def reference_values(case: Case) -> np.ndarray:
    """Quantities at nominal parameters from long double arithmetic, shape (Q,).

    "value" quantities use the law's exact solution where one is known (``case.model.exact``);
    the others (and laws without one) use classical RK4 in long double at a fine step, whose
    error C h^4 is far below the binary64 round-off of the runs compared with it.
    """
    from errbudget.solve.tableaux import get_scheme

    params = nominal_params(case)
    fine = case.step / REFERENCE_REFINEMENT
    while n_steps_for(case.horizon, fine) > REFERENCE_MAX_STEPS:
        fine *= 2
    traj = solve(case, params, fine, scheme=get_scheme("rk4"), dtype=np.longdouble)
    values, _ = quantity_values(case, traj)
    values = values[:, 0].copy()
    if case.model.exact is not None:
        wide = {k: np.asarray(v, dtype=np.longdouble) for k, v in params.items()}
        law = {k: v for k, v in wide.items() if k != "N0"}
        for q, spec in enumerate(case.quantities):
            if spec.kind == "value":
                with np.errstate(all="ignore"):
                    exact = case.model.exact(np.longdouble(spec.at), wide["N0"], law)
                values[q] = float(np.asarray(exact).reshape(-1)[0])
    return values


def fit_curve(steps, errors, order: int, unit_roundoff: float) -> tuple[float, float]:
    """Fit E(h) = C h^p + D u / h by non-negative least squares on relative residuals.

    Each point is weighted by 1 / E_i so that errors spanning many decades count alike;
    points with zero or non-finite error are left out. The model is the standard balance of
    truncation and accumulated rounding error (Higham 2002, Accuracy and Stability of
    Numerical Algorithms, 2nd ed., SIAM, sec. 1.14 and ch. 4, doi:10.1137/1.9780898718027).

    Returns
    -------
    (C, D) : C [quantity unit / T^p], D [quantity unit * T]
    """
    from scipy.optimize import nnls

    h = np.asarray(steps, dtype=float)
    e = np.asarray(errors, dtype=float)
    keep = np.isfinite(e) & (e > 0)
    if keep.sum() < 2:
        return 0.0, 0.0
    h, e = h[keep], e[keep]
    # Columns scaled to order one before the solve; scaled back afterwards.
    columns = np.column_stack([h**order, unit_roundoff / h])
    scale = np.max(np.abs(columns / e[:, None]), axis=0)
    scale[scale == 0] = 1.0
    coef, _ = nnls(columns / e[:, None] / scale, np.ones_like(e))
    c, d = coef / scale
    return float(c), float(d)


def _fit_one(column: np.ndarray, data: np.ndarray) -> float:
    """Non-negative least squares for data ~ k column, on relative residuals (one unknown)."""
    keep = np.isfinite(data) & (data > 0) & np.isfinite(column)
    if not keep.any():
        return 0.0
    a = column[keep] / data[keep]
    return float(max(0.0, a.sum() / (a * a).sum()))


def error_curve(case: Case, dtype=np.float64, steps=None) -> dict:
    """Total error against step in one arithmetic, and the fitted balance of its two parts.

    Runs the case's scheme at nominal parameters on ``steps`` in ``dtype``, measures the
    total error |q(h) - q_ref| per quantity against :func:`reference_values`, and fits
    E(h) = C h^p + D u / h (p the formal order, u the unit roundoff of ``dtype``) by
    non-negative least squares. Where long double is wider than binary64, each step is also
    run in long double, so the discretisation part |q_wide(h) - q_ref| gives C and the
    round-off part |q(h) - q_wide(h)| gives D; otherwise both come from a joint fit of the
    total (:func:`fit_curve`). The
    optimum step minimises E: h* = (D u / (p C))^(1/(p+1)), which scales like u^(1/(p+1));
    below the crossover h_x = (D u / C)^(1/(p+1)) round-off exceeds discretisation
    (standard result; e.g. Higham 2002, sec. 1.14; Press et al. 2007, Numerical Recipes,
    3rd ed., sec. 5.7).

    Parameters
    ----------
    case : Case
    dtype : numpy float type
        np.float32 or np.float64.
    steps : sequence of float, optional
        Steps to run [T]; default :func:`curve_steps` (halvings of the case's step while
        the finest run has at most ``CURVE_MAX_STEPS`` steps).

    Returns
    -------
    dict
        ``dtype``, ``unit_roundoff``, ``order``, ``steps`` [T], ``reference`` (Q,), and
        ``quantities``: per quantity a dict with ``C``, ``D``, ``optimum_step`` [T] (None when
        C or D is 0), ``crossover_step`` [T] (None likewise), ``errors`` (measured, per
        step; None where undefined), ``orders_below`` (decades between the discretisation
        and round-off parts at the case's step; None if undefined), ``D_is_bound`` (True
        when the fit found no round-off and D is the largest value the points allow) and
        ``statement``.
    """
    from errbudget.solve.tableaux import get_scheme

    if dtype not in UNIT_ROUNDOFF:
        raise ValueError(f"dtype must be one of {list(UNIT_ROUNDOFF)}, not {dtype!r}")
    order = get_scheme(case.scheme).order
    u = UNIT_ROUNDOFF[dtype]
    steps = [float(s) for s in (curve_steps(case) if steps is None else steps)]
    params = nominal_params(case)
    reference = reference_values(case)
    _, wider = wide_type()
    total, disc, rnd = [], [], []
    for step in steps:
        values, _ = quantity_values(case, solve(case, params, step, dtype=dtype))
        with np.errstate(invalid="ignore", over="ignore"):
            total.append(np.abs(values[:, 0] - reference))
            if wider:
                wide, _ = quantity_values(case, solve(case, params, step, dtype=np.longdouble))
                disc.append(np.abs(wide[:, 0] - reference))
                rnd.append(np.abs(values[:, 0] - wide[:, 0]))
    total = np.array(total)  # (levels, Q)
    h = np.asarray(steps)
    out = []
    for q in range(total.shape[1]):
        errors = total[:, q]
        if wider:
            # The two parts measured apart (same step in long double): C from the
            # discretisation part, D from the round-off part, each by non-negative least
            # squares. A joint fit of the total lets pre-asymptotic curvature pose as D u / h.
            c = _fit_one(h**order, np.array(disc)[:, q])
            d = _fit_one(u / h, np.array(rnd)[:, q])
        else:
            c, d = fit_curve(steps, errors, order, u)
        bound = False
        finite = np.isfinite(errors) & (errors > 0)
        if d == 0.0 and finite.any():
            # No round-off visible: D is at most what the smallest error-times-step allows.
            d = float(np.min(errors[finite] * h[finite]) / u)
            bound = True
        out.append(_summary(case, c, d, u, order, errors, bound))
    return {
        "dtype": np.dtype(dtype).name,
        "unit_roundoff": u,
        "order": order,
        "steps": steps,
        "reference": reference,
        "quantities": out,
    }


def _summary(case: Case, c, d, u, order, errors, bound) -> dict:
    """Optimum, crossover and the plain statement for one quantity's fitted curve."""
    both = c > 0 and d > 0
    optimum = (d * u / (order * c)) ** (1 / (order + 1)) if both else None
    crossover = (d * u / c) ** (1 / (order + 1)) if both else None
    disc = c * case.step**order
    rounding = d * u / case.step
    orders = float(np.log10(disc / rounding)) if disc > 0 and rounding > 0 else None
    at = f"at the case's step of {case.step:g} {case.time_unit}"
    if orders is None:
        statement = "round-off could not be separated from discretisation " + at
    elif orders >= NEGLIGIBLE_ORDERS:
        qualifier = "at least " if bound else "about "
        statement = (
            f"round-off is negligible: {qualifier}{orders:.0f} orders of magnitude below the "
            f"discretisation error {at}"
        )
    elif orders > 0:
        statement = (
            f"round-off is small but not negligible: about {orders:.1f} orders of magnitude "
            f"below the discretisation error {at}"
        )
    else:
        statement = (
            f"round-off dominates: about {-orders:.1f} orders of magnitude above the "
            f"discretisation error {at}; a coarser step or wider arithmetic is needed"
        )
    return {
        "C": c,
        "D": d,
        "D_is_bound": bool(bound),
        "optimum_step": optimum,
        "crossover_step": crossover,
        "errors": [float(e) if np.isfinite(e) else None for e in errors],
        "orders_below": orders,
        "statement": statement,
    }
