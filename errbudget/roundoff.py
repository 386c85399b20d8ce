"""Round-off: measured by rerunning in narrower and wider arithmetic, and bounded a priori.

Measured: the case's scheme and step at nominal parameters in binary32, binary64 and the
platform's long double; the binary64 round-off is |q64 - q_wide|. Bounded: a recursion of n
steps accumulates at most about n u max|N| (Higham 2002, Accuracy and Stability of Numerical
Algorithms, 2nd ed., SIAM, ch. 4 and sec. 3.1, doi:10.1137/1.9780898718027), u = 2^-53 for
binary64 (IEEE 754-2008).
"""

from __future__ import annotations

import numpy as np

from errbudget.case import Case
from errbudget.ensemble import n_steps_for, nominal_params, quantity_values, solve

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
        ``n_steps``.
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
    }
