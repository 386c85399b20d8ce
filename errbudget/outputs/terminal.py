"""What ``errbudget run`` prints after a case: a short, aligned summary in the case's words.

The verdict line; per quantity the forecast (accurate value and central interval, with
units), the numerical error against its allowance and the coarsest step adequate for it; every
flag, heaviest first; on a rerun, what changed since the last run and how the last forecast
did against the counts that came in since; the files written. Everything is read from
budget.json (with ``since_last`` set): this module computes nothing.

Plain ASCII apart from the user's own names, so that a log file or a narrow terminal reads it.
"""

from __future__ import annotations

import math
import os
import sys
import textwrap
from pathlib import Path

from errbudget.case.dates import date_text
from errbudget.case.units import in_words
from errbudget.outputs.flags import WORDS, new_counts_outside, ordered, weight

WIDTH = 100  # wrap prose at this many columns
INDENT = "  "
KIND_WORDS = {"value": "value", "time-to": "time to", "peak": "peak", "minimum": "minimum"}


def number(value, sig: int = 3) -> str:
    """``value`` to ``sig`` significant digits, plain ("8400", "0.0123", "2.8e-14")."""
    if value is None or isinstance(value, bool):
        return "n/a"
    x = float(value)
    if not math.isfinite(x):
        return "n/a"
    if x == 0:
        return "0"
    magnitude = abs(x)
    if 1e-3 <= magnitude < 1e6:
        digits = max(sig - 1 - math.floor(math.log10(magnitude)), 0)
        text = f"{x:.{digits}f}"
        return text.rstrip("0").rstrip(".") if "." in text else text
    return f"{x:.{sig - 1}e}".replace("e-0", "e-").replace("e+0", "e").replace("e+", "e")


def amount(value, unit: str | None, sig: int = 3) -> str:
    """A number with its unit in words: "6.76 days", "4.32 plants", "1 fish"."""
    text = number(value, sig)
    if text == "n/a" or not unit:
        return text
    return in_words(text, value, unit)


def verdict_line(data: dict, name: str) -> str:
    """One line: the case, the verdict, the case's step and the recommended step."""
    verdict = data.get("verdict") or {}
    step = (data.get("simulation") or {}).get("step") or {}
    rec = verdict.get("recommended_step") or {}
    word = "ADEQUATE" if verdict.get("adequate") else "NOT ADEQUATE"
    line = f"{name}: {word} at a step of {amount(step.get('value'), step.get('unit'), 6)}"
    if rec.get("value") is None:
        return line + "; no candidate step qualifies"
    return line + f"; coarsest adequate step {amount(rec.get('value'), rec.get('unit'), 6)}"


def summary(data: dict, name: str, folder: Path, written: list[str]) -> str:
    """The whole summary of one run (see the module docstring)."""
    verdict = data.get("verdict") or {}
    parts = [verdict_line(data, name), _wrap(verdict.get("reason") or "", INDENT)]
    parts += ["", *_quantity_table(data)]
    parts += _clearance(data)
    parts += _flags(data.get("flags"))
    parts += _since_last(data)
    parts.append(f"{INDENT}wrote {folder}{os.sep}: {', '.join(written)}")
    return "\n".join(parts)


def _wrap(text: str, indent: str, first: str | None = None) -> str:
    return textwrap.fill(
        text,
        WIDTH,
        initial_indent=first if first is not None else indent,
        subsequent_indent=indent,
        break_on_hyphens=False,
    )


def _date(data: dict, elapsed) -> str | None:
    sim = data.get("simulation") or {}
    return date_text(sim.get("start"), elapsed, sim.get("days_per_time_unit"))


def _forecast(q: dict, data: dict) -> tuple[str, str]:
    """The accurate forecast and its central interval, with units (and dates for times)."""
    unit, par = q.get("unit"), q.get("parameter") or {}
    value = q.get("reference") if q.get("reference") is not None else q.get("value")
    level = par.get("level")
    shown = amount(value, unit, 4)
    low, high = par.get("low"), par.get("high")
    interval = "n/a"
    if low is not None and high is not None:
        interval = f"{number(low, 4)} to {amount(high, unit, 4)}"
    if q.get("kind") == "time-to" and _date(data, value):
        shown += f" ({_date(data, value)})"
        if low is not None and high is not None:
            interval += f" ({_date(data, low)} to {_date(data, high)})"
    label = f"{number(100 * level, 3)}% interval" if level else "interval"
    return shown, f"{label} {interval}"


