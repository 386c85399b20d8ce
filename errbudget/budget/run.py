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

    joint = None
    if case.counts is not None:
        clock.stage("fit", "fitting the counts")
        from errbudget.uncertainty.calibrate import fit_from_counts, joint_from_fit

        fit = fit if fit is not None else fit_from_counts(case)
        joint = joint_from_fit(fit, flags)
        if joint is not None:
            case = with_fitted_nominal(case, fit)

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

    clock.stage("case step", f"the case's step over {rows} parameter sets")
    coarse = passes.case_level(case, ensemble, receiver.advanced, mapper)
    speed = work.speed(case, coarse, ensemble.params)
    plan = work.predict(
        case, chosen, coarse.values, iid, scheme.order, speed, float(np.max(coarse.features.scale))
    )
    work.check(case, plan, rows, patient)
    receiver.planned(plan)
    # The round-off runs (one member, numpy in three arithmetics, mostly Python) go on beside
    # the ensemble passes, whose compiled loop releases the interpreter (started after the
    # speed was measured, which they would slow).
    background = ThreadPoolExecutor(1, thread_name_prefix="errbudget-roundoff")
    rounding_job = background.submit(roundoff.measure, case, case.step)
    background.shutdown(wait=False)

    clock.stage("reference pass", "the reference levels")
    passed = passes.reference_pass(
        case, ensemble, scheme.order, chosen.steps[-2], chosen.steps[-1],
        reuse={case.step: coarse}, progress=receiver.advanced, mapper=mapper,
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
    spreads, indices = _spreads(case, design, passed.reference, iid, seed)
    flags.extend(_unsettled_indices(case, indices))
    found_drivers = (
        drivers(errors, sampled) if design is not None else [None] * len(case.quantities)
    )
    rounding = rounding_job.result()
    limits = _limits(case, scheme, ensemble)

    floor = allowance.resolution(case, passed.scale)
    allowed = allowance.allowances(case, [s["sd"] for s in spreads], floor)
    collapsed = allowance.collapsed(case, spreads, floor)

    clock.stage("search", "searching for the coarsest adequate step")
    candidates = Candidates(case, ensemble, passed, receiver.advanced, mapper)
    recommendation = recommend(
        case, candidates, passed.reference, allowances=allowed, limits=limits, scale=passed.scale
    )
    clock.stage("series", "series for the report")
    report_series = series.series(case, passed, errors)
    report_series["stability"] = series.stability_map(case, sampled, limits, ensemble.members)
    if fit is not None:
        report_series["counts"] = {
            "times": np.asarray(fit.counts.times, float),
            "counts": np.asarray(fit.counts.counts, float),
        }
    clock.stage("better data", "what better data would buy")
    if joint is not None:
        better = better_data.doubled_counts(
            case, joint, n_base, seed, passed, limits, recommendation, floor, mapper
        )
    else:
        better = better_data.per_input(
            case, candidates, passed, sampled, iid, limits, floor, recommendation.step
        )
    validation = None
    if case.counts is not None and fit is not None:
        clock.stage("validation", "comparing with the counts")
        from errbudget.estimates.validation import validate_run

        validation = validate_run(case, fit, passed.count_values)
    evidence = Evidence(
        chosen, errors, spreads, indices, found_drivers, rounding, limits, recommendation,
        report_series, allowances=allowed, collapsed=collapsed, resolution=floor,
        cleared=_cleared(case, passed, iid),
        nominal_reference=_nominal_reference(case, passed, scheme.order),
    )  # fmt: skip
    facts = RunFacts(
        samples=n_base,
        seed=seed,
        parameter_sets=rows,
        reference_steps=(passed.finer_step, passed.finest_step),
        elapsed=clock.elapsed(),
        stages=clock.stages,
        prediction=plan.timing(),
        work={
            **plan.to_dict(),
            "member_steps": int(sum(lv.member_steps for lv in candidates.levels.values())),
        },
    )
    data = budget_json(
        case, scheme, evidence, flags, fit=fit, run=facts, better_data=better, validation=validation
    )
    return Budget(data, report_series)


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
