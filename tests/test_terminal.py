"""What ``errbudget run`` prints: the summary, --quiet, --json, and a pipe that closes early.

The expected texts are written out here, with the numbers taken from the budget.json the
same run wrote: the layout and the words are pinned, the numbers come from the budget.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

from conftest import CRAYFISH, PERCH_LATER, REPO, strict_json

from errbudget.cli import main
from errbudget.outputs.terminal import Printer, number

CASES = REPO / "cases"
LATER = PERCH_LATER  # near the fitted curve
MISSED = [(230, 3400), (260, 3700), (290, 5600)]  # counts the forecast cannot explain


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def _run(capsys, case: Path, out: Path, *extra: str) -> tuple[str, dict]:
    assert main(["run", str(case), "--out", str(out), "--samples", "64", *extra]) == 0
    printed = capsys.readouterr().out
    return printed, strict_json((out / case.stem / "budget.json").read_text())


def _columns(line: str) -> list[str]:
    return [cell.strip() for cell in line.strip().split("  ") if cell.strip()]


def _copy_perch(folder: Path) -> Path:
    for name in ("perch-reservoir.toml", "perch-reservoir-counts.csv"):
        shutil.copy(CASES / name, folder / name)
    return folder / "perch-reservoir.toml"


def test_summary_of_a_counts_case(capsys, tmp_path, report_without_figures):
    case = _copy_perch(tmp_path)
    printed, data = _run(capsys, case, tmp_path / "out")
    fish, days = data["quantities"]
    rec = data["verdict"]["recommended_step"]["value"]
    lines = printed.splitlines()
    assert lines[0] == (
        f"{case}: {'ADEQUATE' if data['verdict']['adequate'] else 'NOT ADEQUATE'} at a step of "
        f"10 days; coarsest adequate step {number(rec, 6)} day{'s' if rec != 1 else ''}"
    )
    # The verdict sentence of budget.json, wrapped.
    assert " ".join(line.strip() for line in lines[1:3]) == data["verdict"]["reason"]
    assert _columns(lines[4]) == [
        "quantity",
        "forecast",
        "numerical error / allowance",
        "adequate from",
    ]
    for row, q, unit in ((5, fish, "fish"), (7, days, "days")):
        numerical = q["numerical_to_allowance"] * q["allowance"]
        judged = "ok" if q["adequate"] else "too coarse"
        step = q["recommended_step"]["value"]
        assert _columns(lines[row]) == [
            q["name"],
            f"{number(q['reference'], 4)} {unit}",
            f"{number(numerical)} / {number(q['allowance'])} {unit} = "
            f"{number(q['numerical_to_allowance'], 2)} {judged}",
            f"{number(step, 6)} day{'s' if step != 1 else ''}",
        ]
        low, high = q["parameter"]["low"], q["parameter"]["high"]
        assert _columns(lines[row + 1]) == [
            f"90% interval {number(low, 4)} to {number(high, 4)} {unit}"
        ]
    assert lines[-3:] == [
        "  flags: none",
        "",
        f"  wrote {tmp_path / 'out' / case.stem}{os.sep}: budget.json, budget.html, ladder.csv, "
        "summary.csv, history.jsonl (appended)",
    ]


def test_summary_lists_flags_most_severe_first(capsys, tmp_path, report_without_figures):
    # Euler at 35 days with r = 0.06/day: r h = 2.1, the logistic map beyond its stable range
    # (May 1976), so artefacts; a requested time between grid points adds the off-grid note.
    text = CRAYFISH.replace('step = "7 day"', 'step = "35 day"').replace(
        'at = "200 day"', 'at = "190 day"'
    )
    case = write(tmp_path, "flagged.toml", text)
    printed, data = _run(capsys, case, tmp_path / "out")
    codes = [f["code"] for f in data["flags"]]
    assert "off-grid" in codes and set(codes) & {"oscillation", "overshoot", "negative"}
    lines = printed.splitlines()
    start = lines.index("  flags, most severe first:")
    shown = [line for line in lines[start + 1 :] if line.startswith("    [")]
    assert len(shown) == len(codes)
    heads = [line.split(":")[0].strip() for line in shown]
    # Artefacts change the verdict; off-grid is a note, listed last.
    assert heads[-1] == "[note] off-grid"
    for flag in data["flags"]:
        if flag["code"] in ("oscillation", "overshoot", "negative", "divergence"):
            assert f"[changes the verdict] {flag['code']}" in heads
    # Every message in full (wrapped), in the order shown.
    block = " ".join(line.strip() for line in lines[start + 1 :] if line.startswith("    "))
    for flag in data["flags"]:
        assert " ".join(flag["message"].split()) in block


def test_summary_of_a_rerun_shows_what_changed_and_the_new_counts(
    capsys, tmp_path, report_without_figures
):
    case = _copy_perch(tmp_path)
    out = tmp_path / "out"
    _run(capsys, case, out, "--quiet")
    with (tmp_path / "perch-reservoir-counts.csv").open("a") as stream:
        stream.writelines(f"{t},{c}\n" for t, c in MISSED)
    printed, data = _run(capsys, case, out)
    since = data["since_last"]
    new = since["new_counts"]
    lines = printed.splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("  since the last run ("))
    assert lines[start] == (
        f"  since the last run ({since['previous_time']}; counts changed, same case file):"
    )
    block = "\n".join(lines[start:])
    for name, item in since["parameters"].items():
        unit = {"r": "per day", "K": "fish", "N0": "fish"}[name]
        assert (
            f"{name} {item['change']} (sd {number(item['sd_before'])} -> "
            f"{number(item['sd_now'])} {unit})"
        ) in " ".join(block.split())
    table = lines.index("    the last forecast against the 3 new counts:")
    assert _columns(lines[table + 1]) == [
        "time",
        "counted (fish)",
        "forecast (fish)",
        "E = forecast - count",
        "u_val",
    ]
    for i, (t, count) in enumerate(MISSED):
        expected = [
            f"{t} days",
            number(count, 4),
            number(new["forecast"][i], 4),
            f"{number(new['E'][i])} fish",
            f"{number(new['u_val'][i])} fish",
            "OUTSIDE" if new["exceed"][i] else "within",
        ]
        assert _columns(lines[table + 2 + i]) == expected
    assert new["n_exceed"] >= 2  # 3400 and 3700 fish where about 4650 were forecast
    warning = " ".join(line.strip() for line in lines[table + 5 : table + 9])
    assert warning.startswith(
        f"WARNING: {new['n_exceed']} of 3 new counts fall outside what the budget explains"
    )


def test_quiet_prints_only_the_verdict_line(capsys, tmp_path, quick_cli):
    case = write(tmp_path, "pond.toml", CRAYFISH)
    printed, data = _run(capsys, case, tmp_path / "out", "--quiet")
    assert printed.count("\n") == 1
    assert printed.startswith(f"{case}: NOT ADEQUATE at a step of 7 days; coarsest adequate step")


def test_json_prints_budget_json(capsys, tmp_path, quick_cli):
    case = write(tmp_path, "pond.toml", CRAYFISH)
    printed, data = _run(capsys, case, tmp_path / "out", "--json")
    assert strict_json(printed) == data
    second = write(tmp_path, "pond2.toml", CRAYFISH)
    assert main(["run", str(case), str(second), "--out", str(tmp_path / "o2"), "--json"]) == 0
    both = json.loads(capsys.readouterr().out)
    written = [
        strict_json((tmp_path / "o2" / p.stem / "budget.json").read_text()) for p in (case, second)
    ]
    assert both == written  # one array, in the order of the cases


def test_a_pipe_closed_early_ends_quietly(tmp_path):
    case = write(tmp_path, "pond.toml", CRAYFISH)
    command = [sys.executable, "-m", "errbudget", "run", str(case), "--out", str(tmp_path)]
    # head reads one line and exits: the rest of the summary meets a closed pipe.
    done = subprocess.run(
        ["bash", "-c", 'set -o pipefail; "$@" | head -n 1', "run", *command],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.stdout.startswith(f"{case}: NOT ADEQUATE")
    assert done.stderr == "", done.stderr
    assert done.returncode == 0
    assert (tmp_path / "pond" / "budget.json").exists()


class _ClosedPipe:
    def __init__(self):
        self.writes = 0

    def write(self, text):
        self.writes += 1
        raise BrokenPipeError

    def flush(self):
        pass


def test_printer_stops_after_a_broken_pipe():
    stream = _ClosedPipe()
    emit = Printer(stream)
    emit("one")
    emit("two")
    assert stream.writes == 1 and emit.gone
