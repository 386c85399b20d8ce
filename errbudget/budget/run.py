"""One run of a case: (fit) -> ensemble -> ladder -> estimates -> budget.

Data flow one way; nothing here reads or writes files except through ``fit_from_counts``
(which reads the counts file named by the case). The CLI writes the outputs.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import stats

from errbudget.budget import passes as sweep
from errbudget.budget.build import STEP_MULTIPLES, assemble, recommend, steps_to_try
from errbudget.case.load import Case
from errbudget.errors import InputError
from errbudget.estimates import artefacts, ladder, roundoff, stability
from errbudget.solve.ensemble import ensemble_params, n_steps_for, nominal_params, solve
from errbudget.solve.tableaux import get_scheme
from errbudget.uncertainty.spread import sample_design, sobol_indices, spread_summary

NOMINAL_POINTS = 2000  # most points of the accurate nominal run kept for the report
BAND_PERCENTILES = (5.0, 50.0, 95.0)
REFERENCE_DEPTH = 8  # reference step = predicted adequate step / this (candidate, half, margin)


@dataclass
class Budget:
    """The result of a run: ``to_dict()`` is budget.json; ``series`` feeds the report's plots."""

    data: dict
    series: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.data

    @property
    def adequate(self) -> bool:
        return bool(self.data["verdict"]["adequate"])


def estimate_memory_mb(case: Case, rows: int, finest_step: float) -> float:
    """Peak memory of the ensemble runs [MB]: one chunk of trajectories and per-member results."""
    levels = 2 * len(STEP_MULTIPLES) + 3
    return sweep.memory_mb(case, rows, finest_step, len(case.quantities), levels)


def run_case(
    case: Case,
    *,
    samples: int | None = None,
    seed: int | None = None,
    progress: Callable[[str], None] | None = None,
    fit=None,
) -> Budget:
    """Compute the error budget of a case.

    Parameters
    ----------
    case : Case
        From :func:`errbudget.load_case`.
    samples : int, optional
        Base sample size of the Sobol design (overrides ``[budget] samples``).
    seed : int, optional
        Seed of the design (overrides ``[budget] seed``).
    progress : callable, optional
        Called with a short label as each stage starts.
    fit : object, optional
        A result of :func:`errbudget.uncertainty.calibrate.fit_from_counts` already computed.

    Returns
    -------
    Budget
    """
    say = progress or (lambda label: None)
    started = time.perf_counter()
    n_base = samples if samples is not None else case.budget.samples
    seed = seed if seed is not None else case.budget.seed
    scheme = get_scheme(case.scheme)
    flags: list[dict] = []

    independent = case.uncertain()
    joint = None
    if case.counts is not None:
        say("fitting the counts")
        from errbudget.uncertainty.calibrate import fit_from_counts, joint_from_fit

        fit = fit if fit is not None else fit_from_counts(case)
        joint = joint_from_fit(fit, flags)
        if joint is not None:
            independent = {k: v for k, v in independent.items() if k not in joint.names}
            case = with_fitted_nominal(case, fit)

    say("choosing the refinement ladder")
    steps_info = ladder.build(case)
    steps = steps_info["steps"]
    if steps_info["capped"]:
        flags.append(
            {
                "code": "ladder-capped",
                "message": (
                    f"the observed order did not settle at the formal order {scheme.order} within "
                    f"{len(steps)} levels (finest step {steps[-1]:g} {case.time_unit}); the "
                    "discretisation estimates are less certain"
                ),
            }
        )

    if independent or joint is not None:
        design = sample_design(independent, joint, n_base, seed)
        sampled = design.values
        rows = design.n_rows
    else:
        design, sampled, rows = None, {}, 1
    _check_memory(case, rows, steps[-1])
    params = ensemble_params(case, sampled)
    iid = design.independent_rows if design is not None else np.array([0])
    members = np.sort(iid)[: sweep.SERIES_MEMBERS]
    count_times = fit.counts.times if fit is not None else None

    say(f"ensemble at the case's step and the reference levels ({rows} parameter sets)")
    passed = sweep.reference_pass(
        case, params, scheme.order, steps[-2], steps[-1], members, count_times
    )
    errors = discretisation_errors(case, passed.case_values, passed.reference)
    deeper = _deeper_reference(
        case, errors, passed.reference, iid, scheme.order, passed.finest_step, rows, flags
    )
    if deeper is not None:
        say("refining the reference for a fine step")
        passed = sweep.reference_pass(
            case, params, scheme.order, 2 * deeper, deeper, members, count_times
        )
        errors = discretisation_errors(case, passed.case_values, passed.reference)
    reference = passed.reference
    flags.extend(
        artefacts.flags(passed.masks, f"at the case's step of {case.step:g} {case.time_unit}")
    )

    say("parameter spread and Sobol indices")
    spreads, indices = _spreads(case, design, reference, iid, seed)
    flags.extend(_unsettled_indices(case, indices))
    drivers = _drivers(errors, sampled, design)
    say("round-off")
    rounding = roundoff.measure(case, case.step)
    law = {k: v for k, v in params.items() if k != "N0"}
    limits = stability.step_limits(case.model, scheme, law)

    say("searching for the coarsest adequate step")
    recommendation = _recommend(case, params, reference, passed, spreads, limits)
    series = _series(case, passed, errors)
    series["stability"] = _stability_map(case, sampled, limits, members)
    if fit is not None:
        series["counts"] = {
            "times": np.asarray(fit.counts.times, float),
            "counts": np.asarray(fit.counts.counts, float),
        }
    elapsed = time.perf_counter() - started
    data = assemble(
        case,
        scheme=scheme,
        steps_info=steps_info,
        case_values=passed.case_values,
        reference=reference,
        errors=errors,
        spreads=spreads,
        indices=indices,
        drivers=drivers,
        rounding=rounding,
        limits=limits,
        flags=flags,
        recommendation=recommendation,
        fit=fit,
        design_rows=rows,
        n_base=n_base,
        seed=seed,
        elapsed=elapsed,
        series=series,
    )
    data["better_data"] = (
        _better_data(case, joint, independent, n_base, seed, passed, limits, recommendation)
        if joint is not None
        else None
    )
    data["run"]["reference_steps"] = [
        {"value": passed.finer_step, "unit": case.time_unit},
        {"value": passed.finest_step, "unit": case.time_unit},
    ]
    data["run"]["chunk_rows"] = sweep.chunk_rows(case, passed.finest_step, rows)
    if case.counts is not None and fit is not None:
        from errbudget.estimates.validation import validate_run

        data["validation"] = validate_run(case, fit, passed.count_values)
        if data["validation"]["flag"] is not None:
            data["flags"].append(data["validation"]["flag"])
    return Budget(data, series)


