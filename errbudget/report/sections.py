"""The report's optional and supporting sections: step search, changes, fit, validation.

Pure functions on dicts, robust to missing keys (these parts of budget.json are written by
other modules and may grow): whatever is absent is shown as "not available" or left out.
"""

from __future__ import annotations

from errbudget.report import fmt
from errbudget.report.fmt import Cell


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


def _before_now(item, unit: str | None, sig: int = fmt.SIG_ERROR) -> Cell:
    """ "before → now" of one item of ``since_last`` with the unit once."""
    item = item if isinstance(item, dict) else {}
    before = fmt.number(item.get("before"), sig)
    now = fmt.with_unit(item.get("now"), unit, sig, why="not recorded")
    if before is None:
        return now
    return Cell(f"{before} → {now.text}")


def changes(since: dict | None, quantities: list[dict]) -> dict | None:
    """The comparison with the previous run (history.compare), one row per quantity."""
    if not since:
        return None
    units = {q.get("name"): q.get("unit") for q in quantities}

    def pair(entry, show):
        entry = entry if isinstance(entry, dict) else {}
        return show(entry.get("before")), show(entry.get("now"))

    def verdict_word(v):
        return "not recorded" if v is None else ("adequate" if v else "not adequate")

    def step_text(v):
        v = v or {}
        return fmt.step(v.get("value"), v.get("unit"), why="none qualified").text

    rows = []
    for name, item in (since.get("quantities") or {}).items():
        item = item if isinstance(item, dict) else {}
        unit = units.get(name)
        rows.append(
            {
                "name": name,
                "cells": [
                    _before_now(item.get("reference"), unit, fmt.SIG_VALUE),
                    _before_now(item.get("parameter_sd"), unit),
                    Cell(item.get("spread") or "not recorded"),
                    _before_now(item.get("discretisation"), unit),
                ],
            }
        )
    parameters = []
    for name, item in (since.get("parameters") or {}).items():
        item = item if isinstance(item, dict) else {}
        unit = item.get("unit")
        shift = fmt.finite(item.get("shift"))
        parameters.append(
            {
                "name": name,
                "cells": [
                    _before_now(
                        {"before": item.get("value_before"), "now": item.get("value_now")},
                        unit,
                        fmt.SIG_VALUE,
                    ),
                    _before_now({"before": item.get("sd_before"), "now": item.get("sd_now")}, unit),
                    Cell(item.get("change") or "new"),
                    Cell(f"{fmt.number(shift, 2)} earlier sd" if shift is not None else ""),
                ],
            }
        )
    return {
        "previous_time": since.get("previous_time") or "not recorded",
        "case_changed": fmt.scalar(since.get("case_changed")).text,
        "counts_changed": fmt.scalar(since.get("counts_changed")).text,
        "verdict": pair(since.get("verdict"), verdict_word),
        "recommended": pair(since.get("recommended_step"), step_text),
        "quantities": rows,
        "parameters": parameters,
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


VALIDATION_COLUMNS = (  # budget.json key, heading (the unit is added)
    ("times", "Time"),
    ("D", "Count D"),
    ("S", "Model S"),
    ("E", "E = S − D"),
    ("u_val", "Validation uncertainty"),
)


def validation(data: dict | None, dates: list | None = None) -> dict | None:
    """The V&V 20 comparison at the count times, with headings a biologist reads.

    Parameters
    ----------
    data : dict or None
        budget.json's ``validation``.
    dates : list of str, optional
        The calendar date of each count time (a case with a start date).
    """
    if not data:
        return None
    unit, time_unit = data.get("unit"), data.get("time_unit")
    columns = [(k, h) for k, h in VALIDATION_COLUMNS if isinstance(data.get(k), list)]
    length = min((len(data[k]) for k, _ in columns), default=0)
    exceed = data.get("exceed") if isinstance(data.get("exceed"), list) else []
    dates = dates or data.get("dates") or []
    records = []
    for i in range(length):
        row = []
        for key, _ in columns:
            value = data[key][i]
            if key == "times":
                text = fmt.step(value, None).text
                row.append(Cell(f"{text} ({dates[i]})" if i < len(dates) and dates[i] else text))
            else:
                row.append(_cell(value))
        beyond = i < len(exceed) and bool(exceed[i])
        row.append(Cell("outside", tone="no") if beyond else Cell("within", tone="ok"))
        records.append(row)
    headers = [f"{h} [{time_unit if k == 'times' else unit}]" for k, h in columns]
    coverage = fmt.number(data.get("coverage"), 3) or "2"
    headers.append(f"|E| ≤ {coverage} × uncertainty?")
    rows = [
        ("Count times compared", fmt.scalar(data.get("n_times"))),
        ("Beyond the uncertainty", fmt.scalar(data.get("n_exceed"))),
    ]
    flag = data.get("flag") or {}
    statement = data.get("statement")
    return {
        "notes": [statement] if statement else [],
        "flag": flag.get("message") if isinstance(flag, dict) else None,
        "rows": rows,
        "headers": headers,
        "records": records,
    }


def _cell(value) -> Cell:
    """A table cell whose unit is in the column header."""
    if isinstance(value, bool) or not isinstance(value, float | int):
        return fmt.scalar(value)
    return fmt.with_unit(value, None, fmt.SIG_VALUE)


def better_data(data: dict | None, quantities: list[dict], recommended: dict | None) -> dict | None:
    """What better data would buy: with counts, twice the counts (parameter sd now and then);
    without, each uncertain input's sd halved in turn (one column per input)."""
    if not isinstance(data, dict) or not data:
        return None
    now = recommended or {}
    step_now = fmt.step(now.get("value"), now.get("unit"), why="no step qualifies")
    inputs = data.get("inputs") if isinstance(data.get("inputs"), dict) else None
    if inputs:
        columns = [f"{name}’s sd halved" for name in inputs]
        rows = []
        for q in quantities:
            name, unit = q.get("name", ""), q.get("unit")
            cells = [
                fmt.with_unit(((item or {}).get("parameter_sd") or {}).get(name), unit, why="n/a")
                for item in inputs.values()
            ]
            now_sd = fmt.with_unit((q.get("parameter") or {}).get("sd"), unit, why="undefined")
            rows.append({"label": f"{name}: parameter sd", "now": now_sd, "cells": cells})
        steps = [
            fmt.step(
                ((item or {}).get("recommended_step") or {}).get("value"),
                ((item or {}).get("recommended_step") or {}).get("unit"),
                why="no step qualifies",
            )
            for item in inputs.values()
        ]
        rows.append({"label": "Recommended step", "now": step_now, "cells": steps})
        draws = [
            fmt.scalar(round(fmt.finite((i or {}).get("effective_draws")) or 0))
            for i in inputs.values()
        ]
        rows.append({"label": "Effective draws (reweighting)", "now": Cell(""), "cells": draws})
    else:
        columns = ["With twice the counts"]
        then_sd = data.get("parameter_sd") if isinstance(data.get("parameter_sd"), dict) else {}
        rows = []
        for q in quantities:
            name, unit = q.get("name", ""), q.get("unit")
            if name not in then_sd:
                continue
            now_sd = fmt.with_unit((q.get("parameter") or {}).get("sd"), unit, why="undefined")
            then = fmt.with_unit(then_sd.get(name), unit, why="undefined")
            rows.append({"label": f"{name}: parameter sd", "now": now_sd, "cells": [then]})
        then_step = data.get("recommended_step") or {}
        rows.append(
            {
                "label": "Recommended step",
                "now": step_now,
                "cells": [fmt.step(then_step.get("value"), then_step.get("unit"), why="none")],
            }
        )
    return {
        "statement": data.get("statement") or "",
        "assumption": data.get("assumption") or "",
        "columns": columns,
        "rows": rows,
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
