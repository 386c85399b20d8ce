"""The HTML budget: verdict first and verbatim, self-contained, escaped, printable.

The budget comes from the real pipeline, run once for the module on the crayfish demo case
with a small Sobol design. The browser tests open the page in a headless Chromium (Debian's
``chromium`` package); without it they fail when ``CI`` is set and are skipped otherwise.
"""

from __future__ import annotations

import copy
import functools
import http.server
import io
import json
import math
import os
import re
import shutil
import subprocess
import threading
from fractions import Fraction
from html import unescape
from html.parser import HTMLParser
from pathlib import Path
from types import SimpleNamespace

import matplotlib
import numpy as np
import pytest
from conftest import headless_browser

import errbudget
from errbudget.outputs.files import dumps
from errbudget.report import render_html
from errbudget.report.fmt import plain
from errbudget.report.plotting import PAD_IN, RC, new_figure, tight_box
from errbudget.report.stability import SLICES, member_limits

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "cases" / "crayfish-pond.toml"
SAMPLES = 64  # a power of two, as the Sobol design needs; small keeps the module fast
CHROMIUM_TIMEOUT = 60  # [s] per browser call
EXPECTED_FIGURES = {"convergence", "forecast", "sobol", "stability", "roundoff"}
# The counts case: every uncertain input is fitted, one Sobol group, so no Sobol chart.
COUNTED_FIGURES = EXPECTED_FIGURES - {"sobol"}
A4_PT = (595.28, 841.89)  # ISO 216 A4, 210 mm x 297 mm in PostScript points (recalled)
PT_TOLERANCE = 1.0  # [pt] Chromium rounds the page box to whole CSS pixels


@pytest.fixture(scope="module")
def report():
    case = errbudget.load_case(CASE)
    budget = errbudget.run_case(case, samples=SAMPLES)
    data = json.loads(dumps(budget.to_dict()))  # exactly what budget.json holds
    html = render_html(data, budget.series, case.text)
    return SimpleNamespace(case=case, budget=budget, data=data, html=html)


