"""Combine the components, apply the verdict rule, search the coarsest adequate step.

Components are combined as independent standard uncertainties by root-sum-square (ASME V&V
20-2009, Standard for Verification and Validation in Computational Fluid Dynamics and Heat
Transfer, sec. 2). The verdict rule: for every quantity the numerical error (discretisation
at the stated ensemble percentile plus round-off) is at most ``fraction`` times the parameter
spread (standard deviation), and no artefact flag is raised.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np

from errbudget.case.load import Case
from errbudget.estimates.roundoff import UNIT_ROUNDOFF
from errbudget.solve.ensemble import n_steps_for
from errbudget.version import package_version

SCHEMA = "errbudget.budget/1"
REFERENCE_NOTE = "Richardson-extrapolated values from the two finest ladder levels"
ARTEFACT_CODES = ("negative", "overshoot", "oscillation", "divergence")
# Multiples of the case's time unit a person would choose as a step, coarsest first.
STEP_MULTIPLES = (28, 14, 10, 7, 5, 3.5, 2, 1) + tuple(2.0**-k for k in range(1, 11))
MIN_STEPS_IN_HORIZON = 4  # a candidate step must fit at least this many times in the horizon
REFERENCE_MARGIN = 2  # candidates stay this many times coarser than the finest ladder level


def candidate_steps(case: Case, finest: float) -> list[float]:
    """Steps to try, coarsest first: round multiples of the time unit and the case's step."""
    steps = {float(m) for m in STEP_MULTIPLES} | {case.step}
    keep = [
        s
        for s in steps
        if REFERENCE_MARGIN * finest <= s * (1 + 1e-12)
        and s * MIN_STEPS_IN_HORIZON <= case.horizon * (1 + 1e-12)
    ]
    return sorted(keep, reverse=True)


def judge_step(case: Case, result: dict, reference, step: float, spreads, scale: float) -> dict:
    """Apply the verdict rule to the ensemble's values at ``step`` against the reference.

    ``result`` comes from :func:`errbudget.budget.passes.candidate_pass`; ``scale`` is the largest
    |N| of the reference level, for the round-off bound n u |N| [population].
    """
    from errbudget.budget.run import discretisation_errors

    errors = discretisation_errors(case, result["values"], reference)
    n_steps = n_steps_for(case.horizon, step)
    ratios = []
    for q, spec in enumerate(case.quantities):
        if not np.isfinite(errors[q]).all():
            ratios.append(math.inf)
            continue
        pct = float(np.percentile(errors[q], case.budget.percentile))
        size = float(np.nanmax(np.abs(reference[q]))) if spec.kind == "time-to" else scale
        numerical = pct + n_steps * UNIT_ROUNDOFF[np.float64] * size
        sd = spreads[q]["sd"] or 0.0
        ratios.append(numerical / sd if sd > 0 else (0.0 if numerical == 0 else math.inf))
    present = [code for code in ARTEFACT_CODES if code in result["artefacts"]]
    worst = max(ratios)
    return {
        "step": step,
        "ratios": ratios,
        "worst_ratio": worst,
        "artefacts": present,
        "adequate": worst <= case.budget.fraction and not present,
        "member_steps": result["member_steps"],
        "seconds": result["seconds"],
    }


def steps_to_try(case: Case, finest: float, limits) -> tuple[list[float], float]:
    """Candidates (coarsest first) and their halves, and the ensemble's stability limit."""
    stable = limits["stable"]
    stable_limit = float(np.min(stable)) if np.isfinite(stable).any() else math.inf
    candidates = [s for s in candidate_steps(case, finest) if s < stable_limit]
    wanted = sorted({*candidates, *(s / 2 for s in candidates)}, reverse=True)
    return wanted, stable_limit


