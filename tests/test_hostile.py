"""Hostile input and faults, round two (issue 13): a catalogue by class.

Each entry is an input an attacker or a careless user would try. Every refusal is exit
code 2 with one line on stderr naming the file (or option) and the key (or path), no
traceback, nothing written. The classes follow the issue:

1. arithmetic in quantity strings that explodes,   5. offset units,
2. memory (and blocking reads) before the guard,   6. environment faults,
3. writing outside the output folder,              7. cells a spreadsheet runs,
4. non-finite and overflowing numbers, sign rules, 8. noise.

No full budget is run where a load or command-line refusal is tested: entries that need
outputs use one small real budget (crayfish pond, 16 base samples) computed once and handed
to the command line in place of ``run_case``.
"""

from __future__ import annotations

import copy
import csv
import errno
import io
import math
import os
import subprocess
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import CRAYFISH as BUILTIN
from conftest import CRAYFISH_CUSTOM as CUSTOM
from conftest import EXIT_INPUT, MARSH_COUNTS, REPO
from conftest import one_error_line as _one_error_line
from scipy import stats

import errbudget.budget.run
import errbudget.outputs.files
import errbudget.outputs.history
import errbudget.report
from errbudget import load_case
from errbudget.case import limits
from errbudget.case.parameters import input_flags
from errbudget.case.units import parse_quantity
from errbudget.cli import main
from errbudget.errors import InputError
from errbudget.outputs.tables import ladder_csv, neutral, summary_csv
from errbudget.uncertainty.design import UNIT_CLIP, sample_design

POND = REPO / "cases" / "crayfish-pond.toml"
QUICK = ["--samples", "16", "--quiet"]
SENTINEL = b"an earlier file, to stay byte for byte\n"

THETA = """\
[model]
form = "theta-logistic"
unit = "beetle"

[parameters]
r     = { value = "0.3 / week", sd = "0.04 / week" }
K     = { value = "800 beetle", sd = "60 beetle" }
theta = 1.5
N0    = "40 beetle"

[simulation]
scheme = "rk4"
step = "1 week"
horizon = "30 week"

[[quantity]]
name = "beetles at week 30"
kind = "value"
at = "30 week"
"""

CUSTOM_T = """\
[model]
form = "custom"
unit = "fish"
rate = "r*N*(1 - N/K)*T/T0"

[parameters]
r  = "0.05 / day"
K  = "1000 fish"
T  = "293.15 K"
T0 = "288.15 K"
N0 = "50 fish"

[simulation]
scheme = "heun"
step = "5 day"
horizon = "100 day"

[[quantity]]
name = "fish at day 100"
kind = "value"
at = "100 day"
"""


# --------------------------------------------------------------------- helpers


