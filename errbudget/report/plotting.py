"""Plumbing of the report's figures: palette, style, the Agg canvas, SVG output, bar panels.

The figures use the object-oriented API (``matplotlib.figure.Figure`` with an explicit
``FigureCanvasAgg``): nothing is registered with pyplot, the global backend of a host
program is left alone, and a figure is freed with its last reference once written
(clearing it first would only rebuild every axis, which costs more than drawing it).
"""

from __future__ import annotations

import io
import re
import textwrap
from collections.abc import Callable

import numpy as np
from markupsafe import Markup, escape
from matplotlib import ticker
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_svg import RendererSVG
from matplotlib.figure import Figure as MplFigure
from matplotlib.transforms import Bbox

from errbudget.report.fmt import finite, number, plain

# Okabe & Ito (2008), "Color Universal Design": distinguishable with the common colour-vision
# deficiencies. Every series is also labelled, so no reading depends on colour alone.
BLUE, ORANGE, VERMILLION = "#0072B2", "#E69F00", "#D55E00"
SKY, GREEN, PURPLE, INK = "#56B4E9", "#009E73", "#CC79A7", "#22303a"
GRID = "#d9dee2"
WIDTH_IN = 6.9  # figure width [in]: inside the 180 mm print column, so print is at scale 1
HALF_WIDTH_IN = 3.4  # a figure set beside a table: half the print column, less the gap
PANEL_IN = 1.45  # height of one per-quantity bar panel [in]
HALF_TITLE_CHARS = 38  # a bold 9 pt title this long fits a panel of half the figure width
LOG_SPAN = 20.0  # bar values spanning more than this factor are drawn on a log axis
LOG_TICKS = 8  # at most about this many labelled ticks on a log axis
PAD_IN = 0.04  # margin around a figure's content [in]
SVG_DPI = 72  # the SVG backend measures and writes text in points
RC = {
    "svg.fonttype": "none",  # text stays text: selectable, searchable, small
    "svg.hashsalt": "errbudget",  # deterministic ids: the same budget gives the same file
    "text.parse_math": False,  # a "$" in a quantity name is text, not TeX
    "font.family": "sans-serif",
    "font.size": 8.5,
    "axes.edgecolor": "#6b7780",
    "axes.labelcolor": INK,
    "axes.titlesize": 9,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    # Titles sit just above their axes (no axis has ticks on top); a fixed position also
    # spares matplotlib measuring every axis to place each title, on every draw.
    "axes.titley": 1.0,
    "xtick.color": INK,
    "ytick.color": INK,
    "text.color": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "legend.frameon": False,
    "legend.fontsize": 7.5,
}


def tight_box(fig: MplFigure) -> Bbox:
    """The box ``savefig(bbox_inches="tight")`` crops an SVG to, measured without drawing.

    ``bbox_inches="tight"`` draws the whole figure once only to measure it (and so does the
    placeholder layout engine ``tight_layout`` leaves behind). Measuring with the SVG
    backend's text metrics at its 72 dpi, as that draw does, gives the same box for a
    fraction of the cost; the figure is then drawn once.
    """
    fig.set_layout_engine(None)
    dpi = fig.dpi
    fig.dpi = SVG_DPI
    try:
        width, height = fig.get_size_inches()
        renderer = RendererSVG(width * SVG_DPI, height * SVG_DPI, io.StringIO(), image_dpi=dpi)
        return fig.get_tightbbox(renderer).padded(PAD_IN)
    finally:
        fig.dpi = dpi


def to_svg(fig: MplFigure, key: str, alt: str) -> Markup:
    """Serialise ``fig`` as inline SVG with role="img", a <title> and ids unique to ``key``."""
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", bbox_inches=tight_box(fig), metadata={"Date": None})
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.S)
    text = re.sub(r"<style[^>]*>.*?</style>", "", text, flags=re.S)  # would leak into the page
    text = re.sub(r'\sid="([^"]+)"', rf' id="{key}-\1"', text)
    text = re.sub(r"url\(#([^)]+)\)", rf"url(#{key}-\1)", text)
    text = re.sub(r'href="#([^"]+)"', rf'href="#{key}-\1"', text)
    head_end = text.index(">") + 1
    head = re.sub(r'\s(width|height)="[^"]*"', "", text[:head_end])
    head = head[:-1] + f' role="img" aria-labelledby="{key}-title" class="chart">'
    title = f'<title id="{key}-title">{escape(alt)}</title>'
    return Markup(head + title + text[head_end:])


