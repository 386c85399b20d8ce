"""The run history of a case (history.jsonl): appended once per run, never rewritten.

Each line is one run: hashes of the case and counts, fitted values, budget components,
verdict, recommended step and time. A new run compares itself with the last line.
"""

from __future__ import annotations

import fcntl
import json
import os
from contextlib import contextmanager
from pathlib import Path

HISTORY_NAME = "history.jsonl"
ENTRY_SCHEMA = "errbudget.history/1"


def entry(budget: dict, timestamp: str) -> dict:
    """The history line of a run, taken from its budget.json."""
    fit = budget.get("fit") or {}
    return {
        "schema": ENTRY_SCHEMA,
        "time": timestamp,
        "case_sha256": budget["case"]["sha256"],
        "counts_sha256": fit.get("counts_sha256"),
        "fitted": fit.get("parameters"),
        "verdict": budget["verdict"]["adequate"],
        "recommended_step": budget["verdict"]["recommended_step"],
        "step": budget["simulation"]["step"],
        "quantities": {
            q["name"]: {
                "unit": q["unit"],
                "value": q["value"],
                "reference": q["reference"],
                "discretisation": q["discretisation"]["error_percentile"],
                "roundoff": q["roundoff"]["error"],
                "parameter_sd": q["parameter"]["sd"],
                "low": q["parameter"]["low"],
                "high": q["parameter"]["high"],
            }
            for q in budget["quantities"]
        },
    }


def last_entry(folder: Path) -> dict | None:
    """The most recent readable line of the history, or None."""
    path = folder / HISTORY_NAME
    if not path.exists():
        return None
    last = None
    with path.open(encoding="utf-8") as stream:
        for line in stream:
            line = line.strip()
            if not line:
                continue
            try:
                last = json.loads(line)
            except json.JSONDecodeError:
                continue  # a foreign or damaged line is skipped, never rewritten
    return last


def compare(previous: dict | None, current: dict) -> dict | None:
    """What changed since the last run: spreads, components, verdict, recommended step."""
    if previous is None:
        return None
    changes = {}
    for name, now in current["quantities"].items():
        before = previous.get("quantities", {}).get(name)
        if before is None:
            continue
        item = {}
        for key in ("value", "reference", "discretisation", "roundoff", "parameter_sd"):
            old, new = before.get(key), now.get(key)
            item[key] = {
                "before": old,
                "now": new,
                "change": None if old is None or new is None else new - old,
            }
        old_sd, new_sd = before.get("parameter_sd"), now.get("parameter_sd")
        if old_sd and new_sd:
            item["spread"] = (
                "narrowed"
                if new_sd < old_sd * 0.99
                else ("widened" if new_sd > old_sd * 1.01 else "unchanged")
            )
        changes[name] = item
    return {
        "previous_time": previous.get("time"),
        "case_changed": previous.get("case_sha256") != current["case_sha256"],
        "counts_changed": previous.get("counts_sha256") != current["counts_sha256"],
        "verdict": {"before": previous.get("verdict"), "now": current["verdict"]},
        "recommended_step": {
            "before": previous.get("recommended_step"),
            "now": current["recommended_step"],
        },
        "quantities": changes,
    }


@contextmanager
def locked(folder: Path):
    """An exclusive lock on the case's output folder, so concurrent runs do not interleave."""
    folder.mkdir(parents=True, exist_ok=True)
    with (folder / ".lock").open("a") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def append(folder: Path, line: dict) -> None:
    """Append one line (one write call, flushed and synced); earlier lines are untouched."""
    text = json.dumps(line, allow_nan=False, ensure_ascii=False) + "\n"
    with (folder / HISTORY_NAME).open("a", encoding="utf-8") as stream:
        stream.write(text)
        stream.flush()
        os.fsync(stream.fileno())