def _write(tmp_path: Path, text: str, name: str = "pond.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _edit(base: str, old: str, new: str) -> str:
    assert base.count(old) == 1, f"edit anchor {old!r} is not unique"
    return base.replace(old, new)


def _refused(capsys, argv: list[str]) -> str:
    """Exit code 2 and one line on stderr, no traceback; the line."""
    assert main(argv) == EXIT_INPUT
    return _one_error_line(capsys)


@dataclass(frozen=True)
class Entry:
    """One hostile case file: the edit, the key the message must name, fragments it holds."""

    kind: int  # the class of the issue, 1 to 8
    base: str
    old: str
    new: str
    where: str
    says: tuple[str, ...]


def _at(location: str, text: str) -> tuple[str, str, str]:
    """An edit that puts a quantity string ``text`` at one of the places a string goes."""
    return {
        "step": (BUILTIN, 'step = "7 day"', f'step = "{text} day"'),
        "horizon": (BUILTIN, 'horizon = "200 day"', f'horizon = "{text} day"'),
        "value": (BUILTIN, 'E  = "0.004 / day"', f'E  = "{text} / day"'),
        "sd": (BUILTIN, 'sd = "0.01 / day"', f'sd = "{text} / day"'),
        "at": (BUILTIN, 'at = "200 day"', f'at = "{text} day"'),
        "level": (BUILTIN, 'level = "6000 crayfish"', f'level = "{text} crayfish"'),
        "unit": (BUILTIN, 'unit = "crayfish"', f'unit = "crayfish * {text}"'),
    }[location]


WHERE = {
    "step": "simulation.step",
    "horizon": "simulation.horizon",
    "value": "parameters.E",
    "sd": "parameters.r.sd",
    "at": "quantity[1].at",
    "level": "quantity[2].level",
    "unit": "model.unit",
}
TOWER = 'raises a power to a power (as in "2**2**2")'

CATALOGUE: dict[str, Entry] = {}
# 1. Power towers and other exploding arithmetic, in every place a quantity string goes.
for place in WHERE:
    CATALOGUE[f"1-tower-in-{place}"] = Entry(
        1, *_at(place, "2**2**2**2**2"), WHERE[place], (TOWER,)
    )
CATALOGUE["1-caret-tower"] = Entry(1, *_at("step", "2^2^2^2^2"), "simulation.step", (TOWER,))
CATALOGUE["1-nine-tower"] = Entry(1, *_at("horizon", "9**9**9"), "simulation.horizon", (TOWER,))
CATALOGUE["1-nested-powers"] = Entry(
    1,
    *_at("step", "((((9**9)**9)**9)**9)"),
    "simulation.step",
    ("is not a finite number (it is beyond the range of a float)",),
)
CATALOGUE["1-exponent-over-limit"] = Entry(
    1,
    *_at("horizon", "10**13 *"),
    "simulation.horizon",
    ("has the exponent 13, above the limit of 12 in absolute value",),
)
CATALOGUE["1-exponent-not-a-literal"] = Entry(
    1,
    *_at("at", "2**(2**3) *"),
    "quantity[1].at",
    ("has an exponent that is not a literal number",),
)
CATALOGUE["1-parentheses-too-deep"] = Entry(
    1,
    *_at("step", "(((((7)))))"),
    "simulation.step",
    ("nests parentheses deeper than the limit of 4",),
)
CATALOGUE["1-too-long"] = Entry(
    1,
    *_at("step", "1" * 250),
    "simulation.step",
    ("is longer than the limit of 200 characters",),
)
CATALOGUE["1-operator-words"] = Entry(
    1,
    BUILTIN,
    'step = "7 day"',
    'step = "7 day squared squared squared squared"',
    "simulation.step",
    ('uses the word "squared"; write the operator instead',),
)
CATALOGUE["1-python-syntax"] = Entry(
    1,
    BUILTIN,
    'step = "7 day"',
    "step = \"7 day; __import__('os')\"",
    "simulation.step",
    ("holds ';', which a quantity cannot hold",),
)
CATALOGUE["1-tower-in-counts-time-unit"] = Entry(
    1,
    BUILTIN + '\n[counts]\nfile = "marsh-counts.csv"\ntime_unit = "day**2**2**2**2"\nfit = ["r"]\n',
    "seed = 1",
    "seed = 2",
    "counts.time_unit",
    (TOWER,),
)

# 2. Sizes beyond the limits, refused before anything is allocated or read.
CATALOGUE["2-samples-in-the-case"] = Entry(
    2,
    BUILTIN,
    "samples = 64",
    "samples = 4611686018427387904",
    "budget.samples",
    ("above the limits of 1048576 parameter sets", "use samples = 131072 or fewer"),
)
CATALOGUE["2-samples-times-quantities"] = Entry(
    2,
    BUILTIN.replace("samples = 64", "samples = 65536"),
    "seed = 1",
    "seed = 1\n" + "".join(f'[[quantity]]\nname = "peak {i}"\nkind = "peak"\n' for i in range(20)),
    "budget.samples",
    ("for 22 quantities", "2097152 parameter sets x quantities", "use samples = 16384 or"),
)

# 4. Non-finite and overflowing numbers.
CATALOGUE["4-bare-nan"] = Entry(
    4, THETA, "theta = 1.5", "theta = nan", "parameters.theta", ("expected a finite number",)
)
CATALOGUE["4-bare-inf"] = Entry(
    4, THETA, "theta = 1.5", "theta = inf", "parameters.theta", ("expected a finite number",)
)
CATALOGUE["4-sd-inf"] = Entry(
    4,
    THETA,
    "theta = 1.5",
    "theta = { value = 1.5, sd = inf }",
    "parameters.theta.sd",
    ("expected a finite number",),
)
CATALOGUE["4-high-inf"] = Entry(
    4,
    THETA,
    "theta = 1.5",
    "theta = { low = 1.0, high = inf }",
    "parameters.theta.high",
    ("expected a finite number",),
)
CATALOGUE["4-sd-1e308"] = Entry(
    4,
    THETA,
    'K     = { value = "800 beetle", sd = "60 beetle" }',
    'K     = { value = "800 beetle", sd = "1e308 beetle" }',
    "parameters.K.sd",
    ("beyond the limit of 1e+100 in absolute value",),
)
CATALOGUE["4-value-near-the-float-limit"] = Entry(
    4,
    BUILTIN,
    'E  = "0.004 / day"',
    'E  = "1.7e308 / day"',
    "parameters.E",
    ("beyond the limit of 1e+100",),
)
CATALOGUE["4-conversion-overflows"] = Entry(
    4,
    BUILTIN,
    'horizon = "200 day"',
    'horizon = "1e306 year"',
    "simulation.horizon",
    ("beyond the limit of 1e+100",),
)
CATALOGUE["4-cv-1e308"] = Entry(
    4,
    BUILTIN,
    "cv = 0.2",
    "cv = 1e308",
    "parameters.N0.cv",
    ("beyond the limit of 1e+100",),
)
CATALOGUE["4-lognormal-draws-overflow"] = Entry(
    4,
    BUILTIN,
    'N0 = { value = "400 crayfish", cv = 0.2, dist = "lognormal" }',
    'N0 = { value = "1e-90 crayfish", sd = "1e90 crayfish", dist = "lognormal" }',
    "parameters.N0",
    ("every draw must be a finite number within 1e+100",),
)
CATALOGUE["4-normal-draws-beyond-the-limit"] = Entry(
    4,
    THETA,
    'r     = { value = "0.3 / week", sd = "0.04 / week" }',
    'r     = { value = "0.3 / week", sd = "2e99 / week" }',
    "parameters.r",
    ("every draw must be a finite number within 1e+100",),
)
CATALOGUE["4-explicit-bound-below-zero"] = Entry(
    4,
    THETA,
    'K     = { value = "800 beetle", sd = "60 beetle" }',
    'K     = { value = "800 beetle", sd = "60 beetle", low = "-5 beetle" }',
    "parameters.K",
    ("a carrying capacity must be positive",),
)

# 5. Offset units.
OFFSET = ("a temperature scale with an offset", '"293.15 K" for 20 degC')
CATALOGUE["5-degC-in-a-custom-law"] = Entry(
    5, CUSTOM_T, 'T  = "293.15 K"', 'T  = "20 degC"', "parameters.T", OFFSET
)
CATALOGUE["5-degF-in-a-custom-law"] = Entry(
    5, CUSTOM_T, 'T0 = "288.15 K"', 'T0 = "59 degF"', "parameters.T0", OFFSET
)
CATALOGUE["5-degC-spread"] = Entry(
    5,
    CUSTOM_T,
    'T  = "293.15 K"',
    'T  = { value = "293.15 K", sd = "2 degC" }',
    "parameters.T.sd",
    OFFSET,
)
CATALOGUE["5-degC-per-day"] = Entry(
    5, CUSTOM, 'E  = "0.004 / day"', 'E  = "0.004 degC / day"', "parameters.E", OFFSET
)

# 8. Noise: sizes that ran for minutes with no guard.
CATALOGUE["8-300-quantities"] = Entry(
    8,
    BUILTIN,
    "seed = 1",
    "seed = 1\n" + "".join(f'[[quantity]]\nname = "q{i}"\nkind = "peak"\n' for i in range(300)),
    "quantity",
    ("302 quantities, above the limit of 50 per case",),
)


@pytest.mark.parametrize("entry", CATALOGUE.values(), ids=CATALOGUE.keys())
def test_catalogue_case_file_refused_naming_key_and_limit(capsys, tmp_path, entry):
    (tmp_path / "marsh-counts.csv").write_text(MARSH_COUNTS)
    path = _write(tmp_path, _edit(entry.base, entry.old, entry.new))
    for command in (["check", str(path)], ["run", str(path), "--out", str(tmp_path / "out")]):
        line = _refused(capsys, command)
        assert line.startswith(f"errbudget: error: {path}, {entry.where}: "), line
        for fragment in entry.says:
            assert fragment in line, (fragment, line)
    assert not (tmp_path / "out").exists()
    # The loader refuses it too (the command line checks limits and strings before loading).
    with pytest.raises(InputError) as refused:
        load_case(path)
    assert refused.value.source == str(path)
    assert all(fragment in refused.value.message for fragment in entry.says), refused.value


# --------------------------------------------------------------------- 1. arithmetic


def test_a_power_tower_comes_back_with_exit_2_in_a_fresh_process(tmp_path):
    # Before: pint evaluated 2**2**2**2**2 exactly (a 19,729-digit integer, then 9**9**9
    # with 369 million digits) and check hung for minutes. The timeout is a hang guard.
    path = _write(tmp_path, _edit(BUILTIN, 'step = "7 day"', 'step = "9**9**9**9 day"'))
    done = subprocess.run(
        [sys.executable, "-m", "errbudget", "check", str(path)],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert done.returncode == EXIT_INPUT
    assert TOWER in done.stderr and "Traceback" not in done.stderr


@pytest.mark.parametrize(
    ("text", "value", "unit"),
    [
        ("7 day", 7, "day"),
        ("0.06 / day", 0.06, "1 / day"),
        ("12 mussel_q / m**2", 12, "mussel_q / meter ** 2"),
        ("3 day**-1", 3, "1 / day"),
        ("2^3 day", 8, "day"),
        ("(2**10)**2 day", 1048576, "day"),
        ("1 / 2 day", 0.5, "day"),
        ("-(5 day)", -5, "day"),
        ("7day", 7, "day"),
        ("1.5e-3 / (m * day)", 1.5e-3, "1 / day / meter"),
    ],
)
def test_what_a_unit_string_needs_is_accepted(text, value, unit):
    from errbudget.case.units import ensure_count_units, ureg

    ensure_count_units("mussel_q")
    quantity = parse_quantity(text, "x")
    assert quantity.magnitude == pytest.approx(value, rel=1e-15)
    assert quantity.units == ureg.Unit(unit)


# --------------------------------------------------------------------- 2. memory, blocking


def test_samples_option_beyond_any_design_refused_by_the_parser(capsys, tmp_path):
    line = _refused(capsys, ["run", str(POND), "--samples", str(2**40), "--out", str(tmp_path)])
    assert line.startswith("errbudget: error: command line: argument --samples: ")
    assert "above the limit of 1048576" in line and "use 262144 or fewer" in line


def test_samples_option_beyond_this_case_design_refused_before_running(capsys, tmp_path):
    # crayfish pond: 3 uncertain inputs, 5 rows per base sample; 2**18 x 5 > 2**20.
    # Checked on the raw tables as the case loads, before any value is parsed.
    line = _refused(capsys, ["run", str(POND), "--samples", str(2**18), "--out", str(tmp_path)])
    assert line.startswith(f"errbudget: error: command line, --samples, for {POND}: ")
    assert "1310720 parameter sets (262144 x 5)" in line and "use samples = 131072" in line
    assert list(tmp_path.iterdir()) == []


def test_a_refusal_beyond_a_limit_loads_neither_numpy_nor_pint(tmp_path):
    # The command line checks the limits and the quantity strings with the light modules
    # (case.files, case.resources, case.quantity_text) before the rest is imported.
    tower = _write(tmp_path, _edit(BUILTIN, 'step = "7 day"', 'step = "9**9**9 day"'), "t.toml")
    many = _write(tmp_path, _edit(BUILTIN, "samples = 64", f"samples = {2**40}"), "m.toml")
    probe = (
        "import sys; from errbudget.cli import main; "
        f"codes = [main(['check', {str(tower)!r}]), main(['check', {str(many)!r}])]; "
        "print(codes, sorted(m for m in ('numpy', 'pint', 'scipy') if m in sys.modules))"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=60)
    assert done.stdout.strip() == "[2, 2] []", done.stdout + done.stderr


def _fifo(tmp_path: Path, name: str) -> Path:
    path = tmp_path / name
    os.mkfifo(path)
    return path


def _check_in_subprocess(path: Path) -> subprocess.CompletedProcess:
    # A separate process with a timeout: a read that blocked would hang the test otherwise.
    return subprocess.run(
        [sys.executable, "-m", "errbudget", "check", str(path)],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )


def test_case_path_that_is_a_named_pipe_is_refused_without_blocking(tmp_path):
    done = _check_in_subprocess(_fifo(tmp_path, "pond.toml"))
    assert done.returncode == EXIT_INPUT
    assert done.stderr.strip() == (
        f"errbudget: error: {tmp_path / 'pond.toml'}: case file is not a regular file "
        "(a named pipe); give the path of a file"
    )


@pytest.mark.parametrize("device", ["/dev/zero", "/dev/urandom", "/dev/null"])
def test_case_path_that_is_a_device_is_refused(capsys, device):
    if not os.path.exists(device):
        pytest.skip(f"{device} is missing on this machine")
    line = _refused(capsys, ["check", device])
    assert line == f"errbudget: error: {device}: case file is not a regular file (a device); " + (
        "give the path of a file"
    )


def test_case_path_that_is_a_folder_is_refused(capsys, tmp_path):
    line = _refused(capsys, ["check", str(tmp_path)])
    assert "case file is not a regular file (a folder)" in line


def test_case_file_over_the_size_limit_is_refused_before_reading(capsys, tmp_path):
    path = tmp_path / "pond.toml"
    with path.open("wb") as handle:
        handle.truncate(limits.MAX_CASE_BYTES + 1)  # sparse: nothing is written
    line = _refused(capsys, ["check", str(path)])
    assert "files over 1000000 bytes are refused" in line


def test_counts_file_that_is_a_named_pipe_is_refused(tmp_path):
    _fifo(tmp_path, "marsh-counts.csv")
    path = _write(tmp_path, BUILTIN + '\n[counts]\nfile = "marsh-counts.csv"\nfit = ["r"]\n')
    done = _check_in_subprocess(path)
    assert done.returncode == EXIT_INPUT
    assert f"{path}, counts.file: " in done.stderr
    assert "counts file is not a regular file (a named pipe)" in done.stderr


def test_counts_file_over_the_row_limit_is_refused_before_parsing(capsys, tmp_path):
    rows = "".join(f"{day},{100 + day % 7}\n" for day in range(200_000))
    (tmp_path / "marsh-counts.csv").write_text("day,count\n" + rows)
    path = _write(tmp_path, BUILTIN + '\n[counts]\nfile = "marsh-counts.csv"\nfit = ["r"]\n')
    line = _refused(capsys, ["check", str(path)])
    assert line.startswith(f"errbudget: error: {path}, counts.file: ")
    assert "counts file has more than 10000 lines after the header, the limit of data rows" in line


def test_counts_file_at_the_row_limit_is_accepted_and_one_more_row_refused(tmp_path):
    from errbudget.case.counts import check_file

    path = tmp_path / "counts.csv"
    path.write_bytes(b"day,count\n" + b"1,2\n" * limits.MAX_COUNT_ROWS)
    check_file(path)
    path.write_bytes(b"day,count\n" + b"1,2\n" * (limits.MAX_COUNT_ROWS + 1))
    with pytest.raises(InputError, match="more than 10000 lines after the header"):
        check_file(path)


def test_counts_file_of_20_mb_is_refused_after_reading_only_its_start(tmp_path, monkeypatch):
    import errbudget.case.files as reader

    path = tmp_path / "counts.csv"
    path.write_bytes(b"day,count\n" + b"1,2\n" * (limits.MAX_COUNTS_BYTES // 4 - 3))
    read = []
    real = reader.os.read
    monkeypatch.setattr(reader.os, "read", lambda fd, n: read.append(n) or real(fd, n))
    from errbudget.case.counts import check_file

    with pytest.raises(InputError, match="more than 10000 lines"):
        check_file(path)
    assert len(read) == 1  # one chunk of 1 MiB holds more than 10,000 rows


# --------------------------------------------------------------------- 3. outside --out


@pytest.fixture(scope="module")
def small_budget():
    """One real budget (crayfish pond, 16 base samples), computed once for this module."""
    return errbudget.budget.run.run_case(load_case(POND), samples=16)


def _quick_outputs(monkeypatch, fake_run) -> None:
    """The command line runs ``fake_run`` and a one-line page: output faults without a run
    (the report itself is tested in tests/test_report.py)."""
    monkeypatch.setattr(errbudget.budget.run, "run_case", fake_run)
    monkeypatch.setattr(errbudget.report, "render_html", lambda data, series, text: "<p>page</p>")


@pytest.fixture
def canned_run(monkeypatch, small_budget):
    """The command line's run_case gives a copy of the small budget: outputs without a run."""

    def fake(case, **kwargs):
        return errbudget.budget.run.Budget(
            copy.deepcopy(small_budget.data), copy.deepcopy(small_budget.series)
        )

    _quick_outputs(monkeypatch, fake)


def _pond(tmp_path: Path, name: str = "pond.toml") -> Path:
    return _write(tmp_path, POND.read_text(encoding="utf-8"), name)


def test_history_that_is_a_symlink_is_refused_and_its_target_untouched(capsys, tmp_path):
    target = tmp_path / "elsewhere.jsonl"
    target.write_bytes(SENTINEL)
    folder = tmp_path / "out" / "pond"
    folder.mkdir(parents=True)
    (folder / "history.jsonl").symlink_to(target)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out")])
    assert line.startswith(f"errbudget: error: {folder / 'history.jsonl'}: ")
    assert "symbolic link" in line
    assert target.read_bytes() == SENTINEL
    assert sorted(p.name for p in folder.iterdir()) == ["history.jsonl"]


def test_dangling_history_symlink_creates_nothing_elsewhere(capsys, tmp_path):
    target = tmp_path / "nowhere" / "made.jsonl"
    folder = tmp_path / "out" / "pond"
    folder.mkdir(parents=True)
    (folder / "history.jsonl").symlink_to(target)
    _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out")])
    assert not target.parent.exists()


def test_history_symlink_made_during_the_run_is_not_followed(
    capsys, tmp_path, monkeypatch, canned_run
):
    # A link that appears after the checks (a race) is still refused by O_NOFOLLOW.
    target = tmp_path / "elsewhere.jsonl"
    target.write_bytes(SENTINEL)
    real = errbudget.outputs.history.last_entry

    def plant_link(folder):
        (folder / "history.jsonl").symlink_to(target)
        return real(folder)

    monkeypatch.setattr(errbudget.outputs.history, "last_entry", plant_link)
    argv = ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out"), *QUICK]
    line = _refused(capsys, argv)
    assert "it is a symbolic link, and outputs are never written through links" in line
    assert target.read_bytes() == SENTINEL


def test_output_folder_that_is_a_symlink_is_refused(capsys, tmp_path):
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "pond").symlink_to(elsewhere)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out")])
    assert line.startswith(f"errbudget: error: {tmp_path / 'out' / 'pond'}: the output folder ")
    assert list(elsewhere.iterdir()) == []


@pytest.mark.parametrize("name", ["...toml", "..toml", "a\nb.toml", "tab\there.toml"])
def test_case_stem_that_is_not_a_plain_folder_name_is_refused(capsys, tmp_path, name):
    path = _pond(tmp_path, name)
    out = tmp_path / "deep" / "out"
    line = _refused(capsys, ["run", str(path), "--out", str(out)])
    shown = str(path).replace("\n", "\\n").replace("\t", "\\t")
    assert line.startswith(f"errbudget: error: {shown}: the file name gives the output folder")
    assert not (tmp_path / "deep").exists()


def test_two_cases_with_one_stem_are_refused_before_anything_runs(capsys, tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    first, second = _pond(tmp_path / "a"), _pond(tmp_path / "b")
    out = tmp_path / "out"
    line = _refused(capsys, ["run", str(first), str(second), "--out", str(out)])
    assert line == (
        f"errbudget: error: command line: {first} and {second} would both write into "
        f"{out / 'pond'}; give the case files different names (or run them with different --out)"
    )
    assert not out.exists()
    assert _refused(capsys, ["run", str(first), str(first), "--out", str(out)])
    assert not out.exists()


def test_symlinked_output_file_is_replaced_not_followed(capsys, tmp_path, canned_run):
    target = tmp_path / "elsewhere.json"
    target.write_bytes(SENTINEL)
    folder = tmp_path / "out" / "pond"
    folder.mkdir(parents=True)
    (folder / "budget.json").symlink_to(target)
    assert main(["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out"), *QUICK]) == 0
    capsys.readouterr()
    assert target.read_bytes() == SENTINEL
    assert not (folder / "budget.json").is_symlink()


# --------------------------------------------------------------------- 4. numbers and signs


def test_capacity_with_a_wide_normal_is_truncated_at_zero(tmp_path):
    path = _write(
        tmp_path,
        _edit(
            BUILTIN,
            'K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }',
            'K  = { value = "9000 crayfish", sd = "9000 crayfish" }',
        ),
    )
    case = load_case(path)
    dist = case.parameters["K"].dist
    assert (dist.kind, dist.low, dist.high) == ("truncated-normal", 0.0, math.inf)
    # Share of N(9000, 9000) at or below zero: Phi(-1) = 0.158655 (standard normal table,
    # Abramowitz & Stegun 1964, table 26.1), here from SciPy.
    assert dist.truncated_share == pytest.approx(stats.norm.cdf(-1.0), rel=1e-12)
    assert dist.truncated_share == pytest.approx(0.158655, abs=1e-6)
    design = sample_design(case.uncertain(), None, 1024, 1)
    assert design.values["K"].min() > 0  # before: 16 % of the members had K <= 0
    flags = input_flags(case.parameters)
    assert [flag["code"] for flag in flags] == ["truncated-at-zero"]
    assert "15.9 % of its draws at or below zero" in flags[0]["message"]


def test_harvest_rate_with_a_wide_normal_is_truncated_at_zero(tmp_path):
    path = _write(
        tmp_path,
        _edit(BUILTIN, 'E  = "0.004 / day"', 'E  = { value = "0.004 / day", sd = "0.004 / day" }'),
    )
    dist = load_case(path).parameters["E"].dist
    assert (dist.kind, dist.low) == ("truncated-normal", 0.0)


def test_normal_whose_tail_below_zero_is_negligible_is_kept(tmp_path):
    # K = 800 +- 60 beetle: 13.3 sd above zero, Phi(-13.3) ~ 1e-40 < NEGLIGIBLE_TAIL.
    dist = load_case(_write(tmp_path, THETA)).parameters["K"].dist
    assert dist.kind == "normal" and dist.truncated_share == 0.0


def test_negligible_tail_is_below_what_the_design_can_reach():
    # The design is clipped to [UNIT_CLIP, 1 - UNIT_CLIP] (uncertainty.spread); the limits
    # module restates it, and the truncation rule is coarser than it.
    assert limits.SMALLEST_DESIGN_PROBABILITY == UNIT_CLIP
    assert limits.NEGLIGIBLE_TAIL * limits.MAX_DESIGN_ROWS < 1e-2


def test_truncated_capacity_flag_reaches_budget_json(tmp_path):
    path = _write(
        tmp_path,
        _edit(
            POND.read_text(encoding="utf-8"),
            'K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }',
            'K  = { value = "9000 crayfish", sd = "9000 crayfish" }',
        ),
    )
    from errbudget import load_case, run_case

    data = run_case(load_case(path), samples=16).to_dict()
    assert "truncated-at-zero" in [flag["code"] for flag in data["flags"]]


# --------------------------------------------------------------------- 6. environment


def _earlier_outputs(folder: Path) -> dict[str, bytes]:
    folder.mkdir(parents=True)
    (folder / "budget.json").write_bytes(SENTINEL)
    (folder / "history.jsonl").write_bytes(SENTINEL)
    return {p.name: p.read_bytes() for p in folder.iterdir()}


def test_out_that_is_a_file_is_refused(capsys, tmp_path):
    out = tmp_path / "out"
    out.write_bytes(SENTINEL)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(out)])
    assert line == f"errbudget: error: {out}: --out is a file, not a folder; choose a folder"
    assert out.read_bytes() == SENTINEL


def test_output_subfolder_that_is_a_file_is_refused(capsys, tmp_path):
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "pond").write_bytes(SENTINEL)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out")])
    assert line.endswith("a file is in the way where the output folder should be")


