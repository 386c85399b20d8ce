"""The report's two curve figures: the stability map of the step and the round-off curve.

Both take budget.json (and, for the map, the run's ``series``) and return a
:class:`~errbudget.report.plotting.Figure`, or ``None`` when their data are missing so that
the caller can fall back to the simpler bar chart. Non-finite numbers are masked before
plotting, never passed to matplotlib.
"""

from __future__ import annotations

import matplotlib
import numpy as np

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
    Figure,
    bar_panel,
    clean,
    new_figure,
    plain_ticks,
    quantity_title,
    to_svg,
)

CENTRAL = (5.0, 95.0)  # percentiles bounding the ensemble's central 90 % range of the input
MAP_HEIGHT_IN = 3.4  # height of the stability map [in]
CURVE_PANEL_IN = 2.3  # height of one round-off curve panel [in]
BAR_PANEL_IN = 1.45  # height of a round-off bar panel (no fitted curve) [in]
CURVE_POINTS = 200  # points of a fitted curve on its log-spaced step grid
REACH = 3.0  # the fitted curve runs this factor beyond the extreme steps and the optimum
MIN_POINTS = 2  # a map needs at least this many members with a finite limit


def _positive(values) -> np.ndarray:
    array = clean(values)
    return np.where(array > 0, array, np.nan)


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
    if not isinstance(data, dict):
        return None
    x = clean(data.get("values"))
    stable = _positive(data.get("stable"))
    if x.shape != stable.shape or x.ndim != 1:
        return None
    keep = np.isfinite(x) & np.isfinite(stable)
    if keep.sum() < MIN_POINTS:
        return None
    monotone = data.get("monotone")
    mono = _positive(monotone) if monotone is not None else np.full_like(x, np.nan)
    if mono.shape != x.shape:
        mono = np.full_like(x, np.nan)
    mono_keep = np.isfinite(x) & np.isfinite(mono)
    name = str(data.get("parameter") or "the input")
    unit_p = str(data.get("unit") or "")
    sim = budget.get("simulation") or {}
    unit_t = (sim.get("step") or {}).get("unit", "")
    case_step = finite((sim.get("step") or {}).get("value"))
    rec = finite(((budget.get("verdict") or {}).get("recommended_step") or {}).get("value"))
    strictest = finite(((budget.get("stability") or {}).get("stable_step") or {}).get("value"))
    if strictest is None or strictest <= 0:
        return None  # budget.json records no limit: the bar chart's note says so
    low_x, high_x = np.nanpercentile(x[np.isfinite(x)], CENTRAL)
    order = np.argsort(x[keep])
    xs, ys = x[keep][order], stable[keep][order]
    shown = [v for v in (case_step, rec, strictest) if v and v > 0]
    shown += list(ys) + list(mono[mono_keep])
    y_low, y_high = min(shown) / 2.5, max(shown) * 3.0
    label_x = f"{name} [{unit_p}]" if unit_p else name
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(MAP_HEIGHT_IN)
        ax = axes[0, 0]
        ax.set_yscale("log")
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
        ax.plot(
            xs, ys, "o-", color=BLUE, markersize=2.8, linewidth=0.9, label="largest stable step"
        )
        if mono_keep.any():
            mo = np.argsort(x[mono_keep])
            ax.plot(
                x[mono_keep][mo],
                mono[mono_keep][mo],
                "s-",
                color=ORANGE,
                markersize=2.4,
                linewidth=0.9,
                label="largest step without oscillation",
            )
        for value, color, style, label in (
            (case_step, INK, "-", "case's step"),
            (rec, GREEN, ":", "recommended step"),
        ):
            if value and value > 0:
                ax.axhline(value, color=color, linestyle=style, linewidth=1.5)
                ax.text(
                    1.0,
                    value,
                    f" {label} {step_text(value, unit_t).text}",
                    transform=ax.get_yaxis_transform(),
                    va="center",
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
        ax.set_ylim(y_low, y_high)
        span = float(xs[-1] - xs[0]) or abs(float(xs[0])) or 1.0
        ax.set_xlim(float(xs[0]) - 0.04 * span, float(xs[-1]) + 0.04 * span)
        ax.set_xlabel(label_x)
        ax.set_ylabel(f"time step [{unit_t}]")
        ax.grid(color=GRID, linewidth=0.6)
        plain_ticks(ax, "y", (1.0, 2.0, 5.0))
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncols=2, fontsize=7)
        fig.tight_layout()
        alt = (
            f"Stability map: the largest stable step of {int(keep.sum())} ensemble members runs "
            f"from {plain(float(np.min(ys)))} to {plain(float(np.max(ys)))} {unit_t} as "
            f"{name} goes from {plain(float(xs[0]))} to {plain(float(xs[-1]))} {unit_p}; "
            f"strictest limit {step_text(strictest, unit_t).text}; case's step "
            f"{step_text(case_step, unit_t).text}; recommended step "
            f"{step_text(rec, unit_t, why='none').text}."
        )
        svg = to_svg(fig, key, alt)
    rho = finite(data.get("rho"))
    depends = f" (Spearman rank correlation {plain(rho, 2)})" if rho is not None else ""
    oscillation = (
        " Squares: each member's largest step without oscillation around the equilibrium."
        if mono_keep.any()
        else " No member has a finite no-oscillation limit with this scheme."
    )
    caption = (
        f"Each dot is one ensemble member: the largest step for which the scheme keeps the "
        f"model's stable equilibrium stable, against {name}, the input these limits depend "
        f"on most{depends}.{oscillation} Red: steps above the strictest member's limit, "
        f"unstable for at least one member. Blue band: the central 90 % of the ensemble's "
        f"{name}. How to read it: a step below every member's limit, that is below the red "
        "region, is stable for the whole ensemble; the case's step (solid line) and the "
        "recommended step (dotted line) should both sit there."
    )
    return Figure(key, title, caption, alt, svg)


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
    heights = [CURVE_PANEL_IN if c else BAR_PANEL_IN for c in curves]
    with matplotlib.rc_context(RC):
        fig, axes = new_figure(
            0.5 + sum(heights), len(quantities), 1, gridspec_kw={"height_ratios": heights}
        )
        alts = []
        for ax, q, cv in zip(axes[:, 0], quantities, curves, strict=True):
            unit = q.get("unit", "")
            ax.set_title(quantity_title(q), pad=8)
            if cv is None:
                _bars(ax, q)
                alts.append(f"{q.get('name')}: no fitted curve")
                continue
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
            plain_ticks(ax)
            alts.append(
                f"{q.get('name')}: {len(cv['steps'])} measured points; fitted total error "
                f"smallest at a step of {step_text(cv['optimum'], unit_t, why='none').text}; "
                f"round-off overtakes discretisation below "
                f"{step_text(cv['crossover'], unit_t, why='none').text}"
            )
        handles = {}
        for ax in axes[:, 0]:
            for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
                handles.setdefault(label, handle)
        fig.tight_layout(rect=(0, 0.55 / fig.get_figheight() + 0.02, 1, 1), h_pad=1.2)
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
    return Figure(key, title, caption, alt, svg)


def _bars(ax, q: dict) -> None:
    """Measured round-off, its bound and the discretisation error for one quantity."""
    unit = q.get("unit", "")
    r = q.get("roundoff") or {}
    disc = q.get("discretisation") or {}
    values = [r.get("error"), r.get("bound"), disc.get("error_percentile")]
    labels = ["measured (binary64)", "bound (u × steps × size)", "discretisation error"]
    zero = {0: "0 (no difference from the wider type)"} if finite(values[0]) == 0 else {}
    bar_panel(ax, labels, values, [PURPLE, SKY, VERMILLION], unit, zero, log=True)
    ax.set_xlabel(f"size [{unit}]")
