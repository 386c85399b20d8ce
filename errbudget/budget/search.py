"""The search for the coarsest adequate step: the candidates, the rule, and why none qualifies.

A candidate is adequate when, over the ensemble, the numerical error of every quantity
(discretisation at the stated percentile plus the round-off bound) is at most ``fraction``
times its parameter spread, and no artefact appears. The search tries round multiples of the
time unit, coarsest first, below the stability limit, and confirms an adequate candidate at
half of it. Candidates are stepped lazily, in that order, and the search stops at the answer.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from errbudget.budget.passes import Candidates
from errbudget.budget.wording import with_unit
from errbudget.case.load import Case
from errbudget.estimates.errors import discretisation_errors
from errbudget.estimates.roundoff import UNIT_ROUNDOFF
from errbudget.solve.ensemble import n_steps_for

# Multiples of the case's time unit a person would choose as a step, coarsest first.
STEP_MULTIPLES = (28, 14, 10, 7, 5, 3.5, 2, 1) + tuple(2.0**-k for k in range(1, 11))
MIN_STEPS_IN_HORIZON = 4  # a candidate step must fit at least this many times in the horizon
REFERENCE_MARGIN = 2  # candidates stay this many times coarser than the finest ladder level
SAME_STEP = 1e-12  # relative tolerance when comparing steps


@dataclass(frozen=True)
class Judged:
    """One candidate step judged by the rule.

    ``ratios`` per quantity: numerical error over parameter sd (inf where undefined);
    ``note`` says why a step was not run (beyond the stability limit).
    """

    step: float
    adequate: bool
    worst_ratio: float | None
    ratios: list[float] = field(default_factory=list)
    artefacts: list[str] = field(default_factory=list)
    member_steps: int = 0
    seconds: float = 0.0
    note: str | None = None


@dataclass(frozen=True)
class Recommendation:
    """The coarsest adequate step (None if none qualifies), and every step judged."""

    step: float | None
    half_check: Judged | None
    tried: list[Judged]
    reason: str | None


def candidate_steps(case: Case, finest: float) -> list[float]:
    """Steps to try, coarsest first: round multiples of the time unit and the case's step."""
    steps = {float(m) for m in STEP_MULTIPLES} | {case.step}
    keep = [
        s
        for s in steps
        if REFERENCE_MARGIN * finest <= s * (1 + SAME_STEP)
        and s * MIN_STEPS_IN_HORIZON <= case.horizon * (1 + SAME_STEP)
    ]
    return sorted(keep, reverse=True)


def stable_limit(limits: dict) -> float:
    """The largest step that is stable for every member of the ensemble [time]."""
    stable = np.asarray(limits["stable"], dtype=float)
    return float(np.min(stable)) if np.isfinite(stable).any() else math.inf


def roundoff_bound(case: Case, reference: np.ndarray, q: int, step: float, scale: float) -> float:
    """The a-priori round-off bound n u |N| of quantity ``q`` at ``step`` [its unit].

    ``scale`` is the largest |N| of the reference level [population]; a time read off a
    crossing takes the largest reference time instead (common practice, no source).
    """
    spec = case.quantities[q]
    size = scale
    if spec.kind == "time-to":
        finite = np.abs(reference[q][np.isfinite(reference[q])])
        size = float(finite.max()) if finite.size else 0.0
    return n_steps_for(case.horizon, step) * UNIT_ROUNDOFF[np.float64] * size


def judge_step(case: Case, candidates: Candidates, reference, step: float, allowances,
               scale: float) -> Judged:  # fmt: skip
    """Apply the verdict rule to the ensemble at ``step`` against the reference.

    ``ratios`` are the numerical errors in units of each quantity's allowance
    (:mod:`errbudget.budget.allowance`): the step is adequate when none exceeds 1 and no
    artefact appears.
    """
    level = candidates.level(step)
    errors = discretisation_errors(case, level.values, reference)
    ratios = []
    for q in range(len(case.quantities)):
        if not np.isfinite(errors[q]).all():
            ratios.append(math.inf)
            continue
        discretisation = candidates.percentile(errors[q], case.budget.percentile)
        numerical = discretisation + roundoff_bound(case, reference, q, step, scale)
        allowed = allowances[q]
        ratios.append(numerical / allowed if allowed > 0 else (0.0 if numerical == 0 else math.inf))
    present = candidates.artefacts(step)
    worst = max(ratios)
    return Judged(
        step=step,
        adequate=worst <= 1.0 and not present,
        worst_ratio=worst,
        ratios=ratios,
        artefacts=present,
        member_steps=level.member_steps,
        seconds=level.seconds,
    )


def recommend(case: Case, candidates: Candidates, reference, *, allowances, limits,
              scale: float) -> Recommendation:  # fmt: skip
    """The coarsest candidate that meets the rule and whose half meets it too.

    Candidates are stepped in the order the rule needs them and the search stops at the
    answer; steps beyond the ensemble's stability limit are listed but not run.
    """
    finest = candidates.finest.step
    limit = stable_limit(limits)
    tried: list[Judged] = []
    for step in candidate_steps(case, finest):
        if step >= limit:
            tried.append(Judged(step, False, None, note="beyond the stability limit"))
            continue
        result = judge_step(case, candidates, reference, step, allowances, scale)
        tried.append(result)
        if result.adequate:
            half = judge_step(case, candidates, reference, step / 2, allowances, scale)
            if half.adequate:
                return Recommendation(step, half, tried, None)
    if not tried:
        reason = "the horizon is too short for any candidate step; lengthen it or give a finer step"
    else:
        reason = why_none(case, tried, allowances, reference, scale)
    return Recommendation(None, None, tried, reason)


def why_none(case: Case, tried: Sequence[Judged], allowances, reference, scale: float) -> str:
    """Why no candidate qualifies, and what would change that."""
    finest = tried[-1].step
    finest_text = with_unit(f"{finest:g}", finest, case.time_unit)
    start = f"no candidate step down to {finest_text} meets the rule"
    for q, spec in enumerate(case.quantities):
        allowed = allowances[q]
        if allowed <= 0:
            return (
                f'{start}: "{spec.name}" has no parameter spread, so it leaves no allowance '
                "for numerical error; make an input it depends on uncertain, or drop it "
                "from the budget"
            )
        if roundoff_bound(case, reference, q, finest, scale) > allowed:
            return (
                f'{start}: round-off would dominate "{spec.name}" before the '
                "discretisation error is small enough; raise [budget] fraction or accept "
                "a wider allowance"
            )
    judged = [t for t in tried if t.worst_ratio is not None]
    if judged and all(t.artefacts for t in judged):
        codes = ", ".join(sorted({a for t in judged for a in t.artefacts}))
        return (
            f"{start}: every candidate shows artefacts ({codes}); check the law and its parameters"
        )
    return (
        f"{start}: the adequate step is finer than the reference levels reach (the finest "
        "reference level is capped); shorten the horizon, or raise [budget] fraction"
    )