def recommend(
    case: Case, evaluated: dict, reference, *, finest: float, spreads, limits, scale: float
) -> dict:
    """The coarsest candidate step that meets the rule, checked again at half of it.

    ``evaluated`` maps every step of :func:`steps_to_try` to its ensemble results.
    """
    _, stable_limit = steps_to_try(case, finest, limits)
    tried = []
    for step in candidate_steps(case, finest):
        if step >= stable_limit:
            tried.append(
                {
                    "step": step,
                    "adequate": False,
                    "worst_ratio": None,
                    "artefacts": [],
                    "note": "beyond the stability limit",
                }
            )
            continue
        result = judge_step(case, evaluated[step], reference, step, spreads, scale)
        tried.append(result)
        if result["adequate"]:
            half = judge_step(case, evaluated[step / 2], reference, step / 2, spreads, scale)
            if half["adequate"]:
                return {"step": step, "half_check": half, "tried": tried, "reason": None}
    reason = (
        _why_none(case, tried, spreads, reference, scale)
        if tried
        else ("the horizon is too short for any candidate step; lengthen it or give a finer step")
    )
    return {"step": None, "half_check": None, "tried": tried, "reason": reason}


def _why_none(case: Case, tried: list[dict], spreads, reference, scale: float) -> str:
    """Why no candidate qualifies, and what would change that."""
    finest = tried[-1]["step"]
    finest_text = with_unit(f"{finest:g}", finest, case.time_unit)
    start = f"no candidate step down to {finest_text} meets the rule"
    for q, spec in enumerate(case.quantities):
        sd = spreads[q]["sd"] or 0.0
        if sd <= 0:
            return (
                f'{start}: "{spec.name}" has no parameter spread, so it leaves no allowance '
                "for numerical error; make an input it depends on uncertain, or drop it "
                "from the budget"
            )
        n_steps = n_steps_for(case.horizon, finest)
        size = float(np.nanmax(np.abs(reference[q]))) if spec.kind == "time-to" else scale
        if n_steps * UNIT_ROUNDOFF[np.float64] * size > case.budget.fraction * sd:
            return (
                f'{start}: round-off would dominate "{spec.name}" before the '
                "discretisation error is small enough; raise [budget] fraction or accept "
                "a wider allowance"
            )
    judged = [t for t in tried if t.get("worst_ratio") is not None]
    if judged and all(t["artefacts"] for t in judged):
        return (
            f"{start}: every candidate shows artefacts ("
            f"{', '.join(sorted({a for t in judged for a in t['artefacts']}))}); check the "
            "law and its parameters"
        )
    return (
        f"{start}: the adequate step is finer than the reference levels reach; raise "
        "[budget] memory_limit, shorten the horizon, or raise [budget] fraction"
    )


def plain_step(step: float) -> str:
    """1.75 -> '1.75', 3.5 -> '3.5', 0.4375 -> '7/16' (readable step values for sentences)."""
    if float(step).is_integer():
        return str(int(step))
    if abs(round(step, 3) - step) < 1e-12:
        return f"{round(step, 3):g}"
    fraction = Fraction(step).limit_denominator(4096)
    if abs(float(fraction) - step) < 1e-12 and fraction.denominator <= 64:
        return f"{fraction.numerator}/{fraction.denominator}"
    return f"{step:.4g}"


TIME_WORDS = ("second", "minute", "hour", "day", "week", "month", "year")


def with_unit(text: str, value: float, unit: str) -> str:
    """'7' and 'day' -> '7 days' in sentences (time words only; counts keep their name)."""
    plural = unit in TIME_WORDS and value > 1
    return f"{text} {unit}s" if plural else f"{text} {unit}"


