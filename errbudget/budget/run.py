"""One run of a case, in the order the data flow: (fit) -> ladder -> design -> reference pass
-> estimates -> step search -> budget.json.

Nothing here reads or writes files except through ``fit_from_counts`` (which reads the counts
file named by the case). The CLI writes the outputs.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

import numpy as np

from errbudget.budget import allowance, better_data, passes, series, work
from errbudget.budget.build import Evidence, RunFacts, budget_json
from errbudget.budget.passes import Candidates, Ensemble, ReferencePass
from errbudget.budget.progress import Progress, as_progress
from errbudget.budget.search import recommend
from errbudget.case.load import Case
from errbudget.case.parameters import input_flags
from errbudget.case.resources import check_design_size
from errbudget.errors import InputError
from errbudget.estimates import artefacts, ladder, roundoff, stability
from errbudget.estimates.drivers import drivers
from errbudget.estimates.errors import discretisation_errors
from errbudget.estimates.richardson import richardson
from errbudget.solve import engine
from errbudget.solve.ensemble import ensemble_params, nominal_params
from errbudget.solve.stream import Mapper, stream
from errbudget.solve.tableaux import get_scheme
from errbudget.uncertainty.design import design_for_case
from errbudget.uncertainty.spread import sobol_indices, spread_summary


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


class _Clock:
    """Wall time of each stage of the run; announces each stage to the progress receiver."""

    def __init__(self, progress: Progress):
        self.progress = progress
        self.stages: dict[str, float] = {}
        self.started = self.last = time.perf_counter()
        self.current: str | None = None

    def stage(self, name: str, label: str | None = None) -> None:
        now = time.perf_counter()
        if self.current is not None:
            self.stages[self.current] = self.stages.get(self.current, 0.0) + now - self.last
        self.current, self.last = name, now
        if label:
            self.progress.stage(label)

    def elapsed(self) -> float:
        self.stage("done")
        return time.perf_counter() - self.started


def run_case(
    case: Case,
    *,
    samples: int | None = None,
    seed: int | None = None,
    progress: Progress | Callable[[str], None] | None = None,
    fit=None,
    patient: bool = False,
    mapper: Mapper | None = None,
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
    progress : Progress or callable, optional
        Told each stage as it starts (a callable gets the stage's label), the predicted
        work and the work done (see :mod:`errbudget.budget.progress`).
    fit : object, optional
        A result of :func:`errbudget.uncertainty.calibrate.fit_from_counts` already computed.
    patient : bool
        Run even when the predicted time exceeds ``[budget] time_limit`` (otherwise an
        :class:`~errbudget.errors.InputError` says what to lower).
    mapper : callable, optional
        Runs the passes over the design in chunks of members as separate tasks, for example
        on Dask workers (:class:`errbudget.batch.cluster.DaskMapper`); the budget is the
        same, number for number (see :func:`errbudget.solve.stream.stream`).

    Returns
    -------
    Budget
    """
    receiver = as_progress(progress)
    clock = _Clock(receiver)
    if samples is not None:  # [budget] samples was checked at load, an override is not yet
        check_design_size(case, samples, "run_case", "samples")
    n_base = samples if samples is not None else case.budget.samples
    seed = seed if seed is not None else case.budget.seed
    scheme = get_scheme(case.scheme)
    flags: list[dict] = input_flags(case.parameters)
    case, fit, joint = _fit(case, fit, flags, clock)
    prepared = _prepare(case, scheme, joint, fit, n_base, seed, flags, clock)
    measured = _measure(case, scheme, prepared, seed, flags, clock, patient, mapper)
    evidence, better, candidates = _decide(
        case, scheme, prepared, measured, joint, n_base, seed, clock, mapper
    )
    validation = None
    if case.counts is not None and fit is not None:
        clock.stage("validation", "comparing with the counts")
        from errbudget.estimates.validation import validate_run

        validation = validate_run(case, fit, measured.passed.count_values)
    if fit is not None:
        evidence.series["counts"] = {
            "times": np.asarray(fit.counts.times, float),
            "counts": np.asarray(fit.counts.counts, float),
        }
    passed = measured.passed
    facts = RunFacts(
        samples=n_base,
        seed=seed,
        parameter_sets=prepared.rows,
        reference_steps=(passed.finer_step, passed.finest_step),
        elapsed=clock.elapsed(),
        stages=clock.stages,
        prediction=measured.plan.timing(),
        work={
            **measured.plan.to_dict(),
            "member_steps": int(sum(lv.member_steps for lv in candidates.levels.values())),
        },
    )
    data = budget_json(
        case, scheme, evidence, flags, fit=fit, run=facts, better_data=better, validation=validation
    )
    return Budget(data, evidence.series)


