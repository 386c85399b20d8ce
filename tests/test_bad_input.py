"""Bad input through the command line, beyond the catalogue of tests/test_cli.py.

Each case: exit code 2, one stderr line naming the file and the key, line or row, no
traceback, and nothing written or overwritten (checked by test_cli's helper, which runs the
case twice: into a missing --out folder and over earlier outputs).
"""

from __future__ import annotations

import json

import pytest
from conftest import (
    CRAYFISH,
    CRAYFISH_COUNTS,
    CRAYFISH_CUSTOM,
    EXIT_INPUT,
    K_LINE,
    MARSH_COUNTS,
    assert_refused_without_writing,
    one_error_line,
    strict_json,
)

from errbudget.cli import main

HEADER = "day,count\n"

# (base text, old, new, where, fragments the message must hold)
CASE_EDITS = {
    "title-not-a-string": (
        CRAYFISH,
        'title = "Upper marsh crayfish pond, autumn harvest plan"',
        "title = 5",
        "title",
        ("expected a non-empty string, got 5",),
    ),
    "model-not-a-table": (
        CRAYFISH,
        '[model]\nform = "logistic-harvest"\nunit = "crayfish"\n',
        "model = [1]\n",
        "model",
        ("expected a table, got list",),
    ),
    "missing-horizon": (
        CRAYFISH,
        'horizon = "200 day"\n',
        "",
        "simulation.horizon",
        ("missing required key 'horizon'",),
    ),
    "missing-quantity-at": (
        CRAYFISH,
        'at = "200 day"\n',
        "",
        "quantity[1].at",
        ("missing required key 'at'",),
    ),
    "missing-counts-fit": (
        CRAYFISH_COUNTS,
        'fit = ["r", "K", "N0"]\n',
        "",
        "counts.fit",
        ("missing required key 'fit'",),
    ),
    "horizon-in-crayfish": (
        CRAYFISH,
        'horizon = "200 day"',
        'horizon = "200 crayfish"',
        "simulation.horizon",
        ("has the wrong dimension for a time span",),
    ),
    "quantity-at-in-crayfish": (
        CRAYFISH,
        'at = "200 day"',
        'at = "200 crayfish"',
        "quantity[1].at",
        ("has the wrong dimension for a time",),
    ),
    "level-in-days": (
        CRAYFISH,
        'level = "6000 crayfish"',
        'level = "6000 day"',
        "quantity[2].level",
        ("has the wrong dimension for a population level",),
    ),
    "rate-per-kg": (
        CRAYFISH,
        'E  = "0.004 / day"',
        'E  = "0.004 / kg"',
        "parameters.E",
        ("has the wrong dimension for a rate (per time)",),
    ),
    "step-without-unit": (
        CRAYFISH,
        'step = "7 day"',
        "step = 7",
        "simulation.step",
        ("not a time",),
    ),
    "population-unit-is-a-time": (
        CRAYFISH,
        'unit = "crayfish"',
        'unit = "day"',
        "model.unit",
        ("not a population",),
    ),
    "N0-zero": (
        CRAYFISH,
        'N0 = { value = "400 crayfish", cv = 0.2, dist = "lognormal" }',
        'N0 = "0 crayfish"',
        "parameters.N0",
        ("an initial population must be positive",),
    ),
    "K-negative-low": (
        CRAYFISH,
        K_LINE,
        'K = { value = "9000 crayfish", low = "-1 crayfish", high = "10500 crayfish" }',
        "parameters.K",
        ("a carrying capacity must be positive",),
    ),
    "E-negative": (
        CRAYFISH,
        'E  = "0.004 / day"',
        'E  = "-0.004 / day"',
        "parameters.E",
        ("a harvest rate cannot be negative",),
    ),
    "sd-zero": (CRAYFISH, 'sd = "0.01 / day"', 'sd = "0 / day"', "parameters.r.sd", ("positive",)),
    "cv-negative": (CRAYFISH, "cv = 0.2", "cv = -0.2", "parameters.N0.cv", ("out of range",)),
    "samples-negative": (
        CRAYFISH,
        "samples = 64",
        "samples = -64",
        "budget.samples",
        ("out of range",),
    ),
    "samples-a-string": (
        CRAYFISH,
        "samples = 64",
        'samples = "64"',
        "budget.samples",
        ("expected an integer",),
    ),
    "horizon-negative": (
        CRAYFISH,
        'horizon = "200 day"',
        'horizon = "-200 day"',
        "simulation.horizon",
        ("the horizon must be positive",),
    ),
    "level-negative": (
        CRAYFISH,
        'level = "6000 crayfish"',
        'level = "-6000 crayfish"',
        "quantity[2].level",
        ("the level cannot be negative",),
    ),
    "memory-limit-zero": (
        CRAYFISH,
        "seed = 1",
        "seed = 1\nmemory_limit = 0",
        "budget.memory_limit",
        ("out of range",),
    ),
    "fraction-infinite": (
        CRAYFISH,
        "fraction = 0.1",
        "fraction = inf",
        "budget.fraction",
        ("expected a finite number",),
    ),
    "quantity-time-negative": (
        CRAYFISH,
        'at = "200 day"',
        'at = "-5 day"',
        "quantity[1].at",
        ("outside the horizon",),
    ),
    "step-too-small-for-the-ladder": (
        CRAYFISH,
        'step = "7 day"',
        'step = "0.0001 day"',
        "simulation.step",
        ("steps of 0.0001 day; at most", "use a step of at least"),
    ),
    "step-absurdly-small": (
        CRAYFISH,
        'step = "7 day"',
        'step = "1e-300 day"',
        "simulation.step",
        ("at most",),
    ),
    "huge-exponent-in-a-value": (
        CRAYFISH,
        'E  = "0.004 / day"',
        'E  = "0.004e99999 / day"',
        "parameters.E",
        ("is not a finite number",),
    ),
    "nan-value": (
        CRAYFISH,
        'E  = "0.004 / day"',
        'E  = "nan / day"',
        "parameters.E",
        ("is not a finite number",),
    ),
    "date-as-a-value": (
        CRAYFISH,
        'E  = "0.004 / day"',
        "E  = 1979-05-27",
        "parameters.E",
        ("expected a quantity",),
    ),
    "private-unit-name": (
        CRAYFISH,
        'unit = "crayfish"',
        'unit = "__import__"',
        "model.unit",
        ('"__import__" cannot be used as a unit name',),
    ),
    "counts-file-missing": (
        CRAYFISH_COUNTS,
        '"marsh-counts.csv"',
        '"nothere.csv"',
        "counts.file",
        ("nothere.csv", "not found"),
    ),
    # custom expressions (beyond test_cli: calls, dunder names, comprehensions, size, depth)
    "rate-call-outside-whitelist": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N + open(N)"',
        "model.rate",
        ('the function "open" is not available', "allowed functions are"),
    ),
    "rate-dunder-name": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N + __builtins__"',
        "model.rate",
        ("__builtins__",),
    ),
    "rate-comprehension": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N + max([x for x in N])"',
        "model.rate",
        ("comprehensions are not allowed",),
    ),
    "rate-very-long": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N' + " + 0*N" * 2000 + '"',
        "model.rate",
        (),
    ),
    "rate-deeply-nested": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N + ' + "(" * 300 + "N" + ")" * 300 + '"',
        "model.rate",
        (),
    ),
    "rate-huge-exponent": (
        CRAYFISH_CUSTOM,
        'rate = "r*N*(1 - N/K) - E*N"',
        'rate = "r*N*(1 - N/K) - E*N + N**100000"',
        "model.rate",
        ("exponent",),
    ),
}


