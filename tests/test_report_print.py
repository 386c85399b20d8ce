"""The report on paper and as read: every demo case prints on at most five A4 pages, page 1
carries the memo, and the visible text shows no raw key of budget.json. So does the rerun of
the perch-reservoir demo after three new counts (the report's "Since the last run" section),
whose page 1 also carries the one-line summary of the rerun.

The printing needs headless Chromium (Debian's ``chromium``) and poppler's ``pdfinfo`` and
``pdftotext`` (``poppler-utils``); ``.ci/run`` tries to install both. Without them these
tests are skipped with the reason, unless ``ERRBUDGET_REQUIRE_PRINT`` is set, when they fail.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest
from conftest import DEMO_CASES, PERCH_LATER, REPO, headless_browser

from errbudget.cli import main
from errbudget.report.memo import since_brief

MAX_PAGES = 5  # the printed A4 document of a demo case
TIMEOUT = 60  # [s] per browser call
SAMPLES = "64"  # the layout does not depend on the design size; small keeps the test fast
# Symbols of the V&V 20 comparison, written as such in the validation sentence (notation,
# defined in that sentence, not a key shown in place of a label).
NOTATION = {"u_val", "u_num", "u_input", "u_D"}


def _tool(name: str) -> str:
    found = shutil.which(name)
    if found is None:
        if os.environ.get("ERRBUDGET_REQUIRE_PRINT"):
            pytest.fail(f"{name} is not installed (install chromium and poppler-utils)")
        pytest.skip(f"{name} is not installed")
    return found


def _print(html: Path, pdf: Path, profile: Path) -> None:
    command = headless_browser(
        _tool("chromium"), profile, "--no-pdf-header-footer", f"--print-to-pdf={pdf}", html.as_uri()
    )
    done = subprocess.run(command, capture_output=True, timeout=TIMEOUT, check=False)
    assert done.returncode == 0 and pdf.exists(), done.stderr[-2000:]


def _pages(pdf: Path) -> int:
    info = subprocess.run(
        [_tool("pdfinfo"), str(pdf)], capture_output=True, text=True, timeout=TIMEOUT, check=True
    )
    return int(re.search(r"^Pages:\s+(\d+)", info.stdout, flags=re.M).group(1))


def _page_text(pdf: Path, page: int) -> str:
    done = subprocess.run(
        [_tool("pdftotext"), "-f", str(page), "-l", str(page), "-layout", str(pdf), "-"],
        capture_output=True,
        text=True,
        timeout=TIMEOUT,
        check=True,
    )
    return " ".join(done.stdout.replace("\u202f", " ").split())


@pytest.fixture(scope="module")
def printed(tmp_path_factory):
    """Each demo case run (small design) and its report printed to PDF."""
    _tool("chromium")
    folder = tmp_path_factory.mktemp("printed")
    out = folder / "reports"
    args = ["run", *map(str, DEMO_CASES), "--out", str(out), "--samples", SAMPLES, "--quiet"]
    assert main(args) == 0
    result = {}
    for case in DEMO_CASES:
        pdf = folder / f"{case.stem}.pdf"
        _print(out / case.stem / "budget.html", pdf, folder / "profile")
        result[case.stem] = (out / case.stem, pdf)
    return result


@pytest.fixture(scope="module")
def reprinted(tmp_path_factory):
    """The perch-reservoir demo run, three later counts appended, run again, and printed."""
    _tool("chromium")
    folder = tmp_path_factory.mktemp("reprinted")
    for name in ("perch-reservoir.toml", "perch-reservoir-counts.csv"):
        shutil.copy(REPO / "cases" / name, folder / name)
    case, out = folder / "perch-reservoir.toml", folder / "reports"
    args = ["run", str(case), "--out", str(out), "--samples", SAMPLES, "--quiet"]
    assert main(args) == 0
    with (folder / "perch-reservoir-counts.csv").open("a") as stream:
        stream.writelines(f"{t},{c}\n" for t, c in PERCH_LATER)
    assert main(args) == 0
    pdf = folder / "perch-reservoir-rerun.pdf"
    _print(out / case.stem / "budget.html", pdf, folder / "profile")
    return out / case.stem, pdf


@pytest.mark.parametrize("case", DEMO_CASES, ids=lambda p: p.stem)
def test_demo_report_prints_on_at_most_five_pages(printed, case):
    _, pdf = printed[case.stem]
    assert 1 <= _pages(pdf) <= MAX_PAGES


def test_rerun_report_prints_on_at_most_five_pages(reprinted):
    folder, pdf = reprinted
    assert json.loads((folder / "budget.json").read_text())["since_last"]["new_counts"]
    assert 1 <= _pages(pdf) <= MAX_PAGES


def test_rerun_page_one_carries_the_rerun_summary(reprinted):
    folder, pdf = reprinted
    data = json.loads((folder / "budget.json").read_text())
    _assert_memo(data, _page_text(pdf, 1))
    summary = " ".join(since_brief(data).replace("\u202f", " ").split())
    assert summary.startswith(f"Since the last run ({data['since_last']['previous_time']}): ")
    assert "the counts changed" in summary and "3 new counts" in summary
    assert summary in _page_text(pdf, 1)


def test_rerun_prints_the_comparison_and_what_a_decision_needs(reprinted):
    """Fitting on five pages dropped nothing: each part is somewhere in the printed text."""
    _, pdf = reprinted
    text = " ".join(_page_text(pdf, page) for page in range(1, _pages(pdf) + 1))
    for part in (
        "The forecast and its numerical error",
        "What weighs on the decision",
        "Since the last run",
        "The last forecast against the new counts",  # the figure
        "The last forecast against the counts that came in since",  # its table
        "The forecast before and now",
        "The fitted parameters before and now",
        "Validation against the counts",
        "What this budget does not cover",
        "local regulations and the advice of qualified biologists",
        "How it was made",
        "Methods",
        "The case file",
    ):
        assert part in text, part
    assert re.search(r"230 day 4655 fish .* 260 day 4690 fish .* 290 day 4710 fish", text)


@pytest.mark.parametrize("case", DEMO_CASES, ids=lambda p: p.stem)
def test_page_one_carries_the_memo(printed, case):
    folder, pdf = printed[case.stem]
    data = json.loads((folder / "budget.json").read_text())
    _assert_memo(data, _page_text(pdf, 1))


def _assert_memo(data: dict, text: str) -> None:
    """Page 1's text holds the question, the verdict, the steps and each quantity and flag."""
    verdict = data["verdict"]
    assert "Is the time step of this forecast small enough" in text
    assert ("NOT ADEQUATE" if not verdict["adequate"] else "ADEQUATE") in text
    assert "recommended step" in text.lower()  # the label is set in capitals by the page
    assert "Allowance" in text and "Central interval" in text
    for q in data["quantities"]:
        assert q["name"] in text, q["name"]
    for flag in data["flags"]:
        if flag["code"] not in ("off-grid", "truncated-at-zero", "indices-unsettled"):
            assert flag["code"] in text, flag["code"]  # every flag that weighs on the decision