@dataclass(frozen=True)
class _Prepared:
    """What the passes run on: the ladder, the design and the ensemble built from it."""

    chosen: ladder.Ladder
    design: object  # Design or None (nothing uncertain)
    sampled: dict
    iid: np.ndarray
    rows: int
    ensemble: Ensemble


@dataclass(frozen=True)
class _Measured:
    """The ensemble's numbers: the plan, the reference levels, the errors and the estimates."""

    plan: work.WorkPlan
    coarse: object  # the case-step Level
    passed: ReferencePass
    errors: np.ndarray
    spreads: list[dict]
    indices: list[dict]
    drivers: list
    rounding: dict
    limits: dict


def _fit(case: Case, fit, flags: list[dict], clock: _Clock):
    """With counts: the fit, the joint distribution of the fitted inputs, and the case with
    the fitted values as nominal (the case unchanged and None, None without counts)."""
    if case.counts is None:
        return case, fit, None
    clock.stage("fit", "fitting the counts")
    from errbudget.uncertainty.calibrate import fit_from_counts, joint_from_fit

    fit = fit if fit is not None else fit_from_counts(case)
    joint = joint_from_fit(fit, flags)
    if joint is not None:
        case = with_fitted_nominal(case, fit)
    return case, fit, joint


def _prepare(case, scheme, joint, fit, n_base, seed, flags, clock) -> _Prepared:
    """The refinement ladder, the Sobol design and the ensemble of parameter sets."""
    clock.stage("ladder", "choosing the refinement ladder")
    chosen = ladder.build(case)
    flags.extend(_ladder_flags(case, chosen, scheme.order))
    clock.stage("design", "sampling the parameter design")
    design = design_for_case(case, joint, n_base, seed)
    rows = design.n_rows if design is not None else 1
    _check_memory(case, rows, chosen.steps[-1])
    sampled = design.values if design is not None else {}
    iid = design.independent_rows if design is not None else np.array([0])
    count_times = fit.counts.times if fit is not None else None
    ensemble = passes.ensemble_for(case, ensemble_params(case, sampled), iid, count_times)
    return _Prepared(chosen, design, sampled, iid, rows, ensemble)


def _measure(case, scheme, prepared: _Prepared, seed, flags, clock, patient, mapper) -> _Measured:
    """The case's step (and from it the predicted work), the reference levels, the errors at
    the case's step, the parameter spread and Sobol indices, round-off and stability."""
    receiver, ensemble, iid = clock.progress, prepared.ensemble, prepared.iid
    clock.stage("case step", f"the case's step over {prepared.rows} parameter sets")
    coarse = passes.case_level(case, ensemble, receiver.advanced, mapper)
    speed = work.speed(case, coarse, ensemble.params)
    scale = float(np.max(coarse.features.scale))
    plan = work.predict(case, prepared.chosen, coarse.values, iid, scheme.order, speed, scale)
    work.check(case, plan, prepared.rows, patient)
    receiver.planned(plan)
    # The round-off runs (one member, numpy in three arithmetics, mostly Python) go on beside
    # the ensemble passes, whose compiled loop releases the interpreter (started after the
    # speed was measured, which they would slow).
    background = ThreadPoolExecutor(1, thread_name_prefix="errbudget-roundoff")
    rounding_job = background.submit(roundoff.measure, case, case.step)
    background.shutdown(wait=False)

    clock.stage("reference pass", "the reference levels")
    steps = prepared.chosen.steps
    passed = passes.reference_pass(
        case, ensemble, scheme.order, steps[-2], steps[-1], reuse={case.step: coarse},
        progress=receiver.advanced, mapper=mapper,
    )  # fmt: skip
    errors = discretisation_errors(case, passed.case_values, passed.reference)
    deeper = _deeper_reference(case, errors, passed.reference, iid, scheme.order, passed, flags)
    if deeper is not None:
        clock.stage("reference pass", "refining the reference for a fine step")
        passed = passes.reference_pass(
            case, ensemble, scheme.order, 2 * deeper, deeper, reuse={case.step: coarse},
            progress=receiver.advanced, mapper=mapper,
        )  # fmt: skip
        errors = discretisation_errors(case, passed.case_values, passed.reference)
    where = f"at the case's step of {case.step:g} {case.time_unit}"
    flags.extend(artefacts.flags(passed.masks, where))

    clock.stage("estimates", "parameter spread, Sobol indices and round-off")
    spreads, indices = _spreads(case, prepared.design, passed.reference, iid, seed)
    flags.extend(_unsettled_indices(case, indices))
    found_drivers = (
        drivers(errors, prepared.sampled)
        if prepared.design is not None
        else [None] * len(case.quantities)
    )
    rounding = rounding_job.result()
    limits = _limits(case, scheme, ensemble)
    return _Measured(
        plan, coarse, passed, errors, spreads, indices, found_drivers, rounding, limits
    )