@pytest.mark.parametrize("edit", CASE_EDITS.values(), ids=CASE_EDITS.keys())
def test_bad_case_refused(capsys, tmp_path, edit):
    base, old, new, where, says = edit
    assert base.count(old) == 1, old
    (tmp_path / "marsh-counts.csv").write_text(MARSH_COUNTS)
    path = tmp_path / "bad-case.toml"
    path.write_text(base.replace(old, new), encoding="utf-8")
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    prefix = f"errbudget: error: {path}, {where}: "
    assert line.startswith(prefix), line
    for fragment in says:
        assert fragment in line, (fragment, line)


# Counts files through the CLI: (file text, where the message must point, fragments)
COUNTS_FILES = {
    "missing-column": (
        "days,count\n0,410\n28,1130\n56,2640\n",
        "line 1",
        ('no column "day"', 'did you mean "days"?'),
    ),
    "non-numeric": (HEADER + "0,410\n28,lots\n56,2640\n", 'line 3, column "count"', ("lots",)),
    "negative": (HEADER + "0,410\n28,-3\n56,2640\n", 'line 3, column "count"', ("negative",)),
    "missing-value": (HEADER + "0,410\n28,\n56,2640\n", 'line 3, column "count"', ("missing",)),
    "duplicate-time": (HEADER + "0,410\n28,1130\n28,2640\n", 'line 4, column "day"', ("repeats",)),
    "unsorted": (HEADER + "0,410\n56,1130\n28,2640\n", 'line 4, column "day"', ("sort the rows",)),
    "bad-date": (
        HEADER + "2024-01-01,410\n2024-02-30,1130\n2024-03-01,2640\n",
        'line 3, column "day"',
        ("cannot be parsed as a date",),
    ),
    "single-count": (HEADER + "0,410\n", None, ("has 1 data row; a fit needs at least 3",)),
    "ragged-row": (HEADER + "0,410,5\n28,1130\n56,2640\n", None, ("not a regular table",)),
    "empty": ("", None, ("empty",)),
    "not-utf8": (HEADER + "0,410\n28,\xff\n56,2640\n", "line 3", ("not UTF-8",)),
    # Found by the fit, not the reader: before the fix the message named no file.
    "fractional-for-poisson": (
        HEADER + "0,410.5\n28,1130\n56,2640\n",
        None,
        ("not a whole number",),
    ),
}