def clean(value):
    """Plain JSON types; NaN and infinity become None."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return [clean(v) for v in value.tolist()]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        value = float(value)
        return value if math.isfinite(value) else None
    return value


def _difference(a, b) -> float | None:
    """|a - b|, or None when either is not finite (a diverged run)."""
    a, b = float(a), float(b)
    return abs(a - b) if math.isfinite(a) and math.isfinite(b) else None


def _number(value) -> float | None:
    value = float(value) if value is not None else math.nan
    return value if math.isfinite(value) else None


def assemble(
    case: Case,
    *,
    scheme,
    steps_info,
    case_values,
    reference,
    errors,
    spreads,
    indices,
    drivers,
    rounding,
    limits,
    flags,
    recommendation,
    fit,
    design_rows,
    n_base,
    seed,
    elapsed,
    series,
) -> dict:
    """budget.json as a dict (the contract of DESIGN.md §3)."""
    ladder_steps = steps_info["steps"]
    quantities = []
    for q, spec in enumerate(case.quantities):
        unit = case.quantity_unit(spec)
        column = steps_info["values"][:, q]
        finest_gci = steps_info["convergence"][q]
        case_gci = steps_info["case_level"][q]
        finite = errors[q][np.isfinite(errors[q])]
        all_finite = finite.size == errors[q].size
        pct = float(np.percentile(finite, case.budget.percentile)) if finite.size else None
        pct = pct if all_finite else None
        nominal_value = float(column[0])
        reference_nominal = _richardson_nominal(column, scheme.order)
        richardson_case = (
            abs(nominal_value - reference_nominal)
            if reference_nominal is not None and math.isfinite(nominal_value)
            else None
        )
        round_error = _number(rounding["measured"][q])
        numerical = None if pct is None else pct + (round_error or 0.0)
        sd = spreads[q]["sd"]
        ratio = numerical / sd if numerical is not None and sd else None
        gci_case = _case_gci(case_gci, column, scheme.order)
        quantities.append(
            {
                "name": spec.name,
                "kind": spec.kind,
                "at": None if spec.at is None else {"value": spec.at, "unit": case.time_unit},
                "level": None
                if spec.level is None
                else {"value": spec.level, "unit": case.population_unit},
                "unit": unit,
                "value": _number(nominal_value),
                "reference": reference_nominal,
                "off_grid": bool(steps_info["off_grid"][q]),
                "discretisation": {
                    "error": richardson_case,
                    "error_percentile": pct,
                    "percentile": case.budget.percentile,
                    "gci": gci_case,
                    "observed_order": finest_gci.observed_order if finest_gci else None,
                    "formal_order": scheme.order,
                    "behaviour": finest_gci.behaviour if finest_gci else "divergent",
                    "asymptotic": bool(steps_info["settled"][q]),
                    "driver": drivers[q],
                    "ladder": [
                        {"step": s, "value": _number(v)}
                        for s, v in zip(ladder_steps, column, strict=True)
                    ],
                    "finest_levels": finest_gci.to_dict() if finest_gci else None,
                },
                "roundoff": {
                    "error": round_error,
                    "bound": _number(rounding["bound"][q]),
                    "float32_difference": _difference(
                        rounding["float32"][q], rounding["float64"][q]
                    ),
                    "method": rounding["method"],
                    **_curve_block(rounding, q, scheme.order, unit, case.time_unit),
                },
                "parameter": {
                    "sd": sd,
                    "mean": spreads[q]["mean"],
                    "low": spreads[q]["low"],
                    "high": spreads[q]["high"],
                    "level": case.budget.level,
                    "indices": {k: v for k, v in indices[q].items() if not k.startswith("_")},
                    "indices_converged": indices[q].get("_convergence", {}).get("agree"),
                    "computed_on": REFERENCE_NOTE,
                },
                "numerical_to_parameter": ratio,
                "allowance": case.budget.fraction * sd if sd else None,
                "combined": _rss(numerical, sd),
                "shares": _shares(pct, round_error, sd),
                "adequate": bool(ratio is not None and ratio <= case.budget.fraction),
            }
        )
    artefact_flags = [f for f in flags if f["code"] in ARTEFACT_CODES]
    verdict = _verdict(case, quantities, artefact_flags, recommendation)
    for item in quantities:
        if item["value"] is None:
            flags.append(
                {
                    "code": "undefined-quantity",
                    "message": (
                        f'"{item["name"]}" has no value at nominal parameters '
                        "(the level is never reached within the horizon, or the run diverged)"
                    ),
                }
            )
    if any(steps_info["off_grid"]):
        flags.append(
            {
                "code": "off-grid",
                "message": (
                    "a requested time falls between grid points; values there are read from the "
                    "cubic Hermite interpolant of the step's end values"
                ),
            }
        )
    stable = limits["stable"]
    monotone = limits["monotone"]
    data = {
        "schema": SCHEMA,
        "case": {"title": case.title, "path": str(case.path), "sha256": case.sha256},
        "simulation": {
            "scheme": case.scheme,
            "scheme_label": scheme.label,
            "formal_order": scheme.order,
            "step": {"value": case.step, "unit": case.time_unit},
            "horizon": {"value": case.horizon, "unit": case.time_unit},
            "law": case.model.equation,
            "population_unit": case.population_unit,
        },
        "quantities": quantities,
        "verdict": verdict,
        "flags": flags,
        "fit": fit.to_dict() if fit is not None and hasattr(fit, "to_dict") else None,
        "since_last": None,
        "validation": None,
        "stability": {
            "equilibrium": limits["equilibrium"] or None,
            "stable_step": {
                "value": _number(np.min(stable)) if stable.size else None,
                "unit": case.time_unit,
            },
            "stable_step_nominal": {
                "value": _number(stable[0]) if stable.size else None,
                "unit": case.time_unit,
            },
            "monotone_step": {
                "value": _number(np.min(monotone)) if monotone.size else None,
                "unit": case.time_unit,
            },
            "note": "smallest over the parameter ensemble (the strictest member)",
        },
        "trajectory_error": {
            "largest_p95": series.get("worst_error"),
            "at": {"value": series.get("worst_time"), "unit": case.time_unit},
            "unit": case.population_unit,
        },
        "recommendation": {
            "tried": [
                {
                    "step": {"value": t["step"], "unit": case.time_unit},
                    "adequate": t["adequate"],
                    "worst_ratio": t.get("worst_ratio"),
                    "artefacts": t.get("artefacts", []),
                    "note": t.get("note"),
                }
                for t in recommendation["tried"]
            ],
            "half_step_check": None
            if recommendation["half_check"] is None
            else {
                "step": {"value": recommendation["half_check"]["step"], "unit": case.time_unit},
                "adequate": recommendation["half_check"]["adequate"],
                "worst_ratio": recommendation["half_check"]["worst_ratio"],
            },
        },
        "run": {
            "package": "errbudget",
            "version": package_version(),
            "samples": n_base,
            "seed": seed,
            "parameter_sets": design_rows,
            "ladder": [{"value": s, "unit": case.time_unit} for s in ladder_steps],
            "ladder_capped": bool(steps_info["capped"]),
            "roundoff_method": rounding["method"],
            "elapsed_seconds": elapsed,
            "cost": _cost(case, recommendation),
        },
    }
    return clean(data)


def _cost(case: Case, recommendation: dict) -> dict | None:
    """Throughput measured during the step search, and one run's time at each step."""
    timed = [t for t in recommendation["tried"] if t.get("seconds")]
    if not timed:
        return None
    throughput = sum(t["member_steps"] for t in timed) / sum(t["seconds"] for t in timed)
    members = timed[0]["member_steps"] / n_steps_for(case.horizon, timed[0]["step"])
    rec = recommendation["step"]

    def seconds_per_run(step):
        return n_steps_for(case.horizon, step) / throughput

    return {
        "member_steps_per_second": throughput,
        "runs_per_second_at_case_step": throughput / n_steps_for(case.horizon, case.step),
        "runs_per_second_at_recommended_step": None
        if rec is None
        else throughput / n_steps_for(case.horizon, rec),
        "steps_per_run": {
            "case": n_steps_for(case.horizon, case.step),
            "recommended": None if rec is None else n_steps_for(case.horizon, rec),
        },
        "ensemble_seconds_at_case_step": seconds_per_run(case.step) * members,
        "ensemble_seconds_at_recommended_step": None
        if rec is None
        else seconds_per_run(rec) * members,
        "note": "one run = one parameter set over the horizon, measured in this run's step search",
    }


