"""Calendar dates in a case: ``[simulation] start`` and times given as dates.

Inside the package every time is elapsed time since the start, in the case's time unit T;
dates exist only at the edges. A case with ``start`` may give ``horizon``, a quantity's
``at`` and the counts' time column as dates (TOML dates, TOML date-times, or ISO 8601 text
such as ``"2025-11-15"``); each is turned into elapsed time here, once. Outputs show both: the
elapsed time and the date it falls on (:func:`date_text`).

Date-times with a UTC offset are converted to UTC and compared as naive UTC times; a plain
date is midnight at its start. Lengths of months and years are pint's (a mean Julian year of
365.25 days, a month of a twelfth of it) when T is a month or a year.
"""

from __future__ import annotations

import datetime as dt
import re

from errbudget.errors import InputError

SECONDS_PER_DAY = 86400.0
# ISO 8601 calendar date, optionally with a time and a UTC offset (as the counts reader).
ISO_DATE = re.compile(
    r"^\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?(?:Z|[+-]\d{2}:?\d{2})?$"
)


def is_date(value: object) -> bool:
    """Whether ``value`` is a date as a case file may write it (TOML date, date-time, ISO text)."""
    if isinstance(value, dt.date | dt.datetime):
        return True
    return isinstance(value, str) and ISO_DATE.match(value.strip()) is not None


def moment(value: object, where: str) -> tuple[dt.datetime, bool]:
    """``value`` as a naive UTC datetime, and whether it was a plain date (no time of day).

    Raises
    ------
    InputError
        When ``value`` is not a date such as 2025-03-01 or 2025-03-01T08:30.
    """
    if isinstance(value, dt.datetime):
        return _naive(value), False
    if isinstance(value, dt.date):
        return dt.datetime(value.year, value.month, value.day), True
    if isinstance(value, dt.time):
        raise InputError(
            "a time of day alone is not a date; write a date such as 2025-03-01 or a date "
            "and time such as 2025-03-01T08:30",
            where=where,
        )
    text = str(value).strip()
    if not ISO_DATE.match(text):
        raise InputError(
            f"{value!r} is not a date; write it as 2025-03-01 (or 2025-03-01T08:30)", where=where
        )
    try:
        parsed = dt.datetime.fromisoformat(text.replace(" ", "T"))
    except ValueError:
        raise InputError(f"{value!r} is not a valid calendar date", where=where) from None
    return _naive(parsed), len(text) == len("2025-03-01")


def _naive(value: dt.datetime) -> dt.datetime:
    if value.tzinfo is not None:
        value = value.astimezone(dt.UTC).replace(tzinfo=None)
    return value


def elapsed(value: object, start: dt.datetime | None, days_per_unit: float, where: str) -> float:
    """The time from ``start`` to the date ``value`` [T], where one T is ``days_per_unit`` days.

    Raises
    ------
    InputError
        When the case has no ``[simulation] start`` to measure the date from.
    """
    when, _ = moment(value, where)
    if start is None:
        raise InputError(
            f"{_show(value)} is a date, but the case has no start date to measure it from; "
            "add [simulation] start = 2025-03-01 (the date of time 0), or give an elapsed time "
            'such as "200 day"',
            where=where,
        )
    days = (when - start).total_seconds() / SECONDS_PER_DAY
    return days / days_per_unit


def _show(value: object) -> str:
    return value.isoformat() if isinstance(value, dt.date | dt.datetime) else repr(value)


def date_text(start: str | None, elapsed_time, days_per_unit) -> str | None:
    """The calendar date ``elapsed_time`` [T] after ``start`` (ISO text), or None.

    A start given as a plain date gives the date the moment falls on (``2025-07-19``);
    a start with a time of day gives the date and time to the minute (``2025-07-19T07:12``).
    """
    if start is None or elapsed_time is None or days_per_unit is None:
        return None
    try:
        origin, plain = moment(start, "start")
        when = origin + dt.timedelta(days=float(elapsed_time) * float(days_per_unit))
    except (InputError, OverflowError, ValueError, TypeError):
        return None
    return when.date().isoformat() if plain else when.isoformat(timespec="minutes")


def start_text(value: dt.datetime, plain: bool) -> str:
    """The start as it is stored in budget.json: a date, or a date and time (UTC)."""
    return value.date().isoformat() if plain else value.isoformat(timespec="seconds")
