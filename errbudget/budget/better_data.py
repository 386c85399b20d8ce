"""What better data would buy: the recommended step and the spread with narrower inputs.

With counts, "better data" means twice as many counts of the same quality: the fitted
covariance is halved and the budget is run again on a new design. Without counts, each
uncertain input's standard deviation is halved in turn, and the budget is estimated on this
run's own ensemble by importance weighting: a member drawn from the input's distribution p
gets the weight p_half(x) / p(x), where p_half has the same centre and half the sd
(Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., ch. 10: importance sampling with
effective sample size (sum w)^2 / sum w^2). The weighted spread sets the narrower
allowance, and the candidate steps are judged on weighted percentiles of the same members'
errors, stepping finer candidates only where the narrower allowance needs them.
"""

from __future__ import annotations

import math

import numpy as np

from errbudget.budget import allowance, passes
from errbudget.budget.passes import Candidates, ReferencePass
from errbudget.budget.search import Recommendation, recommend
from errbudget.budget.wording import plain_step, with_unit
from errbudget.case.distributions import Distribution
from errbudget.case.load import Case
from errbudget.solve.ensemble import ensemble_params
from errbudget.solve.stream import Mapper
from errbudget.solve.tableaux import get_scheme
from errbudget.uncertainty.design import design_for_case
from errbudget.uncertainty.spread import spread_summary

MIN_EFFECTIVE = 100  # effective draws below which the reweighted estimate is called rough


def halved(dist: Distribution) -> Distribution:
    """The same distribution with half the standard deviation, about the same centre.

    Normal, lognormal and truncated normal: sd halved (same bounds for the truncated one);
    uniform and triangular: the support shrunk by half about the centre (the midpoint, the
    mode), which halves the sd of both.
    """
    if dist.kind in ("normal", "lognormal", "truncated-normal"):
        return Distribution(dist.kind, dist.nominal, dist.sd / 2, dist.low, dist.high, dist.mode)
    centre = dist.mode if dist.kind == "triangular" else (dist.low + dist.high) / 2
    return Distribution(
        dist.kind,
        dist.nominal,
        dist.sd,
        centre - (centre - dist.low) / 2,
        centre + (dist.high - centre) / 2,
        dist.mode,
    )


def weights(dist: Distribution, values: np.ndarray) -> np.ndarray:
    """Importance weights p_half(x) / p(x) of members drawn from ``dist``, normalised."""
    with np.errstate(all="ignore"):
        w = halved(dist).frozen().pdf(values) / dist.frozen().pdf(values)
    w = np.where(np.isfinite(w), w, 0.0)
    total = w.sum()
    return w / total if total > 0 else w


