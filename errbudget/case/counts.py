"""Read field counts (time, count) from a delimited text file into plain arrays.

The file is a small table with a header line: one column holds the time of each count,
either as elapsed time since the start of the simulation (in the case's ``time_unit``) or
as ISO 8601 dates (``2024-05-01``, ``2024-05-01T08:30``); another holds the observed
population value (a count, or a density such as plants per square metre). The reader
checks every row and refuses anything a fit could silently misread, naming the file, the
line (the header is line 1) and the column.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import re
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from errbudget.case.files import read_regular_file
from errbudget.case.limits import MAX_COUNTS_BYTES, MAX_MAGNITUDE
from errbudget.case.resources import check_count_rows, check_counts_file
from errbudget.errors import InputError, did_you_mean

MAX_FILE_BYTES = MAX_COUNTS_BYTES  # the name the tests and older callers use
MIN_ROWS = 3  # fewest counts a growth-curve fit can use (two parameters plus the start value)
SECONDS_PER_DAY = 86400.0
# Cell texts read as "no value recorded" rather than as a malformed number.
MISSING_TOKENS = frozenset({"", "na", "n/a", "null", "none", "-"})
# ISO 8601 calendar date, optionally with a time and a UTC offset.
_ISO_DATE = re.compile(
    r"^\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?(?:Z|[+-]\d{2}:?\d{2})?$"
)
_DELIMITERS = (",", ";", "\t")


@dataclass(frozen=True, eq=False)
class Counts:
    """Field counts ready for fitting.

    Attributes
    ----------
    times : numpy.ndarray
        Elapsed time of each count since the start, strictly increasing, shape (T,)
        [the case's internal time unit].
    counts : numpy.ndarray
        Observed values, shape (T,) [population unit] (floats: densities are allowed).
    path : str
        The file the counts were read from.
    sha256 : str
        SHA-256 of the file bytes (hex), so a report can say exactly which data it used.
    labels : tuple of str
        The time column as written in the file, one per count (for reports).
    """

    times: np.ndarray
    counts: np.ndarray
    path: str
    sha256: str
    labels: tuple[str, ...]


def read_counts(
    path: Path | str,
    *,
    time_column: str,
    count_column: str,
    time_factor: float = 1.0,
    days_to_internal: float | None = None,
    start: str | None = None,
    start_is_case_start: bool = False,
    where: str = "counts",
) -> Counts:
    """Read and check a counts file.

    Parameters
    ----------
    path : pathlib.Path or str
        The file: comma-, semicolon- or tab-separated text (UTF-8) with a header line.
    time_column, count_column : str
        Header names of the time column and of the count column.
    time_factor : float
        Internal time units per time unit of the file's elapsed times (multiply), e.g. 7
        when the file counts weeks and the case works in days [internal unit / file unit].
    days_to_internal : float, optional
        Internal time units in one day [internal unit / day]; required when the time
        column holds ISO dates.
    start : str, optional
        ISO date of time zero when the time column holds dates; default: the first date in
        the file. Not accepted when the column holds elapsed times, unless
        ``start_is_case_start``: then it is the case's ``[simulation] start``, from which
        elapsed times count too.
    where : str
        What the file is called in messages and the case-file table it came from.

    Returns
    -------
    Counts
        Times converted to the internal unit, counts as floats, the file hash and labels.

    Raises
    ------
    errbudget.errors.InputError
        For every problem in the file, naming the file, the line and the column.
    """
    if not (math.isfinite(time_factor) and time_factor > 0):
        raise ValueError(f"time_factor must be a positive finite number, got {time_factor!r}")
    path = Path(path)
    source = str(path)
    raw = _read_bytes(path, where)
    header, rows = _parse_table(raw, source, where)
    if time_column == count_column:
        raise InputError(
            f'the time column and the count column are both "{time_column}"; '
            "name two different columns",
            source=source,
            where="line 1",
        )
    time_index = _column_index(header, time_column, source)
    count_index = _column_index(header, count_column, source)

    filled = [(line, row) for line, row in rows if any(row)]  # blank lines carry no count
    dated = bool(filled) and _ISO_DATE.match(filled[0][1][time_index]) is not None
    columns = (time_index, time_column, count_index, count_column)
    lines, time_cells, moments, values = _cells(filled, columns, dated, source)
    places = [f'line {line}, column "{time_column}"' for line in lines]
    if dated:
        times = _days_since_start(
            moments, time_cells, places, days_to_internal, start, source, where
        )
    else:
        times = _scaled_elapsed(
            moments,
            time_cells,
            places,
            time_factor,
            start is not None and not start_is_case_start,
            source,
            time_column,
            where,
        )
    _check_order(times, time_cells, lines, source, time_column)
    if len(values) < MIN_ROWS:
        raise InputError(
            f"has {len(values)} data row{'s' if len(values) != 1 else ''}; "
            f"a fit needs at least {MIN_ROWS}",
            source=source,
        )
    times_array = np.asarray(times, dtype=float)
    counts_array = np.asarray(values, dtype=float)
    times_array.flags.writeable = False
    counts_array.flags.writeable = False
    return Counts(
        times=times_array,
        counts=counts_array,
        path=source,
        sha256=hashlib.sha256(raw).hexdigest(),
        labels=tuple(time_cells),
    )


def _cells(filled: list, columns: tuple, dated: bool, source: str):
    """Line numbers, time cells, times (dates or elapsed numbers) and counts, row by row so
    that the first bad cell in the file is the one reported."""
    time_index, time_column, count_index, count_column = columns
    lines: list[int] = []
    time_cells: list[str] = []
    moments: list = []  # datetimes, or elapsed times in the file's unit
    values: list[float] = []
    for line, row in filled:
        time_where = f'line {line}, column "{time_column}"'
        if dated:
            moments.append(_parse_date(row[time_index], source, time_where))
        else:
            expected = "a number (nor an ISO date, YYYY-MM-DD)"
            moments.append(_number(row[time_index], source, time_where, expected))
        count_where = f'line {line}, column "{count_column}"'
        value = _number(row[count_index], source, count_where)
        if value < 0:
            raise InputError(
                f"{row[count_index]} is negative; counts must be zero or more",
                source=source,
                where=count_where,
            )
        lines.append(line)
        time_cells.append(row[time_index])
        values.append(value)
    return lines, time_cells, moments, values


def _read_bytes(path: Path, where: str) -> bytes:
    """The whole file, after checking it is a regular file within the size and row limits."""
    raw = read_regular_file(path, MAX_FILE_BYTES, f"{where} file")
    check_count_rows(raw.count(b"\n"), str(path), where)
    return raw


def check_file(path: Path | str, where: str = "counts") -> None:
    """Check, without parsing or holding it, that a counts file can be read: a regular file
    within the size and row limits (see :func:`errbudget.case.resources.check_counts_file`)."""
    check_counts_file(Path(path), where)


def _parse_table(raw: bytes, source: str, where: str) -> tuple[list[str], list[tuple[int, list]]]:
    """Header names and (line number, cells) of each data row, all cells stripped text."""
    text = _decode(raw, source, where)
    first_line = text.splitlines()[0]
    if not first_line.strip():
        raise InputError(
            "line 1 is empty; the first line must hold the column names",
            source=source,
            where="line 1",
        )
    delimiter = max(_DELIMITERS, key=first_line.count)
    # The standard library's reader, not pandas: ``errbudget check`` reads counts files too
    # and must stay light. Every cell is text; a blank line is a row of empty cells, so that
    # row i of the table is line i + 1.
    try:
        rows = list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter))
    except csv.Error as error:
        raise InputError(
            f"{where} file is not a regular table ({error}); write one row per line, "
            "cells separated by commas",
            source=source,
        ) from None
    cells = _padded(rows, source, where)
    header = cells[0]
    if all(name == "" for name in header):
        raise InputError(
            "line 1 holds no column names; the first line must name the columns",
            source=source,
            where="line 1",
        )
    return header, [(number + 2, row) for number, row in enumerate(cells[1:])]


def _decode(raw: bytes, source: str, where: str) -> str:
    """The file's text (UTF-8, a leading byte-order mark dropped); empty files refused."""
    try:
        text = raw.decode("utf-8-sig")  # spreadsheet exports often start with a byte-order mark
    except UnicodeDecodeError as error:
        line = raw[: error.start].count(b"\n") + 1
        raise InputError(
            f"{where} file is not UTF-8 text (a byte on this line cannot be decoded); "
            "save it as UTF-8 CSV",
            source=source,
            where=f"line {line}",
        ) from None
    if not text.strip():
        raise InputError(
            f"{where} file is empty; expected a header line and data rows", source=source
        )
    return text


def _padded(rows: list[list[str]], source: str, where: str) -> list[list[str]]:
    """Stripped cells, short rows padded to the header's width; a longer row is refused."""
    width = len(rows[0])
    for number, row in enumerate(rows[1:], start=2):
        if len(row) > width:
            raise InputError(
                f"{where} file is not a regular table (Expected {width} fields in line "
                f"{number}, saw {len(row)}); every row needs the same number of cells as the "
                "header",
                source=source,
            )
    cells = [[cell.strip() for cell in row] + [""] * (width - len(row)) for row in rows]
    return cells


def _column_index(header: list[str], name: str, source: str) -> int:
    """Position of column ``name`` in the header, or an error listing the columns present."""
    positions = [i for i, column in enumerate(header) if column == name]
    if len(positions) > 1:
        raise InputError(
            f'column "{name}" appears {len(positions)} times in the header',
            source=source,
            where="line 1",
        )
    if not positions:
        present = ", ".join(f'"{column}"' for column in header if column)
        raise InputError(
            f'no column "{name}" in the header (columns present: {present})'
            f"{did_you_mean(name, header)}",
            source=source,
            where="line 1",
        )
    return positions[0]


def _number(cell: str, source: str, where: str, expected: str = "a number") -> float:
    """A finite float from one cell, or an error saying what is wrong with the cell."""
    if cell.lower() in MISSING_TOKENS:
        raise InputError(
            "value is missing; fill it in or delete the row", source=source, where=where
        )
    try:
        value = float(cell)
    except ValueError:
        raise InputError(f'"{cell}" is not {expected}', source=source, where=where) from None
    if not math.isfinite(value):
        raise InputError(f'"{cell}" is not a finite number', source=source, where=where)
    if abs(value) > MAX_MAGNITUDE:
        raise InputError(
            f'"{cell}" is beyond the limit of {MAX_MAGNITUDE:g} in absolute value (a number '
            "this large is a typo or would overflow)",
            source=source,
            where=where,
        )
    return value


def _parse_date(cell: str, source: str, where: str) -> datetime:
    """An ISO 8601 date or date-time; aware values are converted to naive UTC."""
    if cell.lower() in MISSING_TOKENS:
        raise InputError(
            "value is missing; fill it in or delete the row", source=source, where=where
        )
    try:
        if not _ISO_DATE.match(cell):
            raise ValueError(cell)
        moment = datetime.fromisoformat(cell)
    except ValueError:
        raise InputError(
            f'"{cell}" cannot be parsed as a date; write dates as YYYY-MM-DD '
            "(optionally with a time, YYYY-MM-DDTHH:MM)",
            source=source,
            where=where,
        ) from None
    if moment.tzinfo is not None:
        moment = moment.astimezone(UTC).replace(tzinfo=None)
    return moment


def _scaled_elapsed(
    elapsed: list[float],
    cells: list[str],
    places: list[str],
    time_factor: float,
    own_start: bool,
    source: str,
    column: str,
    where: str,
) -> list[float]:
    """Elapsed times in the file's unit times ``time_factor`` [internal unit]; ``own_start``:
    the counts table names a start of its own, which elapsed times cannot use."""
    if own_start:
        raise InputError(
            f'start is only used when the time column holds dates; column "{column}" '
            "holds elapsed times, which already count from the start",
            where=f"[{where}] start",
        )
    for value, cell, place in zip(elapsed, cells, places, strict=True):
        if value < 0:
            raise InputError(
                f"elapsed time {cell} is before the start (times must be zero or more)",
                source=source,
                where=place,
            )
    return [value * time_factor for value in elapsed]


def _days_since_start(
    moments: list[datetime],
    cells: list[str],
    places: list[str],
    days_to_internal: float | None,
    start: str | None,
    source: str,
    where: str,
) -> list[float]:
    """Time since ``start`` (default: the first date) [internal unit]."""
    if days_to_internal is None or not (math.isfinite(days_to_internal) and days_to_internal > 0):
        raise ValueError("days_to_internal (a positive float) is needed when the times are dates")
    origin = moments[0] if start is None else _parse_date(str(start), None, f"[{where}] start")
    times = []
    for moment, cell, place in zip(moments, cells, places, strict=True):
        days = (moment - origin).total_seconds() / SECONDS_PER_DAY
        if days < 0:
            raise InputError(
                f"date {cell} is before the start {origin.isoformat()}", source=source, where=place
            )
        times.append(days * days_to_internal)
    return times


def _check_order(
    times: list[float], cells: list[str], lines: list[int], source: str, column: str
) -> None:
    """Refuse repeated times and rows out of time order, naming the first offending row."""
    for i in range(1, len(times)):
        place = f'line {lines[i]}, column "{column}"'
        if times[i] == times[i - 1]:
            raise InputError(
                f"time {cells[i]} repeats the time on line {lines[i - 1]}; "
                "combine the two counts or correct the time",
                source=source,
                where=place,
            )
        if times[i] < times[i - 1]:
            raise InputError(
                f"time {cells[i]} comes before {cells[i - 1]} on line {lines[i - 1]}; "
                "sort the rows by time",
                source=source,
                where=place,
            )


def read_case_counts(case) -> Counts | None:
    """The counts file of a case (its ``[counts]`` table), read and checked as the run reads
    it; None when the case has no counts. ``errbudget check`` calls this, so that a misspelt
    column or a bad row shows before a run."""
    spec = case.counts
    if spec is None:
        return None
    return read_counts(
        spec.path,
        time_column=spec.time_column,
        count_column=spec.count_column,
        time_factor=spec.time_factor,
        days_to_internal=spec.days_to_internal,
        start=spec.start,
        start_is_case_start=spec.start_is_case_start,
        where="counts",
    )
