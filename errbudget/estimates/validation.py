"""Validation against field counts: the comparison error E = S - D and its uncertainty u_val.

At each count time t_i the model value S_i (the law at the fitted, or nominal, parameters,
solved accurately) is compared with the count D_i. Following the validation comparison of
ASME V&V 20-2009 (Standard for Verification and Validation in Computational Fluid Dynamics
and Heat Transfer, ASME, New York; recalled), the comparison error is E = S - D and its
validation uncertainty, for independent components, is

    u_val = sqrt(u_num^2 + u_input^2 + u_D^2),

with u_num the discretisation error at the case's step, u_input the spread of S caused by
the uncertain parameters, and u_D the sd of a count about the model value under the
observation model. When |E| exceeds k u_val (k = 2) at too many count times the mismatch
is larger than every known uncertainty explains: a better step will not fix a wrong equation,
and a "model-form" flag says so.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence

import numpy as np

from errbudget.solve.ensemble import n_steps_for
from errbudget.solve.tableaux import get_scheme, integrate
from errbudget.solve.trajectory import Trajectory

COVERAGE = 2.0  # common practice, no source: k = 2 coverage of |E| against u_val
MIN_EXCEED = 3  # this many count times beyond k u_val flag model-form error ...
EXCEED_SHARE = 0.25  # ... or more than this share of the count times
HORIZON_SLACK = 1e-9  # relative: a count at the horizon up to round-off is inside it

Values = Callable[[np.ndarray], np.ndarray] | Sequence[float] | np.ndarray


def observation_sd(error_model: str, mu: np.ndarray, nuisance: Mapping[str, float]) -> np.ndarray:
    """Standard deviation of a count about the model value, u_D [population unit].

    Poisson: sqrt(mu). Negative binomial (NB2, var = mu + mu^2 / k; Hilbe 2011, Negative
    Binomial Regression, 2nd ed., Cambridge University Press): sqrt(mu + mu^2 / k).
    Normal: sigma. Lognormal with ln D ~ N(ln mu, s^2), i.e. mu the median as in the fit:
    mu exp(s^2 / 2) sqrt(exp(s^2) - 1) (the sd of a lognormal variable; Johnson, Kotz &
    Balakrishnan 1994, Continuous Univariate Distributions vol. 1, ch. 14, recalled). Each
    is the ``sd`` of the observation model's class in :mod:`errbudget.uncertainty.observation`.

    Parameters
    ----------
    error_model : str
        "poisson", "negative-binomial", "normal" or "lognormal".
    mu : array_like
        Model values [population unit].
    nuisance : mapping
        ``{"dispersion": k}`` [population unit] or ``{"sigma": s}`` (normal [population
        unit], lognormal [1]); ignored for Poisson.

    Returns
    -------
    numpy.ndarray
        u_D, same shape as ``mu`` [population unit].
    """
    from errbudget.uncertainty.observation import OBSERVATION_MODELS

    model = OBSERVATION_MODELS.get(error_model)
    if model is None:
        raise ValueError(f"unknown observation model {error_model!r}")
    phi = math.nan if model.nuisance is None else _nuisance(nuisance, model.nuisance.name)
    return model.sd(np.asarray(mu, dtype=float), float(phi))


def _nuisance(nuisance: Mapping, name: str) -> float:
    value = nuisance.get(name)
    if isinstance(value, Mapping):  # the budget.json form {"value": ..., "unit": ...}
        value = value.get("value")
    if value is None:
        raise ValueError(f"the observation model needs the nuisance parameter {name!r}")
    return float(value)


def _times_and_counts(fit_or_counts) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Count times, counts and (for a fit) the fitted model values at those times."""
    counts = getattr(fit_or_counts, "counts", None)
    if hasattr(counts, "times"):  # a CaseFit: .counts is a Counts
        return (
            np.asarray(counts.times, dtype=float),
            np.asarray(counts.counts, dtype=float),
            np.asarray(fit_or_counts.result.fitted, dtype=float),
        )
    if counts is not None and hasattr(fit_or_counts, "times"):  # a Counts
        return np.asarray(fit_or_counts.times, float), np.asarray(counts, float), None
    raise TypeError("fit_or_counts must be a CaseFit or a Counts")


