"""The programme overview (outputs/overview.py, report/overview.py) and the batch's own files
and in-process runs (errbudget.batch), without Dask."""

from __future__ import annotations

import csv
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from errbudget.batch.driver import Programme, run_cases
from errbudget.batch.files import render_outputs, write_outputs
from errbudget.outputs import history
from errbudget.outputs.overview import (
    FAILED,
    check_overview_place,
    overview_csv,
    row_for_budget,
    row_for_failure,
    terminal_table,
)
from errbudget.report.overview import render_overview

REPO = Path(__file__).resolve().parents[1]
PINNED = REPO / "tests" / "golden" / "pinned"


def _pinned(name: str) -> dict:
    return json.loads((PINNED / f"{name}.json").read_text(encoding="utf-8"))


def _rows():
    return [
        row_for_budget(0, Path("cases/mussel-bed.toml"), _pinned("mussel-bed")),
        row_for_budget(1, Path("cases/crayfish-pond.toml"), _pinned("crayfish-pond")),
        row_for_failure(2, Path("cases/=bad.toml"), "cases/=bad.toml, model.form: unknown", 2),
        row_for_budget(3, Path("golden/negative-euler.toml"), _pinned("negative-euler")),
    ]


def test_a_row_holds_the_verdict_the_binding_quantity_and_its_error_against_the_allowance():
    budget = _pinned("crayfish-pond")
    row = row_for_budget(0, Path("cases/crayfish-pond.toml"), budget)
    binding = next(q for q in budget["quantities"] if q["name"] == row.binding)
    assert row.verdict == "NOT ADEQUATE" and row.binding == "days to 6000 crayfish"
    assert row.unit == binding["unit"] == "day"
    assert row.allowance == binding["allowance"]
    # the error the verdict sentence states: ratio x allowance (budget.combine)
    assert row.error == pytest.approx(binding["numerical_to_allowance"] * binding["allowance"])
    assert f"{row.error:.3g} days" in budget["verdict"]["reason"]
    assert row.ratio == budget["verdict"]["ratio"]
    assert (row.step, row.recommended, row.time_unit) == (7.0, 1.0, "day")
    assert row.report == "crayfish-pond/budget.html"


def test_the_csv_is_worst_first_with_units_in_their_own_columns():
    table = list(csv.DictReader(io.StringIO(overview_csv(_rows()))))
    assert [r["verdict"] for r in table] == [FAILED, "NOT ADEQUATE", "NOT ADEQUATE", "ADEQUATE"]
    # a spreadsheet would run a cell starting with "=": it is made plain text
    assert [r["case"] for r in table] == ["'=bad", "crayfish-pond", "negative-euler", "mussel-bed"]
    failed = table[0]
    assert failed["exit_code"] == "2" and failed["message"].endswith("model.form: unknown")
    assert failed["case_file"] == "cases/=bad.toml"
    pond = table[1]
    assert (pond["step"], pond["recommended_step"], pond["step_unit"]) == ("7.0", "1.0", "day")
    assert pond["quantity_unit"] == "day" and float(pond["error_to_allowance"]) > 1
    assert "negative" in table[2]["flags"].split()


def test_the_terminal_table_is_compact_and_lists_the_failure_messages():
    text = terminal_table(_rows())
    lines = text.splitlines()
    assert lines[0].split()[:2] == ["case", "verdict"]
    assert lines[2].startswith("=bad") and "FAILED (bad input)" in lines[2]
    pond = next(line for line in lines if line.startswith("crayfish-pond"))
    assert "7 day   1 day" in pond and "6.76 / 1.72 day (3.93x)" in pond
    euler = next(line for line in lines if line.startswith("negative-euler"))
    assert euler.endswith("negative, overshoot, oscillation")
    assert lines[-1] == "=bad: cases/=bad.toml, model.form: unknown"
    assert max(len(line) for line in lines) <= 150


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.links, self.sources, self.rows, self.buttons = [], [], 0, 0

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "a":
            self.links.append(attrs.get("href"))
        if "src" in attrs or (tag == "link" and attrs.get("rel") == "stylesheet"):
            self.sources.append(attrs.get("src") or attrs.get("href"))
        self.rows += tag == "tr"
        self.buttons += tag == "button"


