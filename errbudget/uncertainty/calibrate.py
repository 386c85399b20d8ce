"""Link the case to its field counts: read them, fit the listed parameters, hand the fit on.

The model is solved for the fit with its closed-form solution where the law has one, and
otherwise with classical Runge-Kutta on a step refined until halving it changes the values
at the count times by less than FIT_TOLERANCE (relative), so the solver does not bias the
estimates.

A fitted parameter that also has a distribution in ``[parameters]`` takes it as its prior
(:func:`errbudget.uncertainty.fitting.fit_counts`); the joint distribution handed to the
design is a normal on each parameter's estimation scale, so a bounded prior's range holds
for every member. :func:`fit_flags` names the parameters the counts barely inform.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from errbudget.case.counts import Counts, read_case_counts
from errbudget.case.load import Case
from errbudget.solve.ensemble import solve
from errbudget.solve.tableaux import SCHEMES
from errbudget.uncertainty.fitting import FitResult, fit_counts
from errbudget.uncertainty.spread import JointNormal

FIT_TOLERANCE = 1e-8  # relative change at the count times accepted from halving the step
MAX_HALVINGS = 12


@dataclass(frozen=True)
class CaseFit:
    """A fit of the case's parameters to its counts, with what is needed downstream."""

    result: FitResult
    counts: Counts
    units: dict
    solver: str

    def to_dict(self) -> dict:
        data = self.result.to_dict(self.units)
        data["counts_sha256"] = self.counts.sha256
        data["counts_file"] = self.counts.path
        data["times"] = [float(t) for t in self.counts.times]
        data["counts"] = [float(c) for c in self.counts.counts]
        data["solver"] = self.solver
        return data


