"""Faults: numerical trouble never crashes or leaks NaN/inf, a failed run loses nothing,
concurrent runs keep the history whole, runs are reproducible, user text is escaped."""

from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import (
    CRAYFISH,
    CRAYFISH_COUNTS,
    EXIT_INPUT,
    REPO,
    one_error_line,
    strict_json,
    without_clock,
)

import errbudget
import errbudget.outputs.files
import errbudget.report
from errbudget.cli import main
from errbudget.uncertainty.fitting import fit_counts

QUICK = ["--samples", "16", "--quiet"]
PERCH = REPO / "cases" / "perch-reservoir.toml"


def _run_ok(capsys, case: Path, out: Path, *extra: str) -> dict:
    assert main(["run", str(case), "--out", str(out), *QUICK, *extra]) == 0
    captured = capsys.readouterr()
    assert captured.err == "", captured.err  # no warnings or tracebacks leak to the user
    return strict_json((out / case.stem / "budget.json").read_text(encoding="utf-8"))


def _all_numbers_finite(value) -> bool:
    if isinstance(value, dict):
        return all(_all_numbers_finite(v) for v in value.values())
    if isinstance(value, list):
        return all(_all_numbers_finite(v) for v in value)
    if isinstance(value, float):
        return bool(np.isfinite(value))
    return True


# --------------------------------------------------------------------- numerical faults


def test_overflow_at_an_unstable_step_is_flagged_not_crashed(capsys, tmp_path):
    # r h = 350: explicit Euler's first step overshoots K a hundredfold and the next would
    # step far below zero, where the population is absorbed: a stock the case's step wipes
    # out while the accurate solution grows to K.
    case = tmp_path / "pond.toml"
    case.write_text(
        CRAYFISH.replace(
            'r  = { value = "0.06 / day", sd = "0.01 / day" }',
            'r  = { value = "50 / day", sd = "1 / day" }',
        )
    )
    data = _run_ok(capsys, case, tmp_path / "out")
    assert "negative" in [flag["code"] for flag in data["flags"]]
    assert _all_numbers_finite(data)


def test_fit_that_fails_falls_back_to_the_prior_spread(capsys, tmp_path):
    # All-zero counts: the Poisson likelihood drives r, K and N0 off towards 0 or infinity.
    # r and K are given as fixed values (no prior), so nothing holds them: K runs off.
    (tmp_path / "marsh-counts.csv").write_text("day,count\n0,0\n28,0\n56,0\n84,0\n112,0\n")
    case = tmp_path / "pond.toml"
    case.write_text(
        CRAYFISH_COUNTS.replace(
            'r  = { value = "0.06 / day", sd = "0.01 / day" }', 'r  = "0.06 / day"'
        ).replace(
            'K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }',
            'K  = "9000 crayfish"',
        )
    )
    data = _run_ok(capsys, case, tmp_path / "out")
    failed = [flag for flag in data["flags"] if flag["code"] == "fit-failed"]
    assert len(failed) == 1
    assert "prior spread" in failed[0]["message"]
    assert data["fit"]["converged"] is False
    assert _all_numbers_finite(data)
    history = (tmp_path / "out" / "pond" / "history.jsonl").read_text().splitlines()
    assert len(history) == 1 and strict_json(history[0])


def test_singular_information_falls_back_to_the_bootstrap():
    # mu = a b: only the product is determined, so the observed information is singular.
    counts = np.array([95.0, 110.0, 102.0, 98.0, 105.0])
    times = np.arange(counts.size, dtype=float)

    def simulate(theta):
        theta = np.atleast_2d(theta)
        return np.repeat((theta[:, 0] * theta[:, 1])[:, None], times.size, axis=1)

    result = fit_counts(simulate, ("a", "b"), [10.0, 10.0], times, counts, n_bootstrap=20)
    assert "bootstrap" in result.message, result.message
    assert result.uncertainty_method in ("parametric bootstrap", "none")
    if result.cov is not None:
        assert np.isfinite(result.cov).all()


SINGULAR = """\
title = "Only the product a b is identifiable"
[model]
form = "custom"
unit = "fish"
rate = "a*b*N*(1 - N/K)"
[parameters]
a = "0.2 / day"
b = "1"
K = "1000 fish"
N0 = "50 fish"
[simulation]
scheme = "rk4"
step = "1 day"
horizon = "40 day"
[[quantity]]
name = "fish on day 30"
kind = "value"
at = "30 day"
[counts]
file = "counts.csv"
error = "poisson"
fit = ["a", "b"]
"""


def _singular_counts(tmp_path: Path) -> None:
    times = np.arange(0.0, 40.0, 4.0)
    mu = 1000 / (1 + (1000 / 50 - 1) * np.exp(-0.2 * times))
    counts = np.random.default_rng(1).poisson(mu)
    (tmp_path / "counts.csv").write_text(
        "time,count\n" + "".join(f"{t:g},{c}\n" for t, c in zip(times, counts, strict=True))
    )


