"""The run history of a case (history.jsonl): appended once per run, never rewritten.

Each line is one run: hashes of the case and counts, fitted values, budget components,
verdict, recommended step and time. A new run compares itself with the last line.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import math
import os
import stat
from pathlib import Path

import numpy as np

from errbudget.outputs.files import HISTORY_NAME, environment_error

# Open the history without following a link, without blocking on a pipe, not inherited.
_NO_FOLLOW = os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0)
ENTRY_SCHEMA = "errbudget.history/1"
FORECAST_POINTS = 50  # samples of the forecast kept per run: enough to interpolate a curve
Z_95 = 1.6448536269514722  # 95th percentile of the standard normal: p95 - p5 = 2 z sd
SD_TOLERANCE = 0.01  # relative change of an sd below which it counts as unchanged


def entry(budget: dict, timestamp: str, series: dict | None = None) -> dict:
    """The history line of a run, taken from its budget.json (and the run's ``series``).

    Besides the budget's components it keeps what a later run needs to check this run's
    forecast against counts that arrive after it: the count times and counts, the
    observation model with its nuisance parameter, and a compact forecast (see
    :func:`forecast_from_series`).
    """
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
        "unit": _population_unit(budget),
        "time_unit": budget["simulation"]["horizon"]["unit"],
        "error": fit.get("error"),
        "nuisance": {k: v.get("value") for k, v in (fit.get("nuisance") or {}).items()},
        "count_times": fit.get("times"),
        "counts": fit.get("counts"),
        "forecast": forecast_from_series(series) if series else None,
    }


def _population_unit(budget: dict) -> str | None:
    validation = budget.get("validation") or {}
    if validation.get("unit"):
        return validation["unit"]
    for q in budget["quantities"]:
        if q["unit"] != budget["simulation"]["horizon"]["unit"]:
            return q["unit"]
    return None


def forecast_from_series(series: dict, points: int = FORECAST_POINTS) -> dict | None:
    """The run's ensemble forecast on about ``points`` times over the horizon.

    ``series["band"]`` holds the 5th, 50th and 95th percentiles of the accurate ensemble
    solutions on the case's grid ``series["times"]``. The forecast keeps the median as the
    value and, as a normal approximation, sd = (p95 - p5) / (2 z_0.95) = (p95 - p5) / 3.29
    (z_0.95 = 1.645, the 95th percentile of the standard normal). Non-finite values become
    None.

    Returns
    -------
    dict or None
        {"times": [...], "values": [...], "sd": [...], "sd_method": str} [case time unit,
        population unit].
    """
    times = np.asarray(series.get("times", []), dtype=float)
    band = np.asarray(series.get("band", []), dtype=float)
    if times.size == 0 or band.ndim != 2 or band.shape[0] < 3:
        return None
    pick = np.unique(np.linspace(0, times.size - 1, min(points, times.size)).round().astype(int))
    low, median, high = band[0, pick], band[1, pick], band[-1, pick]
    return {
        "times": _plain(times[pick]),
        "values": _plain(median),
        "sd": _plain((high - low) / (2 * Z_95)),
        "sd_method": "ensemble median; sd = (p95 - p5) / 3.29 (normal approximation)",
    }


def _plain(values) -> list:
    return [float(x) if math.isfinite(x) else None for x in np.asarray(values, dtype=float)]


def last_entry(folder: Path) -> dict | None:
    """The most recent readable line of the history, or None."""
    path = folder / HISTORY_NAME
    if not os.path.lexists(path):
        return None
    last = None
    for line in _read_history(path).splitlines():
        line = line.strip()
        if not line:
            continue
        try:
            last = json.loads(line)
        except json.JSONDecodeError:
            continue  # a foreign or damaged line is skipped, never rewritten
    return last


def _read_history(path: Path) -> str:
    try:
        handle = os.open(path, os.O_RDONLY | _NO_FOLLOW)
    except OSError as error:
        raise environment_error(error, path, "read the history") from None
    try:
        _regular(handle, path)
        with os.fdopen(os.dup(handle), "rb") as stream:
            data = stream.read()
    except OSError as error:
        raise environment_error(error, path, "read the history") from None
    finally:
        os.close(handle)
    return data.decode("utf-8", errors="replace")


def _regular(handle: int, path: Path) -> None:
    if not stat.S_ISREG(os.fstat(handle).st_mode):
        raise environment_error(OSError(errno.ENXIO, "not a regular file"), path, "use the history")


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
            item["spread"] = _change(old_sd, new_sd)
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
        **_parameter_changes(previous.get("fitted") or {}, current.get("fitted") or {}),
        "verdict_changed": previous.get("verdict") != current["verdict"],
        "recommended_step_changed": previous.get("recommended_step") != current["recommended_step"],
        "new_counts": check_forecast(previous, current),
    }


def _change(before, now) -> str | None:
    """The change of an sd: narrowed, widened or unchanged (within SD_TOLERANCE), or None."""
    if before is None or now is None:
        return None
    if now < before * (1 - SD_TOLERANCE):
        return "narrowed"
    if now > before * (1 + SD_TOLERANCE):
        return "widened"
    return "unchanged"


def _parameter_changes(before: dict, now: dict) -> dict:
    """Per fitted parameter the estimate and sd before and now, and the names whose sd
    narrowed and whose estimate moved by more than its earlier sd (``shift`` is the move in
    units of that sd)."""
    parameters = {}
    for name, item in now.items():
        old = before.get(name) or {}
        old_sd, old_value, value = old.get("sd"), old.get("value"), item.get("value")
        shift = None
        if old_sd and old_value is not None and value is not None:
            shift = (value - old_value) / old_sd
        parameters[name] = {
            "sd_before": old_sd,
            "sd_now": item.get("sd"),
            "change": _change(old_sd, item.get("sd")),
            "value_before": old_value,
            "value_now": value,
            "unit": item.get("unit"),
            "shift": shift,
        }
    narrowed = [name for name, item in parameters.items() if item["change"] == "narrowed"]
    moved = [n for n, item in parameters.items() if item["shift"] and abs(item["shift"]) > 1]
    return {"parameters": parameters, "narrowed": narrowed, "moved": moved}


def check_forecast(previous: dict, current: dict) -> dict | None:
    """The previous run's forecast against the counts that came after its last count.

    For each count D_j of the current run later than the previous run's last count time (and
    within the previous forecast's time range), the previous forecast F_j (ensemble median,
    linearly interpolated between the stored times) gives E_j = F_j - D_j, set against
    u_val = sqrt(sd_F^2 + u_D^2) following the V&V 20 comparison approach (ASME V&V
    20-2009), with sd_F the forecast's sd and u_D the count's sd about F_j under the
    previous run's observation model. There is no u_num term: the forecast is made of
    accurate solutions. ``exceed`` marks |E| > 2 u_val (common practice, no source).

    Returns
    -------
    dict or None
        None when the previous run kept no forecast or no counts; otherwise times, counts,
        forecast, forecast_sd, u_D, E, u_val, exceed, n_exceed, unit, time_unit, and
        ``beyond`` (later counts outside the forecast range, not compared).
    """
    from errbudget.estimates.validation import COVERAGE, observation_sd

    forecast, old_times = previous.get("forecast"), previous.get("count_times")
    times, counts = current.get("count_times"), current.get("counts")
    if not forecast or old_times is None or times is None or counts is None:
        return None
    last = max(old_times) if old_times else -math.inf
    f_times = np.asarray(forecast["times"], dtype=float)
    f_values = np.asarray([np.nan if v is None else v for v in forecast["values"]], float)
    f_sd = np.asarray([np.nan if v is None else v for v in forecast["sd"]], float)
    times, counts = np.asarray(times, dtype=float), np.asarray(counts, dtype=float)
    later = times > last
    inside = later & (times <= f_times[-1] * (1 + 1e-12))
    t, d = times[inside], counts[inside]
    value = np.interp(t, f_times, f_values)
    sd = np.interp(t, f_times, f_sd)
    error_model = previous.get("error") or current.get("error")
    nuisance = previous.get("nuisance") or current.get("nuisance") or {}
    try:
        u_data = observation_sd(error_model, value, nuisance)
    except ValueError:
        u_data = np.full(value.shape, np.nan)
    error = value - d
    u_val = np.hypot(sd, u_data)  # no overflow of the squares
    with np.errstate(invalid="ignore"):
        exceed = np.abs(error) > COVERAGE * u_val
    return {
        "times": _plain(t),
        "counts": _plain(d),
        "forecast": _plain(value),
        "forecast_sd": _plain(sd),
        "u_D": _plain(u_data),
        "E": _plain(error),
        "u_val": _plain(u_val),
        "exceed": [bool(x) for x in exceed],
        "n_exceed": int(exceed.sum()),
        "unit": previous.get("unit"),
        "time_unit": previous.get("time_unit"),
        "beyond": _plain(times[later & ~inside]),
    }


@contextlib.contextmanager
def locked(folder: Path):
    """An exclusive lock on the case's output folder, so concurrent runs do not interleave.

    The lock is taken on the folder itself (``flock`` on its descriptor), so no lock file
    is ever left behind. Folders this call creates are removed again if the block fails
    while they are still empty. A folder that is a symbolic link is refused, never followed.
    """
    created = _make_folders(folder)
    try:
        handle = _lock(folder)
    except BaseException:
        _remove_if_empty(created)
        raise
    try:
        yield
    except BaseException:
        _remove_if_empty(created)
        raise
    finally:
        fcntl.flock(handle, fcntl.LOCK_UN)
        os.close(handle)


def _make_folders(folder: Path) -> list[Path]:
    """Create ``folder`` and missing parents; the ones created, deepest first."""
    missing = [p for p in (folder, *folder.parents) if not os.path.lexists(p)]
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        _remove_if_empty([p for p in missing if p.is_dir()])
        raise environment_error(
            error, error.filename or folder, "create the output folder"
        ) from None
    return missing


def _lock(folder: Path) -> int:
    """A descriptor of ``folder`` holding an exclusive lock (retried if the folder was
    removed and made anew by another run while this one waited)."""
    while True:
        try:
            handle = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW)
        except OSError as error:
            raise environment_error(error, folder, "open the output folder") from None
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            same = os.stat(folder, follow_symlinks=False).st_ino == os.fstat(handle).st_ino
        except FileNotFoundError:
            same = False
        if same:
            return handle
        fcntl.flock(handle, fcntl.LOCK_UN)
        os.close(handle)
        _make_folders(folder)


def _remove_if_empty(folders: list[Path]) -> None:
    for path in folders:  # deepest first
        try:
            path.rmdir()
        except OSError:
            return  # not empty (or gone): keep it and its parents


def line_text(line: dict) -> str:
    """The text of one history line: strict JSON (raises ValueError on NaN or infinity)."""
    return json.dumps(line, allow_nan=False, ensure_ascii=False) + "\n"


def append(folder: Path, line: dict, text: str | None = None) -> None:
    """Append one line (one write call, flushed and synced); earlier lines are untouched.

    ``text`` is :func:`line_text` of ``line`` when the caller already made it. The history
    is opened without following a symbolic link (refused) and must be a regular file.
    """
    text = line_text(line) if text is None else text
    path = folder / HISTORY_NAME
    try:
        handle = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT | _NO_FOLLOW, 0o644)
    except OSError as error:
        raise environment_error(error, path, "append to the history") from None
    size = None
    try:
        _regular(handle, path)
        size = os.fstat(handle).st_size
        data = memoryview(text.encode("utf-8"))
        while data:
            data = data[os.write(handle, data) :]
        os.fsync(handle)
    except OSError as error:
        if size is not None:  # a partial line would join the next one: cut it off again
            _truncate(handle, size)
        raise environment_error(error, path, "append to the history") from None
    finally:
        os.close(handle)


def _truncate(handle: int, size: int) -> None:
    # Best effort: the fault that brought us here is the one reported.
    with contextlib.suppress(OSError):
        os.ftruncate(handle, size)
