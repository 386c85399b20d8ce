"""The report's optional and supporting sections: step search, changes, fit, validation.

Pure functions on dicts, robust to missing keys (these parts of budget.json are written by
other modules and may grow): whatever is absent is shown as "not available" or left out.
"""

from __future__ import annotations

from errbudget.report import fmt
from errbudget.report.fmt import Cell

LIST_SHOWN = 8  # lists longer than this are summarised in generic tables, not printed whole
PROSE_LENGTH = 80  # longer strings are sentences: shown as paragraphs, not table cells


def step_search(recommendation: dict) -> list[dict]:
    """Rows of the coarse-to-fine search for the recommended step, and its half-step check."""
    rows = []
    for t in recommendation.get("tried") or []:
        step = t.get("step") or {}
        result = "adequate" if t.get("adequate") else "not adequate"
        rows.append(
            {
                "step": fmt.step(step.get("value"), step.get("unit")),
                "ratio": fmt.ratio(t.get("worst_ratio"), why=t.get("note") or None),
                "artefacts": ", ".join(t.get("artefacts") or []) or "none",
                "result": result,
                "adequate": bool(t.get("adequate")),
            }
        )
    half = recommendation.get("half_step_check")
    if half:
        step = half.get("step") or {}
        rows.append(
            {
                "step": fmt.Cell(
                    fmt.step(step.get("value"), step.get("unit")).text + " (half-step check)"
                ),
                "ratio": fmt.ratio(half.get("worst_ratio")),
                "artefacts": "not recorded",
                "result": "adequate" if half.get("adequate") else "not adequate",
                "adequate": bool(half.get("adequate")),
            }
        )
    return rows


def _change_cell(item, unit: str | None) -> list[Cell]:
    """Before, now and change of one item of ``since_last`` (a signed change)."""
    if not isinstance(item, dict):
        return [fmt.scalar(item), Cell(""), Cell("")]
    change = fmt.finite(item.get("change"))
    sign = "+" if change is not None and change > 0 else ""
    changed = fmt.with_unit(change, unit, why="a value is missing")
    if change is not None:
        changed = Cell(sign + changed.text)
    return [
        fmt.with_unit(item.get("before"), unit, fmt.SIG_VALUE, why="not recorded"),
        fmt.with_unit(item.get("now"), unit, fmt.SIG_VALUE, why="not recorded"),
        changed,
    ]


def changes(since: dict | None, quantities: list[dict]) -> dict | None:
    """The comparison with the previous run (history.compare), robust to missing keys."""
    if not since:
        return None
    units = {q.get("name"): q.get("unit") for q in quantities}
    labels = {
        "value": "value",
        "reference": "reference",
        "discretisation": "discretisation error (percentile)",
        "roundoff": "round-off",
        "parameter_sd": "parameter sd",
    }

    def pair(entry, show):
        entry = entry if isinstance(entry, dict) else {}
        return show(entry.get("before")), show(entry.get("now"))

    def verdict_word(v):
        return "not recorded" if v is None else ("adequate" if v else "not adequate")

    def step_text(v):
        v = v or {}
        return fmt.step(v.get("value"), v.get("unit"), why="none qualified").text

    items = []
    for name, changes in (since.get("quantities") or {}).items():
        rows = []
        for key, label in labels.items():
            if isinstance(changes, dict) and key in changes:
                rows.append({"label": label, "cells": _change_cell(changes[key], units.get(name))})
        spread = changes.get("spread") if isinstance(changes, dict) else None
        items.append({"name": name, "rows": rows, "spread": spread})
    return {
        "previous_time": since.get("previous_time") or "not recorded",
        "case_changed": fmt.scalar(since.get("case_changed")).text,
        "counts_changed": fmt.scalar(since.get("counts_changed")).text,
        "verdict": pair(since.get("verdict"), verdict_word),
        "recommended": pair(since.get("recommended_step"), step_text),
        "quantities": items,
    }


def fit_summary(fit: dict | None) -> dict | None:
    if not fit:
        return None
    rows = []
    for name, p in (fit.get("parameters") or {}).items():
        p = p if isinstance(p, dict) else {"value": p}
        rows.append(
            {
                "name": name,
                "value": fmt.with_unit(p.get("value"), p.get("unit")),
                "sd": fmt.with_unit(
                    p.get("sd"), p.get("unit"), why="the curvature at the optimum was not usable"
                ),
            }
        )
    for name, p in (fit.get("nuisance") or {}).items():
        p = p if isinstance(p, dict) else {"value": p}
        rows.append(
            {
                "name": f"{name} (observation model)",
                "value": fmt.with_unit(p.get("value"), p.get("unit"), fmt.SIG_VALUE),
                "sd": Cell(""),
            }
        )
    summary = [
        (label, fmt.scalar(fit.get(key)))
        for key, label in (
            ("error", "observation model"),
            ("n_counts", "counts fitted"),
            ("converged", "optimiser converged"),
            ("uncertainty_method", "uncertainty from"),
            ("loglik", "log-likelihood"),
            ("aic", "AIC"),
        )
        if key in fit
    ]
    return {"parameters": rows, "summary": summary, "message": fit.get("message")}


def key_values(data: dict | None, prefix: str = "") -> list[tuple[str, Cell]] | None:
    """Any nested dict as (dotted key, value) rows; long lists summarised."""
    if not data:
        return None
    rows: list[tuple[str, Cell]] = []
    for key, value in data.items():
        label = f"{prefix}{key}"
        if isinstance(value, dict):
            rows.extend(key_values(value, label + " › ") or [(label, Cell("(empty)"))])
        elif isinstance(value, list):
            if len(value) <= LIST_SHOWN and all(not isinstance(v, dict | list) for v in value):
                rows.append((label, Cell(", ".join(fmt.scalar(v).text for v in value))))
            else:
                rows.append((label, Cell(f"{len(value)} entries (see budget.json)")))
        else:
            rows.append((label, fmt.scalar(value)))
    return rows


