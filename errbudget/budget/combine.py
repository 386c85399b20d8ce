"""Combining the components, and the verdict rule with its sentence.

Components are combined as independent standard uncertainties by root-sum-square (ASME V&V
20-2009, Standard for Verification and Validation in Computational Fluid Dynamics and Heat
Transfer, sec. 2). The verdict rule: for every quantity the numerical error (discretisation
at the stated ensemble percentile plus round-off) is at most ``fraction`` times the parameter
spread (standard deviation), and no artefact flag is raised.
"""

from __future__ import annotations

import math

from errbudget.budget.search import Recommendation
from errbudget.budget.wording import plain_step, with_unit
from errbudget.case.load import Case
from errbudget.estimates import artefacts

ARTEFACT_CODES = artefacts.CODES


def root_sum_square(numerical: float | None, sd: float | None) -> float | None:
    """sqrt(numerical^2 + sd^2) without overflow for values near the float limit."""
    if numerical is None or sd is None:
        return None
    return math.hypot(numerical, sd)


def shares(disc, rounding, sd) -> dict | None:
    """Each component's share of the combined variance (ASME V&V 20 root-sum-square)."""
    parts = {"discretisation": disc, "roundoff": rounding or 0.0, "parameter": sd}
    if any(v is None for v in parts.values()):
        return None
    largest = max(abs(v) for v in parts.values())
    if largest == 0:
        return dict.fromkeys(parts, 0.0)
    scaled = {k: (v / largest) ** 2 for k, v in parts.items()}  # scaled: no overflow
    total = sum(scaled.values())
    return {k: v / total for k, v in scaled.items()}


def verdict(case: Case, quantities: list[dict], artefact_flags: list[dict],
            recommendation: Recommendation) -> dict:  # fmt: skip
    """The verdict block of budget.json: adequate or not, why, and the recommended step.

    ``ratio`` is the binding quantity's numerical error in units of its allowance, the
    number the sentence states ("... times the allowance").
    """
    ratios = [(q["numerical_to_allowance"], q) for q in quantities]
    undefined = [q for r, q in ratios if r is None]
    binding = max(
        (pair for pair in ratios if pair[0] is not None), key=lambda p: p[0], default=(None, None)
    )[1]
    adequate = not undefined and not artefact_flags and all(r <= 1.0 for r, _ in ratios)
    first = _first_sentence(case, undefined, binding, adequate)
    if artefact_flags:
        first += " Artefacts at this step: " + ", ".join(f["code"] for f in artefact_flags) + "."
    rec = recommendation.step
    rec_text = (
        f"The coarsest adequate step is {with_unit(plain_step(rec), rec, case.time_unit)}."
        if rec is not None
        else f"No candidate step qualifies: {recommendation.reason}."
    )
    return {
        "adequate": bool(adequate),
        "fraction": case.budget.fraction,
        "recommended_step": {"value": rec, "unit": case.time_unit},
        "binding_quantity": binding["name"] if binding else None,
        "ratio": binding["numerical_to_allowance"] if binding else None,
        "reason": f"{first} {rec_text}",
    }


def _first_sentence(case: Case, undefined: list[dict], binding: dict | None, adequate) -> str:
    step_text = with_unit(plain_step(case.step), case.step, case.time_unit)
    if undefined:
        return (
            f'At {step_text}, the numerical error of "{undefined[0]["name"]}" cannot be set '
            "against an allowance (the error or the spread is undefined, or the allowance "
            "is zero): the step cannot be judged adequate."
        )
    if binding is None:
        return f"At {step_text}, no quantity could be evaluated."
    times = binding["numerical_to_allowance"]
    numerical = times * binding["allowance"] if binding["allowance"] else 0.0
    if adequate:
        verdict_text = "the step is adequate"
    elif times > 1:
        verdict_text = "the step is too coarse"
    else:
        verdict_text = "but artefacts make the step inadequate"
    sd = binding["parameter"]["sd"] or 0.0
    if binding["allowance"] is not None and binding["allowance"] > case.budget.fraction * sd:
        resolution = binding["resolution"]["value"]
        floor = with_unit(f"{resolution:.3g}", resolution, binding["unit"])
        allowance = f"allowance, the resolution of {floor}"
    else:
        allowance = f"{case.budget.fraction:.0%} allowance of its parameter spread"
    return (
        f'At {step_text}, the numerical error of "{binding["name"]}" is '
        f"{with_unit(f'{numerical:.3g}', numerical, binding['unit'])}, {times:.2g} times the "
        f"{allowance}: {verdict_text}."
    )