def _check_memory(case: Case, rows: int, finest_step: float) -> None:
    """Refuse a run whose estimated memory exceeds ``[budget] memory_limit``."""
    limit = case.budget.memory_limit_mb
    need = estimate_memory_mb(case, rows, finest_step)
    if need > limit:
        raise InputError(
            f"this run would need about {need:.0f} MB ({rows} parameter sets, finest step "
            f"{finest_step:g} {case.time_unit}), above the limit of {limit:.0f} MB; lower "
            "[budget] samples, shorten the horizon, or raise [budget] memory_limit",
            str(case.path),
            "budget.samples",
        )


def _unsettled_indices(case: Case, indices: list[dict]) -> list[dict]:
    """A flag when the Sobol indices moved between half and full sample (raise samples)."""
    unsettled = [
        (spec.name, found["_convergence"]["advice"])
        for spec, found in zip(case.quantities, indices, strict=True)
        if found.get("_convergence", {}).get("agree") is False
    ]
    if not unsettled:
        return []
    names = ", ".join(f'"{name}"' for name, _ in unsettled)
    return [
        {
            "code": "indices-unsettled",
            "message": (
                f"the Sobol indices of {names} changed between the half and the full sample beyond "
                f"their intervals: {unsettled[0][1]}"
            ),
        }
    ]


def _spreads(case: Case, design, reference, iid, seed) -> tuple[list[dict], list[dict]]:
    """Per quantity: the forecast spread on the reference values, and the Sobol indices."""
    spreads, indices = [], []
    for q in range(len(case.quantities)):
        spreads.append(spread_summary(reference[q, iid], case.budget.level))
        indices.append(sobol_indices(design, reference[q], seed=seed) if design else {})
    return spreads, indices


