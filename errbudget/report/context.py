"""From budget.json to the template's context: every number formatted, every gap explained.

Pure functions on dicts: no I/O, no markup (the template escapes all text it is given).
"""

from __future__ import annotations

import platform
from importlib import metadata

from errbudget.report import fmt, memo, sections
from errbudget.report.fmt import Cell
from errbudget.report.table import budget_table

QUESTION = (
    "Is the time step of this forecast small enough, given how well the parameters are known?"
)
LIBRARIES = ("numpy", "scipy", "SALib", "pint", "matplotlib", "Jinja2")
METHODS = [
    (
        "Discretisation error",
        "Each quantity is solved on a ladder of halved steps; the "
        "observed order of accuracy and Richardson extrapolation give a reference value, and the "
        "error of the case's step is taken over the whole parameter ensemble at the stated "
        "percentile.",
        "L. F. Richardson (1911), Phil. Trans. R. Soc. A 210, 307–357, doi:10.1098/rsta.1911.0009",
    ),
    (
        "Grid convergence index",
        "Roache's GCI with safety factor 1.25 (three or more levels "
        "and a trusted observed order) or 3, following the procedure of Celik et al. for the "
        "observed order and oscillatory convergence.",
        "P. J. Roache (1998), Verification and Validation in Computational Science and "
        "Engineering, Hermosa; I. B. Celik et al. (2008), J. Fluids Eng. 130, 078001, "
        "doi:10.1115/1.2960953",
    ),
    (
        "Parameter uncertainty",
        "Sampling design of Saltelli et al. over the uncertain inputs; "
        "first-order and total Sobol indices with bootstrap confidence intervals; forecast "
        "spread computed on accurate (extrapolated) solutions.",
        "I. M. Sobol' (2001), Math. Comput. Simul. 55, 271–280, "
        "doi:10.1016/S0378-4754(00)00270-6; A. Saltelli et al. (2010), Comput. Phys. Commun. "
        "181, 259–270, doi:10.1016/j.cpc.2009.09.018",
    ),
    (
        "Combining the components",
        "Independent standard uncertainties combined by "
        "root-sum-square; each component's share is its part of the combined variance.",
        "ASME V&V 20-2009, Standard for Verification and Validation in Computational Fluid "
        "Dynamics and Heat Transfer",
    ),
    (
        "Step limits",
        "Linear stability of the scheme at the model's stable equilibrium: the "
        "explicit Euler logistic map oscillates and then turns unstable as r·h grows.",
        "R. M. May (1976), Nature 261, 459–467, doi:10.1038/261459a0",
    ),
    (
        "Round-off",
        "The run is repeated in a wider float type and compared; the bound is the "
        "unit round-off times the number of steps times the size of the solution.",
        "N. J. Higham (2002), Accuracy and Stability of Numerical Algorithms, 2nd ed., SIAM, "
        "doi:10.1137/1.9780898718027",
    ),
]
CAUTIONS = [
    "Model-form error: whether the growth law itself fits the population is not part of "
    "this budget, beyond the validation check against counts when counts are given.",
    "Process noise and demographic stochasticity: the forecast is deterministic; chance "
    "births and deaths, weather and disease add spread that is not shown here.",
    "Changes in harvest, stocking, removal effort or the environment after the forecast "
    "start are not included.",
    "Errors in the counts beyond the stated observation model (missed animals, double "
    "counts, changing survey effort) are not included.",
]
DISCLAIMER = (
    "This report checks the arithmetic of a forecast, not whether the forecast or "
    "the decision is wise. Decisions about living stocks follow local regulations and "
    "the advice of qualified biologists."
)