def test_the_page_links_each_report_sorts_by_column_and_loads_nothing():
    rows = _rows()
    rows[0] = rows[0].__class__(**{**rows[0].__dict__, "title": "<script>alert(1)</script>"})
    page = render_overview(rows, when="2025-05-01T10:00:00+00:00", where="in this process")
    parsed = _Page()
    parsed.feed(page)
    assert parsed.links == [
        "crayfish-pond/budget.html", "negative-euler/budget.html", "mussel-bed/budget.html",
    ]  # fmt: skip
    assert parsed.sources == [] and "http" not in page.replace("http-equiv", "")
    assert parsed.rows == 1 + len(rows) and parsed.buttons == 10
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert page.count("<script>") == 1  # the sorter only
    assert "@media print" in page
    # worst first: the failed case's row comes before the others
    assert page.index("=bad") < page.index("crayfish-pond") < page.index("mussel-bed")
    assert re.search(r"1</strong> adequate, <strong>2</strong> not adequate, <strong>1", page)


def test_an_overview_in_the_way_of_a_folder_is_refused(tmp_path):
    (tmp_path / "overview.csv").mkdir()
    with pytest.raises(Exception, match="a folder is in the way of the programme overview"):
        check_overview_place(tmp_path)


def test_the_exit_code_says_whether_any_case_failed():
    ok = row_for_budget(0, Path("a.toml"), _pinned("mussel-bed"))
    bad = row_for_failure(1, Path("b.toml"), "b.toml: x", 2)
    broken = row_for_failure(2, Path("c.toml"), "internal error: x", 1)
    assert Programme([ok], {}, Path("."), "", 0).exit_code == 0
    assert Programme([ok, bad], {}, Path("."), "", 0).exit_code == 2
    assert Programme([ok, bad, broken], {}, Path("."), "", 0).exit_code == 1
    assert Programme([ok], {}, Path("."), "", 0, overview_error="x").exit_code == 2


def test_a_rendering_made_elsewhere_is_compared_with_the_history_as_it_is_when_written(tmp_path):
    from errbudget import load_case, run_case

    case = load_case(REPO / "tests" / "golden" / "cases" / "negative-euler.toml")
    budget = run_case(case, samples=16)
    rendered = render_outputs(budget, case.text, None, "2025-05-01T10:00:00+00:00")
    assert rendered.data["since_last"] is None
    folder = tmp_path / "negative-euler"
    # Another run of the same case appends to the history in between.
    earlier = dict(rendered.line, time="2025-04-01T10:00:00+00:00", verdict=True)
    folder.mkdir()
    history.append(folder, earlier)
    written = write_outputs(folder, rendered)
    data = json.loads((folder / "budget.json").read_text(encoding="utf-8"))
    assert data["since_last"]["previous_time"] == "2025-04-01T10:00:00+00:00"
    assert data["since_last"]["verdict_changed"] is True
    assert written.files["budget.json"] == (folder / "budget.json").read_text(encoding="utf-8")
    lines = (folder / "history.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(line)["time"] for line in lines] == [earlier["time"], rendered.line["time"]]


def test_a_batch_in_this_process_keeps_failures_per_case(tmp_path):
    good = REPO / "tests" / "golden" / "cases" / "negative-euler.toml"
    bad = tmp_path / "broken.toml"
    bad.write_text(good.read_text(encoding="utf-8").replace('"logistic"', '"logistik"'))
    out = tmp_path / "out"
    programme = run_cases([good, bad], out=out, samples=16)
    assert programme.exit_code == 2 and programme.where == "in this process"
    assert [row.verdict for row in programme.rows] == ["NOT ADEQUATE", FAILED]
    assert "model.form" in programme.rows[1].message and str(bad) in programme.rows[1].message
    assert (out / "negative-euler" / "budget.html").is_file()
    assert not (out / "broken").exists()
    assert programme.overview == [out / "overview.csv", out / "overview.html"]
    assert "broken" in (out / "overview.csv").read_text(encoding="utf-8")