def validation(data: dict | None) -> dict | None:
    """The validation comparison as a table of whatever keys it has.

    Lists of plain values that share the most common length (one entry per count time:
    times, S, D, E, u_val...) become the columns of one table; long strings become paragraphs;
    everything else is listed as key-value rows. A column's unit is read from ``time_unit``
    for keys naming a time and from ``unit`` for the other numeric columns, when the dict
    carries them.
    """
    if not data:
        return None
    lengths = [len(v) for v in data.values() if _plain_list(v)]
    length = max(set(lengths), key=lengths.count) if lengths else 0
    columns = [k for k, v in data.items() if _plain_list(v) and len(v) == length]
    if length < 2 or len(columns) < 2:
        columns = []
    rest = {k: v for k, v in data.items() if k not in columns}
    unit, time_unit = data.get("unit"), data.get("time_unit")
    units = {}
    for key in columns:
        numeric = any(isinstance(v, float | int) and not isinstance(v, bool) for v in data[key])
        kind = time_unit if "time" in key.lower() else unit
        units[key] = kind if numeric and isinstance(kind, str) else None
    records = [[_cell(data[k][i]) for k in columns] for i in range(length)]
    headers = [f"{k} [{units[k]}]" if units[k] else k for k in columns]
    notes = [v for v in rest.values() if isinstance(v, str) and len(v) > PROSE_LENGTH]
    rest = {k: v for k, v in rest.items() if not (isinstance(v, str) and v in notes)}
    return {"notes": notes, "rows": key_values(rest) or [], "headers": headers, "records": records}


def _plain_list(value) -> bool:
    return isinstance(value, list) and all(not isinstance(v, dict | list) for v in value)


def _cell(value) -> Cell:
    """A table cell whose unit is in the column header."""
    if isinstance(value, bool) or not isinstance(value, float | int):
        return fmt.scalar(value)
    return fmt.with_unit(value, None, fmt.SIG_VALUE)


def better_data(data: dict | None, quantities: list[dict], recommended: dict | None) -> dict | None:
    """What twice the counts would change: the statement and parameter sd now vs then."""
    if not isinstance(data, dict) or not data:
        return None
    then_sd = data.get("parameter_sd") if isinstance(data.get("parameter_sd"), dict) else {}
    rows = []
    for q in quantities:
        name, unit = q.get("name", ""), q.get("unit")
        if name not in then_sd:
            continue
        rows.append(
            {
                "name": name,
                "now": fmt.with_unit((q.get("parameter") or {}).get("sd"), unit, why="undefined"),
                "then": fmt.with_unit(then_sd.get(name), unit, why="undefined"),
            }
        )
    now = recommended or {}
    then = data.get("recommended_step") or {}
    return {
        "statement": data.get("statement") or "",
        "assumption": data.get("assumption") or "",
        "rows": rows,
        "step_now": fmt.step(now.get("value"), now.get("unit"), why="no step qualifies"),
        "step_then": fmt.step(then.get("value"), then.get("unit"), why="no step qualifies"),
    }


def _seconds(value) -> Cell:
    """A clock time in seconds, milliseconds or microseconds, whichever reads best."""
    x = fmt.finite(value)
    if x is None:
        return Cell(fmt.NOT_AVAILABLE, True)
    for scale, unit in ((1.0, "s"), (1e-3, "ms"), (1e-6, "µs")):
        if abs(x) >= scale or unit == "µs":
            return fmt.with_unit(x / scale, unit, 2)
    return fmt.with_unit(x, "s", 2)  # not reached: the loop ends on µs


def cost(data: dict | None) -> dict | None:
    """Runs per second and full-ensemble time at the case's and the recommended step."""
    if not isinstance(data, dict) or not data:
        return None
    steps = data.get("steps_per_run") if isinstance(data.get("steps_per_run"), dict) else {}
    throughput = fmt.finite(data.get("member_steps_per_second"))
    case_seconds = fmt.finite(data.get("ensemble_seconds_at_case_step"))
    case_steps = fmt.finite(steps.get("case"))
    members = None
    if throughput and case_seconds and case_steps:
        members = round(throughput * case_seconds / case_steps)  # inverts how run.py sums it
    why = "no recommended step"
    return {
        "rows": [
            {
                "label": "Steps per run",
                "case": fmt.scalar(steps.get("case")),
                "rec": fmt.scalar(steps.get("recommended"))
                if steps.get("recommended") is not None
                else Cell(fmt.NOT_AVAILABLE, True, why),
            },
            {
                "label": "Runs per second",
                "case": fmt.with_unit(data.get("runs_per_second_at_case_step"), "runs/s", 2),
                "rec": fmt.with_unit(
                    data.get("runs_per_second_at_recommended_step"), "runs/s", 2, why=why
                ),
            },
            {
                "label": "A full ensemble" + (f" ({members} parameter sets)" if members else ""),
                "case": _seconds(data.get("ensemble_seconds_at_case_step")),
                "rec": _seconds(data.get("ensemble_seconds_at_recommended_step"))
                if fmt.finite(data.get("ensemble_seconds_at_recommended_step")) is not None
                else Cell(fmt.NOT_AVAILABLE, True, why),
            },
        ],
        "throughput": fmt.with_unit(throughput, "member steps/s", 2),
        "note": _sentence(data.get("note")),
    }


def _sentence(text) -> str:
    """A note as a sentence: capital first letter, no final full stop (the template adds it)."""
    text = str(text or "").strip().rstrip(".")
    return text[:1].upper() + text[1:]
