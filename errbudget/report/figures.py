"""The report's figures, written as inline SVG strings.

Each builder takes budget.json (and the run's ``series``) and returns a
:class:`~errbudget.report.plotting.Figure` with its SVG, alt text and caption, or with
``svg=None`` and a one-line note when its data are missing. Non-finite numbers are masked
before plotting, never passed to matplotlib.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import matplotlib
import numpy as np

from errbudget.report import curves
from errbudget.report.fmt import finite, number, plain
from errbudget.report.fmt import step as step_text
from errbudget.report.plotting import (
    BLUE,
    GREEN,
    GRID,
    INK,
    ORANGE,
    PANEL_IN,
    PURPLE,
    RC,
    SKY,
    VERMILLION,
    Figure,
    bar_panel,
    clean,
    new_figure,
    plain_ticks,
    quantity_title,
    skipped,
    to_svg,
)

# a white box keeps line labels legible where they cross the ensemble band
LABEL_BOX = {"facecolor": "white", "alpha": 0.75, "edgecolor": "none", "pad": 0.8}


def all_figures(budget: dict, series: dict | None) -> list[Figure]:
    """Every figure of the report, in reading order."""
    series = series or {}
    builders: list[tuple[str, str, Callable[[], Figure]]] = [
        ("budget", "Error budget per quantity", lambda: budget_bars(budget)),
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
        except (
            ValueError,
            TypeError,
            KeyError,
            IndexError,
            OverflowError,
            ZeroDivisionError,
            FloatingPointError,
            AttributeError,
        ) as error:
            # A figure must never take the whole report down; the tables carry the numbers.
            figures.append(skipped(key, title, f"the figure could not be drawn ({error})"))
    return figures


def budget_bars(budget: dict) -> Figure:
    """Discretisation error (ensemble percentile), round-off and parameter sd per quantity."""
    key, title = "budget", "Error budget per quantity"
    quantities = budget.get("quantities") or []
    if not quantities:
        return skipped(key, title, "no quantities in the budget")
    fraction = finite(budget.get("verdict", {}).get("fraction"))
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.5 + PANEL_IN * len(quantities), len(quantities), 1)
        alts = []
        for ax, q in zip(axes[:, 0], quantities, strict=True):
            unit = q.get("unit", "")
            disc = q.get("discretisation", {})
            pct = finite(disc.get("percentile")) or 95
            values = [
                disc.get("error_percentile"),
                q.get("roundoff", {}).get("error"),
                q.get("parameter", {}).get("sd"),
            ]
            labels = [f"discretisation ({pct:g}th pct.)", "round-off (measured)", "parameter sd"]
            allowance = finite(q.get("allowance"))
            zero = {1: "0 (no difference found)"} if finite(values[1]) == 0 else {}
            bar_panel(
                ax,
                labels,
                values,
                [VERMILLION, PURPLE, BLUE],
                unit,
                zero,
                scale=[values[0], values[2], allowance],
            )
            if allowance is not None and allowance > 0:
                ax.axvline(allowance, color=INK, linestyle=(0, (4, 2)), linewidth=1.1)
                share = f"{fraction:.0%} of sd" if fraction is not None else "of sd"
                ax.text(
                    allowance,
                    1.02,
                    f"allowance {plain(allowance)} {unit} ({share})",
                    transform=ax.get_xaxis_transform(),
                    ha="center",
                    va="bottom",
                    fontsize=7.5,
                )
            ax.set_title(quantity_title(q), pad=14)
            ax.set_xlabel(f"size [{unit}]")
            alts.append(
                f"{q.get('name')}: discretisation error {plain(values[0])} {unit}, "
                f"round-off {plain(values[1])} {unit}, parameter sd {plain(values[2])} "
                f"{unit}, allowance {plain(allowance)} {unit}"
            )
        fig.tight_layout(h_pad=1.6)
        alt = "Bar chart of the error budget. " + "; ".join(alts) + "."
        svg = to_svg(fig, key, alt)
    caption = (
        "For each quantity: the discretisation error of the case's step (at the stated "
        "percentile over the parameter ensemble), the measured round-off and the "
        "parameter standard deviation. The step is adequate for a quantity when the "
        "discretisation bar (plus round-off) ends left of the dashed allowance line."
    )
    return Figure(key, title, caption, alt, svg)


def convergence(budget: dict) -> Figure:
    """|ladder value - reference| against the step, log-log, with the formal-order slope."""
    key, title = "convergence", "Convergence with the step"
    quantities = budget.get("quantities") or []
    step_value = finite(budget.get("simulation", {}).get("step", {}).get("value"))
    unit_t = budget.get("simulation", {}).get("step", {}).get("unit", "")
    rec = finite((budget.get("verdict", {}).get("recommended_step") or {}).get("value"))
    panels = []
    for q in quantities:
        ref = finite(q.get("reference"))
        points = []
        for level in q.get("discretisation", {}).get("ladder") or []:
            h, v = finite(level.get("step")), finite(level.get("value"))
            if ref is not None and h is not None and h > 0 and v is not None and v != ref:
                points.append((h, abs(v - ref)))
        panels.append((q, sorted(points)))
    if not any(len(p) >= 2 for _, p in panels):
        return skipped(
            key,
            title,
            "not drawn: no quantity has two ladder levels that differ from the reference",
        )
    cols = 2 if len(panels) > 1 else 1
    rows = math.ceil(len(panels) / cols)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.9 + 2.6 * rows, rows, cols)
        alts, handles = [], {}
        for ax, (q, points) in zip(axes.flat, panels, strict=False):
            unit = q.get("unit", "")
            ax.set_title(quantity_title(q), pad=8)
            if len(points) < 2:
                ax.text(
                    0.5,
                    0.5,
                    "no change with the step to show",
                    ha="center",
                    transform=ax.transAxes,
                    style="italic",
                )
                ax.set_axis_off()
                continue
            h, err = np.array(points).T
            ax.loglog(h, err, "o-", color=BLUE, markersize=4, label="nominal parameters")
            order = finite(q.get("discretisation", {}).get("formal_order"))
            if order:
                ax.loglog(
                    h,
                    err[-1] * (h / h[-1]) ** order,
                    "--",
                    color="#7b868e",
                    linewidth=1,
                    label=f"slope {order:g} (formal order)",
                )
            pct = finite(q.get("discretisation", {}).get("error_percentile"))
            level = finite(q.get("discretisation", {}).get("percentile")) or 95
            if pct and step_value:
                ax.loglog(
                    [step_value],
                    [pct],
                    "D",
                    color=VERMILLION,
                    markersize=5,
                    label=f"{level:g}th percentile over the ensemble (the verdict's)",
                )
            allowance = finite(q.get("allowance"))
            if allowance:
                ax.axhline(
                    allowance,
                    color=INK,
                    linestyle=(0, (4, 2)),
                    linewidth=1,
                    label="allowance (fraction of the parameter sd)",
                )
            if step_value:
                ax.axvline(
                    step_value,
                    color=INK,
                    linewidth=0.9,
                    label=f"case's step {step_text(step_value, unit_t).text}",
                )
            if rec:
                ax.axvline(
                    rec,
                    color=GREEN,
                    linewidth=1.6,
                    linestyle=":",
                    label=f"recommended step {step_text(rec, unit_t).text}",
                )
            ax.set_xlabel(f"time step [{unit_t}]")
            ax.set_ylabel(f"|value − reference| [{unit}]")
            ax.grid(which="major", color=GRID, linewidth=0.6)
            plain_ticks(ax, "x", (1.0, 2.0, 5.0))
            low, high = ax.get_ylim()
            plain_ticks(ax, "y", (1.0, 2.0, 5.0) if high / low < 10**2.5 else (1.0,))
            for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
                handles.setdefault(
                    label.split(" (")[0] if "allowance" in label else label, (handle, label)
                )
            observed = finite(q.get("discretisation", {}).get("observed_order"))
            alts.append(
                f"{q.get('name')}: error falls from {plain(err[-1])} {unit} at step "
                f"{plain(h[-1])} {unit_t} to {plain(err[0])} {unit} at step "
                f"{plain(h[0])} {unit_t}; observed order {plain(observed)}"
            )
        for ax in list(axes.flat)[len(panels) :]:
            ax.set_axis_off()
        fig.tight_layout(rect=(0, 0.5 / fig.get_figheight() + 0.04, 1, 1))
        fig.legend(
            [h for h, _ in handles.values()],
            [lbl for _, lbl in handles.values()],
            loc="lower center",
            ncols=2,
            fontsize=7.5,
        )
        alt = "Log-log convergence plot. " + "; ".join(alts) + "."
        svg = to_svg(fig, key, alt)
    caption = (
        "Distance of each refinement level from the Richardson-extrapolated reference, "
        "at nominal parameters. Points parallel to the dashed formal-order line mean "
        "the ladder is in the asymptotic range, so the extrapolation can be trusted. "
        "The diamond is the error the verdict uses (95th percentile over the "
        "ensemble); the dotted vertical line is the recommended step."
    )
    return Figure(key, title, caption, alt, svg)


def forecast(budget: dict, series: dict) -> Figure:
    """Ensemble band, nominal runs at the case's step and accurate, numerical error band."""
    key, title = "forecast", "The forecast over time"
    try:
        times = clean(series.get("times"))
        band = clean(series.get("band"))
        error = clean(series.get("error_p95"))
        coarse = clean(series.get("nominal_coarse"))
        fine_t, fine = clean(series.get("fine_times")), clean(series.get("nominal_fine"))
    except (TypeError, ValueError):
        return skipped(key, title, "not drawn: the time series of the run are malformed")
    if times.size == 0 or band.shape != (3, times.size) or np.isnan(band).all():
        return skipped(
            key,
            title,
            "not drawn: the time series of the run are not available "
            "(budget.json alone does not carry them)",
        )
    unit_t = budget.get("simulation", {}).get("step", {}).get("unit", "")
    unit_n = budget.get("simulation", {}).get("population_unit", "")
    step_value = finite(budget.get("simulation", {}).get("step", {}).get("value"))
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(4.3, 2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.25]})
        top, bottom = axes[0, 0], axes[1, 0]
        top.fill_between(
            times,
            band[0],
            band[2],
            color=SKY,
            alpha=0.45,
            linewidth=0,
            label="5–95 % of the ensemble (accurate)",
        )
        top.plot(times, band[1], color=BLUE, linewidth=1.4, label="ensemble median (accurate)")
        if fine.size and fine.size == fine_t.size:
            top.plot(fine_t, fine, color=INK, linewidth=1, label="nominal parameters, accurate")
        if coarse.size == times.size:
            top.plot(
                times,
                coarse,
                "o-",
                color=VERMILLION,
                markersize=2.6,
                linewidth=0.9,
                label=f"nominal parameters, case's step {step_text(step_value, unit_t).text}",
            )
        marked = _counts_and_marks(top, budget, series, unit_t, unit_n)
        top.set_ylabel(f"population [{unit_n}]")
        top.grid(color=GRID, linewidth=0.6)
        top.legend(loc="best", fontsize=7)
        top.set_title("Population", pad=4)
        alt = (
            f"Line chart of the population [{unit_n}] over "
            f"{step_text(np.nanmax(times), unit_t).text}: the ensemble 5–95 % band runs "
            f"from {plain(np.nanmin(band[0]))} to "
            f"{plain(np.nanmax(band[2]))} {unit_n}."
        )
        if error.size == times.size and not np.isnan(error).all():
            bottom.plot(times, error, "o-", color=ORANGE, markersize=2.6, linewidth=1.1)
            bottom.fill_between(times, 0, error, color=ORANGE, alpha=0.2, linewidth=0)
            worst = int(np.nanargmax(error))
            bottom.annotate(
                f"largest: {plain(error[worst])} {unit_n} at "
                f"{step_text(times[worst], unit_t).text}",
                (times[worst], error[worst]),
                xytext=(8, 3),
                textcoords="offset points",
                fontsize=7,
                va="bottom",
            )
            bottom.set_ylim(0, np.nanmax(error) * 1.45 or 1)
            alt += (
                f" The numerical error (95th percentile over the ensemble) peaks at "
                f"{plain(error[worst])} {unit_n} at {step_text(times[worst], unit_t).text}."
            )
        else:
            bottom.text(
                0.5,
                0.5,
                "numerical error along the run not available",
                ha="center",
                transform=bottom.transAxes,
                style="italic",
            )
        bottom.set_ylabel(f"error [{unit_n}]")
        bottom.set_xlabel(f"time [{unit_t}]")
        bottom.grid(color=GRID, linewidth=0.6)
        bottom.set_title(
            "Numerical error of the case's step (95th percentile over the ensemble)", pad=4
        )
        fig.tight_layout(h_pad=0.8)
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
        name = str(q.get("name", ""))
        at, level = q.get("at") or {}, q.get("level") or {}
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
    if lines:
        caption += (
            " Dashed lines mark the forecast quantities: a vertical line at the time of a value "
            "quantity, a horizontal line at the level a time-to quantity waits for."
        )
        alt += " Marked: " + "; ".join(lines) + "."
    return {"caption": caption, "alt": alt}


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


