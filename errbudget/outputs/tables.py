"""CSV companions of budget.json, so the numbers can go straight into a spreadsheet."""

from __future__ import annotations

import csv
import io

# A text cell starting with one of these is run as a formula by spreadsheet programs; a
# leading apostrophe makes it plain text (OWASP "CSV injection" advice). Numbers are kept.
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutral(value):
    """A CSV cell: None as empty, a text that a spreadsheet would run prefixed with ``'``.

    A carriage return inside a text becomes a line feed: the writer quotes a cell holding
    its line terminator ("\n") but not a lone "\r", which readers take for a row's end.
    """
    if value is None:
        return ""
    if not isinstance(value, str):
        return value
    if value.startswith(FORMULA_START):
        value = "'" + value
    return value.replace("\r\n", "\n").replace("\r", "\n")


def csv_text(header: list[str], rows: list[list]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([neutral(value) for value in row])
    return buffer.getvalue()


def ladder_csv(budget: dict) -> str:
    """One row per quantity and ladder level: step and value at nominal parameters."""
    time_unit = budget["simulation"]["step"]["unit"]
    rows = []
    for q in budget["quantities"]:
        for level in q["discretisation"]["ladder"]:
            rows.append([q["name"], level["step"], time_unit, level["value"], q["unit"]])
    return csv_text(["quantity", "step", "step_unit", "value", "value_unit"], rows)


def summary_csv(budget: dict) -> str:
    """One row per quantity: the budget components, the spread and the verdict."""
    rows = []
    for q in budget["quantities"]:
        d, p = q["discretisation"], q["parameter"]
        rows.append(
            [
                q["name"],
                q["unit"],
                q["value"],
                q["reference"],
                d["error"],
                d["error_percentile"],
                d["percentile"],
                d["gci"],
                d["observed_order"],
                d["behaviour"],
                q["roundoff"]["error"],
                p["mean"],
                p["sd"],
                p["low"],
                p["high"],
                p["level"],
                q["numerical_to_parameter"],
                q["allowance"],
                q["adequate"],
            ]
        )
    header = [
        "quantity",
        "unit",
        "value_at_case_step",
        "reference",
        "richardson_error",
        "discretisation_error_at_percentile",
        "percentile",
        "gci",
        "observed_order",
        "behaviour",
        "roundoff_error",
        "ensemble_mean",
        "parameter_sd",
        "interval_low",
        "interval_high",
        "interval_level",
        "numerical_to_parameter",
        "allowance",
        "adequate",
    ]
    return csv_text(header, rows)