def test_out_below_a_file_is_refused(capsys, tmp_path):
    (tmp_path / "notes.txt").write_bytes(SENTINEL)
    out = tmp_path / "notes.txt" / "out"
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(out)])
    assert line == (
        f"errbudget: error: {tmp_path / 'notes.txt'}: a file is in the way where a folder of "
        "--out should be"
    )


def test_read_only_output_folder_is_refused_before_running(capsys, tmp_path, monkeypatch):
    # The tests may run as root, which permissions do not stop: the check is made to see a
    # read-only file system, as access(2) reports one even to root.
    monkeypatch.setattr(errbudget.outputs.files.os, "access", lambda path, mode: False)
    monkeypatch.setattr(errbudget.outputs.files, "_read_only", lambda path: True)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out")])
    assert line == (
        f"errbudget: error: {tmp_path}: cannot write the outputs here: the file system is read-only"
    )


@pytest.mark.parametrize(
    ("code", "cause"),
    [
        (errno.ENOSPC, "the disk is full"),
        (errno.EACCES, "permission denied"),
        (errno.EROFS, "the file system is read-only"),
        (errno.EDQUOT, "the disk quota is used up"),
    ],
)
def test_write_fault_on_a_fresh_folder_leaves_nothing(
    capsys, tmp_path, monkeypatch, canned_run, code, cause
):
    def failing(*args, **kwargs):
        raise OSError(code, os.strerror(code))

    monkeypatch.setattr(errbudget.outputs.files.tempfile, "mkstemp", failing)
    out = tmp_path / "out"
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(out), *QUICK])
    assert line == (
        f"errbudget: error: {out / 'pond' / 'budget.json'}: cannot write the outputs here: {cause}"
    )
    assert not out.exists()  # neither the folders made for the run nor a lock file