def _decide(case, scheme, prepared, measured: _Measured, joint, n_base, seed, clock, mapper):
    """Allowances, the step search, the report's series and what better data would buy."""
    passed, ensemble, iid = measured.passed, prepared.ensemble, prepared.iid
    floor = allowance.resolution(case, passed.scale)
    allowed = allowance.allowances(case, [s["sd"] for s in measured.spreads], floor)
    collapsed = allowance.collapsed(case, measured.spreads, floor)

    clock.stage("search", "searching for the coarsest adequate step")
    candidates = Candidates(case, ensemble, passed, clock.progress.advanced, mapper)
    recommendation = recommend(
        case, candidates, passed.reference, allowances=allowed, limits=measured.limits,
        scale=passed.scale,
    )  # fmt: skip
    clock.stage("series", "series for the report")
    report_series = series.series(case, passed, measured.errors)
    report_series["stability"] = series.stability_map(
        case, prepared.sampled, measured.limits, ensemble.members
    )
    clock.stage("better data", "what better data would buy")
    if joint is not None:
        better = better_data.doubled_counts(
            case, joint, n_base, seed, passed, measured.limits, recommendation, floor, mapper
        )
    else:
        better = better_data.per_input(
            case, candidates, passed, prepared.sampled, iid, measured.limits, floor,
            recommendation.step,
        )  # fmt: skip
    evidence = Evidence(
        prepared.chosen, measured.errors, measured.spreads, measured.indices, measured.drivers,
        measured.rounding, measured.limits, recommendation, report_series, allowances=allowed,
        collapsed=collapsed, resolution=floor, cleared=_cleared(case, passed, iid),
        nominal_reference=_nominal_reference(case, passed, scheme.order),
    )  # fmt: skip
    return evidence, better, candidates


def _nominal_reference(case: Case, passed: ReferencePass, order: int) -> np.ndarray:
    """Richardson extrapolation at nominal values from the ensemble's two reference levels."""
    finer, finest = stream(case, nominal_params(case), [passed.finer_step, passed.finest_step])
    with np.errstate(all="ignore"):
        return richardson(finest.values[:, 0], finer.values[:, 0], ladder.RATIO, order)


def _cleared(case: Case, passed: ReferencePass, iid) -> dict:
    """The share of the ensemble that the accurate solution clears (reaches zero) by the
    horizon: an outcome of the model and its parameters, not an artefact of the step."""
    finest = passed.finest.features
    cleared = (finest.finite & (finest.smallest <= 0))[iid]
    return {
        "share": float(cleared.mean()) if cleared.size else 0.0,
        "members": int(cleared.sum()),
        "of": int(cleared.size),
        "by": {"value": case.horizon, "unit": case.time_unit},
        "note": "share of the parameter sets whose accurate solution reaches zero within the "
        "horizon (independent draws of the design); an outcome of the model, not of the step",
    }


