"""The stability figure: each member's largest stable step (the map), or the step limits as bars.

The map needs the run's ``series["stability"]`` (one limit per ensemble member); without it,
or when budget.json records no strictest limit, the figure falls back to bars of the limits
budget.json carries. Large ensembles are drawn as groups of neighbouring members (median and
range), so the page stays small: a few hundred markers whatever the ensemble size.
"""

from __future__ import annotations

from dataclasses import dataclass

import matplotlib
import numpy as np
from matplotlib.legend_handler import HandlerTuple

from errbudget.report.figure import Figure, skipped
from errbudget.report.fmt import finite, number, plain
from errbudget.report.fmt import step as step_text
from errbudget.report.plotting import (
    BLUE,
    GREEN,
    GRID,
    INK,
    ORANGE,
    RC,
    SKY,
    VERMILLION,
    bar_panel,
    clean,
    new_figure,
    plain_ticks,
    to_svg,
)

CENTRAL = (5.0, 95.0)  # percentiles bounding the ensemble's central 90 % range of the input
MAP_HEIGHT_IN = 2.2  # height of the stability map [in]
MIN_POINTS = 2  # a map needs at least this many members with a finite limit
MAX_MEMBERS_DRAWN = 256  # up to this many members, each is its own dot
SLICES = 128  # beyond it, members are summarised over this many equal slices of the input
BAND_ALPHA = 0.3  # opacity of the band of each slice's range


@dataclass(frozen=True)
class Limits:
    """One series of per-member step limits, sorted by the input, maybe summarised by slices.

    ``x`` and ``y`` are what is drawn: the members themselves, or the medians of the members
    in each non-empty slice of the input's range; ``low`` and ``high`` the range of the
    limits in each slice (None when every member is drawn).
    """

    x: np.ndarray
    y: np.ndarray
    low: np.ndarray | None = None
    high: np.ndarray | None = None


def _positive(values) -> np.ndarray:
    array = clean(values)
    return np.where(array > 0, array, np.nan)


def member_limits(x: np.ndarray, limit: np.ndarray, keep: np.ndarray, edges: np.ndarray) -> Limits:
    """The members kept, sorted by the input; summarised by slices when too many to draw.

    ``edges`` are the slice boundaries over the input's range, shared by both series.
    """
    order = np.argsort(x[keep], kind="stable")
    xs, ys = x[keep][order], limit[keep][order]
    if xs.size <= MAX_MEMBERS_DRAWN:
        return Limits(xs, ys)
    # The slice of each member (the top edge belongs to the last slice); xs is sorted, so
    # each slice's members are contiguous.
    which = np.clip(np.searchsorted(edges, xs, side="right") - 1, 0, edges.size - 2)
    slices = np.split(np.arange(xs.size), np.flatnonzero(np.diff(which)) + 1)
    return Limits(
        x=np.array([np.median(xs[m]) for m in slices]),
        y=np.array([np.median(ys[m]) for m in slices]),
        low=np.array([ys[m].min() for m in slices]),
        high=np.array([ys[m].max() for m in slices]),
    )


