"""Page 1 of the report, the memo: the forecast per quantity, what needs attention, and in one
line what changed since the last run. Pure functions on budget.json (no markup)."""

from __future__ import annotations

from errbudget.case.dates import date_text
from errbudget.outputs.flags import DOUBT, WORDS, decisive, new_counts_outside, ordered, weight
from errbudget.report import fmt
from errbudget.report.fmt import Cell

KIND_WORDS = {
    "value": "value at {at}",
    "time-to": "time to reach {level}",
    "peak": "highest value",
    "minimum": "lowest value",
}


def dated(budget: dict, elapsed) -> str | None:
    sim = budget.get("simulation") or {}
    return date_text(sim.get("start"), fmt.finite(elapsed), sim.get("days_per_time_unit"))


def _what(q: dict, budget: dict) -> str:
    at, level = q.get("at") or {}, q.get("level") or {}
    at_text = fmt.step(at.get("value"), at.get("unit")).text
    if at.get("date"):
        at_text += f" ({at['date']})"
    level_text = fmt.with_unit(level.get("value"), level.get("unit"), fmt.SIG_VALUE).text
    return KIND_WORDS.get(q.get("kind"), q.get("kind") or "").format(at=at_text, level=level_text)


def forecast_rows(budget: dict) -> list[dict]:
    """One row per quantity: the accurate forecast with its interval, the numerical error of
    the case's step against the allowance, and the coarsest step adequate for the quantity."""
    rows = []
    for q in budget.get("quantities") or []:
        unit, par = q.get("unit"), q.get("parameter") or {}
        value = q.get("reference") if q.get("reference") is not None else q.get("value")
        times, allowance = fmt.finite(q.get("numerical_to_allowance")), q.get("allowance")
        numerical = times * allowance if times is not None and allowance else None
        step = q.get("recommended_step") or {}
        dates = q.get("dates") or {}
        rows.append(
            {
                "name": q.get("name", ""),
                "what": _what(q, budget),
                "value": fmt.with_unit(value, unit, fmt.SIG_VALUE, why="not reached"),
                "date": dates.get("reference") or "",
                "interval": fmt.interval(
                    par.get("low"), par.get("high"), unit, par.get("level"), why="undefined"
                ),
                "interval_dates": (
                    f"{dates['low']} – {dates['high']}"
                    if dates.get("low") and dates.get("high")
                    else ""
                ),  # fmt: skip
                "error": fmt.with_unit(numerical, unit, why="cannot be judged"),
                "allowance": fmt.with_unit(allowance, unit, why="undefined"),
                "ratio": fmt.ratio(times, why="undefined"),
                "adequate": bool(q.get("adequate")),
                "step": fmt.step(
                    step.get("value"), step.get("unit"), why="none of the steps tried"
                ),
            }
        )
    return rows


def attention(budget: dict) -> list[dict]:
    """What weighs on the decision, heaviest first: the flags that change the verdict or
    question what it is measured against, new counts the last forecast missed, clearance."""
    items = [
        {"code": f.get("code", ""), "weight": WORDS[weight(f)], "message": f.get("message", "")}
        for f in decisive(budget.get("flags"))
    ]
    missed = new_counts_outside(budget.get("since_last"))
    if missed:
        items.append(
            {
                "code": "new counts",
                "weight": WORDS[2],
                "message": (
                    f"{missed['n_exceed']} of the {len(missed['times'])} counts that came in "
                    "since the last run lie outside what that run's budget explains (|E| > 2 "
                    "u_val): the last forecast missed them. See “Since the last run”."
                ),
            }
        )
    clearance = budget.get("clearance") or {}
    if fmt.finite(clearance.get("share")):
        by = clearance.get("by") or {}
        items.append(
            {
                "code": "clearance",
                "weight": "outcome",
                "message": (
                    f"{fmt.percent(clearance['share']).text} of the parameter sets "
                    f"({clearance.get('members')} of {clearance.get('of')}) reach zero by "
                    f"{fmt.step(by.get('value'), by.get('unit')).text}: an outcome of the "
                    "model, not of the step."
                ),
            }
        )
    return items


def notes(budget: dict) -> list[dict]:
    """The flags that do not weigh on the decision (page 1 lists the others)."""
    return [
        {"code": f.get("code", ""), "weight": WORDS[weight(f)], "message": f.get("message", "")}
        for f in ordered(budget.get("flags"))
        if weight(f) < DOUBT
    ]


def since_brief(budget: dict) -> str | None:
    """One sentence for page 1 on a rerun: what changed, and how the last forecast did."""
    since = budget.get("since_last")
    if not since:
        return None
    parts = []
    if since.get("counts_changed"):
        parts.append("the counts changed")
    if since.get("case_changed"):
        parts.append("the case file changed")
    narrowed = since.get("narrowed") or []
    if narrowed:
        parts.append("the spread of " + ", ".join(narrowed) + " narrowed")
    moved = since.get("moved") or []
    if moved:
        parts.append(", ".join(moved) + " moved by more than their earlier sd")
    parts.append("the verdict " + ("changed" if since.get("verdict_changed") else "is unchanged"))
    parts.append(
        "the recommended step "
        + ("changed" if since.get("recommended_step_changed") else "is unchanged")
    )
    new = since.get("new_counts") or {}
    if new.get("times"):
        n, out = len(new["times"]), new.get("n_exceed") or 0
        parts.append(
            f"{out} of {n} new counts lie outside what the last budget explains"
            if out
            else f"all {n} new counts lie within what the last budget explains"
        )
    return f"Since the last run ({since.get('previous_time')}): " + "; ".join(parts) + "."


def new_counts(budget: dict) -> dict | None:
    """The table of the last forecast against the counts that came in since."""
    new = ((budget.get("since_last") or {}).get("new_counts")) or {}
    if not new.get("times"):
        return None
    unit, time_unit = new.get("unit"), new.get("time_unit")
    rows = []
    for i, t in enumerate(new["times"]):
        when = fmt.step(t, time_unit).text
        date = dated(budget, t)
        rows.append(
            [
                Cell(f"{when} ({date})" if date else when),
                fmt.with_unit(new["counts"][i], unit, fmt.SIG_VALUE),
                fmt.with_unit(new["forecast"][i], unit, fmt.SIG_VALUE),
                fmt.with_unit(new["E"][i], unit),
                fmt.with_unit(new["u_val"][i], unit),
                Cell("outside", tone="no") if new["exceed"][i] else Cell("within", tone="ok"),
            ]
        )
    headers = [
        "Time",
        "Count",
        "Last forecast",
        "Forecast − count (E)",
        "Validation uncertainty",
        "|E| ≤ 2 × uncertainty?",
    ]
    return {"headers": headers, "rows": rows, "outside": new.get("n_exceed") or 0}