def _ladder_flags(case: Case, chosen: ladder.Ladder, order: int) -> list[dict]:
    """A flag naming the quantities whose order did not settle, and the cap that stopped it."""
    if not chosen.capped:
        return []
    unsettled = []
    for q, spec in enumerate(case.quantities):
        if not chosen.settled[q]:
            orders = ", ".join(
                "undefined" if p is None else f"{p:.3g}"
                for p in ladder.last_orders(chosen.values[:, q])
            )
            unsettled.append(f'"{spec.name}" (last two triplets: {orders})')
    cap = (
        f"its cap of {ladder.MAX_LEVELS} levels"
        if chosen.capped_by == "levels"
        else f"its cap of {ladder.MAX_STEPS} steps on the finest level"
    )
    return [
        {
            "code": "ladder-capped",
            "message": (
                f"the observed order of {', '.join(unsettled)} did not settle within "
                f"{ladder.ORDER_TOLERANCE:.0%} of the formal order {order} before the ladder "
                f"reached {cap} (finest step {chosen.steps[-1]:g} {case.time_unit}); the "
                "discretisation estimates are less certain"
            ),
        }
    ]


def _limits(case: Case, scheme, ensemble: Ensemble) -> dict:
    """Step limits from linear stability, per member, and at the nominal parameters."""
    law = {k: v for k, v in ensemble.params.items() if k != "N0"}
    limits = stability.step_limits(case.model, scheme, law)
    nominal = {k: np.array([v]) for k, v in case.nominal().items() if k != "N0"}
    at_nominal = stability.step_limits(case.model, scheme, nominal)["stable"]
    limits["stable_nominal"] = float(at_nominal[0]) if at_nominal.size else None
    return limits


def estimate_memory_mb(case: Case, rows: int, finest_step: float) -> float:
    """Peak memory of the ensemble work [MB]: per-member results of every level and of the
    design, and the report's series. Nothing grows with the number of steps (the passes
    stream; ``finest_step`` is kept for callers that compare steps)."""
    quantities = len(case.quantities)
    levels = 6  # case step, finer, finest, and the candidates the search keeps
    per_member = rows * (quantities * 2 + 12) * levels * 8
    series_bytes = 2 * min(rows, passes.SERIES_MEMBERS) * passes.SERIES_POINTS * 8
    return (per_member + series_bytes) / 1e6


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
    """Per quantity: the forecast spread on the reference values, and the Sobol indices.

    The quantities' indices are estimated at the same time on the engine's threads (numpy
    releases the lock in the bootstrap's array work); each has its own seeded resampling.
    """
    spreads = [
        spread_summary(reference[q, iid], case.budget.level) for q in range(len(case.quantities))
    ]
    if design is None:
        return spreads, [{} for _ in case.quantities]
    with ThreadPoolExecutor(max(1, min(engine.THREADS, len(case.quantities)))) as pool:
        indices = list(pool.map(lambda q: sobol_indices(design, reference[q], seed=seed),
                                range(len(case.quantities))))  # fmt: skip
    return spreads, indices


def with_fitted_nominal(case: Case, fit) -> Case:
    """The case with its fitted parameters' nominal values set to the estimates."""
    estimates = dict(zip(fit.result.names, fit.result.values, strict=True))
    parameters = {
        name: replace(p, nominal=float(estimates[name])) if name in estimates else p
        for name, p in case.parameters.items()
    }
    return replace(case, parameters=parameters)


def _deeper_reference(
    case: Case, errors, reference, iid, order: int, passed: ReferencePass, flags: list[dict]
) -> float | None:
    """A finer reference step when the adequate step is likely below the ladder's reach.

    The adequate step is predicted from the ensemble's error at the case's step,
    e(h) = e(h0) (h/h0)^p, with the rule of :func:`errbudget.budget.work.deeper_step`.
    """
    percentiles, sds = [], []
    for q in range(errors.shape[0]):
        finite = np.isfinite(errors[q]).all()
        pct = float(np.percentile(errors[q], case.budget.percentile)) if finite else math.inf
        values = reference[q, iid]
        values = values[np.isfinite(values)]
        percentiles.append(pct)
        sds.append(float(np.std(values, ddof=1)) if values.size > 1 else 0.0)
    floor = allowance.resolution(case, passed.scale)
    allowed = np.array(allowance.allowances(case, sds, floor))
    needed = work.adequate_step(case, np.array(percentiles), allowed, order)
    step, capped = work.deeper_step(case, needed, passed.finest_step)
    if capped:
        flags.append(
            {
                "code": "reference-capped",
                "message": (
                    "the adequate step looks finer than the reference levels that the step "
                    "cap allows; the recommendation may not reach it"
                ),
            }
        )
    return step