def sobol(budget: dict) -> Figure:
    """First-order and total Sobol indices with their confidence half-widths per quantity."""
    key, title = "sobol", "Which parameters drive the spread"
    quantities = [
        q for q in budget.get("quantities") or [] if (q.get("parameter") or {}).get("indices")
    ]
    if not quantities:
        return skipped(
            key, title, "not drawn: no Sobol indices (no uncertain parameters, or too few samples)"
        )
    with matplotlib.rc_context(RC):
        height = sum(0.75 + 0.3 * len(q["parameter"]["indices"]) for q in quantities)
        fig, axes = new_figure(
            0.4 + height,
            len(quantities),
            1,
            gridspec_kw={
                "height_ratios": [len(q["parameter"]["indices"]) + 1.5 for q in quantities]
            },
        )
        alts = []
        for ax, q in zip(axes[:, 0], quantities, strict=True):
            names = list(q["parameter"]["indices"])
            rows = np.arange(len(names))[::-1]
            parts = q["parameter"]["indices"]
            for offset, part, color, label in (
                (0.18, "first", BLUE, "first-order"),
                (-0.18, "total", ORANGE, "total"),
            ):
                values = np.array([finite(parts[n].get(part)) or 0.0 for n in names])
                conf = np.array([finite(parts[n].get(f"{part}_conf")) or 0.0 for n in names])
                ax.barh(
                    rows + offset,
                    values,
                    height=0.34,
                    color=color,
                    label=label,
                    xerr=conf,
                    error_kw={"elinewidth": 0.8, "capsize": 2, "ecolor": INK},
                )
            ax.set_yticks(rows, names)
            ax.set_xlim(min(-0.05, ax.get_xlim()[0]), max(1.05, ax.get_xlim()[1]))
            ax.axvline(0, color="#6b7780", linewidth=0.6)
            ax.set_title(q.get("name", ""))
            ax.set_xlabel("Sobol index [1] (share of the forecast variance)")
            ax.grid(axis="x", color=GRID, linewidth=0.6)
            top = max(names, key=lambda n: finite(parts[n].get("total")) or 0.0)
            alts.append(
                f"{q.get('name')}: largest total index {top} ({plain(parts[top].get('total'))})"
            )
        fig.tight_layout(rect=(0, 0, 1, 1 - 0.3 / fig.get_figheight()))
        fig.legend(*axes[0, 0].get_legend_handles_labels(), loc="upper right", ncols=2)
        alt = "Bar chart of Sobol indices. " + "; ".join(alts) + "."
        svg = to_svg(fig, key, alt)
    caption = (
        "Share of each quantity's variance due to each uncertain input alone "
        "(first-order) and with its interactions (total), with confidence half-widths. "
        "Better data on the inputs with the largest total index narrow the forecast "
        "most; inputs near zero could be fixed."
    )
    fitted = list((budget.get("fit") or {}).get("parameters") or {})
    grouped = any("fitted" in (q.get("parameter") or {}).get("indices", {}) for q in quantities)
    if fitted and grouped:
        caption += (
            f" The parameters fitted to the counts ({', '.join(fitted)}) are correlated "
            'through the fit, so they are analysed as one group, "fitted", not as '
            "independent inputs."
        )
    return Figure(key, title, caption, alt, svg)