def build(budget: dict, case_text: str) -> dict:
    """Everything the template shows except the figures."""
    sim = budget.get("simulation") or {}
    verdict = budget.get("verdict") or {}
    step = sim.get("step") or {}
    rec = verdict.get("recommended_step") or {}
    quantities = budget.get("quantities") or []
    return {
        "question": QUESTION,
        "title": (budget.get("case") or {}).get("title") or "untitled case",
        "adequate": bool(verdict.get("adequate")),
        "marker": "ADEQUATE" if verdict.get("adequate") else "NOT ADEQUATE",
        "reason": verdict.get("reason") or "no verdict was recorded",
        "case_step": fmt.step(step.get("value"), step.get("unit")),
        "recommended": fmt.step(
            rec.get("value"), rec.get("unit"), why="no candidate step meets the rule"
        ),
        "fraction": fmt.percent(verdict.get("fraction")),
        "same_step": step.get("value") is not None and step.get("value") == rec.get("value"),
        "forecast": memo.forecast_rows(budget),
        "attention": memo.attention(budget),
        "all_flags": memo.notes(budget),
        "since_brief": memo.since_brief(budget),
        "new_counts": memo.new_counts(budget),
        "facts": _facts(budget),
        "columns": [q.get("name", "") for q in quantities],
        "groups": budget_table(quantities, verdict.get("fraction")),
        "since_last": sections.changes(budget.get("since_last"), quantities),
        "fit": sections.fit_summary(budget.get("fit")),
        "validation": sections.validation(budget.get("validation")),
        "tried": sections.step_search(budget.get("recommendation") or {}),
        "better_data": sections.better_data(
            budget.get("better_data"), quantities, verdict.get("recommended_step")
        ),
        "cost": sections.cost((budget.get("run") or {}).get("cost")),
        "provenance": _provenance(budget),
        "ladder": ", ".join(
            fmt.step(s.get("value"), None).text
            for s in (budget.get("run") or {}).get("ladder") or []
        ),
        "methods": METHODS,
        "cautions": CAUTIONS,
        "disclaimer": DISCLAIMER,
        "case_text": case_text,
    }


def _facts(budget: dict) -> list[tuple[str, Cell]]:
    sim = budget.get("simulation") or {}
    step, horizon = sim.get("step") or {}, sim.get("horizon") or {}
    order = sim.get("formal_order")
    scheme = sim.get("scheme_label") or sim.get("scheme") or "not recorded"
    return [
        ("Growth law", Cell(sim.get("law") or "not recorded", not sim.get("law"))),
        ("Scheme", Cell(f"{scheme} (formal order {order})" if order else scheme)),
        ("Case's step", fmt.step(step.get("value"), step.get("unit"))),
        ("Horizon", _horizon(horizon, sim.get("start"))),
        ("Population unit", Cell(sim.get("population_unit") or "not recorded")),
    ]


def _horizon(horizon: dict, start) -> Cell:
    cell = fmt.step(horizon.get("value"), horizon.get("unit"))
    if start and horizon.get("date"):
        return Cell(f"{cell.text}, from {start} to {horizon['date']}")
    return cell


def _provenance(budget: dict) -> list[tuple[str, Cell]]:
    case, run = budget.get("case") or {}, budget.get("run") or {}
    versions = [f"Python {platform.python_version()}"]
    for name in LIBRARIES:
        try:
            versions.append(f"{name} {metadata.version(name)}")
        except metadata.PackageNotFoundError:
            versions.append(f"{name} not installed")
    elapsed = fmt.with_unit(run.get("elapsed_seconds"), "s", 2)
    return [
        ("Case file", Cell(case.get("path") or "not recorded")),
        ("Case SHA-256", Cell(case.get("sha256") or "not recorded")),
        ("Program", Cell(f"{run.get('package', 'errbudget')} {run.get('version', '')}".strip())),
        ("Libraries", Cell(", ".join(versions))),
        (
            "Run at",
            Cell(run["timestamp"])
            if run.get("timestamp")
            else Cell(fmt.NOT_AVAILABLE, True, "the run was not made through the command line"),
        ),
        ("Seed", fmt.scalar(run.get("seed"))),
        ("Base samples (Sobol design)", fmt.scalar(run.get("samples"))),
        ("Parameter sets solved", fmt.scalar(run.get("parameter_sets"))),
        ("Round-off measured by", Cell(run.get("roundoff_method") or "not recorded")),
        ("Computing time", elapsed),
        ("Schema", Cell(budget.get("schema") or "not recorded")),
    ]