def _quantity_table(data: dict) -> list[str]:
    """Per quantity: forecast and interval; numerical error of allowance; adequate-from step."""
    header = ("quantity", "forecast", "numerical error / allowance", "adequate from")
    rows = []
    for q in data.get("quantities") or []:
        unit = q.get("unit")
        numerical = None
        times, allowance = q.get("numerical_to_allowance"), q.get("allowance")
        if times is not None and allowance is not None:
            numerical = times * allowance
        judged = "ok" if q.get("adequate") else "too coarse"
        error = (
            f"{number(numerical)} / {amount(allowance, unit)} = {number(times, 2)} {judged}"
            if numerical is not None
            else "cannot be judged"
        )
        step = q.get("recommended_step") or {}
        shown, interval = _forecast(q, data)
        rows.append((q.get("name", ""), shown, error, amount(step.get("value"), step.get("unit"))))
        rows.append(("", interval, "", ""))
    widths = [max(len(r[i]) for r in (header, *rows)) for i in range(4)]
    lines = []
    for row in (header, *rows):
        cells = [cell.ljust(width) for cell, width in zip(row, widths, strict=True)]
        lines.append((INDENT + "  ".join(cells)).rstrip())
    return lines


def _clearance(data: dict) -> list[str]:
    share = (data.get("clearance") or {}).get("share")
    if not share:
        return []
    clear = data["clearance"]
    by = clear.get("by") or {}
    when = amount(by.get("value"), by.get("unit"), 6)
    return [
        "",
        _wrap(
            f"Cleared: {number(100 * share, 3)}% of the parameter sets ({clear.get('members')} of "
            f"{clear.get('of')}) reach zero by {when}, an outcome of the model, not of the step.",
            INDENT,
        ),
    ]


def _flags(flags: list[dict] | None) -> list[str]:
    if not flags:
        return ["", f"{INDENT}flags: none"]
    lines = ["", f"{INDENT}flags, most severe first:"]
    for flag in ordered(flags):
        head = f"{INDENT * 2}[{WORDS[weight(flag)]}] {flag.get('code')}: "
        lines.append(_wrap(f"{head}{flag.get('message', '')}", INDENT * 4, first=""))
    return lines


def _since_last(data: dict) -> list[str]:
    since = data.get("since_last")
    if not since:
        return [""]
    changed = [
        "counts changed" if since.get("counts_changed") else "same counts",
        "case file changed" if since.get("case_changed") else "same case file",
    ]
    lines = [
        "",
        f"{INDENT}since the last run ({since.get('previous_time')}; {', '.join(changed)}):",
    ]
    lines += _parameter_lines(since)
    lines += _verdict_lines(data, since)
    lines += _new_count_lines(data, since)
    return lines + [""]


def _parameter_lines(since: dict) -> list[str]:
    parts = []
    for name, item in (since.get("parameters") or {}).items():
        unit, change = item.get("unit"), item.get("change") or "new"
        text = (
            f"{name} {change} (sd {number(item.get('sd_before'))} -> "
            f"{amount(item.get('sd_now'), unit)})"
        )
        if item.get("shift") is not None and abs(item["shift"]) > 1:
            text += f", moved {number(item['shift'], 2)} earlier sd"
        parts.append(text)
    if not parts:
        return []
    return [_wrap("fitted parameters: " + "; ".join(parts), INDENT * 3, first=INDENT * 2)]


