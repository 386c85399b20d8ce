"""Estimates of growth-model parameters from field counts, with their uncertainty.

The caller supplies an accurate, vectorised solver ``simulate(theta) -> mu``: model values
at the count times for S parameter sets at once. Counts are modelled as independent draws
about mu under one observation model (:mod:`errbudget.uncertainty.observation`).

Without priors the estimates maximise the log-likelihood; their uncertainty is the inverse
observed information, or a parametric bootstrap where that fails
(:mod:`errbudget.uncertainty.information`). Positive parameters are estimated on the ln
scale, where the likelihood is more nearly quadratic, and the covariance of the natural-scale
estimates follows by the delta method, cov = diag(v) cov_ln diag(v), v the estimates (Casella
& Berger 2002, Statistical Inference, 2nd ed., section 5.5.4, recalled).

With a prior for some of the parameters (a fitted parameter that also has a distribution in
the case), the estimates are the posterior mode on the estimation scale, where each
parameter is unbounded (a logit scale for a prior on a bounded range), and the uncertainty
is the posterior's (:mod:`errbudget.uncertainty.posterior`): a normal on that scale, so
every value handed on lies inside the prior's support.
Numerical failure is returned as data (``converged=False`` and a message), never raised.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from errbudget.errors import InputError
from errbudget.uncertainty.fit_result import FitResult
from errbudget.uncertainty.information import (
    LOG_SD_LIMIT,
    bootstrap,
    hessian,
    inverse_information,
    poorly_determined,
)
from errbudget.uncertainty.likelihood import Problem, as_prior
from errbudget.uncertainty.observation import ERROR_MODELS, observation_model
from errbudget.uncertainty.optimise import optimise, starting_points
from errbudget.uncertainty.posterior import (
    IS_DRAWS,
    Posterior,
    choose,
    importance_sampling,
    prior_moments,
    transformed_moments,
)
from errbudget.uncertainty.scales import scale_for

__all__ = ["ERROR_MODELS", "FitResult", "fit_counts"]

RUNAWAY = 25.0  # estimation-scale distance from the start (a factor 7e10) taken as "ran off"
Z90 = 1.6448536269514722  # standard normal 95th percentile: central 90 % interval
# common practice, no source: a posterior sd at least this share of the prior's, with a mean
# that moved less than MOVED prior sd, means the counts barely inform the parameter.
BARELY_NARROWED = 0.8
MOVED = 0.5
# common practice, no source: a posterior mean this many prior sd from the prior mean means
# the counts contradict the prior.
CONFLICT = 3.0


@dataclass(frozen=True, eq=False)
class _Builder:
    """Turns an estimation-scale point and an uncertainty into a FitResult."""

    problem: Problem
    names: tuple[str, ...]

    def __call__(self, z, objective, converged, method, message, cov_log=None, **extra):
        problem = self.problem
        theta, phi = problem.split(z)
        values = theta[0]
        mu = problem.model(theta)[0]
        loglik = float(problem.parts(z)[0][0]) if math.isfinite(objective) else -math.inf
        cov = sd = None
        if cov_log is not None and "cov" not in extra:
            scale = np.array([s.derivative(zj) for s, zj in zip(problem.scales, z, strict=False)])
            cov = scale[:, None] * cov_log * scale[None, :]
            sd = np.sqrt(np.diag(cov))
        if "cov" in extra:
            cov = extra.pop("cov")
            sd = None if cov is None else np.sqrt(np.diag(cov))
        nuisance = problem.observation.nuisance_names
        phi0 = float(phi[0, 0]) if problem.m else math.nan
        return FitResult(
            names=self.names,
            values=values,
            cov=cov,
            sd=sd,
            log_scale=tuple(s.is_ln for s in problem.scales),
            cov_log=cov_log,
            error=problem.observation.name,
            nuisance={n: float(v) for n, v in zip(nuisance, phi[0], strict=True)},
            loglik=loglik,
            aic=2 * (problem.k + problem.m) - 2 * loglik,
            n_counts=problem.y.size,
            fitted=mu,
            residuals=problem.observation.pearson(problem.y, mu, phi0),
            converged=converged,
            uncertainty_method=method,
            message=message,
            scales=problem.scales,
            **extra,
        )


def _setup(simulate, names, start, times, counts, error, positive, priors):
    """Check the arguments; the Problem and the start on the estimation scale."""
    start = np.asarray(start, dtype=float)
    times = np.asarray(times, dtype=float)
    counts = np.asarray(counts, dtype=float)
    log_scale = np.ones(len(names), dtype=bool) if positive is None else np.array(positive, bool)
    priors = (None,) * len(names) if priors is None else tuple(as_prior(p) for p in priors)
    if start.shape != (len(names),) or log_scale.shape != (len(names),):
        raise ValueError("names, start and positive must have one entry per parameter")
    if len(priors) != len(names):
        raise ValueError("priors must have one entry (or None) per parameter")
    if counts.ndim != 1 or times.shape != counts.shape:
        raise ValueError("times and counts must be 1-D arrays of the same length")
    if not (np.all(np.isfinite(counts)) and np.all(np.isfinite(start))):
        raise ValueError("counts and start values must be finite")
    observation = observation_model(error)
    observation.check_counts(times, counts)
    scales = []
    for name, value, log, prior in zip(names, start, log_scale, priors, strict=True):
        if log and value <= 0:
            raise InputError(
                f"start value {value:g} of {name} is not positive; a positive "
                "parameter needs a positive starting value",
                where=name,
            )
        support = prior.support() if prior is not None else (-math.inf, math.inf)
        scale = scale_for(float(support[0]), float(support[1]), bool(log))
        if not scale.contains(value):
            raise InputError(
                f"start value {value:g} of {name} is outside the support of its prior "
                f"({scale.low:g} to {scale.high:g})",
                where=name,
            )
        scales.append(scale)
    bounds = np.log([observation.support(counts)]) if observation.nuisance else np.zeros((0, 2))
    problem = Problem(simulate, counts, observation, tuple(scales), priors, bounds)
    z_start = np.array([s.to_estimation(v) for s, v in zip(scales, start, strict=True)])
    return problem, z_start


def _too_few_counts(problem: Problem, names) -> str | None:
    """Why the counts cannot determine the estimated quantities, or None.

    A parameter with a prior needs no count of its own; the others and the nuisance do.
    """
    every = (*names, *problem.observation.nuisance_names)
    needed = sum(p is None for p in problem.priors) + problem.m
    if problem.y.size >= max(needed, 1):
        return None
    return (
        f"{problem.y.size} counts cannot determine {len(every)} quantities "
        f"({', '.join(every)}); no fit was made"
    )


def _failure(problem, names, z, objective, z0, nm_ok, polish_ok) -> str | None:
    """Why the optimum is not usable, or None."""
    if not np.isfinite(objective):
        return (
            "the likelihood is zero for every parameter set tried near the start "
            "values; check the start values and the counts"
        )
    # Nuisance parameters stay inside their bounded supports; a model parameter on a ln or
    # logit scale that moved this far ran off towards 0, infinity or a bound of its prior.
    bounded = [s.kind != "linear" for s in problem.scales]
    moved = np.abs(z[: problem.k] - z0[: problem.k]) > RUNAWAY
    runaway = [n for n, b, m in zip(names, bounded, moved, strict=True) if b and m]
    if not runaway and (nm_ok or polish_ok):
        return None
    reason = (
        f"{', '.join(runaway)} ran off towards 0 or infinity"
        if runaway
        else "the optimiser stopped before meeting its tolerances"
    )
    return f"the fit did not converge: {reason}; the counts may not determine these parameters"


def _held_note(problem: Problem, z: np.ndarray, held: np.ndarray) -> str:
    notes = []
    for i, name in enumerate(problem.observation.nuisance_names):
        if held[problem.k + i]:
            low, high = problem.nuisance_bounds[i]
            side = "upper" if z[problem.k + i] >= 0.5 * (low + high) else "lower"
            value = math.exp(z[problem.k + i])
            meaning = (
                "the counts are no more scattered than Poisson counts"
                if name == "dispersion" and side == "upper"
                else "the counts leave it undetermined"
            )
            notes.append(
                f"; {name} is held at the {side} end of its support ({value:.3g}): {meaning}"
            )
    return "".join(notes)


def fit_counts(
    simulate: Callable[[np.ndarray], np.ndarray],
    names: Sequence[str],
    start: Sequence[float] | np.ndarray,
    times: np.ndarray,
    counts: np.ndarray,
    error: str = "poisson",
    *,
    positive: Sequence[bool] | None = None,
    priors: Sequence | None = None,
    seed: int = 0,
    n_bootstrap: int = 200,
    uncertainty: str = "auto",
) -> FitResult:
    """Estimates of model parameters from counts, with their covariance.

    Parameters
    ----------
    simulate : callable
        ``simulate(theta)`` with theta of shape (S, k) [internal units] returns the model
        values at ``times``, shape (S, T) [population unit]. Non-finite values (or an
        ArithmeticError) mark a parameter set as impossible.
    names : sequence of str
        Names of the k estimated parameters, in the column order of theta.
    start : array_like
        Starting values (k,) [internal units], e.g. the nominal values of the case.
    times : numpy.ndarray
        Count times (T,) [internal time unit] (only used in messages; ``simulate`` knows
        them).
    counts : numpy.ndarray
        Observed values (T,) [population unit].
    error : str
        Observation model: "poisson"; "negative-binomial" (var = mu + mu^2 / k, k fitted);
        "lognormal" (ln y ~ N(ln mu, s^2), so mu is the median; s fitted); "normal"
        (y ~ N(mu, sigma^2), sigma fitted). Supports of k and s: see
        :mod:`errbudget.uncertainty.observation`.
    positive : sequence of bool, optional
        Per parameter: the parameter is positive (estimated on a ln scale without a prior;
        default True for all).
    priors : sequence, optional
        Per parameter: its prior (a case Distribution or a frozen scipy.stats distribution)
        or None. Any prior turns the fit into a posterior fit (module docstring).
    seed : int
        Seed of the screening of starting points, the bootstrap and the importance sampling.
    n_bootstrap : int
        Refits in the parametric bootstrap, used where the observed information fails
        (maximum likelihood only).
    uncertainty : str
        "auto" (observed information, bootstrap as fallback) or "bootstrap" (always);
        maximum likelihood only.

    Returns
    -------
    FitResult
        Never raises on numerical failure: ``converged`` and ``message`` say what happened.

    Raises
    ------
    errbudget.errors.InputError
        Unknown observation model, or counts it cannot describe (negative, fractional for
        Poisson / negative binomial, zero for lognormal), or a start value outside the
        support (non-positive for a positive parameter, outside its prior's range).
    """
    names = tuple(names)
    if uncertainty not in ("auto", "bootstrap"):
        raise ValueError(f"uncertainty must be 'auto' or 'bootstrap', got {uncertainty!r}")
    problem, z_model = _setup(simulate, names, start, times, counts, error, positive, priors)
    if problem.has_prior and uncertainty == "bootstrap":
        raise ValueError("a fit with priors takes its uncertainty from the posterior")
    rng = np.random.default_rng(seed)
    build = _Builder(problem, names)
    starts = starting_points(problem, z_model, rng)
    short = _too_few_counts(problem, names)
    if short is not None:
        return build(starts[0], math.inf, False, "none", short)
    z, objective, nm_ok, polish_ok = optimise(problem, starts)
    failure = _failure(problem, names, z, objective, starts[0], nm_ok, polish_ok)
    if failure is not None:
        return build(z, objective, False, "none", failure)
    held = problem.at_bound(z)
    if problem.has_prior:
        return _posterior_fit(build, problem, z, objective, held, rng, seed)
    return _likelihood_fit(build, problem, z, objective, held, uncertainty, n_bootstrap, rng)


def _likelihood_fit(build, problem, z, objective, held, uncertainty, n_bootstrap, rng):
    """Maximum likelihood: observed information, or a parametric bootstrap where it fails."""
    names = build.names
    log_scale = [s.is_ln for s in problem.scales]
    note = _held_note(problem, z, held)
    held_names = _held_names(problem, held)
    if uncertainty == "auto":
        cov_log, detail = inverse_information(hessian(problem, z, ~held), problem.k)
        weak = poorly_determined(names, log_scale, cov_log)
        if cov_log is not None and not weak:
            message = f"converged; uncertainty from the observed information ({detail}){note}"
            return build(
                z, objective, True, "observed information", message, cov_log, held=held_names
            )
        if weak:
            detail = (
                f"the curvature leaves {', '.join(weak)} nearly undetermined (sd of the "
                f"ln value > {LOG_SD_LIMIT:g})"
            )
        reason = f"{detail}, so the uncertainty comes from a parametric bootstrap"
    else:
        reason = "uncertainty from a parametric bootstrap, as requested"
    cov_log, detail = bootstrap(problem, z, n_bootstrap, rng)
    if cov_log is None:
        message = f"converged, but {reason} and {detail}; no uncertainty is available{note}"
        return build(z, objective, True, "none", message, held=held_names)
    weak = poorly_determined(names, log_scale, cov_log)
    caution = (
        f"; {', '.join(weak)} {'is' if len(weak) == 1 else 'are'} poorly determined by the counts"
        if weak
        else ""
    )
    message = f"converged; {reason} ({detail}){caution}{note}"
    return build(
        z,
        objective,
        True,
        "parametric bootstrap",
        message,
        cov_log,
        weak=tuple(weak),
        held=held_names,
    )


def _held_names(problem: Problem, held: np.ndarray) -> tuple[str, ...]:
    nuisance = problem.observation.nuisance_names
    return tuple(n for i, n in enumerate(nuisance) if held[problem.k + i])


def _posterior_fit(build, problem, z, objective, held, rng, seed):
    """Posterior mode with the Laplace approximation or importance sampling (posterior.py)."""
    free = ~held
    full_cov, detail = inverse_information(hessian(problem, z, free), int(free.sum()))
    laplace = None if full_cov is None else full_cov[: problem.k, : problem.k]
    sampled = importance_sampling(problem, z, free, full_cov, rng)
    chosen = choose(z, laplace, detail, sampled, problem.k, IS_DRAWS)
    summary, weak = _posterior_summary(problem, build.names, chosen, seed)
    note = _held_note(problem, z, held)
    if chosen.cov is None:
        message = f"converged (posterior mode); {chosen.message}; no uncertainty is available{note}"
        return build(
            z,
            objective,
            True,
            "none",
            message,
            posterior=summary,
            weak=weak,
            held=_held_names(problem, held),
        )
    sd_z = np.sqrt(np.diag(chosen.cov))
    sds, interval = [], []
    for scale, mean, spread in zip(problem.scales, chosen.center, sd_z, strict=True):
        sds.append(transformed_moments(scale, mean, spread)[1])
        interval.append(scale.to_natural(np.array([mean - Z90 * spread, mean + Z90 * spread])))
    correlation = chosen.cov / np.outer(sd_z, sd_z)
    message = f"converged (posterior mode); uncertainty: {chosen.message}{note}"
    return build(
        z,
        objective,
        True,
        chosen.method,
        message,
        chosen.cov,
        cov=correlation * np.outer(sds, sds),
        center=chosen.center,
        interval=np.array(interval),
        posterior=summary,
        weak=weak,
        held=_held_names(problem, held),
    )


def _posterior_summary(problem, names, chosen: Posterior, seed: int):
    """Prior and posterior moments per parameter, and the names the counts barely inform."""
    parameters, weak, conflict = {}, [], []
    sd_z = None if chosen.cov is None else np.sqrt(np.diag(chosen.cov))
    for j, (name, scale, prior) in enumerate(
        zip(names, problem.scales, problem.priors, strict=True)
    ):
        entry = {"scale": scale.describe(), "prior_mean": None, "prior_sd": None}
        if sd_z is not None:
            entry["posterior_mean"], entry["posterior_sd"] = transformed_moments(
                scale, chosen.center[j], sd_z[j]
            )
        if prior is not None:
            entry["prior_mean"], entry["prior_sd"] = prior_moments(prior, scale)
        if prior is not None and sd_z is not None and entry["prior_sd"] > 0:
            ratio = entry["posterior_sd"] / entry["prior_sd"]
            moved = abs(entry["posterior_mean"] - entry["prior_mean"]) / entry["prior_sd"]
            entry["sd_ratio"], entry["moved"] = ratio, moved
            if ratio >= BARELY_NARROWED and moved <= MOVED:
                weak.append(name)
            if moved > CONFLICT:
                conflict.append(name)
        elif prior is None and sd_z is not None and scale.is_ln and not sd_z[j] <= LOG_SD_LIMIT:
            weak.append(name)
        parameters[name] = entry
    summary = {
        "method": chosen.method,
        "importance_draws": chosen.n_draws,
        "effective_sample_size": chosen.ess,
        "seed": int(seed),
        "message": chosen.message,
        "parameters": parameters,
        "prior_conflict": conflict,
    }
    return summary, tuple(weak)
