"""Chunked ensemble sweeps give the same budget as one sweep over all members."""

from __future__ import annotations

import json
from pathlib import Path

import errbudget
from errbudget.budget import passes as sweep

CASES = Path(__file__).resolve().parent.parent / "cases"
CLOCK = ("elapsed_seconds", "cost", "chunk_rows", "timestamp")


def _budget_text(case, budget_mb: float, monkeypatch) -> tuple[str, int]:
    monkeypatch.setattr(sweep, "TRAJECTORY_BUDGET_MB", budget_mb)
    data = errbudget.run_case(case, samples=64).to_dict()
    chunk = data["run"]["chunk_rows"]
    for key in CLOCK:
        data["run"].pop(key, None)
    return json.dumps(data, sort_keys=True), chunk


def test_chunked_sweep_is_identical_to_a_single_sweep(monkeypatch):
    case = errbudget.load_case(CASES / "crayfish-pond.toml")
    whole, whole_chunk = _budget_text(case, 1e6, monkeypatch)
    parts, part_chunk = _budget_text(case, 0.5, monkeypatch)
    assert part_chunk < whole_chunk  # the second run really was split
    assert parts == whole


def test_memory_estimate_grows_with_samples_but_chunk_stays_bounded():
    case = errbudget.load_case(CASES / "crayfish-pond.toml")
    small = sweep.chunk_rows(case, 0.1, 6_144)
    large = sweep.chunk_rows(case, 0.1, 327_680)
    assert large == small  # the chunk is set by the trajectory budget, not by the sample
    assert sweep.memory_mb(case, 327_680, 0.1, 2, 40) > sweep.memory_mb(case, 6_144, 0.1, 2, 40)