def stability(budget: dict, series: dict | None = None) -> Figure:
    """The stability map when the run's series carry it, else the step limits as bars."""
    mapped = curves.stability_map(budget, series or {})
    if mapped is not None:
        return mapped
    key, title = "stability", "Stability limits of the step"
    info = budget.get("stability") or {}
    unit_t = budget.get("simulation", {}).get("step", {}).get("unit", "")
    limits = [
        ("stable limit, strictest member", (info.get("stable_step") or {}).get("value")),
        ("stable limit, nominal parameters", (info.get("stable_step_nominal") or {}).get("value")),
        ("no-oscillation limit, strictest member", (info.get("monotone_step") or {}).get("value")),
    ]
    if all(finite(v) is None for _, v in limits):
        return skipped(
            key,
            title,
            "not drawn: linear stability gives no step limit for this "
            "model (no stable equilibrium with a finite limit)",
        )
    steps = [
        ("case's step", budget.get("simulation", {}).get("step", {}).get("value")),
        (
            "recommended step",
            (budget.get("verdict", {}).get("recommended_step") or {}).get("value"),
        ),
    ]
    rows = steps + limits
    labels = [label for label, _ in rows]
    values = [finite(v) for _, v in rows]
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.6 + 0.34 * len(rows))
        ax = axes[0, 0]
        missing = {i: "no limit" for i in range(2, 5) if values[i] is None}
        if values[1] is None:
            missing[1] = "no step qualifies"
        bar_panel(
            ax,
            labels,
            values,
            [INK, GREEN, BLUE, SKY, ORANGE],
            unit_t,
            missing,
            log=False,
            label=lambda v: number(v, 3),
        )
        case = finite(steps[0][1])
        if case:
            ax.axvline(case, color=INK, linewidth=0.8, linestyle=(0, (2, 2)))
        ax.set_xlabel(f"time step [{unit_t}]")
        fig.tight_layout()
        alt = "Bar chart of steps: " + "; ".join(
            f"{label} {step_text(v, unit_t).text}" for label, v in zip(labels, values, strict=True)
        )
        svg = to_svg(fig, key, alt + ".")
    caption = (
        "Linear stability of the scheme at the model's stable equilibrium: steps beyond "
        "the stable limit make the equilibrium unstable (wild or divergent runs), steps "
        "beyond the no-oscillation limit make the run zigzag around it when the exact "
        "solution does not. The case's step (dashed line) should sit left of both."
    )
    return Figure(key, title, caption, alt + ".", svg)


