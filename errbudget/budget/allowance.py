"""How much numerical error a quantity can carry: its allowance, and the resolution floor.

The allowance of a quantity is ``fraction`` times its parameter spread (standard deviation),
but never below the resolution of a population: counts of animals or plants are whole
numbers, so an error below half an individual cannot change a decision, whatever the spread
(for mass and density units the case states its resolution, or it is RESOLUTION_SHARE of the
largest state). A population quantity whose forecast lies below the resolution in nearly
the whole ensemble has collapsed: it is judged against the resolution, not by relative
errors of a number that no longer counts anything.
"""

from __future__ import annotations

import math

from errbudget.case.load import Case

# Default resolution of a mass or a density: this share of the largest state of the
# accurate solution (common practice, no source).
RESOLUTION_SHARE = 1e-3


def resolution(case: Case, scale: float) -> float:
    """The smallest population difference that can change a decision [population unit].

    ``[budget] resolution`` when given (half an individual by default for count units),
    else RESOLUTION_SHARE of ``scale``, the largest |N| of the accurate solution.
    """
    if case.budget.resolution is not None:
        return float(case.budget.resolution)
    return RESOLUTION_SHARE * float(scale) if math.isfinite(scale) else 0.0


def is_population(case: Case, q: int) -> bool:
    """Whether quantity ``q`` is a population (not a time)."""
    return case.quantities[q].kind != "time-to"


def allowances(case: Case, sds, floor: float) -> list[float]:
    """Per quantity: max(fraction x sd, resolution) for populations, fraction x sd for times."""
    out = []
    for q, sd in enumerate(sds):
        share = case.budget.fraction * (sd if sd is not None and math.isfinite(sd) else 0.0)
        out.append(max(share, floor) if is_population(case, q) else share)
    return out


def collapsed(case: Case, spreads: list[dict], floor: float) -> list[bool]:
    """Per quantity: a population forecast whose central interval lies below the resolution."""
    return [
        is_population(case, q)
        and spread.get("high") is not None
        and floor > 0
        and abs(spread["high"]) < floor
        and abs(spread.get("low") or 0.0) < floor
        for q, spread in enumerate(spreads)
    ]
