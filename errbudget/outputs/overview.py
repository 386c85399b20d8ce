"""The programme overview: one row per case of a batch, as CSV and as a compact terminal table.

A row holds what a programme manager scans for: the verdict, the quantity that binds it, the
case's step and the recommended one, the numerical error of the binding quantity against its
allowance (both with the quantity's unit), the flags, and where the case's budget.html is. A
case that failed has the verdict FAILED and its error message. Rows are in order of urgency
(failed, not adequate, adequate), in the order the cases were given within each verdict.
The HTML page of the same rows is :mod:`errbudget.report.overview`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

from errbudget.budget.wording import plain_step
from errbudget.errors import InputError
from errbudget.outputs.tables import csv_text

CSV_NAME = "overview.csv"
HTML_NAME = "overview.html"
FAILED, NOT_ADEQUATE, ADEQUATE = "FAILED", "NOT ADEQUATE", "ADEQUATE"
URGENCY = {FAILED: 0, NOT_ADEQUATE: 1, ADEQUATE: 2}  # sort key of a verdict: worst first
NAME_WIDTH = 24  # characters of a case or quantity name in the terminal table
MESSAGE_WIDTH = 160  # characters of a failure message in the terminal table's notes


@dataclass(frozen=True)
class Row:
    """One case of the programme.

    Attributes
    ----------
    order : int -- position of the case on the command line (from 0)
    case : str -- the case file's stem, the name of its output folder
    path : str -- the case file as given
    title : str
    verdict : str -- ADEQUATE, NOT ADEQUATE or FAILED
    binding : str or None -- the quantity that binds the verdict
    step, recommended : float or None -- the case's step and the coarsest adequate step [T]
    time_unit : str or None -- T
    error, allowance : float or None -- numerical error of the binding quantity and the error
        it may carry [quantity unit]
    unit : str or None -- the binding quantity's unit
    ratio : float or None -- error / allowance
    flags : tuple of str -- flag codes
    message : str -- the failure (exit 2 or 1) or the verdict's reason
    exit_code : int -- 0 for a case that ran, else its own exit code (2 bad input, 1 internal)
    report : str or None -- budget.html relative to the overview's folder
    """

    order: int
    case: str
    path: str
    title: str
    verdict: str
    binding: str | None = None
    step: float | None = None
    recommended: float | None = None
    time_unit: str | None = None
    error: float | None = None
    allowance: float | None = None
    unit: str | None = None
    ratio: float | None = None
    flags: tuple[str, ...] = ()
    message: str = ""
    exit_code: int = 0
    report: str | None = None


def row_for_budget(order: int, case_path: Path, budget: dict) -> Row:
    """The overview row of a case that ran, from its budget.json."""
    verdict = budget["verdict"]
    quantity = next(
        (q for q in budget["quantities"] if q["name"] == verdict.get("binding_quantity")), None
    )
    error = allowance = unit = None
    if quantity is not None:
        unit, allowance = quantity["unit"], quantity["allowance"]
        times = quantity["numerical_to_allowance"]
        error = times * allowance if times is not None and allowance is not None else None
    step = budget["simulation"]["step"]
    return Row(
        order=order,
        case=case_path.stem,
        path=str(case_path),
        title=str(budget["case"].get("title") or ""),
        verdict=ADEQUATE if verdict["adequate"] else NOT_ADEQUATE,
        binding=verdict.get("binding_quantity"),
        step=step["value"],
        recommended=(verdict.get("recommended_step") or {}).get("value"),
        time_unit=step["unit"],
        error=error,
        allowance=allowance,
        unit=unit,
        ratio=verdict.get("ratio"),
        flags=tuple(flag["code"] for flag in budget.get("flags") or ()),
        message=verdict["reason"],
        report=f"{case_path.stem}/budget.html",
    )


def row_for_failure(order: int, case_path: Path, message: str, exit_code: int) -> Row:
    """The overview row of a case that did not run (its message is the one-line error)."""
    return Row(
        order=order,
        case=case_path.stem,
        path=str(case_path),
        title="",
        verdict=FAILED,
        message=message,
        exit_code=exit_code,
    )


def ordered(rows: list[Row]) -> list[Row]:
    """Rows by urgency of the verdict, then in the order the cases were given."""
    return sorted(rows, key=lambda row: (URGENCY[row.verdict], row.order))


def overview_csv(rows: list[Row]) -> str:
    """overview.csv: one row per case, numbers plain with their units in their own columns."""
    header = [
        "case", "case_file", "title", "verdict", "exit_code", "binding_quantity", "step",
        "recommended_step", "step_unit", "numerical_error", "allowance", "quantity_unit",
        "error_to_allowance", "flags", "message", "report",
    ]  # fmt: skip
    body = [
        [
            row.case,
            row.path,
            row.title,
            row.verdict,
            row.exit_code,
            row.binding,
            row.step,
            row.recommended,
            row.time_unit,
            row.error,
            row.allowance,
            row.unit,
            row.ratio,
            " ".join(row.flags),
            row.message,
            row.report,
        ]  # fmt: skip
        for row in ordered(rows)
    ]
    return csv_text(header, body)


def terminal_table(rows: list[Row]) -> str:
    """The overview as a compact text table, failure messages below it."""
    header = (
        "case", "verdict", "binding quantity", "step", "recommended", "error / allowed", "flags",
    )  # fmt: skip
    lines = [header]
    for row in ordered(rows):
        if row.verdict == FAILED:
            kind = "bad input" if row.exit_code == 2 else "internal error"
            lines.append((_cut(row.case), f"{FAILED} ({kind})", "", "", "", "", ""))
            continue
        lines.append(
            (
                _cut(row.case),
                row.verdict,
                _cut(row.binding or "none"),
                _step(row.step, row.time_unit),
                _step(row.recommended, row.time_unit) if row.recommended else "none",
                _error_text(row),
                ", ".join(row.flags),
            )
        )
    widths = [max(len(line[i]) for line in lines) for i in range(len(header))]
    text = ["  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True)).rstrip()
            for line in lines]  # fmt: skip
    text.insert(1, "  ".join("-" * w for w in widths))
    failed = [row for row in ordered(rows) if row.verdict == FAILED]
    if failed:
        text.append("")
        text += [f"{row.case}: {_cut(row.message, MESSAGE_WIDTH)}" for row in failed]
    return "\n".join(text)


def check_overview_place(out: Path) -> None:
    """Refuse, before anything runs, an overview that could not be written into ``out``."""
    if out.exists() and not out.is_dir():
        raise InputError("--out is a file, not a folder; choose a folder", str(out))
    for name in (CSV_NAME, HTML_NAME):
        path = out / name
        if path.is_dir() and not path.is_symlink():
            raise InputError("a folder is in the way of the programme overview", str(path))


def _error_text(row: Row) -> str:
    if row.error is None or row.allowance is None:
        return "not available"
    finite = row.ratio is not None and math.isfinite(row.ratio)
    ratio = f" ({_number(row.ratio)}x)" if finite else ""
    return f"{_number(row.error)} / {_with_unit(row.allowance, row.unit)}{ratio}"


def _with_unit(value: float | None, unit: str | None) -> str:
    if value is None:
        return "not available"
    return f"{_number(value)} {unit}" if unit else _number(value)


def _step(value: float | None, unit: str | None) -> str:
    return "not available" if value is None else f"{plain_step(value)} {unit or ''}".rstrip()


def _number(value: float) -> str:
    """Three significant digits; whole numbers from 1000 to a million without an exponent."""
    return f"{value:.0f}" if 1e3 <= abs(value) < 1e6 else f"{value:.3g}"


def _cut(text: str, width: int = NAME_WIDTH) -> str:
    text = " ".join(str(text).split())  # one line, whatever the name holds
    return text if len(text) <= width else text[: width - 3] + "..."