def _curve_block(rounding, q: int, order: int, unit: str, time_unit: str) -> dict:
    """The fitted binary64 curve E(h) = C h^p + D u / h of quantity ``q``, with units."""
    fitted = rounding.get("curve")
    if fitted is None:
        return {"curve": None, "statement": None}
    part = fitted["quantities"][q]
    return {
        "curve": {
            "C": {"value": _number(part["C"]), "unit": f"{unit} / {time_unit}^{order}"},
            "D": {"value": _number(part["D"]), "unit": f"{unit} * {time_unit}"},
            "D_is_bound": part["D_is_bound"],
            "p": order,
            "unit_roundoff": fitted["unit_roundoff"],
            "optimum_step": {"value": _number(part["optimum_step"]), "unit": time_unit},
            "crossover_step": {"value": _number(part["crossover_step"]), "unit": time_unit},
            "steps": {"values": fitted["steps"], "unit": time_unit},
            "errors": {"values": part["errors"], "unit": unit},
        },
        "statement": part["statement"],
    }


def _richardson_nominal(column: np.ndarray, order: int) -> float | None:
    """Extrapolated value from the two finest ladder levels at nominal parameters."""
    fine, coarse = column[-1], column[-2]
    if not (math.isfinite(fine) and math.isfinite(coarse)):
        return None
    return float(fine + (fine - coarse) / (2.0**order - 1))


