"""The report's two bar charts per quantity: the error budget and the Sobol indices."""

from __future__ import annotations

import math

import matplotlib
import numpy as np

from errbudget.report.figure import Figure, skipped
from errbudget.report.fmt import finite, plain
from errbudget.report.plotting import (
    BLUE,
    GRID,
    INK,
    ORANGE,
    PANEL_IN,
    PURPLE,
    RC,
    VERMILLION,
    bar_panel,
    new_figure,
    quantity_title,
    to_svg,
)


def budget_bars(budget: dict) -> Figure:
    """Discretisation error (ensemble percentile), round-off and parameter sd per quantity."""
    key, title = "budget", "Error budget per quantity"
    quantities = budget.get("quantities") or []
    if not quantities:
        return skipped(key, title, "no quantities in the budget")
    fraction = finite(budget.get("verdict", {}).get("fraction"))
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.5 + PANEL_IN * len(quantities), len(quantities), 1)
        alts = [
            _budget_panel(ax, q, fraction) for ax, q in zip(axes[:, 0], quantities, strict=True)
        ]
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


def _budget_panel(ax, q: dict, fraction: float | None) -> str:
    """One quantity's three bars and its allowance line; returns the panel's alt text."""
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
    return (
        f"{q.get('name')}: discretisation error {plain(values[0])} {unit}, "
        f"round-off {plain(values[1])} {unit}, parameter sd {plain(values[2])} "
        f"{unit}, allowance {plain(allowance)} {unit}"
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
    fitted = list((budget.get("fit") or {}).get("parameters") or {})
    if all(len(q["parameter"]["indices"]) == 1 for q in quantities):
        only = group_label(next(iter(quantities[0]["parameter"]["indices"])), fitted)
        return skipped(
            key,
            title,
            f"not drawn: the whole spread of the forecast comes from one group of inputs, {only}, "
            "so its Sobol index is 1 by construction and a chart would tell nothing",
        )
    cols = 2 if len(quantities) > 1 else 1  # side by side: half the height on paper
    rows = math.ceil(len(quantities) / cols)
    inputs = max(len(q["parameter"]["indices"]) for q in quantities)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(0.4 + rows * (0.75 + 0.3 * inputs), rows, cols)
        for ax in axes.flat[len(quantities) :]:
            ax.set_visible(False)
        alts = [_sobol_panel(ax, q, fitted) for ax, q in zip(axes.flat, quantities, strict=False)]
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
    linked = sorted({n for q in quantities for n in q["parameter"]["indices"] if "+" in n})
    if linked:
        caption += (
            " Inputs correlated through [correlations] are drawn together and analysed as one "
            "group (" + "; ".join(group_label(n, fitted) for n in linked) + ")."
        )
    grouped = any("fitted" in (q.get("parameter") or {}).get("indices", {}) for q in quantities)
    if fitted and grouped:
        caption += (
            f" The parameters fitted to the counts ({', '.join(fitted)}) are correlated "
            'through the fit, so they are analysed as one group, "fitted", not as '
            "independent inputs."
        )
    return Figure(key, title, caption, alt, svg)


def group_label(name: str, fitted: list[str]) -> str:
    """A Sobol input or group as the reader knows it: "fitted (r, K, N0)", "r and K"."""
    if name == "fitted" and fitted:
        return f"fitted ({', '.join(fitted)})"
    if "+" in name:
        members = name.split("+")
        return ", ".join(members[:-1]) + " and " + members[-1]
    return name


def _sobol_panel(ax, q: dict, fitted: list[str]) -> str:
    """One quantity's first-order and total indices; returns the panel's alt text."""
    parts = q["parameter"]["indices"]
    names = list(parts)
    rows = np.arange(len(names))[::-1]
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
    ax.set_yticks(rows, [group_label(n, fitted) for n in names])
    ax.set_xlim(min(-0.05, ax.get_xlim()[0]), max(1.05, ax.get_xlim()[1]))
    ax.axvline(0, color="#6b7780", linewidth=0.6)
    ax.set_title(q.get("name", ""))
    ax.set_xlabel("Sobol index: share of the variance")
    ax.grid(axis="x", color=GRID, linewidth=0.6)
    top = max(names, key=lambda n: finite(parts[n].get("total")) or 0.0)
    return f"{q.get('name')}: largest total index {top} ({plain(parts[top].get('total'))})"
