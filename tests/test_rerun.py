"""Rerun after new counts: the comparison with the last run and the check of its forecast."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from conftest import PERCH_LATER as LATER

from errbudget.cli import main

CASES = Path(__file__).resolve().parents[1] / "cases"


def _run(case: Path, out: Path) -> dict:
    assert main(["run", str(case), "--out", str(out), "--samples", "64", "--quiet"]) == 0
    return json.loads((out / case.stem / "budget.json").read_text())


def test_rerun_after_new_counts(tmp_path, report_without_figures):
    for name in ("perch-reservoir.toml", "perch-reservoir-counts.csv"):
        shutil.copy(CASES / name, tmp_path / name)
    case, out = tmp_path / "perch-reservoir.toml", tmp_path / "reports"
    first = _run(case, out)
    assert first["since_last"] is None
    history = out / case.stem / "history.jsonl"
    first_line = history.read_bytes()

    with (tmp_path / "perch-reservoir-counts.csv").open("a") as stream:
        stream.writelines(f"{t},{c}\n" for t, c in LATER)
    second = _run(case, out)
    since = second["since_last"]

    lines = history.read_bytes().splitlines(keepends=True)
    assert len(lines) == 2 and lines[0] == first_line  # append-only: first line byte for byte

    assert since["counts_changed"] is True and since["case_changed"] is False
    before, now = first["fit"]["parameters"], second["fit"]["parameters"]
    for name, item in since["parameters"].items():
        assert item["sd_before"] == before[name]["sd"] and item["sd_now"] == now[name]["sd"]
    narrowed = [n for n in now if now[n]["sd"] < 0.99 * before[n]["sd"]]
    assert since["narrowed"] == narrowed
    assert "K" in narrowed  # counts near the plateau inform the carrying capacity
    verdicts = first["verdict"]["adequate"], second["verdict"]["adequate"]
    assert since["verdict_changed"] == (verdicts[0] != verdicts[1])
    steps = first["verdict"]["recommended_step"], second["verdict"]["recommended_step"]
    assert since["recommended_step_changed"] == (steps[0] != steps[1])

    new = since["new_counts"]
    assert new["times"] == [t for t, _ in LATER] and new["counts"] == [c for _, c in LATER]
    # The previous forecast, recomputed from the first run's history line.
    old = json.loads(first_line)["forecast"]
    expected = np.interp([t for t, _ in LATER], old["times"], old["values"])
    assert new["forecast"] == pytest.approx(expected)
    assert new["E"] == pytest.approx(expected - np.array(new["counts"]))
    # u_val = sqrt(sd_F^2 + u_D^2), u_D = sqrt(F) for Poisson counts (V&V 20 approach)
    sd = np.interp([t for t, _ in LATER], old["times"], old["sd"])
    assert new["u_val"] == pytest.approx(np.sqrt(sd**2 + expected))
    assert new["n_exceed"] == sum(new["exceed"]) and new["unit"] == "fish"
