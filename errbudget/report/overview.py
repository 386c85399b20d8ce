"""overview.html: the programme overview of a batch, one self-contained printable page.

The rows are :class:`errbudget.outputs.overview.Row`, already in order of urgency (failed,
not adequate, adequate). Each column header is a button that sorts the table by that column
(a few lines of inline script; without it the page keeps the urgency order); each case links
to its own budget.html beside the overview. Every user string is escaped (autoescape); the
page loads nothing from anywhere else.
"""

from __future__ import annotations

from collections import Counter
from functools import cache
from pathlib import Path

import jinja2

from errbudget.outputs.overview import ADEQUATE, FAILED, NOT_ADEQUATE, URGENCY, Row, ordered
from errbudget.report import fmt

HERE = Path(__file__).parent
TEMPLATE = "overview.html.j2"


@cache
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(HERE),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_overview(rows: list[Row], *, when: str, where: str) -> str:
    """The overview page of a batch.

    Parameters
    ----------
    rows : list of Row
        One per case, in any order (shown by urgency).
    when : str
        When the batch ran (ISO 8601).
    where : str
        Where it ran ("in this process", "on a local cluster of 2 worker processes", ...).
    """
    counts = Counter(row.verdict for row in rows)
    return (
        _environment()
        .get_template(TEMPLATE)
        .render(
            rows=[_cells(row) for row in ordered(rows)],
            total=len(rows),
            adequate=counts[ADEQUATE],
            not_adequate=counts[NOT_ADEQUATE],
            failed=counts[FAILED],
            when=when,
            where=where,
        )
    )


def _cells(row: Row) -> dict:
    """What the template shows of a row, each cell with its text and its sort key."""
    error = fmt.with_unit(row.error, row.unit, why="no quantity could be evaluated")
    allowance = fmt.with_unit(row.allowance, row.unit, why="no allowance")
    ratio = fmt.ratio(row.ratio, why="not evaluated")
    return {
        "case": row.case,
        "path": row.path,
        "title": row.title,
        "report": row.report,
        "verdict": row.verdict,
        "tone": {FAILED: "failed", NOT_ADEQUATE: "no", ADEQUATE: "ok"}[row.verdict],
        "rank": URGENCY[row.verdict] * 10_000 + row.order,
        "binding": row.binding or "",
        "step": _text(fmt.step(row.step, row.time_unit)) if row.step is not None else "",
        "step_key": row.step if row.step is not None else "",
        "recommended": _text(fmt.step(row.recommended, row.time_unit, why="none qualifies"))
        if row.verdict != FAILED
        else "",
        "recommended_key": row.recommended if row.recommended is not None else "",
        "error": _text(error) if row.verdict != FAILED else "",
        "error_key": row.error if row.error is not None else "",
        "allowance": _text(allowance) if row.verdict != FAILED else "",
        "ratio": _text(ratio) if row.verdict != FAILED else "",
        "ratio_key": row.ratio if row.ratio is not None else "",
        "flags": ", ".join(row.flags),
        "note": row.message if row.verdict == FAILED else "",
        "exit_code": row.exit_code,
    }


def _text(cell: fmt.Cell) -> str:
    return cell.text + (f" ({cell.why})" if cell.missing and cell.why else "")
