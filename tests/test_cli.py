"""Tests of the command line (errbudget.cli.main and ``python -m errbudget``).

Bad input: exit code 2, one line on stderr naming the file and the key (or TOML line), and
nothing written. Good input: each bundled demo case runs and writes schema-valid outputs.
"""

from __future__ import annotations

import html
import json
import os
import subprocess
import sys
import tomllib
from dataclasses import dataclass
from pathlib import Path

import jsonschema
import pytest
from conftest import (
    CRAYFISH,
    CRAYFISH_COUNTS,
    CRAYFISH_CUSTOM,
    DEMO_CASES,
    EXIT_INPUT,
    K_LINE,
    MARSH_COUNTS,
    REPO,
    assert_refused_without_writing,
    one_error_line,
    run_args,
    strict_json,
    without_clock,
)

import errbudget
from errbudget import load_case, run_case
from errbudget.case.units import ensure_count_units, format_unit, parse_unit, spelling, ureg
from errbudget.cli import main

SCHEMA = json.loads((REPO / "errbudget" / "outputs" / "schema" / "budget-1.json").read_text())
SAMPLES = "64"  # base sample size of the Sobol design; a power of two, small for speed

CUSTOM_UNITS = """\
[model]
form = "custom"
unit = "crayfish"
rate = "r*N*N"

[parameters]
r = "0.06 / day"
N0 = "400 crayfish"

[simulation]
scheme = "euler"
step = "7 day"
horizon = "210 day"

[[quantity]]
name = "largest"
kind = "peak"
"""

BASES = {"builtin": CRAYFISH, "custom": CRAYFISH_CUSTOM, "counts": CRAYFISH_COUNTS}


@dataclass(frozen=True)
class Bad:
    """A case made bad by one edit, the key the message must name, and text it must hold."""

    base: str
    old: str
    new: str
    where: str
    says: tuple[str, ...]

    def text(self) -> str:
        base = BASES[self.base]
        assert base.count(self.old) == 1, f"edit anchor {self.old!r} is not unique"
        return base.replace(self.old, self.new)


MODEL_TABLE = '[model]\nform = "logistic-harvest"\nunit = "crayfish"\n'
RATE = 'rate = "r*N*(1 - N/K) - E*N"'

