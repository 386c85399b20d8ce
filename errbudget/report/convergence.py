"""The convergence figure: each quantity's ladder error against the step, log-log."""

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
    RC,
    VERMILLION,
    new_figure,
    plain_ticks,
    quantity_title,
    to_svg,
)

PANEL_IN = 1.9  # height of one row of panels [in]
LEGEND_IN = 0.42  # room for the shared legend below them (two rows of three) [in]
AXIS_TICKS = 6  # about this many labelled ticks on a panel's error axis (many decades)


def convergence(budget: dict) -> Figure:
    """|ladder value - reference| against the step, log-log, with the formal-order slope."""
    key, title = "convergence", "Convergence with the step"
    step = budget.get("simulation", {}).get("step", {})
    steps = {
        "case": finite(step.get("value")),
        "recommended": finite(
            (budget.get("verdict", {}).get("recommended_step") or {}).get("value")
        ),
        "unit": step.get("unit", ""),
    }
    panels = [(q, _ladder_errors(q)) for q in budget.get("quantities") or []]
    if not any(len(p) >= 2 for _, p in panels):
        return skipped(
            key,
            title,
            "not drawn: no quantity has two ladder levels that differ from the reference",
        )
    cols = 2 if len(panels) > 1 else 1
    rows = math.ceil(len(panels) / cols)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(LEGEND_IN + PANEL_IN * rows, rows, cols)
        alts, handles = [], {}
        for ax, (q, points) in zip(axes.flat, panels, strict=False):
            ax.set_title(quantity_title(q, cols), pad=8)
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
            alts.append(_panel(ax, q, points, steps))
            for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
                handles.setdefault(
                    label.split(" (")[0] if "allowance" in label else label, (handle, label)
                )
        for ax in list(axes.flat)[len(panels) :]:
            ax.set_axis_off()
        fig.tight_layout(rect=(0, LEGEND_IN / fig.get_figheight(), 1, 1))
        fig.legend(
            [h for h, _ in handles.values()],
            [lbl for _, lbl in handles.values()],
            loc="lower center",
            ncols=3,
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


def _ladder_errors(q: dict) -> list[tuple[float, float]]:
    """(step, |value - reference|) of the ladder levels that differ from the reference."""
    ref = finite(q.get("reference"))
    points = []
    for level in q.get("discretisation", {}).get("ladder") or []:
        h, v = finite(level.get("step")), finite(level.get("value"))
        if ref is not None and h is not None and h > 0 and v is not None and v != ref:
            points.append((h, abs(v - ref)))
    return sorted(points)


def _panel(ax, q: dict, points: list[tuple[float, float]], steps: dict) -> str:
    """One quantity's ladder, slope, verdict error, allowance and steps; returns its alt text."""
    unit, unit_t = q.get("unit", ""), steps["unit"]
    disc = q.get("discretisation", {})
    h, err = np.array(points).T
    ax.loglog(h, err, "o-", color=BLUE, markersize=4, label="nominal parameters")
    order = finite(disc.get("formal_order"))
    if order:
        ax.loglog(
            h,
            err[-1] * (h / h[-1]) ** order,
            "--",
            color="#7b868e",
            linewidth=1,
            label=f"slope {order:g} (formal order)",
        )
    pct = finite(disc.get("error_percentile"))
    level = finite(disc.get("percentile")) or 95
    if pct and steps["case"]:
        ax.loglog(
            [steps["case"]],
            [pct],
            "D",
            color=VERMILLION,
            markersize=5,
            label=f"{level:g}th percentile over the ensemble (the verdict's)",
        )
    _reference_lines(ax, finite(q.get("allowance")), steps)
    ax.set_xlabel(f"time step [{unit_t}]")
    ax.set_ylabel(f"|value − reference| [{unit}]")
    ax.grid(which="major", color=GRID, linewidth=0.6)
    low, high = ax.get_xlim()
    plain_ticks(ax, "x", (1.0, 2.0, 5.0) if high / low < 10**2.1 else (1.0,))
    low, high = ax.get_ylim()
    plain_ticks(ax, "y", (1.0, 2.0, 5.0) if high / low < 10**2.5 else (1.0,), numticks=AXIS_TICKS)
    return (
        f"{q.get('name')}: error falls from {plain(err[-1])} {unit} at step "
        f"{plain(h[-1])} {unit_t} to {plain(err[0])} {unit} at step "
        f"{plain(h[0])} {unit_t}; observed order {plain(finite(disc.get('observed_order')))}"
    )


def _reference_lines(ax, allowance: float | None, steps: dict) -> None:
    """The allowance (horizontal), the case's and the recommended step (vertical)."""
    unit_t = steps["unit"]
    if allowance:
        ax.axhline(
            allowance,
            color=INK,
            linestyle=(0, (4, 2)),
            linewidth=1,
            label="allowance (fraction of the parameter sd)",
        )
    if steps["case"]:
        ax.axvline(
            steps["case"],
            color=INK,
            linewidth=0.9,
            label=(
                f"case's step {step_text(steps['case'], unit_t).text}"
                + (" (= recommended step)" if steps["case"] == steps["recommended"] else "")
            ),
        )
    case, rec = steps["case"], steps["recommended"]
    if rec and case and abs(rec - case) <= 1e-9 * case:
        return  # the same step: one line, labelled as the case's step in the legend
    if steps["recommended"]:
        ax.axvline(
            steps["recommended"],
            color=GREEN,
            linewidth=1.6,
            linestyle=":",
            label=f"recommended step {step_text(steps['recommended'], unit_t).text}",
        )
