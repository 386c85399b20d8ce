"""The budget table: quantities as columns, rows in four groups (forecast, test, details).

Each row is a label, a function from one quantity of budget.json to its :class:`Cell`, a note
and whether the row is one the verdict rests on (shown strong). Pure functions on dicts.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

from errbudget.report import fmt
from errbudget.report.fmt import Cell

KIND_WORDS = {
    "value": "value at a set time",
    "time-to": "time to reach a level",
    "peak": "highest value",
    "minimum": "lowest value",
}
WHY_PERCENTILE = "some ensemble members diverged or never reached the level"
WHY_GCI = "the order observed on the three coarsest levels is not trusted"
WHY_SD = "the parameter spread is undefined"
NO_CURVE = "no fitted total-error curve"


class Row(NamedTuple):
    label: str
    cell: Callable[[dict], Cell]  # one quantity of budget.json -> its cell in this row
    note: str = ""
    strong: bool = False


def budget_table(quantities: list[dict], fraction) -> list[dict]:
    """The table's groups, each ``{"title", "rows": [{"label", "cells", "note", "strong"}]}``."""
    pct_label = f"{fmt.number(_first(quantities, 'percentile') or 95, 3)}th percentile"
    groups = (
        ("The numbers behind page 1", [_forecast_rows()[1], *_test_rows(fraction, pct_label)[:2]]),
        ("Numerical error in detail", _numerical_rows(pct_label)),
        ("Parameter uncertainty in detail", _parameter_rows()),
    )
    return [
        {
            "title": title,
            "rows": [
                {
                    "label": row.label,
                    "cells": [row.cell(q) for q in quantities],
                    "note": row.note,
                    "strong": row.strong,
                }
                for row in rows
            ],
        }
        for title, rows in groups
    ]


def _forecast_rows() -> list[Row]:
    return [
        Row("Kind", lambda q: Cell(KIND_WORDS.get(q.get("kind"), q.get("kind") or ""))),
        Row(
            "Value at the case's step",
            lambda q: _value(
                q, q.get("value"), "not reached within the horizon, or the run diverged"
            ),
            "nominal parameters",
        ),
        Row(
            "Reference value",
            lambda q: _value(q, q.get("reference"), "the finest ladder levels are not finite"),
            "Richardson-extrapolated, nominal parameters",
        ),
    ]


def _test_rows(fraction, pct_label: str) -> list[Row]:
    return [
        Row(
            "Numerical error",
            lambda q: _size(q, _numerical(q), WHY_PERCENTILE),
            f"discretisation ({pct_label} over the ensemble) + round-off",
            strong=True,
        ),
        Row(
            "Parameter standard deviation",
            lambda q: _size(q, _par(q).get("sd"), WHY_SD),
            "spread of the forecast",
        ),
        Row(
            "Allowance",
            lambda q: _size(q, q.get("allowance"), WHY_SD),
            f"{fmt.percent(fraction).text} of the standard deviation",
            strong=True,
        ),
        Row(
            "Numerical error ÷ parameter sd",
            lambda q: fmt.ratio(q.get("numerical_to_parameter"), why="error or spread undefined"),
            f"must not exceed {fmt.number(fraction, 3)}",
        ),
        Row("Verdict for this quantity", _quantity_verdict, strong=True),
    ]


def _numerical_rows(pct_label: str) -> list[Row]:
    return [
        Row(
            f"Discretisation error, {pct_label}",
            lambda q: _size(q, _disc(q).get("error_percentile"), WHY_PERCENTILE),
            "over the parameter ensemble",
        ),
        Row(
            "Discretisation error at nominal parameters",
            lambda q: _size(q, _disc(q).get("error"), "no reference value"),
            "|value − reference|",
        ),
        Row(
            "Grid convergence index",
            lambda q: _size(q, _disc(q).get("gci"), WHY_GCI),
            "Roache, case's step",
        ),
        Row("Observed order", lambda q: _order(_disc(q))),
        Row(
            "Round-off, measured",
            lambda q: _size(q, _roundoff(q).get("error"), "not measured"),
            "binary64 against a wider type",
        ),
    ]


def _parameter_rows() -> list[Row]:
    return [
        Row("Largest driver", lambda q: _driver(_par(q).get("indices"))),
        Row(
            "Combined uncertainty",
            lambda q: _size(q, q.get("combined"), "a component is undefined"),
            "root-sum-square (ASME V&V 20)",
        ),
        Row("Shares of the variance", _shares, "discretisation / round-off / parameters"),
    ]


def _disc(q: dict) -> dict:
    return q.get("discretisation") or {}


def _par(q: dict) -> dict:
    return q.get("parameter") or {}


def _roundoff(q: dict) -> dict:
    return q.get("roundoff") or {}


def _value(q: dict, value, why: str) -> Cell:
    """A forecast value in the quantity's unit, to SIG_VALUE significant digits."""
    return fmt.with_unit(value, q.get("unit"), fmt.SIG_VALUE, why=why)


def _size(q: dict, value, why: str) -> Cell:
    """An error, spread or allowance in the quantity's unit."""
    return fmt.with_unit(value, q.get("unit"), why=why)


def _numerical(q: dict) -> float | None:
    """Discretisation error (the verdict's percentile) plus measured round-off."""
    pct = fmt.finite(_disc(q).get("error_percentile"))
    if pct is None:
        return None
    return pct + (fmt.finite(_roundoff(q).get("error")) or 0.0)


def _quantity_verdict(q: dict) -> Cell:
    if q.get("adequate"):
        return Cell("✓ within the allowance", tone="ok")
    return Cell("✗ exceeds the allowance", tone="no")


def _first(quantities: list[dict], key: str):
    for q in quantities:
        value = _disc(q).get(key)
        if value is not None:
            return value
    return None


def _order(disc: dict) -> Cell:
    observed = fmt.number(disc.get("observed_order"), 3)
    formal = disc.get("formal_order")
    behaviour = disc.get("behaviour") or "unknown"
    asymptotic = "" if disc.get("asymptotic", True) else ", not yet asymptotic"
    if observed is None:
        return Cell(f"not available ({behaviour})", True)
    return Cell(f"{observed} (formal {formal}; {behaviour}{asymptotic})")


def _driver(indices) -> Cell:
    if not indices:
        return Cell(fmt.NOT_AVAILABLE, True, "no Sobol indices")
    name = max(indices, key=lambda n: fmt.finite((indices[n] or {}).get("total")) or 0.0)
    total = fmt.number((indices[name] or {}).get("total"), 2)
    return Cell(f"{name} (total Sobol index {total})")


def _shares(q: dict) -> Cell:
    shares = q.get("shares")
    if not shares:
        return Cell(fmt.NOT_AVAILABLE, True, "a component is undefined")
    parts = [fmt.percent(shares.get(k)).text for k in ("discretisation", "roundoff", "parameter")]
    return Cell(" / ".join(parts))