def effective_draws(w: np.ndarray) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2."""
    return float(w.sum() ** 2 / (w * w).sum()) if (w * w).sum() > 0 else 0.0


def weighted_spread(values: np.ndarray, w: np.ndarray, level: float) -> dict:
    """Weighted mean, sd and central interval of the finite ``values``."""
    finite = np.isfinite(values) & (w > 0)
    if finite.sum() < 2:
        return {"mean": None, "sd": None, "low": None, "high": None}
    x, v = values[finite], w[finite] / w[finite].sum()
    mean = float(np.sum(v * x))
    sd = float(math.sqrt(max(np.sum(v * (x - mean) ** 2), 0.0) / max(1 - np.sum(v * v), 1e-300)))
    low, high = np.percentile(
        x, [100 * (1 - level) / 2, 100 * (1 + level) / 2], weights=v, method="inverted_cdf"
    )
    return {"mean": mean, "sd": sd, "low": float(low), "high": float(high)}


def per_input(case: Case, candidates: Candidates, passed: ReferencePass, sampled: dict, iid,
              limits: dict, floor: float, now: float | None) -> dict:  # fmt: skip
    """For each uncertain input drawn on its own: its sd halved, the step and the spread."""
    inputs = {}
    for name, dist in case.uncertain().items():
        if name not in sampled:
            continue
        w = weights(dist, np.asarray(sampled[name], dtype=float))
        spreads = [
            weighted_spread(passed.reference[q, iid], w[iid], case.budget.level)
            for q in range(len(case.quantities))
        ]
        allowed = allowance.allowances(case, [s["sd"] for s in spreads], floor)
        found = recommend(
            case, candidates.weighted(w), passed.reference, allowances=allowed, limits=limits,
            scale=passed.scale,
        )  # fmt: skip
        inputs[name] = {
            "recommended_step": {"value": found.step, "unit": case.time_unit},
            "parameter_sd": {spec.name: spreads[q]["sd"] for q, spec in enumerate(case.quantities)},
            "effective_draws": effective_draws(w),
            "statement": _input_statement(case, name, now, found, effective_draws(w)),
        }
    if not inputs:
        return None
    return {
        "assumption": "each uncertain input's sd halved in turn, estimated by reweighting this "
        "run's ensemble (importance sampling)",
        "inputs": inputs,
        "statement": " ".join(item["statement"] for item in inputs.values()),
    }


def _input_statement(case: Case, name: str, now, found: Recommendation, effective: float) -> str:
    rough = " (a rough estimate: few members carry the weight)" if effective < MIN_EFFECTIVE else ""
    if found.step is None:
        return f"With the sd of {name} halved no candidate step would qualify{rough}."
    then = _steps(case, found.step)
    if now is not None and found.step < now:
        return (
            f"With the sd of {name} halved the coarsest adequate step would become {then} "
            f"(now {_steps(case, now)}){rough}."
        )
    return f"With the sd of {name} halved the coarsest adequate step would be {then}{rough}."


def _steps(case: Case, step: float) -> str:
    return with_unit(plain_step(step), step, case.time_unit)


def doubled_counts(case: Case, joint, n_base: int, seed: int, passed: ReferencePass, limits,
                   recommendation: Recommendation, floor: float,
                   mapper: Mapper | None = None) -> dict:  # fmt: skip
    """The budget again as if the counts were doubled: the fitted covariance halved.

    Better data narrow the parameter spread, which shrinks the allowance for numerical
    error: the adequate step may become finer. ``mapper`` runs member chunks as tasks.
    """
    design = design_for_case(case, joint.scaled(0.5), n_base, seed)
    ensemble = passes.ensemble_for(
        case, ensemble_params(case, design.values), design.independent_rows
    )
    order = get_scheme(case.scheme).order
    again = passes.reference_pass(
        case, ensemble, order, passed.finer_step, passed.finest_step, mapper=mapper
    )
    spreads = [
        spread_summary(again.reference[q, design.independent_rows], case.budget.level)
        for q in range(len(case.quantities))
    ]
    allowed = allowance.allowances(case, [s["sd"] for s in spreads], floor)
    better = recommend(
        case, Candidates(case, ensemble, again, mapper=mapper), again.reference, allowances=allowed,
        limits=limits, scale=again.scale,
    )  # fmt: skip
    return {
        "assumption": "twice as many counts of the same quality: the covariance of the fitted "
        "parameters halved",
        "recommended_step": {"value": better.step, "unit": case.time_unit},
        "parameter_sd": {spec.name: spreads[q]["sd"] for q, spec in enumerate(case.quantities)},
        "statement": _counts_statement(case, recommendation.step, better),
    }


def _counts_statement(case: Case, now: float | None, better) -> str:
    then = better.step
    if then is None:
        return f"With twice as many counts no candidate step would qualify: {better.reason}."
    if now is not None and then < now:
        return (
            f"With twice as many counts the parameter spread narrows and the coarsest "
            f"adequate step would become {_steps(case, then)} (now {_steps(case, now)}): better "
            "data demand a finer step."
        )
    return f"With twice as many counts the coarsest adequate step would be {_steps(case, then)}."
