"""The work of a run, predicted before the heavy passes and bounded by ``[budget] time_limit``.

After the ladder (one member) and the case's step over the ensemble (the cheapest level,
timed to measure the engine's speed on this machine, now), the rest of the work is known or
predictable: the two reference levels exactly; a deeper reference and the candidate search
from the step that the nominal ladder's error and the ensemble's spread at the case's step
predict to be adequate, e(h) = e(h0) (h/h0)^p (the same rule the run uses later on the
ensemble). The prediction is member-steps; seconds follow from the measured speed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from errbudget.budget import allowance
from errbudget.budget.search import candidate_steps
from errbudget.case.load import Case
from errbudget.errors import InputError
from errbudget.estimates.ladder import MAX_STEPS, RATIO, Ladder
from errbudget.estimates.richardson import richardson
from errbudget.solve.ensemble import n_steps_for

CALIBRATION_WORK = 2_000_000  # member-steps a speed measurement needs to mean anything
CALIBRATION_MEMBERS = 4096  # members of the calibration run (whole blocks for every thread)
CALIBRATION_REPEATS = 3  # calibration runs, the fastest counts
REFERENCE_DEPTH = 8  # reference step = predicted adequate step / this (candidate, half, margin)
OVERHEAD_SECONDS = 1.0  # what is not stepping (Sobol indices, round-off, report), roughly
# The ensemble's error at its percentile against the nominal error, assumed before it is
# known: a margin so that the prediction errs on the side of more work (common practice,
# no source; the demo cases show factors of 1.5 to 3).
ENSEMBLE_MARGIN = 3.0


@dataclass(frozen=True)
class WorkPlan:
    """Predicted work of the passes still to come, and the speed it was predicted with.

    ``parts`` maps each pass (reference levels, deeper reference, candidate search) to its
    member-steps; ``seconds`` adds OVERHEAD_SECONDS to the stepping time.
    """

    member_steps: int
    seconds: float
    speed: float
    parts: dict

    def to_dict(self) -> dict:
        """The prediction in member-steps (the same on every machine)."""
        return {"predicted_member_steps": self.member_steps, "parts": dict(self.parts)}

    def timing(self) -> dict:
        """The clock side: the measured speed and the predicted seconds."""
        return {"member_steps_per_second": self.speed, "predicted_seconds": self.seconds}


def speed(case: Case, level, params: dict) -> float:
    """The engine's member-steps per second, from the timed case's step, or a calibration.

    The case's step over the ensemble is the first work of a run; when it is too small to
    time (fewer than CALIBRATION_WORK member-steps), the nominal member is stepped as
    CALIBRATION_MEMBERS copies at a step fine enough to make CALIBRATION_WORK.
    """
    if level.member_steps >= CALIBRATION_WORK:
        return level.member_steps / max(level.seconds, 1e-9)
    from errbudget.solve.stream import stream

    copies = {k: np.full(CALIBRATION_MEMBERS, float(np.asarray(v).reshape(-1)[0]))
              for k, v in params.items()}  # fmt: skip
    steps = max(1, CALIBRATION_WORK // CALIBRATION_MEMBERS)
    best = 0.0
    for _ in range(CALIBRATION_REPEATS):  # the fastest of a few: a shared machine is noisy
        timed = stream(case, copies, [case.horizon / steps])[0]
        best = max(best, timed.member_steps / max(timed.seconds, 1e-9))
    return best


def adequate_step(case: Case, errors: np.ndarray, allowed: np.ndarray, order: int) -> float:
    """The step at which every quantity's error would be within its allowance [time].

    ``errors`` and ``allowed`` hold one value per quantity at the case's step; the error is
    taken to scale as h^p (p the formal order). Infinite when nothing limits the step.
    """
    needed = math.inf
    for error, share in zip(errors, allowed, strict=True):
        if math.isfinite(error) and math.isfinite(share) and error > 0 and share > 0:
            needed = min(needed, case.step * (share / error) ** (1 / order))
    return needed


def deeper_step(case: Case, needed: float, finest: float) -> tuple[float | None, bool]:
    """The reference step the adequate step ``needed`` calls for, and whether a cap stopped it.

    The reference must be REFERENCE_DEPTH times finer than the adequate step so that the
    candidate and its half are both well resolved, within MAX_STEPS steps. Returns (None,
    False) when the ladder's finest level already reaches that far, and (None, True) when
    the cap allows nothing finer than it.
    """
    if not math.isfinite(needed):
        return None, False
    levels = max(0, math.ceil(math.log2(case.step * REFERENCE_DEPTH / needed)))
    step = case.step / RATIO**levels
    if step >= finest * (1 - 1e-12):
        return None, False
    while step < finest and n_steps_for(case.horizon, step) > MAX_STEPS:
        step *= RATIO
    if step >= finest * (1 - 1e-12):
        return None, True
    return step, False


def predict(case: Case, chosen: Ladder, case_values: np.ndarray, members, order: int,
            speed: float, scale: float) -> WorkPlan:  # fmt: skip
    """Predict the member-steps and seconds of the passes after the case's step.

    ``case_values`` (Q, S) are the quantities at the case's step over the ensemble (their
    spread over ``members`` stands in for the parameter spread); ``scale`` is their largest
    |N| [population]; ``speed`` is the measured member-steps per second.
    """
    rows = case_values.shape[1]
    finer, finest = chosen.steps[-2], chosen.steps[-1]
    column = chosen.values
    with np.errstate(all="ignore"):
        reference = richardson(column[-1], column[-2], RATIO, order)
        errors = ENSEMBLE_MARGIN * np.abs(column[0] - reference)
        spreads = [_sd(case_values[q, members]) for q in range(case_values.shape[0])]
    allowed = np.array(allowance.allowances(case, spreads, allowance.resolution(case, scale)))
    needed = adequate_step(case, errors, allowed, order)
    parts = {
        "reference levels": rows
        * (n_steps_for(case.horizon, finer) + n_steps_for(case.horizon, finest))
    }
    deeper, _ = deeper_step(case, needed, finest)
    if deeper is not None:
        finest = deeper
        parts["deeper reference"] = rows * (
            n_steps_for(case.horizon, 2 * deeper) + n_steps_for(case.horizon, deeper)
        )
    searched = [s for s in candidate_steps(case, finest) if s != case.step]
    until = [s for s in searched if s >= needed * (1 - 1e-12)] or searched[:1]
    stop = min(until) if until else None
    steps = [s for s in searched if stop is None or s >= stop]
    parts["candidate search"] = rows * sum(
        n_steps_for(case.horizon, s) + (n_steps_for(case.horizon, s / 2) if s == stop else 0)
        for s in steps
    )
    total = int(sum(parts.values()))
    return WorkPlan(total, total / max(speed, 1.0) + OVERHEAD_SECONDS, speed, parts)


def _sd(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(np.std(finite, ddof=1)) if finite.size > 1 else 0.0


def check(case: Case, plan: WorkPlan, rows: int, patient: bool) -> None:
    """Refuse a run predicted to take longer than ``[budget] time_limit``, unless patient."""
    limit = case.budget.time_limit_s
    if patient or plan.seconds <= limit:
        return
    raise InputError(
        f"this run would take about {_duration(plan.seconds)} ({plan.member_steps:.3g} "
        f"member-steps for {rows} parameter sets at {plan.speed:.3g} per second on this "
        f"machine), beyond the time limit of {_duration(limit)}; lower [budget] samples, "
        "give a shorter horizon or a coarser step, raise [budget] time_limit, or run "
        "with --patient to wait for it with a progress bar",
        str(case.path),
        "budget.time_limit",
    )


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