def _recommend(case: Case, params, reference, passed, spreads, limits) -> dict:
    """Evaluate every candidate step (and its half) in one sweep, then pick the coarsest."""
    wanted, _ = steps_to_try(case, passed.finest_step, limits)
    evaluated = sweep.candidate_pass(case, params, passed.finest_step, wanted)
    return recommend(
        case,
        evaluated,
        reference,
        finest=passed.finest_step,
        spreads=spreads,
        limits=limits,
        scale=passed.scale,
    )


def with_fitted_nominal(case: Case, fit) -> Case:
    """The case with its fitted parameters' nominal values set to the estimates."""
    estimates = dict(zip(fit.result.names, fit.result.values, strict=True))
    parameters = {
        name: replace(p, nominal=float(estimates[name])) if name in estimates else p
        for name, p in case.parameters.items()
    }
    return replace(case, parameters=parameters)


def _better_data(
    case: Case, joint, independent, n_base, seed, passed, limits, recommendation
) -> dict:
    """The budget again as if the counts were doubled: the fitted covariance halved.

    Better data narrow the parameter spread, which shrinks the allowance for numerical
    error: the adequate step may become finer.
    """
    from errbudget.uncertainty.spread import JointNormal

    halved = JointNormal(
        names=joint.names,
        mean=joint.mean,
        cov=joint.cov / 2,
        group=joint.group,
        log_scale=joint.log_scale,
    )
    design = sample_design(independent, halved, n_base, seed)
    params = ensemble_params(case, design.values)
    members = np.sort(design.independent_rows)[: sweep.SERIES_MEMBERS]
    again = sweep.reference_pass(
        case,
        params,
        get_scheme(case.scheme).order,
        passed.finer_step,
        passed.finest_step,
        members,
        None,
    )
    spreads = [
        spread_summary(again.reference[q, design.independent_rows], case.budget.level)
        for q in range(len(case.quantities))
    ]
    better = _recommend(case, params, again.reference, again, spreads, limits)
    now, then = recommendation["step"], better["step"]
    unit = case.time_unit
    if then is None:
        statement = (
            f"With twice as many counts no candidate step would qualify: {better['reason']}."
        )
    elif now is not None and then < now:
        statement = (
            f"With twice as many counts the parameter spread narrows and the coarsest "
            f"adequate step would become {then:g} {unit} (now {now:g} {unit}): better "
            "data demand a finer step."
        )
    else:
        statement = (
            f"With twice as many counts the coarsest adequate step would be {then:g} {unit}."
        )
    return {
        "assumption": "twice as many counts of the same quality: the covariance of the fitted "
        "parameters halved",
        "recommended_step": {"value": then, "unit": unit},
        "parameter_sd": {spec.name: spreads[q]["sd"] for q, spec in enumerate(case.quantities)},
        "statement": statement,
    }


def _deeper_reference(
    case: Case, errors, reference, iid, order: int, finest: float, rows: int, flags: list[dict]
) -> float | None:
    """A finer reference step when the adequate step is likely below the ladder's reach.

    The adequate step is predicted from the case-step error, e(h) ~ e(h0) (h/h0)^p; the
    reference must be REFERENCE_DEPTH times finer so that the candidate and its half are both
    well resolved. Returns None when the ladder already reaches that far.
    """
    needed = math.inf
    for q in range(errors.shape[0]):
        finite = np.isfinite(errors[q])
        if not finite.all():
            continue
        error = float(np.percentile(errors[q], case.budget.percentile))
        values = reference[q, iid]
        values = values[np.isfinite(values)]
        sd = float(np.std(values, ddof=1)) if values.size > 1 else 0.0
        if error > 0 and sd > 0:
            ratio = case.budget.fraction * sd / error
            needed = min(needed, case.step * ratio ** (1.0 / order))
    if not math.isfinite(needed):
        return None
    target = needed / REFERENCE_DEPTH
    levels = max(0, math.ceil(math.log2(case.step / target)))
    step = case.step / ladder.RATIO**levels
    if step >= finest * (1 - 1e-12):
        return None
    while step < finest and (
        n_steps_for(case.horizon, step) > ladder.MAX_STEPS
        or estimate_memory_mb(case, rows, step) > case.budget.memory_limit_mb
    ):
        step *= ladder.RATIO
    if step >= finest * (1 - 1e-12):
        flags.append(
            {
                "code": "reference-capped",
                "message": (
                    "the adequate step looks finer than the reference levels that the step and "
                    "memory caps allow; the recommendation may not reach it"
                ),
            }
        )
        return None
    return step


