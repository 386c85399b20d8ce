"""The round-off figure: the fitted total-error curves, or round-off against its bound as bars.

The curves need budget.json's ``roundoff.curve`` of at least one quantity (a quantity
without one gets the bars in its panel); with no curve at all the figure is the bar chart.
"""

from __future__ import annotations

import math

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
    PANEL_IN,
    PURPLE,
    RC,
    SKY,
    VERMILLION,
    bar_panel,
    clean,
    new_figure,
    plain_ticks,
    quantity_title,
    to_svg,
)

CURVE_PANEL_IN = 1.8  # height of one round-off curve panel [in]
CURVE_LEGEND_IN = 0.4  # room for the shared legend below the panels (two rows) [in]
PANEL_TICKS = 5  # about this many labelled ticks on a curve panel's error axis
BAR_PANEL_IN = 1.45  # height of a round-off bar panel (no fitted curve) [in]
CURVE_POINTS = 200  # points of a fitted curve on its log-spaced step grid
REACH = 3.0  # the fitted curve runs this factor beyond the extreme steps and the optimum


def roundoff(budget: dict) -> Figure:
    """The fitted total-error curves when present, else round-off against its bound as bars."""
    fitted = roundoff_curves(budget)
    return fitted if fitted is not None else roundoff_bars(budget)


def _positive(values) -> np.ndarray:
    array = clean(values)
    return np.where(array > 0, array, np.nan)


def _curve(q: dict) -> dict | None:
    """The fitted curve of a quantity when it has usable C, D, p and measured points."""
    curve = (q.get("roundoff") or {}).get("curve")
    if not isinstance(curve, dict):
        return None
    c = finite((curve.get("C") or {}).get("value"))
    d = finite((curve.get("D") or {}).get("value"))
    p = finite(curve.get("p"))
    u = finite(curve.get("unit_roundoff"))
    steps = _positive((curve.get("steps") or {}).get("values"))
    errors = _positive((curve.get("errors") or {}).get("values"))
    if None in (c, d, p, u) or steps.shape != errors.shape or steps.ndim != 1:
        return None
    points = np.isfinite(steps) & np.isfinite(errors)
    if not points.any() or c < 0 or d < 0 or p <= 0:
        return None
    return {
        "C": c,
        "D": d,
        "p": p,
        "u": u,
        "steps": steps[points],
        "errors": errors[points],
        "bound": bool(curve.get("D_is_bound")),
        "optimum": finite((curve.get("optimum_step") or {}).get("value")),
        "crossover": finite((curve.get("crossover_step") or {}).get("value")),
    }


def roundoff_curves(budget: dict) -> Figure | None:
    """Measured binary64 total error against the step, with the fitted C h^p + D u / h.

    Returns None when no quantity carries a usable fitted curve. The optimum step
    h* = (D u / (p C))^(1/(p+1)) minimises the total error (Higham 2002, Accuracy and
    Stability of Numerical Algorithms, 2nd ed., SIAM, doi:10.1137/1.9780898718027).
    """
    key, title = "roundoff", "Round-off and the total error"
    quantities = budget.get("quantities") or []
    curves = [_curve(q) for q in quantities]
    if not any(curves):
        return None
    sim = budget.get("simulation") or {}
    unit_t = (sim.get("step") or {}).get("unit", "")
    case_step = finite((sim.get("step") or {}).get("value"))
    cols = 2 if len(quantities) > 1 else 1  # side by side: half the height on paper
    rows = math.ceil(len(quantities) / cols)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(CURVE_LEGEND_IN + CURVE_PANEL_IN * rows, rows, cols)
        for ax in axes.flat[len(quantities) :]:
            ax.set_visible(False)
        alts = []
        for ax, q, cv in zip(axes.flat, quantities, curves, strict=False):
            ax.set_title(quantity_title(q, cols), pad=8)
            if cv is None:
                _bars(ax, q)
                alts.append(f"{q.get('name')}: no fitted curve")
                continue
            _curve_panel(ax, cv, case_step, unit_t, q.get("unit", ""))
            alts.append(
                f"{q.get('name')}: {len(cv['steps'])} measured points; fitted total error "
                f"smallest at a step of {step_text(cv['optimum'], unit_t, why='none').text}; "
                f"round-off overtakes discretisation below "
                f"{step_text(cv['crossover'], unit_t, why='none').text}"
            )
        handles = {}
        for ax in axes.flat:
            for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
                handles.setdefault(label, handle)
        fig.tight_layout(rect=(0, CURVE_LEGEND_IN / fig.get_figheight(), 1, 1), h_pad=1.2)
        if handles:
            fig.legend(list(handles.values()), list(handles), loc="lower center", ncols=3)
        alt = "Round-off curves. " + "; ".join(alts) + "."
        svg = to_svg(fig, key, alt)
    caption = (
        "Total binary64 error measured at halved steps (dots) and the fitted curve C h^p "
        "(discretisation, dashed) + D u/h (round-off, dotted), u the unit round-off. Round-off "
        "matters only left of the crossing of the two parts; the diamond marks the step with "
        "the smallest total error. The case's step is the vertical line: far to the right of "
        "the optimum, refining it lowers the error."
    )
    said = [
        f"{q.get('name')}: {(q.get('roundoff') or {}).get('statement')}"
        for q in quantities
        if (q.get("roundoff") or {}).get("statement")
    ]
    if said:
        caption += " In words, " + " ".join(s.rstrip(".") + "." for s in said)
    return Figure(key, title, caption, alt, svg)