class _Visible(HTMLParser):
    """The text a reader sees: no <style>, <title> of figures, nor the case file's text."""

    HIDDEN = {"style", "title", "pre", "script"}

    def __init__(self):
        super().__init__()
        self.depth, self.parts = 0, []

    def handle_starttag(self, tag, attrs):
        if tag in self.HIDDEN:
            self.depth += 1

    def handle_endtag(self, tag):
        if tag in self.HIDDEN:
            self.depth -= 1

    def handle_data(self, data):
        if self.depth == 0:
            self.parts.append(data)


def _keys(value) -> set[str]:
    if isinstance(value, dict):
        return set(value) | {k for v in value.values() for k in _keys(v)}
    if isinstance(value, list):
        return {k for v in value for k in _keys(v)}
    return set()


@pytest.mark.parametrize("case", DEMO_CASES, ids=lambda p: p.stem)
def test_visible_text_holds_no_raw_key(printed, case):
    _assert_no_raw_key(printed[case.stem][0])


def test_rerun_visible_text_holds_no_raw_key(reprinted):
    _assert_no_raw_key(reprinted[0])


def _assert_no_raw_key(folder: Path) -> None:
    data = json.loads((folder / "budget.json").read_text())
    parser = _Visible()
    parser.feed((folder / "budget.html").read_text())
    visible = " ".join(parser.parts)
    raw = {k for k in _keys(data) if "_" in k} - NOTATION
    shown = {k for k in raw if re.search(rf"(?<![\w.]){re.escape(k)}(?![\w])", visible)}
    assert not shown, sorted(shown)
    assert "›" not in visible  # no "flag › code" paths of nested keys
