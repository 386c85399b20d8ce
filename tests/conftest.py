"""Shared test material: the crayfish case of DESIGN.md §3 and its variants, invented counts,
helpers for the command line, and fixtures that make a CLI run cheap where a fresh full
budget adds nothing to what a test checks.

Test modules import the constants and helpers (``from conftest import CRAYFISH``); pytest
finds the fixtures itself.
"""

from __future__ import annotations

import copy
import functools
import json
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
DEMO_CASES = sorted((REPO / "cases").glob("*.toml"))
# Invented later counts for the perch-reservoir demo, near its fitted logistic curve (K about
# 4700 fish): appended to its counts file, they make the rerun that the report showcases.
PERCH_LATER = [(230, 4655), (260, 4690), (290, 4710)]
EXIT_INPUT = 2

# The example case of DESIGN.md §3, verbatim apart from the comments, without its [counts]
# table and with 64 base samples instead of 1024 (a power of two, small for speed).
CRAYFISH = """\
title = "Upper marsh crayfish pond, autumn harvest plan"

[model]
form = "logistic-harvest"
unit = "crayfish"

[parameters]
r  = { value = "0.06 / day", sd = "0.01 / day" }
K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }
E  = "0.004 / day"
N0 = { value = "400 crayfish", cv = 0.2, dist = "lognormal" }

[simulation]
scheme = "euler"
step = "7 day"
horizon = "200 day"

[[quantity]]
name = "stock at harvest"
kind = "value"
at = "200 day"

[[quantity]]
name = "days to 6000"
kind = "time-to"
level = "6000 crayfish"

[budget]
fraction = 0.1
samples = 64
seed = 1
"""

# The same law written as a custom rate.
CRAYFISH_CUSTOM = CRAYFISH.replace(
    'form = "logistic-harvest"', 'form = "custom"\nrate = "r*N*(1 - N/K) - E*N"'
)

# The same case fitted to counts: the [counts] table of DESIGN.md §3.
CRAYFISH_COUNTS = (
    CRAYFISH
    + """
[counts]
file = "marsh-counts.csv"
time = "day"
time_unit = "day"
count = "count"
error = "poisson"
fit = ["r", "K", "N0"]
"""
)

# Invented counts for CRAYFISH_COUNTS (its counts file is marsh-counts.csv beside the case).
MARSH_COUNTS = "day,count\n0,410\n28,1130\n56,2640\n84,4870\n112,6420\n140,7390\n"

# The K line of CRAYFISH, the anchor of several one-edit bad cases.
K_LINE = 'K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }'


def headless_browser(binary: str, profile: Path, *args: str) -> list[str]:
    """The command line of a headless Chromium with its own profile and no network chatter,
    for the report's browser tests; ``args`` say what it does (print, screenshot)."""
    return [
        binary,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
        *args,
    ]


def strict_json(text: str):
    """Parse JSON, failing on NaN or infinity (which budget.json must never hold)."""

    def refuse(constant):
        raise AssertionError(f"budget.json holds {constant}")

    return json.loads(text, parse_constant=refuse)


def without_clock(data: dict) -> dict:
    """A copy without the clock readings, all kept under ``run``: timestamp, elapsed_seconds,
    stages (seconds per stage), prediction and cost (measured speeds)."""
    data = json.loads(json.dumps(data))
    for key in ("timestamp", "elapsed_seconds", "stages", "prediction", "cost"):
        data["run"].pop(key, None)
    return data


def one_error_line(capsys) -> str:
    """The single stderr line of a refused command (nothing on stdout, no traceback)."""
    captured = capsys.readouterr()
    assert captured.out == ""
    assert captured.err.endswith("\n") and captured.err.count("\n") == 1, captured.err
    assert "Traceback" not in captured.err
    return captured.err.rstrip("\n")


# --------------------------------------------------------------------- cheap CLI runs

_BUDGETS: dict[tuple, object] = {}  # one real budget per (case, counts, samples, seed)


def _budget_once(run_case, case, *, samples=None, seed=None, progress=None, **kwargs):
    """``run_case`` computed once per session for each case text, counts file and design.

    Each call gets its own deep copy, since the command line edits the dictionary. The case
    path is not part of the key: budget.json then names the path of the first run.
    """
    counts = case.counts.path.read_bytes() if case.counts is not None else b""
    key = (case.text, counts, samples, seed, tuple(sorted(kwargs.items())))
    if key not in _BUDGETS:
        _BUDGETS[key] = run_case(case, samples=samples, seed=seed, progress=progress, **kwargs)
    return copy.deepcopy(_BUDGETS[key])


@pytest.fixture
def report_without_figures(monkeypatch):
    """The command line draws budget.html without its figures (the rest of the page is real).

    For tests of files, locks and messages: the figures are tested in test_report.py.
    """
    import errbudget.report

    real = errbudget.report.render_html
    monkeypatch.setattr(
        errbudget.report, "render_html", functools.partial(real, include_figures=False)
    )


@pytest.fixture
def budget_once(monkeypatch):
    """The command line reuses one real budget per case text within the session."""
    from errbudget.budget import run

    monkeypatch.setattr(run, "run_case", functools.partial(_budget_once, run.run_case))


@pytest.fixture
def quick_cli(budget_once, report_without_figures):
    """Both: a CLI run costs little more than writing its files."""


# --------------------------------------------------------------------- refused input

SENTINEL_JSON = b'{"an": "earlier budget, must stay as it is"}\n'
SENTINEL_HISTORY = b'{"an": "earlier history line"}\n'


def run_args(args: list[str], out: Path, samples: str = "64") -> list[str]:
    """``errbudget run`` arguments: the cases (and options) in ``args``, quiet, into ``out``."""
    return ["run", *args, "--out", str(out), "--samples", samples, "--quiet"]


def assert_refused_without_writing(capsys, tmp_path, args: list[str], stem: str) -> str:
    """Run twice: into a missing --out folder (stays missing), then over earlier outputs
    (left byte for byte). Returns the one stderr line, identical both times."""
    from errbudget.cli import main

    out = tmp_path / "out"
    assert main(run_args(args, out)) == EXIT_INPUT
    first = one_error_line(capsys)
    assert not out.exists()

    folder = out / stem
    folder.mkdir(parents=True)
    (folder / "budget.json").write_bytes(SENTINEL_JSON)
    (folder / "history.jsonl").write_bytes(SENTINEL_HISTORY)
    before = sorted(p.name for p in folder.iterdir())
    assert main(run_args(args, out)) == EXIT_INPUT
    assert one_error_line(capsys) == first
    assert (folder / "budget.json").read_bytes() == SENTINEL_JSON
    assert (folder / "history.jsonl").read_bytes() == SENTINEL_HISTORY
    assert sorted(p.name for p in folder.iterdir()) == before
    return first
