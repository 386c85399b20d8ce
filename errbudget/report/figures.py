"""The report's figures, in reading order (the error budget per quantity is a table on page 1;
``bars.budget_bars`` draws it as bars for whoever wants the chart), written as inline SVG strings.

One module per figure family: ``bars`` (error budget, Sobol indices), ``convergence``,
``forecast``, ``stability`` (the map, or the step limits as bars) and ``roundoff`` (the
fitted curves, or the bars); ``plotting`` holds what they share. Each builder takes
budget.json (and the run's ``series``) and returns a
:class:`~errbudget.report.plotting.Figure` with its SVG, alt text and caption, or with
``svg=None`` and a one-line note when its data are missing. Non-finite numbers are masked
before plotting, never passed to matplotlib.
"""

from __future__ import annotations

from collections.abc import Callable

from errbudget.report.bars import budget_bars, sobol  # noqa: F401 (budget_bars: API)
from errbudget.report.convergence import convergence
from errbudget.report.figure import Figure, skipped
from errbudget.report.forecast import forecast
from errbudget.report.roundoff import roundoff
from errbudget.report.stability import limit_bars, stability_map

# What a figure builder may raise on malformed data; the figure is then replaced by a note.
DRAWING_ERRORS = (
    ValueError,
    TypeError,
    KeyError,
    IndexError,
    OverflowError,
    ZeroDivisionError,
    FloatingPointError,
    AttributeError,
)


def stability(budget: dict, series: dict | None = None) -> Figure:
    """The stability map when the run's series carry it, else the step limits as bars."""
    mapped = stability_map(budget, series or {})
    return mapped if mapped is not None else limit_bars(budget)


def all_figures(budget: dict, series: dict | None) -> list[Figure]:
    """Every figure of the report, in reading order."""
    series = series or {}
    builders: list[tuple[str, str, Callable[[], Figure]]] = [
        ("convergence", "Convergence with the step", lambda: convergence(budget)),
        ("forecast", "The forecast over time", lambda: forecast(budget, series)),
        ("sobol", "Which parameters drive the spread", lambda: sobol(budget)),
        ("stability", "Stability map of the step", lambda: stability(budget, series)),
        ("roundoff", "Round-off", lambda: roundoff(budget)),
    ]
    figures = []
    for key, title, build in builders:
        try:
            figures.append(build())
        except DRAWING_ERRORS as error:
            # A figure must never take the whole report down; the tables carry the numbers.
            figures.append(skipped(key, title, f"the figure could not be drawn ({error})"))
    return figures
