"""The forecast figure: the population over time (ensemble band, nominal runs, counts, marks)
above the numerical error of the case's step along the run.

It needs the run's ``series`` (budget.json alone does not carry the time series).
"""

from __future__ import annotations

import matplotlib
import numpy as np

from errbudget.report.figure import Figure, skipped
from errbudget.report.fmt import finite, plain
from errbudget.report.fmt import step as step_text
from errbudget.report.plotting import (
    BLUE,
    GREEN,
    GRID,
    INK,
    ORANGE,
    PURPLE,
    RC,
    SKY,
    VERMILLION,
    clean,
    new_figure,
    to_svg,
)

HEIGHT_IN = 2.8  # population above its numerical error: about a third of a printed page
LEGEND_IN = 0.32  # room for the legend below the panels (two rows of three) [in]
# a white box keeps line labels legible where they cross the ensemble band
LABEL_BOX = {"facecolor": "white", "alpha": 0.75, "edgecolor": "none", "pad": 0.8}
# The run's time series this figure draws (see Budget.series).
SERIES = ("times", "band", "error_p95", "nominal_coarse", "fine_times", "nominal_fine")


def forecast(budget: dict, series: dict) -> Figure:
    """Ensemble band, nominal runs at the case's step and accurate, numerical error band."""
    key, title = "forecast", "The forecast over time"
    try:
        arrays = {name: clean(series.get(name)) for name in SERIES}
    except (TypeError, ValueError):
        return skipped(key, title, "not drawn: the time series of the run are malformed")
    times, band = arrays["times"], arrays["band"]
    if times.size == 0 or band.shape != (3, times.size) or np.isnan(band).all():
        return skipped(
            key,
            title,
            "not drawn: the time series of the run are not available "
            "(budget.json alone does not carry them)",
        )
    sim = budget.get("simulation", {})
    units = (sim.get("step", {}).get("unit", ""), sim.get("population_unit", ""))
    step_value = finite(sim.get("step", {}).get("value"))
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(
            HEIGHT_IN + LEGEND_IN, 2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.25]}
        )
        top, bottom = axes[0, 0], axes[1, 0]
        alt = _population_panel(top, arrays, step_value, units)
        marked = _counts_and_marks(top, budget, series, *units)
        alt += _error_panel(bottom, times, arrays["error_p95"], units)
        # Below the panels, not over the curves or the marks' labels at the horizon.
        fig.tight_layout(rect=(0, LEGEND_IN / fig.get_figheight(), 1, 1), h_pad=0.8)
        handles, labels = top.get_legend_handles_labels()
        fig.legend(handles, labels, loc="lower center", ncols=3, fontsize=7)
        alt += marked["alt"]
        svg = to_svg(fig, key, alt)
    caption = (
        "Top: the spread the parameters leave in the forecast (band and median of the "
        "ensemble, solved accurately) with the nominal run at the case's step and "
        "solved accurately; where the two nominal curves part, the step matters."
        f"{marked['caption']} "
        "Bottom: how far the case's step is from the accurate solution along the run "
        "(95th percentile over the ensemble): compare its size with the band's width."
        + _largest_error(budget)
    )
    return Figure(key, title, caption, alt, svg)


def _population_panel(ax, arrays: dict, step_value, units: tuple[str, str]) -> str:
    """The ensemble band and median, the accurate and the case-step nominal runs.

    Returns the alt text's opening sentence.
    """
    unit_t, unit_n = units
    times, band = arrays["times"], arrays["band"]
    fine_t, fine, coarse = arrays["fine_times"], arrays["nominal_fine"], arrays["nominal_coarse"]
    ax.fill_between(
        times,
        band[0],
        band[2],
        color=SKY,
        alpha=0.45,
        linewidth=0,
        label="5–95 % of the ensemble (accurate)",
    )
    ax.plot(times, band[1], color=BLUE, linewidth=1.4, label="ensemble median (accurate)")
    if fine.size and fine.size == fine_t.size:
        ax.plot(fine_t, fine, color=INK, linewidth=1, label="nominal parameters, accurate")
    if coarse.size == times.size:
        ax.plot(
            times,
            coarse,
            "o-",
            color=VERMILLION,
            markersize=2.6,
            linewidth=0.9,
            label=f"nominal parameters, case's step {step_text(step_value, unit_t).text}",
        )
    ax.set_ylabel(f"population [{unit_n}]")
    ax.grid(color=GRID, linewidth=0.6)
    ax.set_title("Population", pad=4)
    return (
        f"Line chart of the population [{unit_n}] over "
        f"{step_text(np.nanmax(times), unit_t).text}: the ensemble 5–95 % band runs "
        f"from {plain(np.nanmin(band[0]))} to "
        f"{plain(np.nanmax(band[2]))} {unit_n}."
    )


