"""CSV companions of budget.json: the same numbers, readable by any spreadsheet."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

from errbudget.cli import main

CASES = Path(__file__).resolve().parent.parent / "cases"


def test_csv_tables_carry_the_numbers_of_budget_json(tmp_path, report_without_figures):
    assert (
        main(
            [
                "run",
                str(CASES / "mussel-bed.toml"),
                "--out",
                str(tmp_path),
                "--samples",
                "16",
                "--quiet",
            ]
        )
        == 0
    )
    folder = tmp_path / "mussel-bed"
    budget = json.loads((folder / "budget.json").read_text(encoding="utf-8"))
    ladder = list(csv.DictReader(io.StringIO((folder / "ladder.csv").read_text())))
    summary = list(csv.DictReader(io.StringIO((folder / "summary.csv").read_text())))
    expected_rows = sum(len(q["discretisation"]["ladder"]) for q in budget["quantities"])
    assert len(ladder) == expected_rows
    first = budget["quantities"][0]
    assert float(ladder[0]["step"]) == first["discretisation"]["ladder"][0]["step"]
    assert float(ladder[0]["value"]) == first["discretisation"]["ladder"][0]["value"]
    assert ladder[0]["step_unit"] == budget["simulation"]["step"]["unit"]
    assert [row["quantity"] for row in summary] == [q["name"] for q in budget["quantities"]]
    for row, q in zip(summary, budget["quantities"], strict=True):
        assert float(row["parameter_sd"]) == q["parameter"]["sd"]
        assert float(row["reference"]) == q["reference"]
        assert row["unit"] == q["unit"]