def _curve_panel(ax, cv: dict, case_step, unit_t: str, unit: str) -> None:
    """One quantity's fitted curve, its two parts, the measured points and the optimum."""
    marks = [v for v in (cv["optimum"], cv["crossover"], case_step) if v and v > 0]
    h_low = min([float(cv["steps"].min()), *marks]) / REACH
    h_high = max([float(cv["steps"].max()), *marks]) * REACH
    h = np.geomspace(h_low, h_high, CURVE_POINTS)
    trunc = cv["C"] * h ** cv["p"]
    rounding = cv["D"] * cv["u"] / h
    ax.loglog(h, trunc + rounding, color=BLUE, linewidth=1.4, label="fitted C h^p + D u/h")
    ax.loglog(h, trunc, "--", color="#7b868e", linewidth=0.9, label="discretisation C h^p")
    ax.loglog(
        h,
        rounding,
        ":",
        color=PURPLE,
        linewidth=1.2,
        label="round-off D u/h" + (" (upper bound)" if cv["bound"] else ""),
    )
    ax.loglog(
        cv["steps"],
        cv["errors"],
        "o",
        color=VERMILLION,
        markersize=3.5,
        label="measured (binary64)",
    )
    if cv["optimum"] and cv["optimum"] > 0:
        best = cv["C"] * cv["optimum"] ** cv["p"] + cv["D"] * cv["u"] / cv["optimum"]
        ax.loglog(
            [cv["optimum"]],
            [best],
            "D",
            color=GREEN,
            markersize=5,
            label="optimum step (smallest total error)",
        )
    if case_step:
        ax.axvline(case_step, color=INK, linewidth=0.9, label="case's step")
    ax.set_xlabel(f"time step [{unit_t}]")
    ax.set_ylabel(f"error [{unit}]")
    ax.grid(which="major", color=GRID, linewidth=0.6)
    plain_ticks(ax, "x")
    plain_ticks(ax, "y", numticks=PANEL_TICKS)  # a short axis over many decades


def _bars(ax, q: dict) -> list:
    """Measured round-off, its bound and the discretisation error for one quantity.

    Returns the three values drawn (for the alt text).
    """
    unit = q.get("unit", "")
    r = q.get("roundoff") or {}
    disc = q.get("discretisation") or {}
    values = [r.get("error"), r.get("bound"), disc.get("error_percentile")]
    labels = ["measured (binary64)", "bound (u × steps × size)", "discretisation error"]
    zero = {0: "0 (no difference from the wider type)"} if finite(values[0]) == 0 else {}
    bar_panel(ax, labels, values, [PURPLE, SKY, VERMILLION], unit, zero, log=True)
    ax.set_xlabel(f"size [{unit}]")
    return values


def roundoff_bars(budget: dict) -> Figure:
    """Round-off against its bound and the discretisation error, per quantity, as bars."""
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
            values = _bars(ax, q)
            ax.set_title(quantity_title(q), pad=8)
            alts.append(
                f"{q.get('name')}: measured {plain(values[0])}, bound "
                f"{plain(values[1])}, discretisation {plain(values[2])} {q.get('unit', '')}"
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