def test_full_disk_while_appending_the_history_keeps_it_whole(
    capsys, tmp_path, monkeypatch, canned_run
):
    folder = tmp_path / "out" / "pond"
    before = _earlier_outputs(folder)
    real_write = os.write
    calls = []

    def half_then_full(handle, data):
        calls.append(1)
        if len(calls) == 1:
            return real_write(handle, bytes(data[: len(data) // 2]))  # a partial line
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(errbudget.outputs.history.os, "write", half_then_full)
    line = _refused(capsys, ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out"), *QUICK])
    assert line == (
        f"errbudget: error: {folder / 'history.jsonl'}: cannot append to the history: "
        "the disk is full"
    )
    assert (folder / "history.jsonl").read_bytes() == before["history.jsonl"]
    assert not (folder / ".lock").exists()


def test_other_os_error_is_exit_2_naming_the_path(capsys, tmp_path, monkeypatch):
    def broken(path):
        raise OSError(errno.EIO, "Input/output error", str(path))

    monkeypatch.setattr("errbudget.case.load.read_regular_file", lambda *a: broken(a[0]))
    line = _refused(capsys, ["check", str(_pond(tmp_path))])
    assert line == (
        f"errbudget: error: {tmp_path / 'pond.toml'}: cannot use this file or folder: the "
        "device reported an input/output error"
    )


def test_concurrent_locks_on_one_folder_exclude_each_other(tmp_path):
    import fcntl

    folder = tmp_path / "out" / "pond"
    with errbudget.outputs.history.locked(folder):
        handle = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
        try:
            with pytest.raises(BlockingIOError):
                fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        finally:
            os.close(handle)
    assert sorted(p.name for p in folder.iterdir()) == []  # no lock file left


# --------------------------------------------------------------------- 7. spreadsheet cells

FORMULAS = ["=1+1", "+SUM(A1:A9)", "-2+3", "@cmd", "\tlead", "\rlead"]


@pytest.mark.parametrize("name", FORMULAS)
def test_formula_like_quantity_name_gets_a_leading_apostrophe(small_budget, name):
    data = copy.deepcopy(small_budget.data)
    data["quantities"][0]["name"] = name
    for text in (summary_csv(data), ladder_csv(data)):
        rows = list(csv.reader(io.StringIO(text, newline="")))
        assert rows[1][0] == "'" + name.replace("\r", "\n")  # a lone CR would end the row
        assert not any(cell.startswith(tuple("=+-@")) for row in rows for cell in row[:2])


def test_numbers_and_plain_text_are_left_as_they_are():
    assert neutral(-2.5) == -2.5 and neutral(None) == "" and neutral("stock") == "stock"
    assert neutral("1 / day") == "1 / day"


def test_formula_name_through_the_command_line(capsys, tmp_path, monkeypatch, small_budget):
    import json

    def renamed(case, **kwargs):
        data = copy.deepcopy(small_budget.data)
        data["quantities"][0]["name"] = "=HYPERLINK(1)"
        return errbudget.budget.run.Budget(data, copy.deepcopy(small_budget.series))

    _quick_outputs(monkeypatch, renamed)
    folder = tmp_path / "out" / "pond"
    assert main(["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out"), *QUICK]) == 0
    capsys.readouterr()
    data = json.loads((folder / "budget.json").read_text())
    assert data["quantities"][0]["name"] == "=HYPERLINK(1)"  # JSON keeps names verbatim
    for name in ("summary.csv", "ladder.csv"):
        rows = list(csv.reader(io.StringIO((folder / name).read_text())))
        assert rows[1][0] == "'=HYPERLINK(1)"


# --------------------------------------------------------------------- 8. noise


def test_byte_order_mark_at_the_start_of_a_case_file(capsys, tmp_path):
    path = tmp_path / "pond.toml"
    path.write_bytes(b"\xef\xbb\xbf" + POND.read_bytes())
    assert main(["check", str(path)]) == 0
    assert "Reedbank crayfish pond" in capsys.readouterr().out
    assert load_case(path).sha256 != load_case(POND).sha256  # the file's own bytes


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_traceback_is_accepted_by_the_parser(capsys, tmp_path, where, monkeypatch):
    argv = ["check", str(POND)]
    argv = ["--debug-traceback", *argv] if where == "before" else [*argv, "--debug-traceback"]
    assert main(argv) == 0
    assert capsys.readouterr().err == ""

    def broken(path, **kwargs):
        raise RuntimeError("a bug")

    monkeypatch.setattr("errbudget.case.load.load_case", broken)
    assert main(argv) == 1
    err = capsys.readouterr().err
    assert err.startswith("errbudget: internal error: RuntimeError: a bug\n")
    assert "Traceback (most recent call last)" in err


def test_python_warnings_never_reach_the_user(capsys, tmp_path, monkeypatch, small_budget):
    def noisy(case, **kwargs):
        warnings.warn("overflow encountered in multiply", RuntimeWarning, stacklevel=1)
        return errbudget.budget.run.Budget(
            copy.deepcopy(small_budget.data), copy.deepcopy(small_budget.series)
        )

    _quick_outputs(monkeypatch, noisy)
    argv = ["run", str(_pond(tmp_path)), "--out", str(tmp_path / "out"), *QUICK]
    assert main(argv) == 0
    assert capsys.readouterr().err == ""
    assert main([*argv, "--debug-traceback"]) == 0
    err = capsys.readouterr().err
    assert err.startswith("errbudget: debug: ") and "RuntimeWarning: overflow" in err