class Page(HTMLParser):
    """Collects what the tests look at: tags, link-like attributes, figures, ids, texts."""

    LINK_ATTRIBUTES = {"src", "href", "xlink:href", "srcset", "action", "poster", "background"}

    def __init__(self, html: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.links: list[tuple[str, str, str]] = []
        self.ids: list[str] = []
        self.figures: list[dict] = []
        self.titles: dict[str, str] = {}
        self._figure: dict | None = None
        self._text_into: list[str] | None = None
        self._text_depth = 0
        self.feed(html)
        self.close()

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        attributes = dict(attrs)
        for name, value in attrs:
            if name in self.LINK_ATTRIBUTES:
                self.links.append((tag, name, value or ""))
        if "id" in attributes:
            self.ids.append(attributes["id"])
        if tag == "figure":
            self._figure = {"id": attributes.get("id"), "caption": [], "svg": []}
            self.figures.append(self._figure)
        elif tag == "svg" and self._figure is not None:
            self._figure["svg"].append(attributes)
        elif tag == "figcaption" and self._figure is not None:
            self._start_text(self._figure["caption"])
        elif tag == "title" and "id" in attributes:
            self.titles[attributes["id"]] = ""
            self._title_id = attributes["id"]
            self._start_text([])
        elif self._text_into is not None:
            self._text_depth += 1

    def _start_text(self, into: list[str]) -> None:
        self._text_into, self._text_depth = into, 0

    def handle_endtag(self, tag):
        if self._text_into is not None:
            if self._text_depth == 0:
                if tag == "title":
                    self.titles[self._title_id] = "".join(self._text_into)
                self._text_into = None
            else:
                self._text_depth -= 1
        if tag == "figure":
            self._figure = None

    def handle_data(self, data):
        if self._text_into is not None:
            self._text_into.append(data)


def element_text(html: str, element_id: str) -> str:
    """Text of the element with ``element_id`` (no same-tag nesting), entities decoded."""
    match = re.search(rf'<(\w+)[^>]*\bid="{element_id}"[^>]*>(.*?)</\1>', html, flags=re.S)
    assert match, f"no element with id {element_id}"
    return unescape(re.sub(r"<[^>]+>", "", match.group(2))).replace("\u202f", " ").strip()


# ---------------------------------------------------------------------------------------
# The answer on the first screen


NUMBER = re.compile(r"(?<![\w.])(\d+/\d+|\d+(?:\.\d+)?(?:e[-+]?\d+)?)(%?)")


def _matches(text: str, percent: str, value: float) -> bool:
    """``text`` is ``value`` shown to its own precision (half a unit in its last digit)."""
    if "/" in text:
        return Fraction(text) == Fraction(value).limit_denominator(1 << 20)
    shown = float(text)
    decimals = len(text.split(".")[1].split("e")[0]) if "." in text else 0
    exponent = int(text.split("e")[1]) if "e" in text else 0
    half_unit = 0.5 * 10.0 ** (exponent - decimals)
    target = 100 * value if percent else value
    return abs(shown - target) <= half_unit * (1 + 1e-9)


def _assign(numbers: list[tuple[str, str]], candidates: list[tuple[str, float]]) -> bool:
    """Can every number be matched to its own candidate value (a one-to-one assignment)?"""
    if not numbers:
        return True
    (text, percent), rest = numbers[0], numbers[1:]
    for i, (_, value) in enumerate(candidates):
        if _matches(text, percent, value) and _assign(rest, candidates[:i] + candidates[i + 1 :]):
            return True
    return False


def test_verdict_sentence_is_verbatim_and_every_number_is_in_budget_json(report):
    verdict = report.data["verdict"]
    reason = verdict["reason"]
    assert element_text(report.html, "verdict-reason") == reason
    quoted = re.findall(r'"([^"]*)"', reason)
    assert quoted == [verdict["binding_quantity"]]  # the quantity's name, numbers and all
    numbers = NUMBER.findall(re.sub(r'"[^"]*"', '""', reason))
    binding = next(q for q in report.data["quantities"] if q["name"] == quoted[0])
    numerical = binding["discretisation"]["error_percentile"] + (
        binding["roundoff"]["error"] or 0.0
    )
    candidates = [
        ("case's step", report.data["simulation"]["step"]["value"]),
        ("recommended step", verdict["recommended_step"]["value"]),
        ("numerical error", numerical),
        ("times the allowance", binding["numerical_to_parameter"] / verdict["fraction"]),
        ("allowance fraction", verdict["fraction"]),
    ]
    candidates = [(role, v) for role, v in candidates if v is not None]
    assert len(numbers) >= 4, reason
    assert _assign(numbers, candidates), (numbers, candidates)
    assert ("%" in reason) == any(p for _, p in numbers)


def test_matching_rejects_a_wrong_number():
    # The helper of the test above must be able to fail.
    assert _matches("6.76", "", 6.7624)
    assert not _matches("6.76", "", 6.77)
    assert not _matches("7", "", 6.2)
    assert _matches("10", "%", 0.1)
    assert _matches("7/16", "", 0.4375)
    assert not _assign([("7", ""), ("7", "")], [("a", 7.0), ("b", 1.0)])


def test_marker_and_recommended_step_are_shown_as_text(report):
    verdict = report.data["verdict"]
    marker = element_text(report.html, "answer-marker")
    assert marker.endswith("NOT ADEQUATE" if not verdict["adequate"] else "ADEQUATE")
    assert ("NOT" in marker) == (not verdict["adequate"])
    shown = element_text(report.html, "recommended-step")
    value, unit = shown.split(" ", 1)
    assert float(value) == pytest.approx(verdict["recommended_step"]["value"])
    assert unit == verdict["recommended_step"]["unit"]
    assert report.html.index("answer-marker") < report.html.index('class="budget"')


def _budget_row(html: str, label: str) -> list[str]:
    row = re.search(rf"<th scope=\"row\">{re.escape(label)}.*?</tr>", html, flags=re.S)
    assert row, label
    cells = re.findall(r"<td[^>]*>(.*?)</td>", row.group(0), flags=re.S)
    return [unescape(re.sub(r"<[^>]+>", "", c)).replace("\u202f", "") for c in cells]


@pytest.mark.parametrize(
    ("label", "get"),
    [
        ("Parameter standard deviation", lambda q: q["parameter"]["sd"]),
        (
            "Numerical error",
            lambda q: q["discretisation"]["error_percentile"] + (q["roundoff"]["error"] or 0.0),
        ),
        ("Value at the case&#39;s step", lambda q: q["value"]),
    ],
)
def test_budget_table_shows_each_quantity_with_its_unit(report, label, get):
    cells = _budget_row(report.html, label)
    quantities = report.data["quantities"]
    assert len(cells) == len(quantities)
    for cell, q in zip(cells, quantities, strict=True):
        number, unit = re.fullmatch(r"([-\d.]+)(.*)", cell).groups()
        assert unit == q["unit"]
        assert float(number) == pytest.approx(get(q), rel=5e-3)  # 3-4 significant digits


# ---------------------------------------------------------------------------------------
# Self-contained and escaped


def test_no_script_and_nothing_loaded_from_elsewhere(report):
    page = Page(report.html)
    assert "script" not in page.tags
    assert "<script" not in report.html.lower()
    assert page.links, "the parser found no link attribute at all (the icon is one)"
    for tag, name, value in page.links:
        assert value.startswith(("data:", "#")), (tag, name, value)
        assert not re.match(r"\s*(https?:)?//", value)
    assert "@import" not in report.html
    assert not re.search(r"url\(\s*['\"]?(?!#|data:)", report.html)


def test_ids_are_unique_so_inline_figures_do_not_collide(report):
    ids = Page(report.html).ids
    assert len(ids) == len(set(ids))


def test_title_with_markup_is_escaped(report, tmp_path):
    text = CASE.read_text(encoding="utf-8")
    hostile = "<script>alert(1)</script>"
    path = tmp_path / "hostile.toml"
    path.write_text(
        re.sub(r'^title = ".*"$', f'title = "{hostile}"', text, count=1, flags=re.M),
        encoding="utf-8",
    )
    case = errbudget.load_case(path)
    assert case.title == hostile
    # The run only copies the title into budget.json; the figures never show it (the whole
    # command line with this title is tested in test_faults.py).
    data = copy.deepcopy(report.data)
    data["case"]["title"] = case.title
    html = render_html(data, report.budget.series, case.text, include_figures=False)
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert element_text(html, "case-title") == hostile  # shown as text, not dropped


def test_other_user_strings_are_escaped_in_tables_and_figures(report):
    data = copy.deepcopy(report.data)
    data["quantities"][0]["name"] = '<img src=x onerror="alert(1)"> $\\frac{a}{$'
    data["quantities"][0]["unit"] = "<i>fish</i>"
    data["flags"] = [{"code": "<b>x</b>", "message": "</pre><script>alert(2)</script>"}]
    html = render_html(data, report.budget.series, "</pre><script>alert(3)</script>")
    assert "<script" not in html.lower()
    assert "<img" not in html and "<b>x" not in html and "<i>fish" not in html
    assert "&lt;img src=x" in html
    page = Page(html)  # the name is in figure titles too; a "$" must not break a figure
    assert {f["id"].removeprefix("fig-") for f in page.figures} == EXPECTED_FIGURES


# ---------------------------------------------------------------------------------------
# Figures, print stylesheet, optional sections, missing data


def test_every_figure_has_caption_and_alt_text(report):
    page = Page(report.html)
    assert {f["id"].removeprefix("fig-") for f in page.figures} == EXPECTED_FIGURES
    for figure in page.figures:
        assert "".join(figure["caption"]).strip(), figure["id"]
        (svg,) = figure["svg"][:1]
        assert svg.get("role") == "img"
        title = page.titles.get(svg.get("aria-labelledby"), "")
        assert len(title.strip()) > 20, figure["id"]
        assert "nan" not in title.lower().split()


def test_print_stylesheet(report):
    style = re.search(r"<style>(.*?)</style>", report.html, flags=re.S).group(1)
    assert "@media print" in style
    assert re.search(r"@page\s*{[^}]*size:\s*A4", style)
    assert "max-width: 180mm" in style  # fits Letter too (215.9 mm - 2 x 15 mm margins)
    assert style.count("break-inside: avoid") >= 3  # figures, rows, boxes


def test_optional_sections_render_when_present(report):
    absent = report.html
    for heading in (
        "Since the last run",
        "Fit to the counts",
        "Validation against the counts",
    ):
        assert heading not in absent
    data = copy.deepcopy(report.data)
    name = data["quantities"][0]["name"]
    data["since_last"] = {
        "previous_time": "2026-05-01T08:00:00+00:00",
        "case_changed": False,
        "counts_changed": True,
        "verdict": {"before": True, "now": False},
        "recommended_step": {
            "before": {"value": 2.0, "unit": "day"},
            "now": {"value": 1.0, "unit": "day"},
        },
        "quantities": {
            name: {
                "parameter_sd": {"before": 950.0, "now": 819.0, "change": -131.0},
                "spread": "narrowed",
            }
        },
    }
    data["fit"] = {
        "parameters": {"r": {"value": 0.0612, "sd": 0.0043, "unit": "1 / day"}},
        "error": "poisson",
        "n_counts": 14,
    }
    data["validation"] = {
        "times": [0.0, 14.0, 30.0],
        "D": [262.0, 422.0, 656.0],
        "E": [16.5, -1.13, 12.1],
        "exceed": [False, False, True],
        "unit": "crayfish",
        "time_unit": "day",
        "coverage": 2.0,
        "model_form": True,
    }
    html = render_html(data, report.budget.series, report.case.text, include_figures=False)
    text = unescape(html).replace("\u202f", " ")
    for expected in (
        "Since the last run",
        "2026-05-01T08:00:00+00:00",
        "narrowed",
        "adequate → not adequate",
        "2 day → 1 day",
        "950 → 819 crayfish",
        "Fit to the counts",
        "0.0612 1 / day",
        "0.0043 1 / day",
        "poisson",
        "14",
        "Validation against the counts",
        "Time [day]",
        "Count D [crayfish]",
        "E = S − D [crayfish]",
        "<td>-1.13</td>",
        "<td>656</td>",
        "|E| ≤ 2 × uncertainty?",
    ):
        assert expected in text, expected


def test_missing_and_non_finite_data_do_not_break_the_report(report):
    data = copy.deepcopy(report.data)
    for q in data["quantities"]:
        q["discretisation"].update(error_percentile=None, gci=None, observed_order=None)
        q["discretisation"]["ladder"] = [
            {"step": s["step"], "value": None} for s in q["discretisation"]["ladder"]
        ]
        q["parameter"]["indices"] = {}
        q["numerical_to_parameter"] = q["shares"] = q["allowance"] = None
    for key in ("stable_step", "stable_step_nominal", "monotone_step"):
        data["stability"][key]["value"] = None
    data["verdict"]["recommended_step"]["value"] = None
    series = dict(report.budget.series)
    band = np.array(series["band"], dtype=float)
    band[:, ::3] = np.nan
    band[1, 1] = np.inf
    series.update(
        band=band,
        error_p95=np.full_like(series["error_p95"], np.nan),
        nominal_coarse=np.where(np.arange(len(series["times"])) % 2, np.inf, 1.0),
    )
    html = render_html(data, series, report.case.text)
    page = Page(html)
    drawn = {f["id"].removeprefix("fig-") for f in page.figures}
    assert drawn == {"forecast", "roundoff"}
    for key in EXPECTED_FIGURES - drawn:
        assert re.search(rf'id="fig-{key}"[^>]*>.*?not drawn', html, flags=re.S), key
    assert "not available" in html
    assert ">nan<" not in html.lower() and "inf " not in html
    empty = render_html(report.data, {}, report.case.text)
    assert re.search(r'id="fig-forecast"[^>]*>.*?not drawn', empty, flags=re.S)


def test_provenance_and_cautions(report):
    text = unescape(report.html)
    run = report.data["run"]
    for expected in (
        report.data["case"]["sha256"],
        f"errbudget {run['version']}",
        "numpy",
        "scipy",
        "SALib",
        "pint",
        "matplotlib",
        "doi:10.1115/1.2960953",
        "Roache",
        "Saltelli",
        "Sobol",
        "V&V 20",
        "May (1976)",
        "Higham (2002)",
        "qualified biologists",
        "demographic stochasticity",
    ):
        assert expected in text, expected
    assert "title = " in element_text(report.html, "case-text")


# ---------------------------------------------------------------------------------------
# In a real browser


def _chromium() -> str:
    found = shutil.which("chromium")
    if found is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed (CI must install Debian's chromium)")
        pytest.skip("chromium is not installed")
    return found


def _browser(binary: str, profile: Path, *args: str) -> subprocess.CompletedProcess:
    command = headless_browser(binary, profile, *args)
    return subprocess.run(command, capture_output=True, timeout=CHROMIUM_TIMEOUT, check=False)


@pytest.fixture(scope="module")
def saved(report, tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    (folder / "budget.html").write_text(report.html, encoding="utf-8")
    return folder


def test_first_screen_screenshot(report, saved, tmp_path):
    from PIL import Image  # matplotlib's own dependency

    binary = _chromium()
    png = tmp_path / "first-screen.png"
    result = _browser(
        binary,
        tmp_path / "profile",
        "--hide-scrollbars",
        f"--screenshot={png}",
        "--window-size=1280,900",
        (saved / "budget.html").as_uri(),
    )
    assert result.returncode == 0, result.stderr[-2000:]
    assert png.stat().st_size > 10_000
    with Image.open(png) as image:
        assert image.size == (1280, 900)
        colours = image.convert("RGB").getcolors(maxcolors=1 << 20)
    assert colours is None or len(colours) > 50  # text and the answer box, not a blank page
    # The answer box is on the first screen: its tint covers a good part of the window.
    style = re.search(r"<style>(.*?)</style>", report.html, flags=re.S).group(1)
    name = "--accent-wash" if report.data["verdict"]["adequate"] else "--warn-wash"
    tint = re.search(rf"{name}:\s*#([0-9a-fA-F]{{6}})", style).group(1)
    target = np.array([int(tint[i : i + 2], 16) for i in (0, 2, 4)])
    pixels = np.asarray(Image.open(png).convert("RGB")).reshape(-1, 3).astype(int)
    assert (np.abs(pixels - target).max(axis=1) <= 2).sum() > 50_000


def test_pdf_print_is_a4(saved, tmp_path):
    binary = _chromium()
    pdf = tmp_path / "budget.pdf"
    result = _browser(
        binary,
        tmp_path / "profile",
        "--no-pdf-header-footer",
        f"--print-to-pdf={pdf}",
        (saved / "budget.html").as_uri(),
    )
    assert result.returncode == 0, result.stderr[-2000:]
    content = pdf.read_bytes()
    assert content.startswith(b"%PDF") and len(content) > 20_000
    boxes = re.findall(rb"/MediaBox \[0 0 ([\d.]+) ([\d.]+)\]", content)
    assert len(boxes) >= 2  # several pages
    for width, height in boxes:
        assert math.isclose(float(width), A4_PT[0], abs_tol=PT_TOLERANCE)
        assert math.isclose(float(height), A4_PT[1], abs_tol=PT_TOLERANCE)


class _Counting(http.server.SimpleHTTPRequestHandler):
    def parse_request(self):
        parsed = super().parse_request()
        self.server.seen.append((self.command, self.path))
        return parsed

    def log_message(self, format, *args):  # quiet test output
        pass


def test_page_makes_no_request_but_itself(report, saved, tmp_path):
    binary = _chromium()
    handler = functools.partial(_Counting, directory=str(saved))
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    server.seen = []
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/budget.html"
        result = _browser(binary, tmp_path / "profile", "--dump-dom", url)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)
    assert result.returncode == 0, result.stderr[-2000:]
    assert report.data["verdict"]["reason"].split(",")[0].encode() in result.stdout
    assert server.seen == [("GET", "/budget.html")]


# ---------------------------------------------------------------------------------------
# Stability map, counts, better data, cost of the step, round-off curve, CSV companions

COUNTED_CASE = ROOT / "cases" / "perch-reservoir.toml"  # the demo case with field counts
HOSTILE = "<script>alert(9)</script>"


@pytest.fixture(scope="module")
def counted():
    case = errbudget.load_case(COUNTED_CASE)
    budget = errbudget.run_case(case, samples=SAMPLES)
    data = json.loads(dumps(budget.to_dict()))
    html = render_html(data, budget.series, case.text)
    return SimpleNamespace(case=case, budget=budget, data=data, html=html)


def _figure(html: str, key: str) -> tuple[str, str, str]:
    """(heading, alt text, caption) of the figure ``key``, entities decoded."""
    match = re.search(rf'<figure id="fig-{key}">(.*?)</figure>', html, flags=re.S)
    assert match, f"figure {key} not drawn"
    body = match.group(1)
    heading = re.search(r"<h3>(.*?)</h3>", body, flags=re.S).group(1)
    alt = re.search(r"<title[^>]*>(.*?)</title>", body, flags=re.S).group(1)
    caption = re.search(r"<figcaption>(.*?)</figcaption>", body, flags=re.S).group(1)
    return tuple(unescape(t).replace("\u202f", " ") for t in (heading, alt, caption))


def _text(html: str) -> str:
    return unescape(re.sub(r"<[^>]+>", " ", html)).replace("\u202f", " ")


def test_stability_map_is_drawn_from_the_series(report):
    info = report.budget.series["stability"]
    assert info is not None
    heading, alt, caption = _figure(report.html, "stability")
    assert heading == "Stability map of the step"
    assert f"{info['parameter']} goes from" in alt
    assert len(info["values"]) == int(re.search(r"of (\d+) ensemble members", alt).group(1))
    strictest = report.data["stability"]["stable_step"]["value"]
    shown = re.search(r"strictest limit ([\d.]+) day", alt).group(1)
    assert float(shown) == pytest.approx(strictest, rel=5e-3)  # three significant digits
    assert "stable for the whole ensemble" in caption
    assert "central 90 %" in caption
    svg = re.search(r'<figure id="fig-stability">.*?</figure>', report.html, flags=re.S).group(0)
    assert f"{info['parameter']} [{info['unit']}]" in unescape(svg)  # x axis: input and unit
    assert "case&#39;s step" in svg or "case's step" in unescape(svg)
    assert "recommended step" in unescape(svg)
    has_monotone = info["monotone"] is not None and np.isfinite(info["monotone"]).any()
    assert ("Squares:" in caption) == has_monotone


def test_stability_map_falls_back_to_the_bars_without_its_series(report):
    series = dict(report.budget.series, stability=None)
    html = render_html(report.data, series, report.case.text)
    heading, alt, _ = _figure(html, "stability")
    assert heading == "Stability limits of the step"
    assert alt.startswith("Bar chart of steps")


def test_stability_map_survives_non_finite_members(report):
    info = dict(report.budget.series["stability"])
    values = np.array(info["values"], dtype=float)
    stable = np.array(info["stable"], dtype=float)
    values[::4] = np.nan
    stable[1::4] = np.inf
    stable[2::4] = -1.0  # not a step: masked
    info.update(values=values, stable=stable, monotone=np.full_like(stable, np.inf), rho=np.nan)
    html = render_html(report.data, dict(report.budget.series, stability=info), report.case.text)
    heading, alt, caption = _figure(html, "stability")
    assert heading == "Stability map of the step"
    kept = int((np.isfinite(values) & np.isfinite(stable) & (stable > 0)).sum())
    assert f"of {kept} ensemble members" in alt
    assert "No member has a finite no-oscillation limit" in caption
    assert "Spearman" not in caption and "nan" not in alt.lower().split()


def _figure_svg(html: str, key: str) -> str:
    return re.search(rf'<figure id="fig-{key}">.*?</figure>', html, flags=re.S).group(0)


def test_stability_map_of_a_big_ensemble_draws_a_few_hundred_markers(report):
    info = report.budget.series["stability"]
    rng = np.random.default_rng(3)
    n = 5000
    values = rng.normal(np.mean(info["values"]), np.std(info["values"]), n)
    # Invented limits that fall with the input and scatter with the others, as real ones do.
    stable = 2.0 / np.abs(values) * np.exp(0.05 * rng.standard_normal(n))
    big = dict(info, values=values, stable=stable, monotone=stable / 2)
    html = render_html(report.data, dict(report.budget.series, stability=big), report.case.text)
    svg = _figure_svg(html, "stability")
    markers = svg.count("<use ")  # matplotlib writes each marker as one <use> of its shape
    assert markers <= 2 * SLICES + 60  # two series, a slice's median each, and the ticks
    assert len(svg) < 150_000  # bytes; each member as a marker took about 1.2 MB
    _, alt, caption = _figure(html, "stability")
    # The numbers in the text are still over every member, not over the slices.
    assert (
        f"of {n} ensemble members runs from {plain(stable.min())} to {plain(stable.max())}" in alt
    )
    assert f"goes from {plain(values.min())} to {plain(values.max())}" in alt
    assert f"one of {SLICES} equal slices" in caption and "Squares:" in caption
    # A small ensemble is drawn member by member: the stable and the no-oscillation limits.
    small = _figure_svg(report.html, "stability")
    shown = int(np.isfinite(np.asarray(info["stable"], dtype=float)).sum())
    has_monotone = info["monotone"] is not None and np.isfinite(info["monotone"]).any()
    assert small.count("<use ") >= shown * (2 if has_monotone else 1)
    assert "Each dot is one ensemble member" in _figure(report.html, "stability")[2]


def test_members_summarised_by_slices_keep_every_extreme():
    rng = np.random.default_rng(11)
    x = rng.lognormal(size=10_000)
    y = 1.0 / x * np.exp(0.1 * rng.standard_normal(x.size))
    edges = np.linspace(x.min(), x.max(), SLICES + 1)
    got = member_limits(x, y, np.ones(x.size, dtype=bool), edges)
    # The same summary computed slice by slice with plain masks (the last slice is closed).
    expected = []
    for k in range(SLICES):
        upper = x <= edges[k + 1] if k == SLICES - 1 else x < edges[k + 1]
        m = (x >= edges[k]) & upper
        if m.any():
            expected.append((np.median(x[m]), np.median(y[m]), y[m].min(), y[m].max()))
    np.testing.assert_allclose(np.array([got.x, got.y, got.low, got.high]).T, expected)
    assert got.low.min() == y.min() and got.high.max() == y.max()  # the strictest member shows
    few = member_limits(x[:50], y[:50], np.ones(50, dtype=bool), edges)
    assert few.low is None and np.array_equal(few.x, np.sort(x[:50]))


def test_the_crop_measured_without_drawing_is_matplotlibs_own():
    # plotting.tight_box measures the box savefig(bbox_inches="tight") would crop to, without
    # the measuring draw; with text and a legend outside the axes the two must agree.
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(2.2, 1, 2)
        for ax in axes[0]:
            ax.plot([1, 10, 100], [3, 1, 2], "o-", label="a long label for the legend below")
            ax.set_xscale("log")
            ax.set_title("a title")
            ax.text(1.0, 0.5, " a note beside the axes", transform=ax.transAxes)
        axes[0, 0].legend(loc="upper center", bbox_to_anchor=(0.5, -0.3))
        fig.tight_layout()
        box = tight_box(fig)
        drawn = io.StringIO()
        fig.savefig(drawn, format="svg", bbox_inches="tight", pad_inches=PAD_IN)
    size = re.search(r'<svg[^>]*width="([\d.]+)pt" height="([\d.]+)pt"', drawn.getvalue())
    assert float(size.group(1)) == pytest.approx(box.width * 72, abs=1e-3)  # [pt]
    assert float(size.group(2)) == pytest.approx(box.height * 72, abs=1e-3)


def test_counts_and_quantity_marks_on_the_forecast(counted, report):
    counts = counted.budget.series["counts"]
    _, alt, caption = _figure(counted.html, "forecast")
    assert f"{len(counts['times'])} field counts are drawn as points" in alt
    assert "field counts" in caption
    for q in counted.data["quantities"]:
        if q.get("at"):
            assert f"{q['name']} at {q['at']['value']:g} {q['at']['unit']}" in alt
        if q.get("level"):
            assert f"{q['name']} at level {q['level']['value']:g} {q['level']['unit']}" in alt
    # Without counts there are no count points, but the crayfish marks are still there.
    assert "counts" not in report.budget.series
    _, alt_plain, caption_plain = _figure(report.html, "forecast")
    assert "field counts" not in alt_plain and "field counts" not in caption_plain
    assert "Marked:" in alt_plain


def test_forecast_caption_names_the_largest_error_along_the_run(report):
    info = report.data["trajectory_error"]
    _, _, caption = _figure(report.html, "forecast")
    found = re.search(
        r"largest numerical error along the run is ([\d. ]+) (\S+) at ([\d.]+) (\w+)", caption
    )
    assert found, caption
    assert float(found.group(1).replace(" ", "")) == pytest.approx(info["largest_p95"], rel=5e-3)
    assert found.group(2) == info["unit"]
    assert float(found.group(3)) == pytest.approx(info["at"]["value"])
    assert found.group(4) == info["at"]["unit"]
    data = copy.deepcopy(report.data)
    data["trajectory_error"] = {"largest_p95": None, "at": None, "unit": "crayfish"}
    _, _, without = _figure(render_html(data, report.budget.series, ""), "forecast")
    assert "along the run is" not in without


def test_better_data_section(counted, report):
    better = counted.data["better_data"]
    assert better is not None
    section = re.search(r'<section[^>]*id="better-data".*?</section>', counted.html, flags=re.S)
    assert section, "no better-data section"
    text = _text(section.group(0))
    assert "What better data would buy" in text
    assert better["statement"] in text
    for q in counted.data["quantities"]:
        row = re.search(
            rf"{re.escape(q['name'])}: parameter sd\s+([\d. ]+) (\S+)\s+([\d. ]+) (\S+)", text
        )
        assert row, q["name"]
        now, then = (float(row.group(i).replace(" ", "")) for i in (1, 3))
        assert now == pytest.approx(q["parameter"]["sd"], rel=5e-3)
        assert then == pytest.approx(better["parameter_sd"][q["name"]], rel=5e-3)
        assert row.group(2) == row.group(4) == q["unit"]
    # Verdict details first, then what better data would buy.
    assert counted.html.index('class="budget"') < section.start()
    # Without counts: each input's sd halved in turn (estimated on the same ensemble).
    assert set(report.data["better_data"]["inputs"]) == {"r", "K", "N0"}
    assert _text(report.data["better_data"]["statement"]) in _text(report.html)


def _shown_number(text: str) -> float:
    """A number as the report shows it: "180 000" or "1.3 × 10⁶"."""
    mantissa, _, power = text.partition(" × 10")
    digits = str.maketrans("⁰¹²³⁴⁵⁶⁷⁸⁹⁻", "0123456789-")
    exponent = int(power.translate(digits)) if power else 0
    return float(mantissa.replace(" ", "")) * 10.0**exponent


def test_cost_of_the_step(report):
    cost = report.data["run"]["cost"]
    assert cost is not None
    section = re.search(r'<section[^>]*id="cost".*?</section>', report.html, flags=re.S).group(0)
    text = _text(section)
    assert "Clock measurements made on this machine during this run" in text
    number = r"([\d. ]+(?: × 10[⁰¹²³⁴⁵⁶⁷⁸⁹⁻]+)?)"
    runs = re.search(rf"Runs per second\s+{number} runs/s\s+{number} runs/s", text)
    assert runs, text
    assert _shown_number(runs.group(1)) == pytest.approx(
        cost["runs_per_second_at_case_step"], rel=0.05
    )  # two significant digits
    assert _shown_number(runs.group(2)) == pytest.approx(
        cost["runs_per_second_at_recommended_step"], rel=0.05
    )
    steps = re.search(r"Steps per run\s+(\d+)\s+(\d+)", text)
    assert (int(steps.group(1)), int(steps.group(2))) == (
        cost["steps_per_run"]["case"],
        cost["steps_per_run"]["recommended"],
    )
    ensemble = re.search(
        r"A full ensemble[^)]*\)\s+([\d. ]+) (s|ms|µs)\s+([\d. ]+) (s|ms|µs)", text
    )
    scale = {"s": 1.0, "ms": 1e-3, "µs": 1e-6}
    assert float(ensemble.group(1).replace(" ", "")) * scale[ensemble.group(2)] == pytest.approx(
        cost["ensemble_seconds_at_case_step"], rel=0.05
    )
    assert float(ensemble.group(3).replace(" ", "")) * scale[ensemble.group(4)] == pytest.approx(
        cost["ensemble_seconds_at_recommended_step"], rel=0.05
    )
    data = copy.deepcopy(report.data)
    data["run"]["cost"] = None
    html = render_html(data, report.budget.series, "", include_figures=False)
    assert "Not measured in this run." in _text(html)


def test_roundoff_curve_and_statement(report):
    heading, alt, caption = _figure(report.html, "roundoff")
    assert heading == "Round-off and the total error"
    assert "C h^p" in caption and "D u/h" in caption
    svg = re.search(r'<figure id="fig-roundoff">.*?</figure>', report.html, flags=re.S).group(0)
    assert "fitted C h^p + D u/h" in svg and "measured (binary64)" in svg
    for q in report.data["quantities"]:
        assert f"{q['name']}: {q['roundoff']['statement']}" in caption
        assert f"{len(q['roundoff']['curve']['steps']['values'])} measured points" in alt
    data = copy.deepcopy(report.data)
    for q in data["quantities"]:
        q["roundoff"].update(curve=None, statement=None)
    html = render_html(data, report.budget.series, "")
    heading, alt, caption = _figure(html, "roundoff")
    assert heading == "Round-off" and alt.startswith("Bar chart of round-off")
    assert "In words" not in caption


def test_csv_companions_are_named_in_how_it_was_made(report):
    text = element_text(report.html, "companions")
    assert "ladder.csv" in text and "summary.csv" in text and "budget.json" in text
    assert report.html.index("made-heading") < report.html.index('id="companions"')


def test_new_elements_escape_hostile_strings(counted):
    data = copy.deepcopy(counted.data)
    q = data["quantities"][0]
    old_name = q["name"]
    q["name"] = HOSTILE
    q["roundoff"]["statement"] = HOSTILE
    data["better_data"]["statement"] = HOSTILE
    data["better_data"]["assumption"] = HOSTILE
    data["better_data"]["parameter_sd"][HOSTILE] = data["better_data"]["parameter_sd"].pop(old_name)
    data["run"]["cost"]["note"] = HOSTILE
    series = dict(counted.budget.series)
    series["stability"] = dict(series["stability"], parameter=HOSTILE, unit="<b>u</b>")
    html = render_html(data, series, counted.case.text)
    assert "<script" not in html.lower() and "<b>u" not in html
    assert html.count("&lt;script&gt;alert(9)&lt;/script&gt;") >= 5
    page = Page(html)
    assert {f["id"].removeprefix("fig-") for f in page.figures} == COUNTED_FIGURES
    _, alt, _ = _figure(html, "stability")
    assert HOSTILE in alt  # shown as text inside the figure's title


def test_new_elements_survive_non_finite_numbers(counted):
    data = copy.deepcopy(counted.data)
    for name in data["better_data"]["parameter_sd"]:
        data["better_data"]["parameter_sd"][name] = float("nan")
    data["better_data"]["recommended_step"]["value"] = None
    cost = data["run"]["cost"]
    cost.update(
        member_steps_per_second=float("inf"),
        runs_per_second_at_recommended_step=float("nan"),
        ensemble_seconds_at_case_step=float("nan"),
        ensemble_seconds_at_recommended_step=None,
    )
    cost["steps_per_run"]["recommended"] = None
    for q in data["quantities"]:
        q["roundoff"]["curve"]["C"]["value"] = float("nan")
        q["roundoff"]["curve"]["optimum_step"]["value"] = float("inf")
    data["trajectory_error"]["largest_p95"] = float("nan")
    series = dict(counted.budget.series)
    times = np.array(series["counts"]["times"], dtype=float)
    times[0] = np.nan
    series["counts"] = {"times": times, "counts": series["counts"]["counts"]}
    html = render_html(data, series, counted.case.text)
    text = _text(html)
    assert ">nan<" not in html.lower() and " nan " not in text.lower() and " inf " not in text
    assert "What better data would buy" in text and "Cost of the step" in text
    _, alt, _ = _figure(html, "forecast")
    assert f"{len(times) - 1} field counts" in alt
    heading, _, _ = _figure(html, "roundoff")
    assert heading == "Round-off"  # no usable fitted curve: the bar chart
    assert "not available" in re.search(r'id="cost".*?</section>', html, flags=re.S).group(0)


def test_fitted_parameters_are_said_to_be_analysed_as_one_group(counted, report):
    assert "fitted" in counted.data["quantities"][0]["parameter"]["indices"]
    # One group only: no chart, a note naming the group's members instead.
    note = re.search(r'<p class="skipped" id="fig-sobol">(.*?)</p>', counted.html, flags=re.S)
    names = ", ".join(counted.data["fit"]["parameters"])
    assert f"one group of inputs, fitted ({names})" in unescape(note.group(1))
    _, _, plain_caption = _figure(report.html, "sobol")
    assert "analysed as one group" not in plain_caption  # no fit, no group