def roundoff(budget: dict) -> Figure:
    """The fitted total-error curves when present, else round-off against its bound as bars."""
    fitted = curves.roundoff_curves(budget)
    if fitted is not None:
        return fitted
    key, title = "roundoff", "Round-off"
    quantities = budget.get("quantities") or []
    if not quantities or all(
        finite((q.get("roundoff") or {}).get("bound")) is None
        and finite((q.get("roundoff") or {}).get("error")) is None
        for q in quantities
    ):
        return skipped(key, title, "not drawn: round-off was not measured")
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.4 + PANEL_IN * len(quantities), len(quantities), 1)
        alts = []
        for ax, q in zip(axes[:, 0], quantities, strict=True):
            unit = q.get("unit", "")
            r = q.get("roundoff") or {}
            values = [
                r.get("error"),
                r.get("bound"),
                (q.get("discretisation") or {}).get("error_percentile"),
            ]
            labels = ["measured (binary64)", "bound (u × steps × size)", "discretisation error"]
            zero = {0: "0 (no difference from the wider type)"} if finite(values[0]) == 0 else {}
            bar_panel(ax, labels, values, [PURPLE, SKY, VERMILLION], unit, zero, log=True)
            ax.set_title(quantity_title(q), pad=8)
            ax.set_xlabel(f"size [{unit}]")
            alts.append(
                f"{q.get('name')}: measured {plain(values[0])}, bound "
                f"{plain(values[1])}, discretisation {plain(values[2])} {unit}"
            )
        fig.tight_layout(h_pad=1.2)
        alt = "Bar chart of round-off. " + "; ".join(alts) + "."
        svg = to_svg(fig, key, alt)
    caption = (
        "Round-off measured by repeating the run in a wider float type, the a-priori "
        "bound (unit round-off times the number of steps times the size of the "
        "solution) and the discretisation error for scale. Round-off matters only if "
        "it comes near the discretisation error, which happens at very small steps."
    )
    return Figure(key, title, caption, alt, svg)