def _member_arrays(data: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """The input's value, largest stable step and no-oscillation step of each member.

    Non-finite and non-positive limits become NaN; None when the arrays do not match or
    fewer than MIN_POINTS members have both a value and a stable limit.
    """
    x = clean(data.get("values"))
    stable = _positive(data.get("stable"))
    if x.shape != stable.shape or x.ndim != 1:
        return None
    if (np.isfinite(x) & np.isfinite(stable)).sum() < MIN_POINTS:
        return None
    monotone = data.get("monotone")
    mono = _positive(monotone) if monotone is not None else np.full_like(x, np.nan)
    if mono.shape != x.shape:
        mono = np.full_like(x, np.nan)
    return x, stable, mono


def _draw(ax, limits: Limits, marker: str, size: float, color: str, label: str) -> tuple:
    """Dots joined by a line, over a band of each group's range when members are grouped.

    Returns the legend entry (handle, label); for groups the handle is the (band, line) pair.
    """
    (line,) = ax.plot(limits.x, limits.y, f"{marker}-", color=color, markersize=size, lw=0.9)
    if limits.low is None:
        return line, label
    band = ax.fill_between(
        limits.x, limits.low, limits.high, color=color, alpha=BAND_ALPHA, linewidth=0
    )
    return (band, line), f"{label}: median and range in each slice of the input"


NEAR = 1.6  # steps closer than this factor on the log axis get labels above and below


def _mark_steps(ax, case_step, rec, strictest: float, unit_t: str) -> None:
    """The case's and the recommended step as lines, and the strictest limit, labelled.

    Equal steps get one label; steps within a factor ``NEAR`` of each other get their labels
    above and below their lines, so that the two never overlap.
    """
    same = bool(case_step and rec and abs(case_step - rec) <= 1e-9 * case_step)
    near = bool(case_step and rec and max(case_step, rec) / min(case_step, rec) < NEAR)
    marks = [(case_step, INK, "-", "case's step = recommended step" if same else "case's step")]
    if not same:
        marks.append((rec, GREEN, ":", "recommended step"))
    for value, color, style, label in marks:
        if value and value > 0:
            ax.axhline(value, color=color, linestyle=style, linewidth=1.5)
            above = value >= max(v for v, *_ in marks if v)
            ax.text(
                1.0,
                value,
                f" {label} {step_text(value, unit_t).text}",
                transform=ax.get_yaxis_transform(),
                va=("bottom" if above else "top") if near and not same else "center",
                fontsize=7.5,
                color=color,
            )
    ax.text(
        1.0,
        strictest,
        f" strictest limit {plain(strictest)} {unit_t}",
        transform=ax.get_yaxis_transform(),
        va="center",
        fontsize=7.5,
        color=VERMILLION,
    )


def _regions(ax, x: np.ndarray, strictest: float, y_high: float, name: str) -> None:
    """The central 90 % of the input (vertical band) and the unstable steps (red region)."""
    low_x, high_x = np.nanpercentile(x[np.isfinite(x)], CENTRAL)
    ax.axvspan(
        low_x,
        high_x,
        color=SKY,
        alpha=0.22,
        linewidth=0,
        label=f"central 90 % of the ensemble's {name}",
    )
    ax.axhspan(
        strictest,
        y_high,
        color=VERMILLION,
        alpha=0.12,
        linewidth=0,
        label="unstable for at least one member (above the strictest limit)",
    )
    ax.axhline(strictest, color=VERMILLION, linewidth=0.9, linestyle=(0, (4, 2)))


def _legend(ax, entries: list[tuple]) -> None:
    """The labelled regions, then the limit series (a group's band and line as one entry)."""
    handles, labels = ax.get_legend_handles_labels()
    handles += [handle for handle, _ in entries]
    labels += [label for _, label in entries]
    ax.legend(
        handles,
        labels,
        handler_map={tuple: HandlerTuple(ndivide=1)},
        loc="upper center",
        # Anchored at the axes' foot and padded (in font sizes) past the tick labels and the
        # axis label, so it clears them whatever the figure's height.
        bbox_to_anchor=(0.5, 0.0),
        borderaxespad=4.4,
        ncols=2,
        fontsize=7,
    )


def stability_map(budget: dict, series: dict) -> Figure | None:
    """Each member's largest stable step against the input the limits depend on most.

    The limit is the linear-stability bound of the scheme at the model's stable
    equilibrium, per ensemble member (May 1976, Nature 261, 459-467,
    doi:10.1038/261459a0, for the logistic map's period doubling and instability).
    Returns None when ``series["stability"]`` is missing or has fewer than MIN_POINTS
    finite limits, or when budget.json records no strictest limit.
    """
    key, title = "stability", "Stability map of the step"
    data = (series or {}).get("stability")
    arrays = _member_arrays(data) if isinstance(data, dict) else None
    if arrays is None:
        return None
    x, stable, mono = arrays
    keep = np.isfinite(x) & np.isfinite(stable)
    mono_keep = np.isfinite(x) & np.isfinite(mono)
    sim = budget.get("simulation") or {}
    unit_t = (sim.get("step") or {}).get("unit", "")
    case_step = finite((sim.get("step") or {}).get("value"))
    rec = finite(((budget.get("verdict") or {}).get("recommended_step") or {}).get("value"))
    strictest = finite(((budget.get("stability") or {}).get("stable_step") or {}).get("value"))
    if strictest is None or strictest <= 0:
        return None  # budget.json records no limit: the bar chart's note says so
    x_range = (float(np.min(x[keep])), float(np.max(x[keep])))
    finite_x = x[np.isfinite(x)]
    edges = np.linspace(finite_x.min(), finite_x.max(), SLICES + 1)
    members = member_limits(x, stable, keep, edges)
    oscillation = member_limits(x, mono, mono_keep, edges) if mono_keep.any() else None
    name = str(data.get("parameter") or "the input")
    unit_p = str(data.get("unit") or "")
    shown = [v for v in (case_step, rec, strictest) if v and v > 0]
    shown += list(stable[keep]) + list(mono[mono_keep])
    y_range = (min(shown) / 2.5, max(shown) * 3.0)
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(MAP_HEIGHT_IN)
        ax = axes[0, 0]
        ax.set_yscale("log")
        _regions(ax, x, strictest, y_range[1], name)
        entries = [_draw(ax, members, "o", 2.8, BLUE, "largest stable step")]
        if oscillation is not None:
            label = "largest step without oscillation"
            entries.append(_draw(ax, oscillation, "s", 2.4, ORANGE, label))
        _mark_steps(ax, case_step, rec, strictest, unit_t)
        _map_axes(ax, x_range, y_range, f"{name} [{unit_p}]" if unit_p else name, unit_t)
        _legend(ax, entries)
        fig.tight_layout()
        alt = (
            f"Stability map: the largest stable step of {int(keep.sum())} ensemble members "
            f"runs from {plain(float(np.min(stable[keep])))} to "
            f"{plain(float(np.max(stable[keep])))} {unit_t} as {name} goes from "
            f"{plain(x_range[0])} to {plain(x_range[1])} {unit_p}; strictest limit "
            f"{step_text(strictest, unit_t).text}; case's step "
            f"{step_text(case_step, unit_t).text}; recommended step "
            f"{step_text(rec, unit_t, why='none').text}.{_grouping(members, name)}"
        )
        svg = to_svg(fig, key, alt)
    caption = _map_caption(data, name, members, oscillation)
    return Figure(key, title, caption, alt, svg)


def _map_axes(ax, x_range, y_range, x_label: str, unit_t: str) -> None:
    """Axis ranges (x over every member kept, whether drawn alone or in groups) and labels."""
    ax.set_ylim(*y_range)
    span = (x_range[1] - x_range[0]) or abs(x_range[0]) or 1.0
    ax.set_xlim(x_range[0] - 0.04 * span, x_range[1] + 0.04 * span)
    ax.set_xlabel(x_label)
    ax.set_ylabel(f"time step [{unit_t}]")
    ax.grid(color=GRID, linewidth=0.6)
    plain_ticks(ax, "y", (1.0, 2.0, 5.0))


def _grouping(members: Limits, name: str) -> str:
    """The alt text's sentence on how a large ensemble is drawn (empty when each is a dot)."""
    if members.low is None:
        return ""
    return f" Drawn as the median and range of the members in each of {SLICES} slices of {name}."


def _map_caption(data: dict, name: str, members: Limits, oscillation: Limits | None) -> str:
    rho = finite(data.get("rho"))
    depends = f" (Spearman rank correlation {plain(rho, 2)})" if rho is not None else ""
    if members.low is None:
        opening = "Each dot is one ensemble member: the largest step"
    else:
        opening = (
            f"Each dot is the median over the ensemble members whose {name} falls in one of "
            f"{SLICES} equal slices of its range (the shaded band around the line spans "
            "their range): the largest step"
        )
    if oscillation is None:
        squares = " No member has a finite no-oscillation limit with this scheme."
    elif oscillation.low is None:
        squares = " Squares: each member's largest step without oscillation around the equilibrium."
    else:
        squares = (
            " Squares: the median and range in each slice of the largest step without "
            "oscillation around the equilibrium."
        )
    return (
        f"{opening} for which the scheme keeps the "
        f"model's stable equilibrium stable, against {name}, the input these limits depend "
        f"on most{depends}.{squares} Red: steps above the strictest member's limit, "
        f"unstable for at least one member. Blue band: the central 90 % of the ensemble's "
        f"{name}. How to read it: a step below every member's limit, that is below the red "
        "region, is stable for the whole ensemble; the case's step (solid line) and the "
        "recommended step (dotted line) should both sit there."
    )


def limit_bars(budget: dict) -> Figure:
    """The step limits budget.json records, beside the case's and the recommended step."""
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
