"""Tests of errbudget.case.counts: reading field counts and refusing every malformed file."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from errbudget.case.counts import MAX_FILE_BYTES, MIN_ROWS, read_counts
from errbudget.errors import InputError

GOOD = "day,count,observer\n0,12,ann\n7,30,ann\n14,55,bo\n21,80,bo\n"


def write(tmp_path, text, name="marsh-counts.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def read(path, **options):
    options = {"time_column": "day", "count_column": "count", **options}
    return read_counts(path, **options)


def error_of(path, **options) -> InputError:
    with pytest.raises(InputError) as caught:
        read(path, **options)
    return caught.value


# --- files that read -----------------------------------------------------------------------


def test_elapsed_times_and_counts(tmp_path):
    result = read(write(tmp_path, GOOD))
    np.testing.assert_array_equal(result.times, [0.0, 7.0, 14.0, 21.0])
    np.testing.assert_array_equal(result.counts, [12.0, 30.0, 55.0, 80.0])
    assert result.labels == ("0", "7", "14", "21")
    assert result.counts.dtype == float


def test_sha256_is_the_hash_of_the_file_bytes(tmp_path):
    path = write(tmp_path, GOOD)
    result = read(path)
    assert result.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert result.path == str(path)


def test_time_factor_converts_weeks_to_days(tmp_path):
    path = write(tmp_path, "week,count\n0,5\n1,9\n2.5,20\n")
    result = read(path, time_column="week", time_factor=7.0)
    np.testing.assert_allclose(result.times, [0.0, 7.0, 17.5])
    assert result.labels == ("0", "1", "2.5")


def test_iso_dates_count_from_the_first_date(tmp_path):
    path = write(tmp_path, "date,count\n2024-05-01,5\n2024-05-08,9\n2024-06-01,20\n")
    result = read(path, time_column="date", days_to_internal=1.0)
    np.testing.assert_allclose(result.times, [0.0, 7.0, 31.0])  # May has 31 days
    assert result.labels == ("2024-05-01", "2024-05-08", "2024-06-01")


def test_iso_dates_with_a_start_times_and_a_week_unit(tmp_path):
    text = "date,count\n2024-02-28T12:00,5\n2024-03-01,9\n2024-03-07T00:00,20\n"
    path = write(tmp_path, text)
    result = read(path, time_column="date", start="2024-02-22", days_to_internal=1.0 / 7.0)
    # 2024 is a leap year: 2024-02-22 -> 2024-03-01 is 8 days.
    np.testing.assert_allclose(result.times, [6.5 / 7.0, 8.0 / 7.0, 14.0 / 7.0])


def test_dates_with_utc_offsets_are_compared_in_utc(tmp_path):
    text = "date,count\n2024-05-01T00:00+00:00,5\n2024-05-01T12:00+02:00,6\n2024-05-02T00:00Z,7\n"
    result = read(write(tmp_path, text), time_column="date", days_to_internal=24.0)  # hours
    np.testing.assert_allclose(result.times, [0.0, 10.0, 24.0])


def test_semicolons_tabs_byte_order_mark_and_blank_lines(tmp_path):
    semicolon = write(tmp_path, "\ufeffday;count\n0;1\n\n5;2\n9;4\n", name="a.csv")
    np.testing.assert_array_equal(read(semicolon).counts, [1.0, 2.0, 4.0])
    tab = write(tmp_path, "day\tcount\n0\t1.5\n5\t2.25\n9\t4\n", name="b.tsv")
    np.testing.assert_array_equal(read(tab).counts, [1.5, 2.25, 4.0])  # densities allowed


def test_dates_need_days_to_internal(tmp_path):
    path = write(tmp_path, "date,count\n2024-05-01,5\n2024-05-08,9\n2024-06-01,20\n")
    with pytest.raises(ValueError, match="days_to_internal"):
        read(path, time_column="date")


# --- files refused -------------------------------------------------------------------------


def test_missing_file(tmp_path):
    error = error_of(tmp_path / "nowhere.csv")
    assert error.message == "counts file not found"
    assert error.source == str(tmp_path / "nowhere.csv")


def test_directory_is_not_a_counts_file(tmp_path):
    assert "is not a regular file" in error_of(tmp_path).message


def test_empty_file(tmp_path):
    error = error_of(write(tmp_path, "  \n"))
    assert error.message == "counts file is empty; expected a header line and data rows"


def test_file_that_is_not_utf8(tmp_path):
    path = tmp_path / "latin.csv"
    path.write_bytes("day,count\n0,5\n1,\xe9\n".encode("latin-1"))
    error = error_of(path)
    assert error.where == "line 3"
    assert error.message.startswith("counts file is not UTF-8 text")


def test_row_with_too_many_cells(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n1,6,7\n2,8\n"))
    assert "is not a regular table (Expected 2 fields in line 3, saw 3)" in error.message


def test_file_over_the_size_limit_is_refused_before_reading(tmp_path):
    path = tmp_path / "huge.csv"
    with path.open("wb") as handle:
        handle.truncate(MAX_FILE_BYTES + 1)  # sparse: nothing is written
    error = error_of(path)
    assert "files over 20 MB are refused" in error.message


def test_missing_column_lists_columns_and_suggests(tmp_path):
    error = error_of(write(tmp_path, GOOD), count_column="cuont")
    assert error.message == (
        'no column "cuont" in the header (columns present: "day", "count", "observer")'
        ' (did you mean "count"?)'
    )
    assert error.where == "line 1"


def test_same_column_for_time_and_count(tmp_path):
    error = error_of(write(tmp_path, GOOD), count_column="day")
    assert 'the time column and the count column are both "day"' in error.message


def test_column_named_twice(tmp_path):
    error = error_of(write(tmp_path, "day,count,count\n0,1,2\n1,2,3\n2,3,4\n"))
    assert error.message == 'column "count" appears 2 times in the header'


def test_non_numeric_count_names_file_line_and_column(tmp_path):
    path = write(tmp_path, "day,count\n0,5\n7,9\n14,12\n21,abc\n")
    error = error_of(path)
    assert str(error) == f'{path}, line 5, column "count": "abc" is not a number'
    assert error.source == str(path)
    assert error.where == 'line 5, column "count"'


def test_line_numbers_count_blank_lines(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n\n7,x\n"))
    assert error.where == 'line 4, column "count"'


def test_missing_count(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n7,\n14,12\n"))
    assert error.where == 'line 3, column "count"'
    assert error.message == "value is missing; fill it in or delete the row"


def test_missing_time_written_na(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\nNA,8\n14,12\n"))
    assert error.where == 'line 3, column "day"'
    assert error.message == "value is missing; fill it in or delete the row"


def test_negative_count(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n7,-3\n14,12\n"))
    assert error.where == 'line 3, column "count"'
    assert error.message == "-3 is negative; counts must be zero or more"


@pytest.mark.parametrize("cell", ["inf", "nan", "-Infinity"])
def test_non_finite_count(tmp_path, cell):
    error = error_of(write(tmp_path, f"day,count\n0,5\n7,{cell}\n14,12\n"))
    assert error.message == f'"{cell}" is not a finite number'


def test_non_numeric_time_mentions_dates(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n3 May,8\n14,12\n"))
    assert error.message == '"3 May" is not a number (nor an ISO date, YYYY-MM-DD)'


def test_duplicate_times(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n7,8\n7,9\n14,12\n"))
    assert error.where == 'line 4, column "day"'
    assert error.message.startswith("time 7 repeats the time on line 3")


def test_unsorted_times_name_the_first_row_out_of_order(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\n14,8\n7,9\n3,12\n"))
    assert error.where == 'line 4, column "day"'
    assert error.message == "time 7 comes before 14 on line 3; sort the rows by time"


def test_duplicate_dates_after_conversion(tmp_path):
    text = "date,count\n2024-05-01,5\n2024-05-02T00:00,8\n2024-05-02,9\n"
    error = error_of(write(tmp_path, text), time_column="date", days_to_internal=1.0)
    assert error.where == 'line 4, column "date"'
    assert "repeats the time on line 3" in error.message


@pytest.mark.parametrize("cell", ["2024-02-30", "2024/05/09", "5"])
def test_date_that_cannot_be_parsed(tmp_path, cell):
    text = f"date,count\n2024-05-01,5\n{cell},8\n2024-06-01,12\n"
    error = error_of(write(tmp_path, text), time_column="date", days_to_internal=1.0)
    assert error.where == 'line 3, column "date"'
    assert error.message.startswith(f'"{cell}" cannot be parsed as a date; write dates as')


def test_date_before_the_start(tmp_path):
    text = "date,count\n2024-05-01,5\n2024-05-08,8\n2024-06-01,12\n"
    error = error_of(
        write(tmp_path, text), time_column="date", start="2024-05-05", days_to_internal=1.0
    )
    assert error.where == 'line 2, column "date"'
    assert error.message == "date 2024-05-01 is before the start 2024-05-05T00:00:00"


def test_start_that_is_not_a_date(tmp_path):
    text = "date,count\n2024-05-01,5\n2024-05-08,8\n2024-06-01,12\n"
    error = error_of(
        write(tmp_path, text), time_column="date", start="May 1st", days_to_internal=1.0
    )
    assert error.where == "[counts] start"
    assert error.message.startswith('"May 1st" cannot be parsed as a date')


def test_negative_elapsed_time_is_before_the_start(tmp_path):
    error = error_of(write(tmp_path, "day,count\n-1,5\n7,8\n14,12\n"))
    assert error.where == 'line 2, column "day"'
    assert error.message == "elapsed time -1 is before the start (times must be zero or more)"


def test_start_is_refused_with_elapsed_times(tmp_path):
    error = error_of(write(tmp_path, GOOD), start="2024-05-01")
    assert error.where == "[counts] start"
    assert error.message.startswith("start is only used when the time column holds dates")


def test_too_few_rows_says_how_many(tmp_path):
    assert MIN_ROWS == 3
    error = error_of(write(tmp_path, "day,count\n0,5\n7,8\n\n"))
    assert error.message == "has 2 data rows; a fit needs at least 3"
    header_only = error_of(write(tmp_path, "day,count\n", name="empty.csv"))
    assert header_only.message == "has 0 data rows; a fit needs at least 3"


def test_first_line_must_hold_names(tmp_path):
    error = error_of(write(tmp_path, "\nday,count\n0,5\n7,8\n14,9\n"))
    assert error.message == "line 1 is empty; the first line must hold the column names"


def test_where_label_is_used_in_file_messages(tmp_path):
    error = error_of(tmp_path / "nowhere.csv", where="recount")
    assert error.message == "recount file not found"


def test_header_of_empty_names(tmp_path):
    error = error_of(write(tmp_path, ",\n0,5\n7,8\n14,9\n"))
    assert error.message == "line 1 holds no column names; the first line must name the columns"


def test_the_first_bad_cell_in_the_file_is_reported(tmp_path):
    error = error_of(write(tmp_path, "day,count\n0,5\nsoon,8\n14,12\n21,lots\n"))
    assert error.where == 'line 3, column "day"'