def _at(values: Values | None, times: np.ndarray, what: str) -> np.ndarray:
    if values is None:
        return np.zeros(times.shape)
    result = values(times) if callable(values) else values
    result = np.asarray(result, dtype=float).reshape(-1)
    if result.shape != times.shape:
        raise ValueError(f"{what} gives {result.size} values for {times.size} count times")
    return result


def _plain(array: np.ndarray) -> list:
    return [float(x) if math.isfinite(x) else None for x in np.asarray(array, dtype=float)]


def compare_with_counts(
    case,
    fit_or_counts,
    reference_at: Values | None = None,
    u_input_at: Values | None = None,
    u_num_at: Values | None = None,
    error_model: str | None = None,
    nuisance: Mapping[str, float] | None = None,
) -> dict:
    """Comparison error E = S - D at each count time, against u_val (V&V 20 approach).

    Parameters
    ----------
    case : Case
        Gives the population and time units (and the horizon).
    fit_or_counts : CaseFit or Counts
        The counts D_i at times t_i [population unit, case time unit]. With a CaseFit the
        fitted model values are S unless ``reference_at`` is given.
    reference_at, u_input_at, u_num_at : callable or array_like, optional
        S, u_input and u_num at the count times: a function of the times (T,) returning
        (T,) values, or the (T,) values themselves [population unit]. u_input and u_num
        default to 0 (say so by passing them).
    error_model : str, optional
        Observation model (default: the fit's).
    nuisance : mapping, optional
        Its nuisance parameter (default: the fit's).

    Returns
    -------
    dict
        JSON-ready: times, unit, time_unit, S, D, E, u_val, u_num, u_input, u_D, exceed,
        n_exceed, n_times, coverage, flag (None or {"code": "model-form", "message"}),
        statement. Non-finite numbers become None.
    """
    times, observed, fitted = _times_and_counts(fit_or_counts)
    result = getattr(fit_or_counts, "result", None)
    error_model = error_model or getattr(result, "error", None)
    if error_model is None:
        raise ValueError("error_model is needed when no fit is given")
    nuisance = nuisance if nuisance is not None else getattr(result, "nuisance", {})
    if reference_at is None and fitted is None:
        raise ValueError("reference_at is needed when no fit is given")
    model = fitted if reference_at is None else _at(reference_at, times, "reference_at")
    u_input = np.abs(_at(u_input_at, times, "u_input_at"))
    u_num = np.abs(_at(u_num_at, times, "u_num_at"))
    u_data = observation_sd(error_model, model, nuisance)
    error = model - observed
    u_val = np.sqrt(u_num**2 + u_input**2 + u_data**2)
    with np.errstate(invalid="ignore"):
        exceed = np.abs(error) > COVERAGE * u_val
    usable = np.isfinite(error) & np.isfinite(u_val)
    exceed &= usable
    n_exceed, n_times = int(exceed.sum()), int(usable.sum())
    flag = _model_form_flag(case, times, error, u_val, usable, n_exceed, n_times)
    share = u_num**2 / np.where(u_val > 0, u_val**2, np.inf)
    statement = _statement(fitted is not None, n_times, n_exceed, flag, share)
    return {
        "times": _plain(times),
        "unit": case.population_unit,
        "time_unit": case.time_unit,
        "S": _plain(model),
        "D": _plain(observed),
        "E": _plain(error),
        "u_val": _plain(u_val),
        "u_num": _plain(u_num),
        "u_input": _plain(u_input),
        "u_D": _plain(u_data),
        "exceed": [bool(x) for x in exceed],
        "n_exceed": n_exceed,
        "n_times": n_times,
        "coverage": COVERAGE,
        "flag": flag,
        "statement": statement,
    }