def _error_panel(ax, times: np.ndarray, error: np.ndarray, units: tuple[str, str]) -> str:
    """The numerical error of the case's step along the run; returns the alt text's sentence."""
    unit_t, unit_n = units
    alt = ""
    if error.size == times.size and not np.isnan(error).all():
        ax.plot(times, error, "o-", color=ORANGE, markersize=2.6, linewidth=1.1)
        ax.fill_between(times, 0, error, color=ORANGE, alpha=0.2, linewidth=0)
        worst = int(np.nanargmax(error))
        ax.annotate(
            f"largest: {plain(error[worst])} {unit_n} at {step_text(times[worst], unit_t).text}",
            (times[worst], error[worst]),
            xytext=(8, 3),
            textcoords="offset points",
            fontsize=7,
            va="bottom",
        )
        ax.set_ylim(0, np.nanmax(error) * 1.45 or 1)
        alt = (
            f" The numerical error (95th percentile over the ensemble) peaks at "
            f"{plain(error[worst])} {unit_n} at {step_text(times[worst], unit_t).text}."
        )
    else:
        ax.text(
            0.5,
            0.5,
            "numerical error along the run not available",
            ha="center",
            transform=ax.transAxes,
            style="italic",
        )
    ax.set_ylabel(f"error [{unit_n}]")
    ax.set_xlabel(f"time [{unit_t}]")
    ax.grid(color=GRID, linewidth=0.6)
    ax.set_title("Numerical error of the case's step (95th percentile over the ensemble)", pad=4)
    return alt


def _counts_and_marks(ax, budget: dict, series: dict, unit_t: str, unit_n: str) -> dict:
    """Field counts as points, each quantity's time and level as labelled lines.

    Returns the sentences added to the caption and to the alt text.
    """
    caption, alt = "", ""
    counts = series.get("counts") if isinstance(series.get("counts"), dict) else None
    if counts is not None:
        times, values = clean(counts.get("times")), clean(counts.get("counts"))
        ok = np.isfinite(times) & np.isfinite(values) if times.shape == values.shape else None
        if ok is not None and times.ndim == 1 and ok.any():
            ax.plot(
                times[ok],
                values[ok],
                "o",
                markerfacecolor="white",
                markeredgecolor=INK,
                markersize=4,
                label="field counts",
                zorder=5,
            )
            caption += " Open circles: the field counts the parameters were fitted to."
            alt += f" {int(ok.sum())} field counts are drawn as points."
    lines = []
    for q in budget.get("quantities") or []:
        lines += _quantity_marks(ax, q, unit_t, unit_n)
    if lines:
        caption += (
            " Dashed lines mark the forecast quantities: a vertical line at the time of a value "
            "quantity, a horizontal line at the level a time-to quantity waits for."
        )
        alt += " Marked: " + "; ".join(lines) + "."
    return {"caption": caption, "alt": alt}


def _quantity_marks(ax, q: dict, unit_t: str, unit_n: str) -> list[str]:
    """A quantity's time (vertical line) or level (horizontal line), labelled; alt phrases."""
    name = str(q.get("name", ""))
    at, level = q.get("at") or {}, q.get("level") or {}
    lines = []
    t = finite(at.get("value")) if isinstance(at, dict) else None
    if t is not None and at.get("unit", unit_t) == unit_t:
        ax.axvline(t, color=PURPLE, linestyle=(0, (5, 2)), linewidth=1)
        ax.text(
            t,
            0.98,
            f"{name} ",
            rotation=90,
            ha="right",
            va="top",
            fontsize=7,
            color=PURPLE,
            transform=ax.get_xaxis_transform(),
            bbox=LABEL_BOX,
        )
        lines.append(f"{name} at {step_text(t, unit_t).text}")
    n = finite(level.get("value")) if isinstance(level, dict) else None
    if n is not None and level.get("unit", unit_n) == unit_n:
        ax.axhline(n, color=GREEN, linestyle=(0, (5, 2)), linewidth=1)
        ax.text(
            0.01,
            n,
            f"{name}: level {plain(n, 4)} {unit_n}",
            va="bottom",
            fontsize=7,
            color=GREEN,
            transform=ax.get_yaxis_transform(),
            bbox=LABEL_BOX,
        )
        lines.append(f"{name} at level {plain(n, 4)} {unit_n}")
    return lines


def _largest_error(budget: dict) -> str:
    """The caption's sentence on the largest numerical error along the run, if recorded."""
    info = budget.get("trajectory_error")
    if not isinstance(info, dict):
        return ""
    largest = finite(info.get("largest_p95"))
    at = info.get("at") or {}
    if largest is None:
        return ""
    when = step_text(at.get("value"), at.get("unit")) if isinstance(at, dict) else None
    place = f" at {when.text}" if when is not None and not when.missing else ""
    unit = info.get("unit") or ""
    return (
        f" The largest numerical error along the run is {plain(largest)} {unit}".rstrip()
        + f"{place} (95th percentile over the ensemble)."
    )
