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

from errbudget import artefacts, ladder, roundoff, stability
from errbudget.budget import assemble, recommend
from errbudget.case import Case
from errbudget.convergence import richardson
from errbudget.ensemble import (
    ensemble_params,
    n_steps_for,
    nominal_params,
    quantity_values,
    solve,
)
from errbudget.errors import InputError
from errbudget.models import stable_equilibria
from errbudget.schemes import get_scheme
from errbudget.spread import sample_design, sobol_indices, spread_summary

BYTES_PER_VALUE = 8
WORK_COPIES = 6  # arrays alive at once per stored trajectory during a level (stages, temporaries)
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
    """Peak memory of the ensemble runs [MB]: trajectories of the case's and finest levels."""
    stored = n_steps_for(case.horizon, case.step) + 2 * n_steps_for(case.horizon, finest_step)
    return rows * stored * BYTES_PER_VALUE * WORK_COPIES / 1e6


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
        A result of :func:`errbudget.calibrate.fit_from_counts` already computed.

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
        from errbudget.calibrate import fit_from_counts, joint_from_fit

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
    limit = case.budget.memory_limit_mb
    need = estimate_memory_mb(case, rows, steps[-1])
    if need > limit:
        raise InputError(
            f"this run would need about {need:.0f} MB ({rows} parameter sets, finest step "
            f"{steps[-1]:g} {case.time_unit}), above the limit of {limit:.0f} MB; lower "
            "[budget] samples, shorten the horizon, or raise [budget] memory_limit",
            str(case.path),
            "budget.samples",
        )
    params = ensemble_params(case, sampled)

    say(f"ensemble at the case's step ({rows} parameter sets)")
    coarse = solve(case, params, case.step)
    case_values, _ = quantity_values(case, coarse)
    say("ensemble on the finest ladder levels")
    finer, finest, reference = _reference_levels(case, params, steps[-2], steps[-1], scheme)
    errors = discretisation_errors(case, case_values, reference)
    iid = design.independent_rows if design is not None else np.array([0])
    deeper = _deeper_reference(case, errors, reference, iid, scheme.order, finest.step, rows, flags)
    if deeper is not None:
        say("refining the reference for a fine step")
        finer, finest, reference = _reference_levels(case, params, 2 * deeper, deeper, scheme)
        errors = discretisation_errors(case, case_values, reference)

    stride = round(case.step / finest.step)
    fine_on_case_grid = finest.states[::stride][: coarse.states.shape[0]]
    law = {k: v for k, v in params.items() if k != "N0"}
    levels = [eq.value for eq in stable_equilibria(case.model, law)]
    masks = artefacts.detect(coarse.states, fine_on_case_grid, levels, coarse.last_index)
    flags.extend(artefacts.flags(masks, f"at the case's step of {case.step:g} {case.time_unit}"))

    say("parameter spread and Sobol indices")
    spreads, indices = [], []
    for q in range(len(case.quantities)):
        spreads.append(spread_summary(reference[q, iid], case.budget.level))
        if design is not None:
            indices.append(sobol_indices(design, reference[q], seed=seed))
        else:
            indices.append({})

    drivers = _drivers(errors, sampled, design)
    say("round-off")
    rounding = roundoff.measure(case, case.step)
    limits = stability.step_limits(case.model, scheme, law)

    say("searching for the coarsest adequate step")
    recommendation = recommend(
        case, params, reference, finest, stride_of=finest.step, spreads=spreads, limits=limits
    )
    series = _series(case, coarse, finest, stride, iid, errors)
    elapsed = time.perf_counter() - started
    data = assemble(
        case,
        scheme=scheme,
        steps_info=steps_info,
        case_values=case_values,
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
        _better_data(
            case,
            joint,
            independent,
            n_base,
            seed,
            finer.step,
            finest.step,
            scheme,
            limits,
            recommendation,
        )
        if joint is not None
        else None
    )
    data["run"]["reference_steps"] = [
        {"value": finer.step, "unit": case.time_unit},
        {"value": finest.step, "unit": case.time_unit},
    ]
    if case.counts is not None and fit is not None:
        from errbudget.validation import validate_run

        data["validation"] = validate_run(case, fit, finest, iid)
        if data["validation"]["flag"] is not None:
            data["flags"].append(data["validation"]["flag"])
    return Budget(data, series)