def _case_gci(result, column, formal: int) -> float | None:
    """Roache's GCI of the case's (coarse) level from the triplet h, h/2, h/4 [unit].

    GCI_coarse = Fs |phi_h - phi_{h/2}| r^p / (r^p - 1) (Roache 1998, Verification and
    Validation in Computational Science and Engineering, Hermosa, ch. 5). With a trusted
    observed order p is that order and Fs 1.25; otherwise p is the formal order and Fs 3
    (the factor ``grid_convergence`` chose).
    """
    if result is None or result.behaviour == "divergent":
        return None
    if result.behaviour == "exact":
        return 0.0
    trusted = result.order_trusted and result.observed_order is not None
    order = result.observed_order if trusted else formal
    r_p = 2.0**order
    return float(result.safety_factor * abs(column[0] - column[1]) * r_p / (r_p - 1))


def _rss(numerical, sd) -> float | None:
    if numerical is None or sd is None:
        return None
    return math.sqrt(numerical**2 + sd**2)


def _shares(disc, rounding, sd) -> dict | None:
    """Each component's share of the combined variance (ASME V&V 20 root-sum-square)."""
    parts = {"discretisation": disc, "roundoff": rounding or 0.0, "parameter": sd}
    if any(v is None for v in parts.values()):
        return None
    total = sum(v * v for v in parts.values())
    return {k: (v * v / total if total > 0 else 0.0) for k, v in parts.items()}


def _verdict(
    case: Case, quantities: list[dict], artefact_flags: list[dict], recommendation: dict
) -> dict:
    fraction = case.budget.fraction
    ratios = [(q["numerical_to_parameter"], q) for q in quantities]
    undefined = [q for r, q in ratios if r is None]
    binding = max(
        (pair for pair in ratios if pair[0] is not None), key=lambda p: p[0], default=(None, None)
    )[1]
    adequate = not undefined and not artefact_flags and all(r <= fraction for r, _ in ratios)
    step_text = with_unit(plain_step(case.step), case.step, case.time_unit)
    rec = recommendation["step"]
    rec_text = (
        f"The coarsest adequate step is {with_unit(plain_step(rec), rec, case.time_unit)}."
        if rec is not None
        else f"No candidate step qualifies: {recommendation['reason']}."
    )
    if undefined:
        q = undefined[0]
        first = (
            f'At {step_text}, the numerical error of "{q["name"]}" cannot be set against '
            "its parameter spread (the error or the spread is undefined or zero): the "
            "step cannot be judged adequate."
        )
    elif binding is not None:
        numerical = binding["numerical_to_parameter"] * binding["parameter"]["sd"]
        times = binding["numerical_to_parameter"] / fraction
        verdict_text = (
            "the step is adequate"
            if adequate
            else (
                "the step is too coarse" if times > 1 else "but artefacts make the step inadequate"
            )
        )
        first = (
            f'At {step_text}, the numerical error of "{binding["name"]}" is '
            f"{with_unit(f'{numerical:.3g}', numerical, binding['unit'])}, {times:.2g} times the "
            f"{fraction:.0%} allowance of its parameter spread: {verdict_text}."
        )
    else:
        first = f"At {step_text}, no quantity could be evaluated."
    if artefact_flags:
        first += " Artefacts at this step: " + ", ".join(f["code"] for f in artefact_flags) + "."
    return {
        "adequate": bool(adequate),
        "fraction": fraction,
        "recommended_step": {"value": rec, "unit": case.time_unit},
        "binding_quantity": binding["name"] if binding else None,
        "ratio": binding["numerical_to_parameter"] if binding else None,
        "reason": f"{first} {rec_text}",
    }
