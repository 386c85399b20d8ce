"""The one builder of budget.json (the contract of DESIGN.md section 3).

Everything the run measured arrives in an :class:`Evidence`; :func:`budget_json` lays it out
and cleans it once at the end (plain JSON types, NaN and infinity as null), so nothing is
added to the dict after it has been cleaned.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from errbudget.budget import combine
from errbudget.budget.search import Judged, Recommendation
from errbudget.case.load import Case
from errbudget.case.units import product_unit
from errbudget.estimates.ladder import RATIO, Ladder
from errbudget.estimates.richardson import richardson
from errbudget.solve.ensemble import n_steps_for
from errbudget.solve.tableaux import Scheme
from errbudget.version import package_version

SCHEMA = "errbudget.budget/1"
REFERENCE_NOTE = (
    "Richardson-extrapolated values from the two reference levels (the ladder's finest, or "
    "finer where the adequate step needs them)"
)


@dataclass(frozen=True)
class Evidence:
    """What a run measured, per quantity q and ensemble member s.

    Attributes
    ----------
    ladder : Ladder -- the nominal refinement ladder
    errors : ndarray (Q, S) -- discretisation error of the case's step per member
    spreads : list of dict -- per quantity, the forecast spread (errbudget.uncertainty)
    indices : list of dict -- per quantity, the Sobol indices
    drivers : list of dict or None -- per quantity, the input driving the error most
    rounding : dict -- errbudget.estimates.roundoff.measure
    limits : dict -- errbudget.estimates.stability.step_limits (with the nominal limit)
    recommendation : Recommendation
    series : dict -- the report's series (trajectory error along the run)
    allowances : list of float -- per quantity, the error it may carry (budget.allowance)
    collapsed : list of bool -- per quantity, the forecast lies below the resolution
    resolution : float -- the population resolution [population unit]
    cleared : dict or None -- the share of the ensemble the accurate solution clears
    nominal_reference : ndarray (Q,) or None -- Richardson extrapolation at nominal values
        from the two reference levels of the ensemble (the ladder's finest two when None)
    """

    ladder: Ladder
    errors: np.ndarray
    spreads: list
    indices: list
    drivers: list
    rounding: dict
    limits: dict
    recommendation: Recommendation
    series: dict
    allowances: list
    collapsed: list
    resolution: float
    cleared: dict | None = None
    nominal_reference: np.ndarray | None = None


@dataclass(frozen=True)
class RunFacts:
    """How the run was made: design size, seed, reference steps, clock readings."""

    samples: int
    seed: int
    parameter_sets: int
    reference_steps: tuple[float, float]
    elapsed: float
    stages: dict = field(default_factory=dict)
    work: dict = field(default_factory=dict)
    prediction: dict = field(default_factory=dict)


def budget_json(case: Case, scheme: Scheme, evidence: Evidence, flags: list[dict], *, fit,
                run: RunFacts, better_data=None, validation=None) -> dict:  # fmt: skip
    """budget.json as a dict, cleaned (plain types, no NaN or infinity)."""
    quantities = [_quantity(case, scheme, evidence, q) for q in range(len(case.quantities))]
    artefact_flags = [f for f in flags if f["code"] in combine.ARTEFACT_CODES]
    verdict = combine.verdict(case, quantities, artefact_flags, evidence.recommendation)
    flags = flags + _quantity_flags(quantities, evidence.ladder)
    if validation is not None and validation.get("flag") is not None:
        flags.append(validation["flag"])
    data = {
        "schema": SCHEMA,
        "case": {"title": case.title, "path": str(case.path), "sha256": case.sha256},
        "simulation": {
            "scheme": case.scheme,
            "scheme_label": scheme.label,
            "formal_order": scheme.order,
            "step": {"value": case.step, "unit": case.time_unit},
            "horizon": {
                "value": case.horizon,
                "unit": case.time_unit,
                "date": case.calendar.date(case.horizon),
            },
            "start": case.calendar.start,
            "days_per_time_unit": case.calendar.days_per_unit,
            "law": case.model.equation,
            "population_unit": case.population_unit,
        },
        "quantities": quantities,
        "verdict": verdict,
        "clearance": evidence.cleared,
        "flags": flags,
        "fit": fit.to_dict() if fit is not None else None,
        "since_last": None,
        "validation": _dated_validation(case, validation),
        "stability": _stability(case, evidence.limits),
        "trajectory_error": {
            "largest_p95": evidence.series.get("worst_error"),
            "at": {"value": evidence.series.get("worst_time"), "unit": case.time_unit},
            "unit": case.population_unit,
        },
        "recommendation": _recommendation(case, evidence.recommendation),
        "run": _run(case, evidence, run),
        "better_data": better_data,
    }
    return clean(data)


def _quantity(case: Case, scheme: Scheme, evidence: Evidence, q: int) -> dict:
    """One quantity's block: value, reference, the three components and the ratio."""
    spec = case.quantities[q]
    unit = case.quantity_unit(spec)
    ladder = evidence.ladder
    column = ladder.values[:, q]
    errors = evidence.errors[q]
    pct = None
    if np.isfinite(errors).all() and errors.size:
        pct = float(np.percentile(errors, case.budget.percentile))
    nominal = float(column[0])
    if evidence.nominal_reference is not None:
        reference = number(evidence.nominal_reference[q])
    else:
        reference = _nominal_reference(column, scheme.order)
    richardson_case = (
        abs(nominal - reference) if reference is not None and math.isfinite(nominal) else None
    )
    rounding = evidence.rounding
    round_error = number(rounding["measured"][q])
    numerical = None if pct is None else pct + (round_error or 0.0)
    spread = evidence.spreads[q]
    sd = spread["sd"]
    ratio = numerical / sd if numerical is not None and sd else None
    allowed = evidence.allowances[q]
    times = None
    if numerical is not None and allowed > 0:
        times = numerical / allowed
    elif numerical == 0:
        times = 0.0
    return {
        "name": spec.name,
        "kind": spec.kind,
        "at": None
        if spec.at is None
        else {"value": spec.at, "unit": case.time_unit, "date": case.calendar.date(spec.at)},
        "level": None
        if spec.level is None
        else {"value": spec.level, "unit": case.population_unit},
        "unit": unit,
        "value": number(nominal),
        "reference": reference,
        "off_grid": bool(ladder.off_grid[q]),
        "discretisation": _discretisation(case, scheme, evidence, q, richardson_case, pct),
        "roundoff": _roundoff(case, scheme, evidence.rounding, q, round_error),
        "parameter": _parameter(case, spread, evidence.indices[q]),
        "numerical_to_parameter": ratio,
        "allowance": allowed if allowed > 0 else None,
        "numerical_to_allowance": times,
        "resolution": {"value": evidence.resolution, "unit": unit}
        if spec.kind != "time-to"
        else None,
        "collapsed": bool(evidence.collapsed[q]),
        "combined": combine.root_sum_square(numerical, sd),
        "shares": combine.shares(pct, round_error, sd),
        "adequate": bool(times is not None and times <= 1.0),
        "recommended_step": _quantity_step(case, evidence.recommendation, q),
        "dates": _dates(case, spec.kind, nominal, reference, spread),
    }


def _discretisation(case, scheme, evidence: Evidence, q: int, error, pct) -> dict:
    """The discretisation block: case-level error, ensemble percentile, GCI and ladder."""
    ladder = evidence.ladder
    column = ladder.values[:, q]
    finest = ladder.convergence[q]
    return {
        "error": error,
        "error_percentile": pct,
        "percentile": case.budget.percentile,
        "gci": _case_gci(ladder.case_level[q], column, scheme.order),
        "observed_order": finest.observed_order if finest else None,
        "formal_order": scheme.order,
        "behaviour": finest.behaviour if finest else "divergent",
        "asymptotic": bool(ladder.settled[q]),
        "driver": evidence.drivers[q],
        "ladder": [
            {"step": s, "value": number(v)} for s, v in zip(ladder.steps, column, strict=True)
        ],
        "finest_levels": finest.to_dict() if finest else None,
    }


def _roundoff(case, scheme, rounding: dict, q: int, error) -> dict:
    """The round-off block: measured error, bound, single-precision difference, curve."""
    unit = case.quantity_unit(case.quantities[q])
    return {
        "error": error,
        "bound": number(rounding["bound"][q]),
        "float32_difference": _difference(rounding["float32"][q], rounding["float64"][q]),
        "method": rounding["method"],
        **_curve_block(rounding, q, scheme.order, unit, case.time_unit),
    }


def _parameter(case, spread: dict, indices: dict) -> dict:
    """The parameter block: spread of the forecast and its Sobol indices."""
    return {
        "sd": spread["sd"],
        "mean": spread["mean"],
        "low": spread["low"],
        "high": spread["high"],
        "level": case.budget.level,
        "indices": {k: v for k, v in indices.items() if not k.startswith("_")},
        "indices_converged": indices.get("_convergence", {}).get("agree"),
        "computed_on": REFERENCE_NOTE,
    }


def _quantity_step(case: Case, recommendation: Recommendation, q: int) -> dict:
    """The coarsest step tried from which on (every finer step tried too) quantity ``q`` alone
    is within its allowance without artefacts; the verdict's step is the finest of these."""
    judged = [t for t in recommendation.tried if t.ratios and t.note is None]
    if recommendation.half_check is not None and recommendation.half_check.ratios:
        judged.append(recommendation.half_check)
    best = None
    for t in sorted(judged, key=lambda t: t.step):  # finest first
        if t.artefacts or not (t.ratios[q] <= 1.0):
            break
        best = t.step
    return {"value": best, "unit": case.time_unit}


def _dates(case: Case, kind: str, nominal, reference, spread: dict) -> dict | None:
    """For a time-to quantity of a case with a start date: the dates its times fall on."""
    if kind != "time-to" or case.calendar.start is None:
        return None
    times = {"value": nominal, "reference": reference, "low": spread["low"], "high": spread["high"]}
    return {key: case.calendar.date(number(t)) for key, t in times.items()}


def _dated_validation(case: Case, validation: dict | None) -> dict | None:
    """The validation block, with the date of each count time when the case has a start."""
    if validation is None or case.calendar.start is None or "times" not in validation:
        return validation
    return {**validation, "dates": [case.calendar.date(t) for t in validation["times"]]}


def _quantity_flags(quantities: list[dict], ladder: Ladder) -> list[dict]:
    """Flags about the quantities themselves: collapsed, undefined at nominal values, read off
    the grid."""
    flags = [
        {
            "code": "collapsed",
            "message": (
                f'"{item["name"]}" has collapsed: its forecast lies below the resolution of '
                f"{item['resolution']['value']:.3g} {item['unit']} in nearly the whole "
                "ensemble, so its numerical error is judged against that resolution, not "
                "against its (vanishing) spread"
            ),
        }
        for item in quantities
        if item["collapsed"]
    ]
    flags += [
        {
            "code": "undefined-quantity",
            "message": (
                f'"{item["name"]}" has no value at nominal parameters '
                "(the level is never reached within the horizon, or the run diverged)"
            ),
        }
        for item in quantities
        if item["value"] is None
    ]
    if any(ladder.off_grid):
        flags.append(
            {
                "code": "off-grid",
                "message": (
                    "a requested time falls between grid points; values there are read from the "
                    "cubic Hermite interpolant of the step's end values"
                ),
            }
        )
    return flags


def _stability(case: Case, limits: dict) -> dict:
    """Step limits from linear stability at the stable equilibria."""
    stable, monotone = limits["stable"], limits["monotone"]
    return {
        "equilibrium": limits["equilibrium"] or None,
        "stable_step": {
            "value": number(np.min(stable)) if stable.size else None,
            "unit": case.time_unit,
        },
        "stable_step_nominal": {
            "value": number(limits["stable_nominal"]),
            "unit": case.time_unit,
        },
        "monotone_step": {
            "value": number(np.min(monotone)) if monotone.size else None,
            "unit": case.time_unit,
        },
        "note": "smallest over the parameter ensemble (the strictest member)",
    }


def _recommendation(case: Case, recommendation: Recommendation) -> dict:
    """Every candidate tried, and the check at half the recommended step."""
    half = recommendation.half_check
    return {
        "tried": [
            {
                "step": {"value": t.step, "unit": case.time_unit},
                "adequate": t.adequate,
                "worst_ratio": t.worst_ratio,
                "ratios": _ratios(case, t),
                "artefacts": t.artefacts,
                "note": t.note,
            }
            for t in recommendation.tried
        ],
        "half_step_check": None
        if half is None
        else {
            "step": {"value": half.step, "unit": case.time_unit},
            "adequate": half.adequate,
            "worst_ratio": half.worst_ratio,
        },
    }


def _ratios(case: Case, judged: Judged) -> dict | None:
    """Per quantity name, the numerical error at this step in units of its allowance."""
    if not judged.ratios:
        return None
    return {spec.name: number(r) for spec, r in zip(case.quantities, judged.ratios, strict=True)}


def _run(case: Case, evidence: Evidence, run: RunFacts) -> dict:
    """How the run was made, with its clock readings (the only part that varies run to run)."""
    finer, finest = run.reference_steps
    return {
        "package": "errbudget",
        "version": package_version(),
        "samples": run.samples,
        "seed": run.seed,
        "parameter_sets": run.parameter_sets,
        "ladder": [{"value": s, "unit": case.time_unit} for s in evidence.ladder.steps],
        "ladder_capped": bool(evidence.ladder.capped),
        "roundoff_method": evidence.rounding["method"],
        "elapsed_seconds": run.elapsed,
        "cost": _cost(case, evidence.recommendation),
        "reference_steps": [
            {"value": finer, "unit": case.time_unit},
            {"value": finest, "unit": case.time_unit},
        ],
        "stages": run.stages,
        "work": run.work,
        "prediction": run.prediction,
    }


def _cost(case: Case, recommendation: Recommendation) -> dict | None:
    """Throughput measured during the step search, and one run's time at each step."""
    timed: list[Judged] = [t for t in recommendation.tried if t.seconds]
    if not timed:
        return None
    throughput = sum(t.member_steps for t in timed) / sum(t.seconds for t in timed)
    members = timed[0].member_steps / n_steps_for(case.horizon, timed[0].step)
    rec = recommendation.step

    def per_run(step):
        return n_steps_for(case.horizon, step) / throughput

    return {
        "member_steps_per_second": throughput,
        "runs_per_second_at_case_step": 1 / per_run(case.step),
        "runs_per_second_at_recommended_step": None if rec is None else 1 / per_run(rec),
        "steps_per_run": {
            "case": n_steps_for(case.horizon, case.step),
            "recommended": None if rec is None else n_steps_for(case.horizon, rec),
        },
        "ensemble_seconds_at_case_step": per_run(case.step) * members,
        "ensemble_seconds_at_recommended_step": None if rec is None else per_run(rec) * members,
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
            "C": {"value": number(part["C"]), "unit": product_unit(unit, time_unit, -order)},
            "D": {"value": number(part["D"]), "unit": product_unit(unit, time_unit, 1)},
            "D_is_bound": part["D_is_bound"],
            "p": order,
            "unit_roundoff": fitted["unit_roundoff"],
            "optimum_step": {"value": number(part["optimum_step"]), "unit": time_unit},
            "crossover_step": {"value": number(part["crossover_step"]), "unit": time_unit},
            "steps": {"values": fitted["steps"], "unit": time_unit},
            "errors": {"values": part["errors"], "unit": unit},
        },
        "statement": part["statement"],
    }


def _nominal_reference(column: np.ndarray, order: int) -> float | None:
    """Richardson extrapolation of the two finest ladder levels at nominal parameters."""
    fine, coarse = column[-1], column[-2]
    if not (math.isfinite(fine) and math.isfinite(coarse)):
        return None
    return float(richardson(fine, coarse, RATIO, order))


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
    r_p = float(RATIO) ** order
    return float(result.safety_factor * abs(column[0] - column[1]) * r_p / (r_p - 1))


def _difference(a, b) -> float | None:
    """|a - b|, or None when either is not finite (a diverged run)."""
    a, b = float(a), float(b)
    return abs(a - b) if math.isfinite(a) and math.isfinite(b) else None


def number(value) -> float | None:
    """A finite float, or None."""
    value = float(value) if value is not None else math.nan
    return value if math.isfinite(value) else None


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