def test_singular_information_through_the_cli_uses_the_bootstrap(capsys, tmp_path):
    # Fitting a and b of a custom law in which only their product matters, with no prior
    # (fixed values in [parameters] are the start): the observed information matrix is
    # singular, so the uncertainty must come from the bootstrap, the run must finish (a work
    # cap bounds the refits) and the budget stay finite.
    case = tmp_path / "singular.toml"
    case.write_text(SINGULAR)
    _singular_counts(tmp_path)
    data = _run_ok(capsys, case, tmp_path / "out")
    assert data["fit"]["uncertainty_method"] == "parametric bootstrap"
    assert "bootstrap" in data["fit"]["message"]
    assert _all_numbers_finite(data)


def test_priors_separate_what_the_counts_cannot(capsys, tmp_path):
    # The same product a b with priors: the posterior is proper. On the ln scale the counts
    # fix ln a + ln b, so the posterior sd of ln b is (1/s_a^2 + 1/s_b^2)^-1/2 with s_a = 0.25
    # and s_b = 0.1 the prior sds of ln a and ln b: 0.093, 93 % of b's prior sd (conditioning
    # of a normal; Gelman et al. 2013, Bayesian Data Analysis, sec. 3.5): b is barely informed,
    # a (37 %) is.
    case = tmp_path / "singular.toml"
    case.write_text(
        SINGULAR.replace(
            'a = "0.2 / day"', 'a = { value = "0.2 / day", sd = "0.05 / day" }'
        ).replace('b = "1"', 'b = { value = "1", sd = "0.1" }')
    )
    _singular_counts(tmp_path)
    data = _run_ok(capsys, case, tmp_path / "out")
    assert data["fit"]["uncertainty_method"] in ("Laplace", "importance sampling")
    assert data["fit"]["weakly_informed"] == ["b"]
    ratio = data["fit"]["posterior"]["parameters"]["b"]["sd_ratio"]
    assert ratio == pytest.approx(0.93, abs=0.05)
    assert "weakly-informed" in [flag["code"] for flag in data["flags"]]
    assert _all_numbers_finite(data)


# --------------------------------------------------------------------- nothing lost
# These tests break the writing of the outputs; the budget and the figures are beside the
# point, so the case's budget is computed once (quick_cli) and the page drawn without figures.


def _earlier_outputs(capsys, tmp_path) -> tuple[Path, Path, dict[str, bytes]]:
    case = tmp_path / "pond.toml"
    case.write_text(CRAYFISH)
    out = tmp_path / "out"
    _run_ok(capsys, case, out)
    folder = out / "pond"
    return case, out, {p.name: p.read_bytes() for p in folder.iterdir()}


def _assert_unchanged(folder: Path, before: dict[str, bytes]) -> None:
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before


def test_failed_rendering_leaves_earlier_outputs(capsys, tmp_path, monkeypatch, quick_cli):
    case, out, before = _earlier_outputs(capsys, tmp_path)
    assert {"budget.json", "budget.html", "history.jsonl"} <= set(before)

    def broken(*args, **kwargs):
        raise RuntimeError("renderer broke")

    monkeypatch.setattr(errbudget.report, "render_html", broken)
    assert main(["run", str(case), "--out", str(out), *QUICK]) == 1
    assert "internal error" in capsys.readouterr().err
    _assert_unchanged(out / "pond", before)


@pytest.mark.parametrize("failing_call", [1, 2])
def test_failed_write_leaves_the_earlier_set(
    capsys, tmp_path, monkeypatch, failing_call, quick_cli
):
    # Before the fix, budget.json was renamed into place before budget.html was written, so
    # a failure on the second file left a new budget.json beside an old budget.html.
    case, out, before = _earlier_outputs(capsys, tmp_path)
    real = errbudget.outputs.files.tempfile.mkstemp
    calls = []

    def flaky(*args, **kwargs):
        calls.append(1)
        if len(calls) == failing_call + 1:  # the (n+1)-th temporary of the new run
            raise OSError(28, "No space left on device")
        return real(*args, **kwargs)

    monkeypatch.setattr(errbudget.outputs.files.tempfile, "mkstemp", flaky)
    # A full disk is a fault of the environment: exit code 2 and one line naming the file.
    assert main(["run", str(case), "--out", str(out), *QUICK]) == EXIT_INPUT
    assert "the disk is full" in one_error_line(capsys)
    _assert_unchanged(out / "pond", before)  # also: no temporary left behind