def discretisation_errors(case: Case, values: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """|value - reference| per quantity and member, shape (Q, S).

    A time-to level reached by one solution but not the other within the horizon gets the
    lower bound |horizon - t|; where neither reaches it the error is 0 (nothing to compare).
    Members whose run diverged keep an infinite error.
    """
    with np.errstate(invalid="ignore"):
        errors = np.abs(values - reference)
    for q, spec in enumerate(case.quantities):
        if spec.kind != "time-to":
            continue
        v, ref = values[q], reference[q]
        neither = np.isnan(v) & np.isnan(ref)
        one = np.isnan(v) ^ np.isnan(ref)
        found = np.where(np.isnan(v), ref, v)
        errors[q] = np.where(neither, 0.0, np.where(one, np.abs(case.horizon - found), errors[q]))
    errors[np.isnan(errors)] = np.inf
    return errors


def _most_correlated(target: np.ndarray, sampled: dict) -> dict | None:
    """The input whose Spearman rank correlation with ``target`` is largest in size.

    Non-finite entries of ``target`` are left out; returns {"name", "rho"} or None.
    """
    finite = np.isfinite(target)
    best = None
    for name, values in sampled.items():
        if np.ptp(values[finite]) == 0:
            continue
        rho = float(stats.spearmanr(values[finite], target[finite]).statistic)
        if math.isfinite(rho) and (best is None or abs(rho) > abs(best["rho"])):
            best = {"name": name, "rho": rho}
    return best


def _drivers(errors: np.ndarray, sampled: dict, design) -> list[dict | None]:
    """Per quantity: the input whose rank correlation with the discretisation error is largest."""
    result = []
    for q in range(errors.shape[0]):
        finite = np.isfinite(errors[q])
        usable = design is not None and finite.sum() > 10 and np.ptp(errors[q][finite]) > 0
        result.append(_most_correlated(errors[q], sampled) if usable else None)
    return result


def _stability_map(case: Case, sampled: dict, limits: dict, members: np.ndarray) -> dict | None:
    """Per-member step limits against the input they depend on most, for the report."""
    stable = np.asarray(limits["stable"], dtype=float)
    if stable.size < 2 or not np.isfinite(stable).any() or not sampled:
        return None
    found = _most_correlated(stable, sampled)
    if found is None or found["rho"] == 0:
        return None
    best, best_rho = found["name"], found["rho"]
    monotone = np.asarray(limits["monotone"], dtype=float)
    return {
        "parameter": best,
        "unit": case.parameters[best].unit,
        "values": sampled[best][members],
        "stable": stable[members],
        "monotone": monotone[members] if monotone.size == stable.size else None,
        "rho": best_rho,
    }


def _series(case: Case, passed, errors) -> dict:
    """Time series for the report: ensemble bands and the numerical error along the run.

    Bands use the first SERIES_MEMBERS independent draws of the design, at up to
    SERIES_POINTS times of the case's grid.
    """
    times = passed.series_index * case.step
    fine, coarse = passed.series_fine, passed.series_coarse
    with np.errstate(invalid="ignore"):
        gap = np.abs(coarse - fine)
        band = np.nanpercentile(fine, BAND_PERCENTILES, axis=1)
        gap_high = np.nanpercentile(gap, 95.0, axis=1)
    worst = int(np.nanargmax(gap_high)) if np.isfinite(gap_high).any() else 0
    nominal = nominal_params(case)
    accurate = solve(case, nominal, passed.finest_step)
    keep = np.unique(
        np.linspace(0, accurate.last_index, min(accurate.last_index + 1, NOMINAL_POINTS))
        .round()
        .astype(int)
    )
    coarse_nominal = solve(case, nominal, case.step)
    return {
        "times": times,
        "fine_times": keep * passed.finest_step,
        "band": band,
        "error_p95": gap_high,
        "worst_time": float(times[worst]),
        "worst_error": float(gap_high[worst]) if np.isfinite(gap_high[worst]) else None,
        "nominal_coarse": coarse_nominal.states[passed.series_index, 0],
        "nominal_fine": accurate.states[keep, 0],
        "errors": errors,
    }