def _verdict_lines(data: dict, since: dict) -> list[str]:
    def word(v):
        return "n/a" if v is None else ("adequate" if v else "not adequate")

    verdict = since.get("verdict") or {}
    steps = since.get("recommended_step") or {}
    before, now = steps.get("before") or {}, steps.get("now") or {}
    v_text = (
        f"verdict {word(verdict.get('before'))} -> {word(verdict.get('now'))}"
        if since.get("verdict_changed")
        else f"verdict unchanged ({word(verdict.get('now'))})"
    )
    step_now = amount(now.get("value"), now.get("unit"), 6)
    s_text = (
        f"coarsest adequate step {amount(before.get('value'), before.get('unit'), 6)} -> {step_now}"
        if since.get("recommended_step_changed")
        else f"coarsest adequate step unchanged ({step_now})"
    )
    lines = [f"{INDENT * 2}{v_text}; {s_text}"]
    units = {q.get("name"): q.get("unit") for q in data.get("quantities") or []}
    for name, item in (since.get("quantities") or {}).items():
        value, sd = item.get("reference") or {}, item.get("parameter_sd") or {}
        if not value:
            continue
        unit = units.get(name)
        lines.append(
            _wrap(
                f'"{name}": forecast {number(value.get("before"), 4)} -> '
                f"{amount(value.get('now'), unit, 4)}, sd {number(sd.get('before'))} -> "
                f"{amount(sd.get('now'), unit)} ({item.get('spread') or 'n/a'})",
                INDENT * 3,
                first=INDENT * 2,
            )
        )
    return lines


def _new_count_lines(data: dict, since: dict) -> list[str]:
    new = since.get("new_counts")
    if not new or not new.get("times"):
        if since.get("counts_changed"):
            return [f"{INDENT * 2}no count came in after the last run's last count"]
        return []
    unit, time_unit = new.get("unit"), new.get("time_unit")
    lines = [f"{INDENT * 2}the last forecast against the {len(new['times'])} new counts:"]
    table = [
        ("time", f"counted ({unit})", f"forecast ({unit})", "E = forecast - count", "u_val", "")
    ]
    for i, t in enumerate(new["times"]):
        when = amount(t, time_unit, 6)
        if _date(data, t):
            when += f" ({_date(data, t)})"
        table.append(
            (
                when,
                number(new["counts"][i], 4),
                number(new["forecast"][i], 4),
                amount(new["E"][i], unit),
                amount(new["u_val"][i], unit),
                "OUTSIDE" if new["exceed"][i] else "within",
            )
        )
    widths = [max(len(r[i]) for r in table) for i in range(6)]
    for row in table:
        cells = [
            c.rjust(w) if 0 < i < 5 else c.ljust(w)
            for i, (c, w) in enumerate(zip(row, widths, strict=True))
        ]
        lines.append((INDENT * 3 + "  ".join(cells)).rstrip())
    outside = new_counts_outside(since)
    if outside:
        lines.append(
            _wrap(
                f"WARNING: {outside['n_exceed']} of {len(new['times'])} new counts fall outside "
                "what the budget explains (|E| > 2 u_val, u_val from the forecast's parameter "
                "spread and the counting error): the last forecast missed them; the model or "
                "its inputs need a look before this forecast is used.",
                INDENT * 3,
                first=INDENT * 2,
            )
        )
    else:
        lines.append(
            f"{INDENT * 2}all {len(new['times'])} new counts lie within what the budget "
            "explains (|E| <= 2 u_val)"
        )
    if new.get("beyond"):
        lines.append(
            f"{INDENT * 2}{len(new['beyond'])} new counts lie beyond the last forecast's horizon"
        )
    return lines


class Printer:
    """stdout that ends quietly when the reader goes away (``errbudget run ... | head``).

    After a broken pipe, stdout is pointed at the null device, so that neither later prints
    nor Python's flush at exit raise again; the runs themselves go on and write their files.
    """

    def __init__(self, stream=None):
        self.stream = stream
        self.gone = False

    def __call__(self, text: str) -> None:
        if self.gone:
            return
        stream = self.stream or sys.stdout
        try:
            stream.write(text + "\n")
            stream.flush()
        except BrokenPipeError:
            self.gone = True
            _silence(stream)


def _silence(stream) -> None:
    try:
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, stream.fileno())
        os.close(null)
    except (OSError, ValueError, AttributeError):
        pass  # not a real file (a test's capture): nothing left to flush at exit