@pytest.mark.parametrize("item", COUNTS_FILES.values(), ids=COUNTS_FILES.keys())
def test_bad_counts_file_refused(capsys, tmp_path, item):
    text, where, says = item
    csv = tmp_path / "marsh-counts.csv"
    csv.write_bytes(text.encode("latin-1"))
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH_COUNTS)
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    located = f"{csv.resolve()}, {where}: " if where else f"{csv.resolve()}: "
    assert line.startswith(f"errbudget: error: {located}"), line
    for fragment in says:
        assert fragment in line, (fragment, line)


def test_lognormal_counts_of_zero_name_the_counts_file(capsys, tmp_path):
    (tmp_path / "marsh-counts.csv").write_text(HEADER + "0,0\n28,5\n56,9\n")
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH_COUNTS.replace('error = "poisson"', 'error = "lognormal"'))
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    assert line.startswith(f"errbudget: error: {(tmp_path / 'marsh-counts.csv').resolve()}: ")
    assert "lognormal" in line


def test_check_refuses_a_missing_counts_file(capsys, tmp_path):
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH_COUNTS)  # no marsh-counts.csv beside it
    assert main(["check", str(path)]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert line.startswith(f"errbudget: error: {path}, counts.file: "), line


def test_memory_guard_refuses_with_estimate_and_advice(capsys, tmp_path):
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH.replace("seed = 1", "seed = 1\nmemory_limit = 0.001"))
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    assert line.startswith(f"errbudget: error: {path}, budget.samples: "), line
    assert "would need about" in line and "MB" in line
    assert "above the limit" in line
    assert "lower [budget] samples" in line and "raise [budget] memory_limit" in line


def test_unreachable_level_is_a_flag_not_an_error(capsys, tmp_path, report_without_figures):
    # K = 9000 at most 10500 with harvest: 60000 crayfish is never reached.
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH.replace('level = "6000 crayfish"', 'level = "60000 crayfish"'))
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--samples", "16", "--quiet"]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    data = strict_json((out / "pond" / "budget.json").read_text(encoding="utf-8"))
    assert "undefined-quantity" in [flag["code"] for flag in data["flags"]]
    quantity = data["quantities"][1]
    assert quantity["value"] is None and quantity["reference"] is None
    # Strict JSON already refuses NaN and infinity; check every number is finite too.
    assert json.dumps(data, allow_nan=False)
