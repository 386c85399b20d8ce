"""The figure of a rerun: the last run's forecast against the counts that came in since.

Drawn from budget.json's ``since_last.new_counts``: at each new count time the last forecast
with a bar of twice the validation uncertainty (the V&V 20 comparison of the history), and
the count itself; with the run's series, the current forecast band behind them.
"""

from __future__ import annotations

import matplotlib
import numpy as np

from errbudget.report.figure import Figure, skipped
from errbudget.report.fmt import plain
from errbudget.report.plotting import (
    BLUE,
    GRID,
    HALF_WIDTH_IN,
    INK,
    RC,
    SKY,
    VERMILLION,
    clean,
    new_figure,
    to_svg,
)

HEIGHT_IN = 2.0  # a small figure beside its table: a handful of points (legend below)


def new_counts_figure(budget: dict, series: dict | None) -> Figure:
    """Last forecast +- 2 u_val and the new counts, over the current forecast band."""
    key, title = "since", "The last forecast against the new counts"
    new = ((budget.get("since_last") or {}).get("new_counts")) or {}
    times = clean(new.get("times"))
    if times.size == 0:
        return skipped(key, title, "no count came in after the last run's last count")
    counts, forecast, u_val = (clean(new.get(k)) for k in ("counts", "forecast", "u_val"))
    unit, unit_t = new.get("unit") or "", new.get("time_unit") or ""
    exceed = np.asarray(new.get("exceed") or [False] * times.size, dtype=bool)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(HEIGHT_IN, width=HALF_WIDTH_IN)
        ax = axes[0, 0]
        _band(ax, series or {}, times)
        ax.errorbar(
            times,
            forecast,
            yerr=2 * u_val,
            fmt="s",
            color=BLUE,
            markersize=4,
            capsize=3,
            label="last run's forecast ± 2 × validation uncertainty",
        )
        ax.plot(times[~exceed], counts[~exceed], "o", color=INK, label="new count, within")
        if exceed.any():
            ax.plot(
                times[exceed],
                counts[exceed],
                "X",
                color=VERMILLION,
                markersize=7,
                label="new count, outside",
            )
        ax.set_xlabel(f"time [{unit_t}]")
        ax.set_ylabel(f"population [{unit}]")
        ax.grid(color=GRID, linewidth=0.6)
        # Below the axes (inside, it would hide the few points of a half-width figure); no
        # tight_layout, which would squeeze the axes to make room: the crop takes the margins.
        # The pad (in font sizes) clears the tick labels and the axis label.
        ax.legend(loc="upper left", bbox_to_anchor=(-0.02, 0.0), fontsize=7, borderaxespad=4.4)
        alt = (
            f"Chart of {times.size} new counts against the last forecast: "
            + "; ".join(
                f"at {plain(t)} {unit_t} counted {plain(c)} {unit}, forecast {plain(f)} "
                f"± {plain(2 * u)} {unit}"
                for t, c, f, u in zip(times, counts, forecast, u_val, strict=True)
            )
            + "."
        )
        svg = to_svg(fig, key, alt)
    caption = (
        "Squares: what the last run forecast at the times of the counts that came in since, "
        "with bars of twice the validation uncertainty (the forecast's parameter spread and "
        "the counting error of the observation model). A count outside its bar (a cross) is "
        "one the last budget does not explain."
    )
    if (series or {}).get("band") is not None:
        caption += " The shaded band is this run's 5–95 % forecast."
    return Figure(key, title, caption, alt, svg)


def _band(ax, series: dict, times: np.ndarray) -> None:
    grid, band = clean(series.get("times")), clean(series.get("band"))
    if grid.size == 0 or band.shape != (3, grid.size):
        return
    keep = (grid >= times.min() - 0.1 * np.ptp(times) - 1e-9) & (
        grid <= times.max() + 0.1 * np.ptp(times) + 1e-9
    )
    if keep.sum() < 2:
        return
    ax.fill_between(
        grid[keep],
        band[0][keep],
        band[2][keep],
        color=SKY,
        alpha=0.35,
        linewidth=0,
        label="this run: 5–95 % of the ensemble",
    )