def _model_form_flag(case, times, error, u_val, usable, n_exceed: int, n_times: int):
    """The model-form flag when too many counts lie beyond k u_val, else None."""
    if not n_times or not (n_exceed >= MIN_EXCEED or n_exceed > EXCEED_SHARE * n_times):
        return None
    worst = int(np.nanargmax(np.where(usable, np.abs(error) / u_val, -np.inf)))
    return {
        "code": "model-form",
        "message": (
            f"the model misses the counts by more than {COVERAGE:g} u_val at {n_exceed} of "
            f"{n_times} count times (worst at {times[worst]:g} {case.time_unit}: "
            f"E = {error[worst]:.4g} {case.population_unit}, u_val = {u_val[worst]:.3g} "
            f"{case.population_unit}); "
            "the growth law itself may be wrong, and a smaller step will not fix it"
        ),
    }


def _statement(fitted: bool, n_times: int, n_exceed: int, flag, share: np.ndarray) -> str:
    """The validation sentence: the comparison made, its outcome and u_num's share."""
    return (
        f"Following the V&V 20 comparison approach (ASME V&V 20-2009), the comparison error "
        f"E = S - D (model at the {'fitted' if fitted else 'nominal'} parameters "
        f"minus count) was set against u_val = sqrt(u_num^2 + u_input^2 + u_D^2) at {n_times} "
        f"count times: |E| > {COVERAGE:g} u_val at {n_exceed}. "
        + (
            "The model does not explain the counts within their uncertainty: model-form error "
            "is likely."
            if flag
            else "The differences are within what the known uncertainties explain."
        )
        + f" The discretisation error accounts for at most {100 * np.nanmax(share, initial=0):.2g}"
        "% of u_val^2."
    )


def validate_run(case, fit, count_values: np.ndarray | None) -> dict:
    """Validation of a run: S and u_D from the fit, u_input from the ensemble, u_num at the step.

    Parameters
    ----------
    case : Case
    fit : CaseFit
        The fit to the case's counts.
    count_values : numpy.ndarray or None
        The ensemble's accurate solutions at the count times, shape (T_c, M), over independent
        draws of the design; NaN after the horizon. Their sample sd is u_input
        [population unit]; counts after the horizon get u_input 0 and are named.

    Returns
    -------
    dict
        As :func:`compare_with_counts`.
    """
    times = np.asarray(fit.counts.times, dtype=float)
    u_input = np.zeros(times.shape)
    late = times > case.horizon * (1 + HORIZON_SLACK)
    if count_values is not None and count_values.shape[1] > 1:
        with np.errstate(invalid="ignore"):
            spread = np.nanstd(count_values, axis=1, ddof=1)
        u_input = np.where(late | ~np.isfinite(spread), 0.0, spread)
    u_num = np.abs(at_case_step(case, fit, times) - np.asarray(fit.result.fitted, dtype=float))
    data = compare_with_counts(case, fit, None, u_input, u_num)
    if late.any():
        data["statement"] += (
            f" {int(late.sum())} count(s) after the horizon carry no parameter spread (u_input 0)."
        )
    return data


def at_case_step(case, fit, times: np.ndarray) -> np.ndarray:
    """The law at the fitted parameters, solved with the case's scheme and step, at ``times``."""
    params = dict(case.nominal())
    params.update(zip(fit.result.names, (float(v) for v in fit.result.values), strict=True))
    law = {k: np.array([v]) for k, v in params.items() if k != "N0"}
    end = float(max(np.max(times), case.step))
    scheme = get_scheme(case.scheme)
    with np.errstate(all="ignore"):
        states = integrate(
            case.model.rate,
            np.array([params["N0"]]),
            law,
            case.step,
            n_steps_for(end, case.step),
            scheme,
        )
        traj = Trajectory(states, case.step, end, case.model.rate, law)
        return np.array([traj.value_at(float(t))[0][0] for t in times])