def new_figure(height: float, rows: int = 1, cols: int = 1, width: float = WIDTH_IN, **kwargs):
    fig = MplFigure(figsize=(width, height))
    FigureCanvasAgg(fig)  # the Agg canvas, set explicitly for this figure only
    axes = fig.subplots(rows, cols, squeeze=False, **kwargs)
    return fig, axes


def quantity_title(q: dict, columns: int = 1) -> str:
    """The panel title of a quantity; in a grid of two columns, wrapped so that it does not
    run into the next panel (a left-aligned title is not kept inside its axes)."""
    text = f"{q.get('name', 'quantity')} [{q.get('unit', '')}]"
    if columns > 1:
        text = "\n".join(textwrap.wrap(text, HALF_TITLE_CHARS, break_long_words=False))
    return text


def positive(values) -> list[float]:
    return [v for v in (finite(x) for x in values) if v is not None and v > 0]


def tick_text(value, _position=None) -> str:
    """Tick labels as plain text (no mathtext: faster, and it reads like the tables)."""
    text = number(value, 3) or ""
    return text.removeprefix("1 × ")  # a bare power of ten reads "10⁻¹²", not "1 × 10⁻¹²"


def plain_ticks(
    ax, axis: str = "both", log_subs: tuple = (1.0,), numticks: int = LOG_TICKS
) -> None:
    """Plain-number tick labels; on log axes majors at ``log_subs`` x 10^k (about ``numticks``
    of them), minors unlabelled."""
    for name in ("x", "y") if axis == "both" else (axis,):
        target = ax.xaxis if name == "x" else ax.yaxis
        if target.get_scale() == "log":
            target.set_major_locator(ticker.LogLocator(base=10, subs=log_subs, numticks=numticks))
            target.set_minor_locator(ticker.NullLocator())  # unlabelled minors: slow, little use
        target.set_major_formatter(ticker.FuncFormatter(tick_text))


def bar_panel(
    ax,
    labels: list[str],
    values: list,
    colors: list[str],
    unit: str,
    notes: dict[int, str],
    scale: list | None = None,
    log: bool | None = None,
    label: Callable[[float], str] = plain,
) -> None:
    """Horizontal bars with their value written beside them.

    The axis spans the ``scale`` values (default: all); it is logarithmic when they span more
    than LOG_SPAN (or as ``log`` says). A value too small to see on that axis is written as
    text instead of drawn, so the bars that matter keep a readable, honest length.
    """
    reach = positive(values if scale is None else scale) or positive(values)
    if log is None:
        log = bool(reach) and max(reach) / min(reach) > LOG_SPAN
    if log and reach:
        low, high = min(reach) / 4, max(reach) * 12
        ax.set_xscale("log")
    else:
        low, high = 0.0, (max(reach) * 1.3 if reach else 1.0)
    ax.set_xlim(low, high)
    visible = low if log else 0.004 * high  # below this a bar would be a hairline or off-axis
    rows = np.arange(len(labels))[::-1]
    left = low if log else 0.0
    for index, (row, value, color) in enumerate(zip(rows, values, colors, strict=True)):
        v = finite(value)
        if v is not None and v > visible:
            ax.barh(
                row, v - left, left=left, height=0.62, color=color, edgecolor=INK, linewidth=0.4
            )
            ax.text(
                v * 1.1 if log else v + 0.01 * high,
                row,
                f" {label(v)} {unit}",
                va="center",
                fontsize=7.5,
            )
            continue
        if index in notes:
            text = notes[index]
        elif v is None:
            text = "not available"
        elif v == 0:
            text = f"0 {unit}"
        else:
            text = f"{plain(v)} {unit} (too small to draw on this axis)"
        ax.text(
            low * 1.15 if log else 0.01 * high,
            row,
            text,
            va="center",
            fontsize=7.5,
            style="italic",
            color="#4d5a63",
            bbox={"facecolor": "white", "edgecolor": "none", "pad": 1.0},
        )
    ax.set_yticks(rows, labels)
    ax.tick_params(axis="y", length=0)
    ax.grid(axis="x", color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)
    plain_ticks(ax, "x")


def clean(values) -> np.ndarray:
    array = np.asarray(values if values is not None else [], dtype=float)
    return np.where(np.isfinite(array), array, np.nan)