BAD_CASES = {
    # unknown keys, with a did-you-mean suggestion where one is close
    "unknown-top-level-key": Bad(
        "builtin",
        "[simulation]",
        "[simulaton]",
        "simulaton",
        (
            "unknown key 'simulaton'",
            'did you mean "simulation"?',
            "accepted: title, model, parameters, simulation, quantity, budget, counts",
        ),
    ),
    "unknown-simulation-key": Bad(
        "builtin",
        'step = "7 day"',
        'steps = "7 day"',
        "simulation.steps",
        ("unknown key 'steps'", 'did you mean "step"?', "accepted: scheme, step, horizon"),
    ),
    "unknown-budget-key": Bad(
        "builtin",
        "fraction = 0.1",
        "fractoin = 0.1",
        "budget.fractoin",
        ("unknown key 'fractoin'", 'did you mean "fraction"?', "accepted: fraction, samples"),
    ),
    "unknown-parameter-table-key": Bad(
        "builtin",
        'sd = "0.01 / day" }',
        'sd = "0.01 / day", hi = "1 / day" }',
        "parameters.r.hi",
        ("unknown key 'hi'", 'did you mean "high"?', "accepted: value, sd, cv, low, high"),
    ),
    "unknown-quantity-key": Bad(
        "builtin",
        'level = "6000 crayfish"',
        'levle = "6000 crayfish"',
        "quantity[2].levle",
        ("unknown key 'levle'", 'did you mean "level"?', "accepted: name, kind, at, level"),
    ),
    # missing required keys
    "missing-model": Bad("builtin", MODEL_TABLE, "", "model", ("missing required key 'model'",)),
    "missing-model-form": Bad(
        "builtin", 'form = "logistic-harvest"\n', "", "model.form", ("missing required key 'form'",)
    ),
    "missing-model-unit": Bad(
        "builtin", 'unit = "crayfish"\n', "", "model.unit", ("missing required key 'unit'",)
    ),
    "missing-step": Bad(
        "builtin", 'step = "7 day"\n', "", "simulation.step", ("missing required key 'step'",)
    ),
    "missing-law-parameter": Bad(
        "builtin",
        'E  = "0.004 / day"\n',
        "",
        "parameters.E",
        ("missing parameter 'E' of the 'logistic-harvest' law",),
    ),
    "missing-quantity-name": Bad(
        "builtin",
        'name = "stock at harvest"\n',
        "",
        "quantity[1].name",
        ("missing required key 'name'",),
    ),
    # wrong dimensions
    "rate-in-crayfish": Bad(
        "builtin",
        'E  = "0.004 / day"',
        'E  = "0.004 crayfish"',
        "parameters.E",
        (
            "'0.004 crayfish' has the wrong dimension for a rate (per time)",
            'expected something convertible to "1/day"',
        ),
    ),
    "step-in-crayfish": Bad(
        "builtin",
        'step = "7 day"',
        'step = "7 crayfish"',
        "simulation.step",
        ("'7 crayfish' is not a time", 'such as "7 day"'),
    ),
    "K-in-days": Bad(
        "builtin",
        K_LINE,
        'K = "9000 day"',
        "parameters.K",
        (
            "'9000 day' has the wrong dimension for a population level",
            'expected something convertible to "crayfish"',
        ),
    ),
    # non-positive values
    "K-zero": Bad(
        "builtin",
        K_LINE,
        'K = "0 crayfish"',
        "parameters.K",
        ("a carrying capacity must be positive, got 0 crayfish",),
    ),
    "step-negative": Bad(
        "builtin",
        'step = "7 day"',
        'step = "-7 day"',
        "simulation.step",
        ("the step must be positive, got -7 day",),
    ),
    "horizon-zero": Bad(
        "builtin",
        'horizon = "200 day"',
        'horizon = "0 day"',
        "simulation.horizon",
        ("the horizon must be positive",),
    ),
    "sd-negative": Bad(
        "builtin",
        'sd = "0.01 / day"',
        'sd = "-0.01 / day"',
        "parameters.r.sd",
        ("sd must be positive",),
    ),
    "samples-zero": Bad(
        "builtin",
        "samples = 64",
        "samples = 0",
        "budget.samples",
        ("0 is out of range", "accepted: a power of two"),
    ),
    # time consistency
    "step-longer-than-horizon": Bad(
        "builtin",
        'step = "7 day"',
        'step = "300 day"',
        "simulation.step",
        ("the step (300 day) is longer than the horizon (200 day)",),
    ),
    "quantity-time-outside-horizon": Bad(
        "builtin",
        'at = "200 day"',
        'at = "250 day"',
        "quantity[1].at",
        ("at = 250 day is outside the horizon (0, 200] day",),
    ),
    # unknown names, with suggestions
    "unknown-form": Bad(
        "builtin",
        'form = "logistic-harvest"',
        'form = "logistik"',
        "model.form",
        ("unknown form 'logistik'", 'did you mean "logistic"?', "accepted: exponential, logistic"),
    ),
    "unknown-scheme": Bad(
        "builtin",
        'scheme = "euler"',
        'scheme = "eular"',
        "simulation.scheme",
        ("unknown scheme 'eular'", 'did you mean "euler"?', "accepted: euler, heun, midpoint, rk4"),
    ),
    "unknown-distribution": Bad(
        "builtin",
        'dist = "lognormal"',
        'dist = "lognormel"',
        "parameters.N0.dist",
        (
            "unknown distribution 'lognormel'",
            'did you mean "lognormal"?',
            "accepted: normal, lognormal, uniform, triangular, truncated-normal",
        ),
    ),
    "unknown-quantity-kind": Bad(
        "builtin",
        'kind = "value"',
        'kind = "valeu"',
        "quantity[1].kind",
        (
            "unknown kind 'valeu'",
            'did you mean "value"?',
            "accepted: value, time-to, peak, minimum",
        ),
    ),
    "unknown-observation-model": Bad(
        "counts",
        'error = "poisson"',
        'error = "poison"',
        "counts.error",
        (
            "unknown observation model 'poison'",
            'did you mean "poisson"?',
            "accepted: poisson, negative-binomial, lognormal, normal",
        ),
    ),
    # custom rates
    "rate-attribute-access": Bad(
        "custom",
        RATE,
        'rate = "r*N.real*(1 - N/K) - E*N"',
        "model.rate",
        ("attribute access", "not allowed"),
    ),
    "rate-call-import": Bad(
        "custom",
        RATE,
        "rate = \"r*N*(1 - N/K) - E*N + __import__('os')\"",
        "model.rate",
        ('"__import__"', "not allowed"),
    ),
    "rate-lambda": Bad(
        "custom",
        RATE,
        'rate = "r*N*(1 - N/K) - E*N + (lambda x: x)(N)"',
        "model.rate",
        ("lambda", "not allowed"),
    ),
    "rate-subscript": Bad(
        "custom",
        RATE,
        'rate = "r*N*(1 - N/K) - E*N[0]"',
        "model.rate",
        ("subscripts", "not allowed"),
    ),
    "rate-undefined-name": Bad(
        "custom",
        RATE,
        'rate = "rr*N*(1 - N/K) - E*N"',
        "model.rate",
        ("the rate uses 'rr', which is not in [parameters]", 'did you mean "r"?'),
    ),
    # counts
    "fit-unknown-parameter": Bad(
        "counts", '"K", "N0"]', '"K", "Q"]', "counts.fit", ("cannot fit 'Q': not a parameter",)
    ),
    "counts-path-escapes-folder": Bad(
        "counts",
        '"marsh-counts.csv"',
        '"../x.csv"',
        "counts.file",
        ("a relative counts path must stay inside the case's folder",),
    ),
}