def test_failed_rename_leaves_the_earlier_set(capsys, tmp_path, monkeypatch, quick_cli):
    case, out, before = _earlier_outputs(capsys, tmp_path)
    real = os.replace

    def broken_second(src, dst):
        if str(dst).endswith("budget.html"):
            raise OSError(5, "Input/output error")
        return real(src, dst)

    monkeypatch.setattr(errbudget.outputs.files.os, "replace", broken_second)
    assert main(["run", str(case), "--out", str(out), *QUICK]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert "budget.html" in line and "input/output error" in line
    # budget.json is renamed first in the set, so it may be new; this is the documented
    # window of write_all_atomic. The history is appended only after all renames.
    after = {p.name: p.read_bytes() for p in (out / "pond").iterdir()}
    assert after["history.jsonl"] == before["history.jsonl"]
    assert after["budget.html"] == before["budget.html"]
    assert not [name for name in after if name.endswith(".tmp")]


# Each process runs the command line on a budget computed beforehand, read from a pickle by a
# stand-in for errbudget.budget.run (so the process loads neither SciPy nor the engine), and
# draws the page without figures: the test is about the lock on the history, not the numbers.
ONE_BUDGET = """
import functools, pickle, sys, types
with open(sys.argv[1], "rb") as stream:
    data, series = pickle.load(stream)
stand_in = types.ModuleType("errbudget.budget.run")
stand_in.run_case = lambda case, **kwargs: types.SimpleNamespace(
    to_dict=lambda: data, series=series
)
sys.modules["errbudget.budget.run"] = stand_in
import errbudget.report
errbudget.report.render_html = functools.partial(
    errbudget.report.render_html, include_figures=False
)
from errbudget.cli import main
sys.exit(main(sys.argv[2:]))
"""


def _subprocess_run(args: list[str], cwd: Path) -> subprocess.Popen:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    return subprocess.Popen(
        [sys.executable, "-c", ONE_BUDGET, *args],
        cwd=cwd,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        stdin=subprocess.DEVNULL,
        text=True,
    )


def test_two_concurrent_runs_append_two_whole_history_lines(tmp_path):
    (tmp_path / "pond.toml").write_text(CRAYFISH)
    budget = errbudget.run_case(errbudget.load_case(tmp_path / "pond.toml"), samples=16)
    (tmp_path / "budget.pickle").write_bytes(pickle.dumps((budget.to_dict(), budget.series)))
    args = ["budget.pickle", "run", "pond.toml", "--out", "out", *QUICK]
    runs = [_subprocess_run(args, tmp_path) for _ in range(2)]
    for run in runs:
        _, err = run.communicate(timeout=180)
        assert run.returncode == 0, err
    lines = (tmp_path / "out" / "pond" / "history.jsonl").read_text().splitlines()
    assert len(lines) == 2
    assert all(strict_json(line)["schema"] == "errbudget.history/1" for line in lines)
    # The run that took the lock second compared itself with the first one's whole line.
    last = strict_json((tmp_path / "out" / "pond" / "budget.json").read_text())
    assert last["since_last"] is not None


# --------------------------------------------------------------------- reproducibility


def test_counts_case_is_reproducible_bit_for_bit():
    # Through the API and the budget.json writer (the HTML adds nothing to the numbers).
    case = errbudget.load_case(PERCH)
    first, second = (
        strict_json(errbudget.outputs.files.dumps(errbudget.run_case(case, samples=16).to_dict()))
        for _ in "ab"
    )
    assert first["fit"] is not None
    # json round trip keeps every float's 17 significant digits: equality is bit for bit.
    assert without_clock(first) == without_clock(second)


# --------------------------------------------------------------------- hostile text

HOSTILE = "<img src=x onerror=alert(1)>"


def test_report_escapes_title_and_quantity_name(capsys, tmp_path):
    case = tmp_path / "pond.toml"
    text = CRAYFISH.replace(
        '"Upper marsh crayfish pond, autumn harvest plan"', json.dumps(HOSTILE)
    ).replace('name = "stock at harvest"', f"name = {json.dumps(HOSTILE + ' q')}")
    case.write_text(text)
    data = _run_ok(capsys, case, tmp_path / "out")
    assert data["case"]["title"] == HOSTILE
    page = (tmp_path / "out" / "pond" / "budget.html").read_text(encoding="utf-8")
    assert "<img" not in page.lower()
    assert "&lt;img src=x onerror=alert(1)&gt;" in page


def test_counts_symlink_out_of_the_case_folder_is_refused(capsys, tmp_path):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "secret.csv").write_text("day,count\n0,1\n1,2\n2,3\n")
    folder = tmp_path / "case"
    folder.mkdir()
    (folder / "marsh-counts.csv").symlink_to(outside / "secret.csv")
    case = folder / "pond.toml"
    case.write_text(CRAYFISH_COUNTS)
    assert main(["check", str(case)]) == EXIT_INPUT
    line = one_error_line(capsys)
    assert line.startswith(f"errbudget: error: {case}, counts.file: "), line
    assert "must stay inside the case's folder" in line
