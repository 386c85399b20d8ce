"""The refinement ladder: steps h, h/2, h/4, ... from the case's step, chosen on the nominal run.

The ladder grows until the observed order of every quantity settles near the scheme's formal
order over the last triplets, or until a cap; the ensemble then runs only on the levels the
budget needs (the case's step and the finest levels).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from errbudget.case.limits import LADDER_HALVINGS, MAX_FINEST_STEPS
from errbudget.case.load import Case
from errbudget.estimates.convergence import FORMAL_ORDER_TOLERANCE, grid_convergence
from errbudget.estimates.richardson import ROUNDOFF_FACTOR
from errbudget.solve.ensemble import n_steps_for, nominal_params
from errbudget.solve.stream import stream
from errbudget.solve.tableaux import get_scheme
from errbudget.solve.trajectory import locate

RATIO = 2  # constant refinement ratio of the ladder
MIN_LEVELS = LADDER_HALVINGS + 1  # the case's step and four refinements
MAX_LEVELS = 12  # h / 2048 at most
MAX_STEPS = MAX_FINEST_STEPS  # steps of the finest level at most, whatever the case
ORDER_TOLERANCE = FORMAL_ORDER_TOLERANCE  # one tolerance: settled and trusted alike
ROUNDOFF_FLOOR = ROUNDOFF_FACTOR * np.finfo(float).eps  # differences this small are round-off


def settled(values: np.ndarray, formal: int) -> bool:
    """Whether the last two triplets of a ladder column give the formal order (or agree exactly).

    ``values`` holds one quantity on the ladder, coarsest first.
    """
    if values.size < 4 or not np.isfinite(values).all():
        return False
    diffs = np.abs(np.diff(values))
    scale = max(np.abs(values).max(), 1e-300)
    if diffs[-1] <= ROUNDOFF_FLOOR * scale:
        return True
    orders = last_orders(values)
    return all(p is not None and abs(p - formal) <= ORDER_TOLERANCE * formal for p in orders)


def last_orders(values: np.ndarray) -> list[float | None]:
    """Observed orders of the last two triplets of a ladder column (None where undefined)."""
    if values.size < 4:
        return []
    diffs = np.abs(np.diff(values))
    orders = []
    for first in (-3, -2):
        a, b = diffs[first], diffs[first + 1]
        ok = a > 0 and b > 0 and np.isfinite(a) and np.isfinite(b)
        orders.append(float(np.log(a / b) / np.log(RATIO)) if ok else None)
    return orders


@dataclass(frozen=True)
class Ladder:
    """The refinement ladder chosen on the nominal parameters.

    Attributes
    ----------
    steps : list of float
        Coarsest (the case's step) first [time].
    values : ndarray (levels, Q)
        Every quantity at nominal parameters on each level [quantity units].
    settled : list of bool
        Per quantity, whether the observed order settled (see :func:`settled`).
    capped : bool
        The ladder stopped at a cap before every quantity settled.
    capped_by : str or None
        Which cap: "levels" (MAX_LEVELS) or "steps" (MAX_STEPS on the finest level).
    off_grid : list of bool
        Per quantity, whether its time falls between grid points of the case's step.
    convergence : list of GridConvergence or None
        Per quantity, the three finest levels (None where a level is not finite).
    case_level : list of GridConvergence or None
        Per quantity, the case's step and the next two levels.
    """

    steps: list[float]
    values: np.ndarray
    settled: list[bool]
    capped: bool
    off_grid: list[bool]
    convergence: list
    case_level: list
    capped_by: str | None = None


def build(case: Case) -> Ladder:
    """Choose the ladder on the nominal parameters: halve until every order settles."""
    scheme = get_scheme(case.scheme)
    params = nominal_params(case)
    steps, rows = [], []
    capped, capped_by = False, None
    while True:
        step = case.step / RATIO ** len(steps)
        rows.append(stream(case, params, [step])[0].values[:, 0])
        steps.append(step)
        table = np.array(rows)
        done = [settled(table[:, q], scheme.order) for q in range(table.shape[1])]
        if len(steps) >= MIN_LEVELS and all(done):
            break
        next_steps = n_steps_for(case.horizon, case.step / RATIO ** len(steps))
        if len(steps) >= MAX_LEVELS or next_steps > MAX_STEPS:
            capped = True
            capped_by = "levels" if len(steps) >= MAX_LEVELS else "steps"
            break
    columns = table.T
    return Ladder(
        steps=steps,
        values=table,
        settled=done,
        capped=capped,
        capped_by=capped_by,
        off_grid=[
            spec.kind == "value" and locate(spec.at, case.step)[0] < 0 for spec in case.quantities
        ],
        convergence=[_safe_gci(c[-3:], steps[-3:], scheme.order) for c in columns],
        case_level=[_safe_gci(c[:3], steps[:3], scheme.order) for c in columns],
    )


def _safe_gci(values: np.ndarray, steps: list[float], formal: int):
    """grid_convergence, or None where a level has no finite value (divergent runs)."""
    if not np.isfinite(values).all():
        return None
    return grid_convergence(list(values), list(steps), formal_order=formal)