def _write_bad(folder: Path, bad: Bad) -> Path:
    (folder / "marsh-counts.csv").write_text(MARSH_COUNTS)
    path = folder / "bad-case.toml"
    path.write_text(bad.text(), encoding="utf-8")
    return path


@pytest.mark.parametrize("bad", BAD_CASES.values(), ids=BAD_CASES.keys())
def test_bad_case_exits_2_with_one_line_naming_file_and_key(capsys, tmp_path, bad):
    path = _write_bad(tmp_path, bad)
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    prefix = f"errbudget: error: {path}, {bad.where}: "
    assert line.startswith(prefix), line
    for fragment in bad.says:
        assert fragment in line[len(prefix) :], (fragment, line)

    # `check` refuses the same case with the same line.
    assert main(["check", str(path)]) == EXIT_INPUT
    assert one_error_line(capsys) == line


def test_malformed_toml_names_the_line(capsys, tmp_path):
    text = CRAYFISH.replace('horizon = "200 day"', 'horizon = "200 day')
    line_number = text.splitlines().index('horizon = "200 day') + 1
    path = tmp_path / "bad-case.toml"
    path.write_text(text)
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    assert line.startswith(f"errbudget: error: {path}: invalid TOML: "), line
    assert f"line {line_number}" in line


def test_custom_rate_with_wrong_units(capsys, tmp_path):
    path = tmp_path / "bad-case.toml"
    path.write_text(CUSTOM_UNITS)
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    # r [1/day] * N [crayfish] * N [crayfish] is crayfish²/day, not crayfish/day.
    assert line == (
        f"errbudget: error: {path}, model.rate: the rate comes out in "
        f'"crayfish**2/day"; it must be a population per time such as "crayfish/day"'
    )


def test_missing_case_file(capsys, tmp_path):
    path = tmp_path / "bad-case.toml"
    line = assert_refused_without_writing(capsys, tmp_path, [str(path)], path.stem)
    assert line == f"errbudget: error: {path}: case file not found"


@pytest.mark.parametrize(
    "option, says",
    [
        (["--bogus"], "unrecognized arguments: --bogus"),
        (["--seed", "-1"], "argument --seed: expected an integer >= 0, got '-1'"),
        (
            ["--samples", "0"],
            "argument --samples: expected a power of two of at least 16 such as 512 or 1024, "
            "got '0'",
        ),
        (["--samples", "many"], "argument --samples: expected an integer, got 'many'"),
    ],
    ids=["unknown-option", "negative-seed", "zero-samples", "word-samples"],
)
def test_bad_option(capsys, tmp_path, option, says):
    path = tmp_path / "good.toml"
    path.write_text(CRAYFISH)
    line = assert_refused_without_writing(capsys, tmp_path, [str(path), *option], path.stem)
    assert line == f"errbudget: error: command line: {says}"