def simulator(case: Case, names: tuple[str, ...], times: np.ndarray):
    """A vectorised function theta (S, k) -> model values at ``times`` (S, T), and its label."""
    nominal = case.nominal()
    end = float(np.max(times))

    def params_for(theta: np.ndarray) -> dict[str, np.ndarray]:
        theta = np.atleast_2d(theta)
        size = theta.shape[0]
        full = {name: np.full(size, value) for name, value in nominal.items()}
        for column, name in enumerate(names):
            full[name] = theta[:, column]
        return full

    if case.model.exact is not None:

        def exact(theta: np.ndarray) -> np.ndarray:
            p = params_for(theta)
            law = {k: v[:, None] for k, v in p.items() if k != "N0"}
            with np.errstate(all="ignore"):
                return case.model.exact(times[None, :], p["N0"][:, None], law)

        return exact, "closed-form solution"

    rk4 = SCHEMES["rk4"]
    to_end = replace(case, horizon=end)

    def solve_at(theta: np.ndarray, step: float) -> np.ndarray:
        traj = solve(to_end, params_for(theta), step, scheme=rk4)  # compiled where possible
        return np.stack([traj.value_at(t)[0] for t in times], axis=1)

    step = min(case.step, end / 8)
    start = np.array([[nominal[n] for n in names]])
    for _ in range(MAX_HALVINGS):
        with np.errstate(all="ignore"):
            coarse, fine = solve_at(start, step), solve_at(start, step / 2)
            change = np.nanmax(np.abs(fine - coarse) / np.maximum(np.abs(fine), 1e-300))
        if change < FIT_TOLERANCE:
            break
        step /= 2

    def numeric(theta: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return solve_at(theta, step)

    return numeric, f"classical Runge-Kutta, step {step:g} {case.time_unit}"


def fit_from_counts(case: Case) -> CaseFit:
    """Read the case's counts and fit its ``[counts] fit`` parameters by maximum likelihood."""
    spec = case.counts
    counts = read_case_counts(case)
    names = spec.fit
    simulate, solver = simulator(case, names, counts.times)
    start = np.array([case.parameters[n].nominal for n in names])
    positive = [case.parameters[n].nominal > 0 for n in names]
    result = fit_counts(
        simulate,
        names,
        start,
        counts.times,
        counts.counts,
        spec.error,
        positive=positive,
        priors=[case.parameters[n].dist for n in names],
        seed=case.budget.seed,
    )
    units = {name: p.unit for name, p in case.parameters.items()}
    units.update(
        {
            "dispersion": case.population_unit,
            "sigma": case.population_unit if spec.error == "normal" else "1",
        }
    )
    return CaseFit(result, counts, units, solver)


def joint_from_fit(fit: CaseFit, flags: list[dict]) -> JointNormal | None:
    """The fitted parameters' joint distribution, or None (prior spread kept, flagged).

    A normal on each parameter's estimation scale (ln, logit within a prior's range, ...)
    with the fit's covariance there; its mean is the posterior mean on that scale when the
    fit sampled the posterior, else the estimate. Appends to ``flags`` the fit-failed flag,
    or the flags of :func:`fit_flags`.
    """
    result = fit.result
    if not result.converged or result.cov_log is None:
        flags.append(
            {
                "code": "fit-failed",
                "message": (
                    f"the fit to the counts did not give usable estimates ({result.message}); the "
                    "budget uses the case's prior spread for " + ", ".join(result.names)
                ),
            }
        )
        return None
    scales = result.scales
    if result.center is not None:
        mean = np.asarray(result.center, dtype=float)
    else:
        mean = np.array([s.to_estimation(v) for s, v in zip(scales, result.values, strict=True)])
    flags.extend(fit_flags(fit))
    return JointNormal(
        names=tuple(result.names),
        mean=mean,
        cov=np.array(result.cov_log),
        group="fitted",
        log_scale=tuple(scales),
    )


def fit_flags(fit: CaseFit) -> list[dict]:
    """Flags for budget.json about the fit (the caller appends them to ``flags``).

    ``weakly-informed``: the parameters the counts barely inform; with a prior, the
    posterior sd is at least 80 % of the prior's and its mean moved less than half a prior
    sd; without one, the sd of ln(value) exceeds 2 (a flat likelihood profile).
    ``prior-conflict``: the posterior mean lies more than 3 prior sd from the prior mean, so
    the counts contradict the stated distribution. Thresholds: common practice, no source.
    :func:`joint_from_fit` already appends these.
    """
    result = fit.result
    summary = result.posterior or {}
    parameters = summary.get("parameters", {})
    flags = []
    if result.weak:
        flags.append(_weak_flag(fit, parameters))
    conflict = summary.get("prior_conflict", [])
    if conflict:
        parts = [
            f"{name} (posterior mean {parameters[name]['posterior_mean']:.3g} "
            f"{fit.units.get(name, '')}, {parameters[name]['moved']:.1f} prior sd from the "
            f"prior mean {parameters[name]['prior_mean']:.3g})"
            for name in conflict
        ]
        flags.append(
            {
                "code": "prior-conflict",
                "message": "the counts contradict the stated distribution of "
                + "; ".join(parts)
                + ": check the counts, their units and the distributions in [parameters]",
            }
        )
    return flags


def _weak_flag(fit: CaseFit, parameters: dict) -> dict:
    result = fit.result
    parts = []
    for name in result.weak:
        unit = fit.units.get(name, "")
        entry = parameters.get(name, {})
        if entry.get("prior_sd"):
            parts.append(
                f"{name} (posterior sd {entry['posterior_sd']:.3g} {unit}, "
                f"{100 * entry['sd_ratio']:.0f}% of the prior's {entry['prior_sd']:.3g} {unit}; "
                f"mean moved {entry['moved']:.2f} prior sd)"
            )
        else:
            parts.append(f"{name} (the likelihood is nearly flat: sd of its ln value above 2)")
    prior_only = all(parameters.get(name, {}).get("prior_sd") for name in result.weak)
    one = len(result.weak) == 1
    its, them = ("its", "it") if one else ("their", "them")
    consequence = (
        f"{its} spread in the budget is essentially {its} prior's"
        if prior_only
        else f"{its} spread in the budget rests on little information"
    )
    return {
        "code": "weakly-informed",
        "message": (
            "the counts barely inform " + "; ".join(parts) + f": {consequence}; counts "
            f"over a longer stretch of the growth would narrow {them}"
        ),
    }