def with_fitted_nominal(case: Case, fit) -> Case:
    """The case with its fitted parameters' nominal values set to the estimates."""
    estimates = dict(zip(fit.result.names, fit.result.values, strict=True))
    parameters = {
        name: replace(p, nominal=float(estimates[name])) if name in estimates else p
        for name, p in case.parameters.items()
    }
    return replace(case, parameters=parameters)


def _better_data(
    case: Case,
    joint,
    independent,
    n_base,
    seed,
    finer_step,
    finest_step,
    scheme,
    limits,
    recommendation,
) -> dict:
    """The budget again as if the counts were doubled: the fitted covariance halved.

    Better data narrow the parameter spread, which shrinks the allowance for numerical
    error: the adequate step may become finer.
    """
    from errbudget.spread import JointNormal

    halved = JointNormal(
        names=joint.names,
        mean=joint.mean,
        cov=joint.cov / 2,
        group=joint.group,
        log_scale=joint.log_scale,
    )
    design = sample_design(independent, halved, n_base, seed)
    params = ensemble_params(case, design.values)
    _, finest, reference = _reference_levels(case, params, finer_step, finest_step, scheme)
    spreads = [
        spread_summary(reference[q, design.independent_rows], case.budget.level)
        for q in range(len(case.quantities))
    ]
    better = recommend(
        case, params, reference, finest, stride_of=finest_step, spreads=spreads, limits=limits
    )
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


def _reference_levels(case: Case, params, finer_step: float, finest_step: float, scheme):
    """Ensemble runs on two levels (ratio 2) and the per-member Richardson reference."""
    finer = solve(case, params, finer_step)
    finest = solve(case, params, finest_step)
    finer_values, _ = quantity_values(case, finer)
    finest_values, _ = quantity_values(case, finest)
    reference = richardson(finest_values, finer_values, ladder.RATIO, scheme.order)
    return finer, finest, reference


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


def _drivers(errors: np.ndarray, sampled: dict, design) -> list[dict | None]:
    """Per quantity: the input whose rank correlation with the discretisation error is largest."""
    result = []
    for q in range(errors.shape[0]):
        best = None
        finite = np.isfinite(errors[q])
        if design is not None and finite.sum() > 10 and np.ptp(errors[q][finite]) > 0:
            for name, values in sampled.items():
                if np.ptp(values[finite]) == 0:
                    continue
                rho = float(stats.spearmanr(values[finite], errors[q][finite]).statistic)
                if math.isfinite(rho) and (best is None or abs(rho) > abs(best["rho"])):
                    best = {"name": name, "rho": rho}
        result.append(best)
    return result


def _series(case: Case, coarse, finest, stride: int, iid: np.ndarray, errors) -> dict:
    """Time series for the report: nominal-free ensemble bands and the error along the run."""
    last = coarse.last_index
    times = np.arange(last + 1) * case.step
    fine = finest.states[::stride][: last + 1].astype(float)
    coarse_states = coarse.states[: last + 1].astype(float)
    with np.errstate(invalid="ignore"):
        gap = np.abs(coarse_states - fine)
        band = np.nanpercentile(fine[:, iid], BAND_PERCENTILES, axis=1)
        gap_high = np.nanpercentile(gap[:, iid], 95.0, axis=1)
    worst = int(np.nanargmax(gap_high)) if np.isfinite(gap_high).any() else 0
    fine_times = np.arange(finest.last_index + 1) * finest.step
    return {
        "times": times,
        "fine_times": fine_times,
        "band": band,
        "error_p95": gap_high,
        "worst_time": float(times[worst]),
        "worst_error": float(gap_high[worst]) if np.isfinite(gap_high[worst]) else None,
        "nominal_coarse": solve(case, nominal_params(case), case.step).states[: last + 1, 0],
        "nominal_fine": solve(case, nominal_params(case), finest.step).states[
            : finest.last_index + 1, 0
        ],
        "errors": errors,
    }