def test_no_command_is_bad_input(capsys):
    assert main([]) == EXIT_INPUT
    assert one_error_line(capsys).startswith("errbudget: error: command line: choose a command")


def test_one_bad_case_stops_every_case_before_anything_runs(capsys, tmp_path):
    good = tmp_path / "good.toml"
    good.write_text(CRAYFISH)
    bad = tmp_path / "bad.toml"
    bad.write_text(CRAYFISH.replace('scheme = "euler"', 'scheme = "eular"'))
    out = tmp_path / "out"
    assert main(run_args([str(good), str(bad)], out)) == EXIT_INPUT
    assert one_error_line(capsys).startswith(f"errbudget: error: {bad}, simulation.scheme: ")
    assert not out.exists()


def _subprocess(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    return subprocess.run(
        [sys.executable, "-m", "errbudget", *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        stdin=subprocess.DEVNULL,
    )


def test_bad_case_through_python_m_has_no_traceback(tmp_path):
    bad = BAD_CASES["unknown-top-level-key"]
    _write_bad(tmp_path, bad)
    done = _subprocess(run_args(["bad-case.toml"], Path("out")), tmp_path)
    assert done.returncode == EXIT_INPUT
    assert done.stdout == ""
    assert "Traceback" not in done.stderr
    assert done.stderr.count("\n") == 1
    assert done.stderr.startswith("errbudget: error: bad-case.toml, simulaton: unknown key ")
    assert not (tmp_path / "out").exists()


def test_version_through_python_m(tmp_path):
    done = _subprocess(["--version"], tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout == f"errbudget {errbudget.__version__}\n"
    assert done.stderr == ""


# --------------------------------------------------------------------------- bugs found


def test_samples_not_a_power_of_two_in_the_case_names_file_and_key(capsys, tmp_path):
    path = tmp_path / "bad-case.toml"
    path.write_text(CRAYFISH.replace("samples = 64", "samples = 100"))
    assert main(["check", str(path)]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert line.startswith(f"errbudget: error: {path}, budget.samples: ")
    assert "power of two" in line


def test_samples_option_not_a_power_of_two_names_the_option(capsys, tmp_path):
    path = tmp_path / "good.toml"
    path.write_text(CRAYFISH)
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--samples", "100", "--quiet"]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert not out.exists()
    assert line.startswith("errbudget: error: command line: argument --samples: "), line


# --------------------------------------------------------------------------- success


def _valid_budget(folder: Path) -> dict:
    data = strict_json((folder / "budget.json").read_text(encoding="utf-8"))
    jsonschema.validate(data, SCHEMA, cls=jsonschema.Draft202012Validator)
    assert data["schema"] == "errbudget.budget/1"
    return data


def test_schema_is_a_valid_json_schema():
    jsonschema.Draft202012Validator.check_schema(SCHEMA)


def test_there_are_demo_cases():
    assert len(DEMO_CASES) >= 3


@pytest.mark.parametrize("case_path", DEMO_CASES, ids=[p.stem for p in DEMO_CASES])
def test_demo_case_runs_and_writes_outputs(capsys, tmp_path, case_path):
    raw = tomllib.loads(case_path.read_text(encoding="utf-8"))
    out = tmp_path / "out"
    assert main(["run", str(case_path), "--out", str(out), "--samples", SAMPLES, "--quiet"]) == 0
    captured = capsys.readouterr()
    assert "ADEQUATE" in captured.out
    assert captured.err == ""
    folder = out / case_path.stem
    budget = _valid_budget(folder)
    assert budget["case"]["title"] == raw["title"]
    assert budget["case"]["path"] == str(case_path)
    assert [q["name"] for q in budget["quantities"]] == [q["name"] for q in raw["quantity"]]
    assert budget["simulation"]["scheme"] == raw["simulation"]["scheme"]
    assert budget["run"]["samples"] == int(SAMPLES)
    assert budget["since_last"] is None
    assert (budget["fit"] is None) == ("counts" not in raw)
    page = (folder / "budget.html").read_text(encoding="utf-8")
    assert page.lstrip().lower().startswith("<!doctype html")
    assert html.escape(raw["title"]) in page
    history = (folder / "history.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(history) == 1
    assert strict_json(history[0])["case_sha256"] == budget["case"]["sha256"]


def test_second_run_appends_history_and_is_reproducible(
    capsys, tmp_path, monkeypatch, report_without_figures
):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "pond.toml").write_text(CRAYFISH)
    folder = tmp_path / "reports" / "pond"

    # First run with the default --out, which is reports/.
    assert main(["run", "pond.toml", "--samples", SAMPLES, "--quiet"]) == 0
    assert "pond.toml: " in capsys.readouterr().out
    first = _valid_budget(folder)
    assert first["since_last"] is None
    history_bytes = (folder / "history.jsonl").read_bytes()
    assert len(history_bytes.splitlines()) == 1

    # Second run of the same case, seed and samples: one more history line, the first kept
    # byte for byte, since_last filled with "no change".
    assert main(["run", "pond.toml", "--out", "reports", "--samples", SAMPLES, "--quiet"]) == 0
    capsys.readouterr()
    second = _valid_budget(folder)
    history_after = (folder / "history.jsonl").read_bytes()
    assert history_after.startswith(history_bytes)
    lines = history_after.decode().splitlines()
    assert len(lines) == 2
    since = second["since_last"]
    assert since is not None
    assert since["previous_time"] == strict_json(lines[0])["time"]
    assert since["case_changed"] is False
    assert since["verdict"] == {
        "before": first["verdict"]["adequate"],
        "now": first["verdict"]["adequate"],
    }
    for q in first["quantities"]:
        change = since["quantities"][q["name"]]
        assert change["value"] == {"before": q["value"], "now": q["value"], "change": 0.0}
        assert change.get("spread") in (None, "unchanged")

    # Reproducibility: the same numbers apart from the clock (and measured speeds).
    second["since_last"] = None
    assert without_clock(second) == without_clock(first)


def test_same_seed_and_samples_differ_only_in_the_run_clock(tmp_path):
    # Through the API (no HTML rendering) to keep the test fast; the CLI adds only
    # run.timestamp and since_last to this dictionary.
    path = tmp_path / "pond.toml"
    path.write_text(CRAYFISH)
    first, second = (run_case(load_case(path), samples=int(SAMPLES)).to_dict() for _ in "ab")
    assert without_clock(first) == without_clock(second)


@pytest.mark.parametrize("case_path", DEMO_CASES, ids=[p.stem for p in DEMO_CASES])
def test_check_prints_resolved_units_and_writes_nothing(capsys, tmp_path, monkeypatch, case_path):
    monkeypatch.chdir(tmp_path)
    raw = tomllib.loads(case_path.read_text(encoding="utf-8"))
    ensure_count_units(raw["model"]["unit"])
    text = raw["model"]["unit"]
    population = format_unit(parse_unit(text, "model.unit"), spelling(text))  # user's spelling
    time_unit = format_unit(ureg.Quantity(raw["simulation"]["step"]).units)

    assert main(["check", str(case_path)]) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    lines = captured.out.splitlines()
    assert f"  population unit: {population}; time unit: {time_unit}" in lines
    for name in raw["parameters"]:
        assert any(line.startswith(f"    {name} = ") for line in lines), name
    for q in raw["quantity"]:
        unit = time_unit if q["kind"] == "time-to" else population
        assert any(
            line.startswith(f"    {q['name']}: ") and line.endswith(f"[{unit}]") for line in lines
        ), q["name"]
    assert list(tmp_path.iterdir()) == []


def test_check_reads_the_counts_and_refuses_a_misspelt_column(capsys, tmp_path, monkeypatch):
    """``check`` opens the counts file: a misspelt count column exits 2 naming file and column,
    as ``run`` would, and nothing is written."""
    monkeypatch.chdir(tmp_path)
    source = REPO / "cases" / "perch-reservoir.toml"
    counts = (REPO / "cases" / "perch-reservoir-counts.csv").read_text(encoding="utf-8")
    (tmp_path / "perch-reservoir-counts.csv").write_text(
        counts.replace("day,count", "day,cuont", 1), encoding="utf-8"
    )
    case = tmp_path / "perch-reservoir.toml"
    case.write_text(source.read_text(encoding="utf-8"), encoding="utf-8")
    before = sorted(p.name for p in tmp_path.iterdir())

    assert main(["check", str(case)]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert "perch-reservoir-counts.csv" in line and 'no column "count"' in line
    assert sorted(p.name for p in tmp_path.iterdir()) == before
