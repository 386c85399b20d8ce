"""Maximum-likelihood estimates of growth-model parameters from field counts.

The caller supplies an accurate, vectorised solver ``simulate(theta) -> mu``: model values
at the count times for S parameter sets at once. Counts y_i at times t_i are modelled as
independent draws around mu_i = N(t_i; theta) under one observation model; the estimates
maximise the log-likelihood l(theta, phi) = sum_i ln p(y_i | mu_i, phi), phi being the
nuisance parameter of the observation model (none for Poisson).

Positive parameters are estimated on the ln scale, where the likelihood is more nearly
quadratic. The uncertainty of the estimates is the inverse of the observed information
(the numerical Hessian of -l at the optimum; Pawitan 2001, In All Likelihood: Statistical
Modelling and Inference Using Likelihood, Oxford University Press); where that matrix is not
usable, a parametric bootstrap (Efron & Tibshirani 1993, An Introduction to the Bootstrap,
Chapman & Hall, ch. 6). The covariance of the natural-scale estimates follows by the delta
method, cov = diag(v) cov_ln diag(v), v the estimates (Casella & Berger 2002, Statistical
Inference, 2nd ed., section 5.5.4, recalled).
Numerical failure is returned as data (``converged=False`` and a message), never raised.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import linalg, optimize
from scipy.special import betaln, gammaln, xlogy

from errbudget.errors import InputError, did_you_mean

ERROR_MODELS = ("poisson", "negative-binomial", "lognormal", "normal")
NUISANCE_NAMES = {
    "poisson": (),
    "negative-binomial": ("dispersion",),
    "lognormal": ("sigma",),
    "normal": ("sigma",),
}
MAX_CONDITION = 1e10  # common practice, no source: beyond this the inverse is mostly round-off
HESSIAN_STEP = 1e-3  # central-difference step on the estimation scale (ln units when positive)
GRADIENT_STEP = 1e-6  # central-difference step of the gradient used by the L-BFGS-B polish
LOG_LIMIT = 700.0  # exp overflows binary64 just above 709
# common practice, no source: a ln-scale sd above this (a 90 % interval wider than a factor
# 700) means the quadratic approximation of the likelihood cannot be trusted.
LOG_SD_LIMIT = 2.0
RUNAWAY = 25.0  # ln-scale distance from the start (a factor 7e10) taken as "ran off to 0 or inf"
N_SCREEN = 48  # random starting points screened in one batched call
SCREEN_WIDTH = 1.0  # half-width of the screening cloud in ln units (a factor e either way)
SIMPLEX_STEP = 0.2  # initial Nelder-Mead simplex edge [ln units, or relative for linear params]
NM_ITERATIONS_PER_DIM = 400  # Nelder-Mead iteration budget per estimated quantity
NB_DRAW_LIMIT = 1e12  # numpy's negative binomial sampler fails for huge k; this is Poisson
PENALTY = 1e100  # finite stand-in for an infinite -ln L, so that line searches stay defined
INTEGER_TOLERANCE = 1e-6  # Poisson / negative binomial counts must be whole numbers to this
BOOTSTRAP_SOLVES = 100_000  # parameter sets solved by all bootstrap refits together, at most
MIN_BOOTSTRAP_FRACTION = 0.5  # fewer successful refits than this share: no bootstrap estimate
_HALF_LN_2PI = 0.5 * math.log(2.0 * math.pi)


@dataclass(frozen=True, eq=False)
class FitResult:
    """Estimates, their uncertainty and diagnostics of one fit.

    Attributes
    ----------
    names : tuple of str
        Estimated model parameters.
    values : numpy.ndarray
        Estimates, shape (k,) [internal units of each parameter].
    cov : numpy.ndarray or None
        Covariance of the estimates, (k, k) [unit_i * unit_j], from the estimation-scale
        covariance by the delta method, cov = diag(v) cov_log diag(v) with v_i the estimate
        for a ln-scale parameter and 1 otherwise. None when unavailable.
    sd : numpy.ndarray or None
        Square roots of the diagonal of ``cov`` [units of each parameter].
    log_scale : tuple of bool
        Which parameters were estimated as ln(value).
    cov_log : numpy.ndarray or None
        Covariance on the estimation scale, (k, k) [ln units for ln-scale parameters].
    error : str
        Observation model, one of :data:`ERROR_MODELS`.
    nuisance : dict
        Fitted nuisance parameter: ``{"dispersion": k}`` (negative binomial, var = mu +
        mu^2 / k) [population unit], ``{"sigma": s}`` (normal [population unit]; lognormal:
        sd of ln y [1]); empty for Poisson.
    loglik : float
        Maximised log-likelihood [1] (-inf if none was found).
    aic : float
        Akaike information criterion, 2 (k + n_nuisance) - 2 loglik [1].
    n_counts : int
        Number of counts fitted.
    fitted : numpy.ndarray
        Model values mu at the count times, (T,) [population unit].
    residuals : numpy.ndarray
        Pearson residuals (y - E y) / sd(y) under the fitted observation model, (T,) [1].
    converged : bool
        Whether the optimiser found an interior maximum.
    uncertainty_method : str
        "observed information", "parametric bootstrap" or "none".
    message : str
        What happened, in a sentence or two.
    """

    names: tuple[str, ...]
    values: np.ndarray
    cov: np.ndarray | None
    sd: np.ndarray | None
    log_scale: tuple[bool, ...]
    cov_log: np.ndarray | None
    error: str
    nuisance: dict
    loglik: float
    aic: float
    n_counts: int
    fitted: np.ndarray
    residuals: np.ndarray
    converged: bool
    uncertainty_method: str
    message: str

    def to_dict(self, units: Mapping[str, str]) -> dict:
        """JSON-ready summary; ``units`` maps parameter (and nuisance) names to unit labels.

        Every non-finite number becomes None.
        """
        sd = self.sd if self.sd is not None else [None] * len(self.names)
        return {
            "parameters": {
                name: {
                    "value": _plain(value),
                    "sd": _plain(spread),
                    "unit": units.get(name),
                    "log_scale": bool(log),
                }
                for name, value, spread, log in zip(
                    self.names, self.values, sd, self.log_scale, strict=True
                )
            },
            "error": self.error,
            "n_counts": int(self.n_counts),
            "nuisance": {
                name: {"value": _plain(value), "unit": units.get(name)}
                for name, value in self.nuisance.items()
            },
            "covariance": _plain(self.cov),
            "covariance_estimation_scale": _plain(self.cov_log),
            "loglik": _plain(self.loglik),
            "aic": _plain(self.aic),
            "fitted": _plain(self.fitted),
            "residuals": _plain(self.residuals),
            "converged": bool(self.converged),
            "uncertainty_method": self.uncertainty_method,
            "message": self.message,
        }


def _plain(value):
    """Floats, nested lists and None (for anything missing or non-finite)."""
    if value is None:
        return None
    array = np.asarray(value, dtype=float)
    if array.ndim == 0:
        number = float(array)
        return number if math.isfinite(number) else None
    return [_plain(item) for item in array]


@dataclass(frozen=True, eq=False)
class _Problem:
    """One likelihood: data, observation model and the map from estimation scale."""

    simulate: Callable[[np.ndarray], np.ndarray]
    y: np.ndarray
    error: str
    log_scale: np.ndarray  # (k,) bool
    n_nuisance: int
    # Parameter sets solved so far, shared by copies made with dataclasses.replace.
    solved: list = field(default_factory=lambda: [0])

    @property
    def k(self) -> int:
        return self.log_scale.size

    def split(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Model parameters (S, k) and nuisance (S, m) from estimation-scale rows (S, k+m)."""
        z = np.atleast_2d(z)
        model = z[:, : self.k]
        theta = np.where(self.log_scale, np.exp(np.clip(model, -LOG_LIMIT, LOG_LIMIT)), model)
        return theta, np.exp(np.clip(z[:, self.k :], -LOG_LIMIT, LOG_LIMIT))

    def model(self, theta: np.ndarray) -> np.ndarray:
        """Model values (S, T); an arithmetic failure of the solver gives NaN rows."""
        self.solved[0] += theta.shape[0]
        with np.errstate(all="ignore"):
            try:
                mu = np.asarray(self.simulate(theta), dtype=float)
            except ArithmeticError:
                return np.full((theta.shape[0], self.y.size), np.nan)
        if mu.shape != (theta.shape[0], self.y.size):
            raise ValueError(
                f"simulate returned shape {mu.shape}, expected {(theta.shape[0], self.y.size)}"
            )
        return mu

    def nll(self, z: np.ndarray) -> np.ndarray:
        """-ln L for each row of ``z`` (S,); +inf where the likelihood is zero or undefined."""
        theta, nuisance = self.split(z)
        return _nll_from_mu(self.error, self.y, self.model(theta), nuisance)


def _log_terms(error: str, y: np.ndarray, mu: np.ndarray, nuisance: np.ndarray) -> np.ndarray:
    """ln p(y_i | mu_i, phi), shape (S, T); -inf where the model value is impossible.

    Poisson: y ln mu - mu - ln y!. Negative binomial with mean mu and dispersion k
    (var = mu + mu^2 / k, the "NB2" form of Hilbe 2011, Negative Binomial Regression, 2nd
    ed., Cambridge University Press):
    ln G(y + k) - ln G(k) - ln y! + k ln(k / (k + mu)) + y ln(mu / (k + mu)).
    Lognormal with median mu: ln y ~ N(ln mu, s^2). Normal: y ~ N(mu, s^2).
    """
    with np.errstate(all="ignore"):
        if error == "poisson":
            terms = xlogy(y, mu) - mu - gammaln(y + 1.0)
            impossible = mu < 0
        elif error == "negative-binomial":
            k = nuisance[:, :1]
            # ln G(y + k) - ln G(k) = ln G(y) - ln B(k, y) stays accurate for very large k.
            rising = np.where(
                y > 0, gammaln(np.maximum(y, 1.0)) - betaln(k, np.maximum(y, 1.0)), 0.0
            )
            terms = (
                rising - gammaln(y + 1.0) - k * np.log1p(mu / k) + xlogy(y, mu) - xlogy(y, k + mu)
            )
            impossible = mu < 0
        elif error == "lognormal":
            s = nuisance[:, :1]
            log_y = np.log(y)
            terms = -log_y - np.log(s) - _HALF_LN_2PI - 0.5 * ((log_y - np.log(mu)) / s) ** 2
            impossible = mu <= 0
        elif error == "normal":
            s = nuisance[:, :1]
            terms = -np.log(s) - _HALF_LN_2PI - 0.5 * ((y - mu) / s) ** 2
            impossible = np.zeros(mu.shape, dtype=bool)
        else:
            raise ValueError(f"unknown observation model {error!r}")
    return np.where(impossible | np.isnan(terms), -np.inf, terms)


def _nll_from_mu(error: str, y: np.ndarray, mu: np.ndarray, nuisance: np.ndarray) -> np.ndarray:
    with np.errstate(all="ignore"):
        total = -_log_terms(error, y, mu, nuisance).sum(axis=1)
    return np.where(np.isfinite(total), total, np.inf)


def _initial_nuisance(error: str, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """Moment estimates of ln(phi) given model values (S, T), as a starting point (S, m)."""
    with np.errstate(all="ignore"):
        if error == "poisson":
            return np.zeros((mu.shape[0], 0))
        if error == "negative-binomial":
            excess = np.mean((y - mu) ** 2 - mu, axis=1)  # the mu^2 / k part of the variance
            k = np.where(excess > 0, np.mean(mu**2, axis=1) / excess, 1e4 * np.max(mu, axis=1))
            phi = np.clip(k, 1e-3, 1e8)
        elif error == "lognormal":
            phi = np.sqrt(np.mean((np.log(y) - np.log(mu)) ** 2, axis=1))
        else:
            phi = np.sqrt(np.mean((y - mu) ** 2, axis=1))
        floor = 1e-6 * (np.mean(np.abs(y)) + 1.0)  # keeps ln(phi) finite for an exact fit
        log_phi = np.log(np.maximum(phi, floor))
    return np.where(np.isfinite(log_phi), log_phi, 0.0)[:, None]


def _objective(problem: _Problem) -> Callable[[np.ndarray], float]:
    return lambda x: float(problem.nll(x[None, :])[0])


def _value_and_gradient(problem: _Problem) -> Callable[[np.ndarray], tuple[float, np.ndarray]]:
    """-ln L and its central-difference gradient from one batched solver call (2d + 1 rows)."""

    def evaluate(x: np.ndarray) -> tuple[float, np.ndarray]:
        d = x.size
        steps = GRADIENT_STEP * np.maximum(1.0, np.abs(x))
        rows = np.repeat(x[None, :], 2 * d + 1, axis=0)
        rows[1 : d + 1] += np.diag(steps)
        rows[d + 1 :] -= np.diag(steps)
        f = problem.nll(rows)
        if not np.isfinite(f[0]):
            return PENALTY, np.zeros(d)
        up, down = f[1 : d + 1], f[d + 1 :]
        gradient = np.where(
            np.isfinite(up) & np.isfinite(down),
            (up - down) / (2 * steps),
            np.where(np.isfinite(up), (up - f[0]) / steps, (f[0] - down) / steps),
        )
        return float(f[0]), np.where(np.isfinite(gradient), gradient, 0.0)

    return evaluate


def _simplex(x0: np.ndarray, log_scale: np.ndarray) -> np.ndarray:
    """Initial Nelder-Mead simplex: ln-scale edges of fixed length, relative edges otherwise."""
    edges = np.where(log_scale, SIMPLEX_STEP, SIMPLEX_STEP * np.maximum(np.abs(x0), 1e-8))
    return np.vstack([x0, x0 + np.diag(edges)])


def _optimise(problem: _Problem, starts: Sequence[np.ndarray], restart: bool = True):
    """Nelder-Mead from each start, a restart from the best, then an L-BFGS-B polish.

    Bootstrap refits skip the restart (they start at the original estimate already) and use
    looser Nelder-Mead tolerances; the polish brings them to the optimum all the same.

    Returns (z, nll, nelder_mead_ok, polish_ok) for the best point found.
    """
    d = starts[0].size
    all_log = np.concatenate([problem.log_scale, np.ones(problem.n_nuisance, dtype=bool)])
    fun = _objective(problem)
    tolerance = 1.0 if restart else 1e3
    options = {
        "xatol": 1e-7 * tolerance,
        "fatol": 1e-9 * tolerance,
        "maxiter": NM_ITERATIONS_PER_DIM * d,
    }
    best = None
    for x0 in starts:
        if not np.isfinite(fun(x0)):
            continue
        result = optimize.minimize(
            fun,
            x0,
            method="Nelder-Mead",
            options={**options, "initial_simplex": _simplex(x0, all_log)},
        )
        if best is None or result.fun <= best.fun:
            best = result
    if best is None:
        return starts[0], math.inf, False, False
    if restart:  # a fresh simplex guards against one that collapsed too early
        simplex = _simplex(best.x, all_log)
        result = optimize.minimize(
            fun, best.x, method="Nelder-Mead", options={**options, "initial_simplex": simplex}
        )
        if result.fun <= best.fun:
            best = result
    polish = optimize.minimize(
        _value_and_gradient(problem), best.x, jac=True, method="L-BFGS-B", options={"maxiter": 200}
    )
    polished = polish.success and polish.fun <= best.fun and polish.fun < PENALTY
    z = polish.x if polished else best.x
    return z, float(fun(z)), bool(best.success), bool(polished)


def _hessian(problem: _Problem, z: np.ndarray) -> np.ndarray | None:
    """Central-difference Hessian of -ln L at ``z`` from one batched call; None if not finite.

    H_ii = (f(z + h_i) - 2 f(z) + f(z - h_i)) / h_i^2 and
    H_ij = (f(++) - f(+-) - f(-+) + f(--)) / (4 h_i h_j), error O(h^2) (Abramowitz &
    Stegun 1964, Handbook of Mathematical Functions, eqs. 25.3.23 and 25.3.26, recalled).
    """
    d = z.size
    all_log = np.concatenate([problem.log_scale, np.ones(problem.n_nuisance, dtype=bool)])
    h = np.where(all_log, HESSIAN_STEP, HESSIAN_STEP * np.maximum(np.abs(z), 1e-8))
    shift = np.diag(h)
    pairs = [(i, j) for i in range(d) for j in range(i + 1, d)]
    rows = [z, *(z + shift), *(z - shift)]
    for i, j in pairs:
        rows += [
            z + shift[i] + shift[j],
            z + shift[i] - shift[j],
            z - shift[i] + shift[j],
            z - shift[i] - shift[j],
        ]
    f = problem.nll(np.array(rows))
    if not np.all(np.isfinite(f)):
        return None
    hessian = np.empty((d, d))
    hessian[np.diag_indices(d)] = (f[1 : d + 1] - 2 * f[0] + f[d + 1 : 2 * d + 1]) / h**2
    for n, (i, j) in enumerate(pairs):
        pp, pm, mp, mm = f[2 * d + 1 + 4 * n : 2 * d + 5 + 4 * n]
        hessian[i, j] = hessian[j, i] = (pp - pm - mp + mm) / (4 * h[i] * h[j])
    return hessian


def _information_covariance(hessian: np.ndarray | None, k: int) -> tuple[np.ndarray | None, str]:
    """Model-parameter block of the inverse observed information, or None and the reason."""
    if hessian is None:
        return None, "the likelihood is not finite next to the optimum"
    if not np.allclose(hessian, hessian.T, rtol=1e-8, atol=0.0):
        return None, "the observed information is not symmetric"
    try:
        factor = linalg.cho_factor(hessian)
    except linalg.LinAlgError:
        return None, "the observed information is not positive definite"
    condition = np.linalg.cond(hessian)
    if not condition < MAX_CONDITION:
        return None, (
            f"the observed information is ill-conditioned (condition number "
            f"{condition:.1e} > {MAX_CONDITION:.0e})"
        )
    inverse = linalg.cho_solve(factor, np.eye(hessian.shape[0]))
    return 0.5 * (inverse[:k, :k] + inverse[:k, :k].T), f"condition number {condition:.1e}"


def _draw(
    error: str, mu: np.ndarray, phi: np.ndarray, rng: np.random.Generator, n: int
) -> np.ndarray:
    """``n`` synthetic count series (n, T) from the fitted observation model."""
    size = (n, mu.size)
    if error == "poisson":
        return rng.poisson(mu, size=size).astype(float)
    if error == "negative-binomial":
        k = min(phi[0], NB_DRAW_LIMIT)
        return rng.negative_binomial(k, k / (k + mu), size=size).astype(float)
    if error == "lognormal":
        return mu * np.exp(phi[0] * rng.standard_normal(size))
    return mu + phi[0] * rng.standard_normal(size)


def _bootstrap(
    problem: _Problem, z: np.ndarray, n: int, rng: np.random.Generator
) -> tuple[np.ndarray | None, str]:
    """Covariance (k, k) on the estimation scale of ``n`` refits to parametric resamples."""
    theta, phi = problem.split(z)
    mu = problem.model(theta)[0]
    if n < 2 or not np.all(np.isfinite(mu)) or np.any(mu < 0):
        return None, "no parametric bootstrap was possible"
    estimates = []
    stop_at = problem.solved[0] + BOOTSTRAP_SOLVES
    tried = 0
    for counts in _draw(problem.error, mu, phi[0], rng, n):
        if problem.solved[0] > stop_at:
            break  # deterministic work cap: the same data give the same number of refits
        tried += 1
        if problem.error == "lognormal" and np.any(counts <= 0):
            continue
        refit, value, nm_ok, polish_ok = _optimise(replace(problem, y=counts), [z], restart=False)
        if np.isfinite(value) and (nm_ok or polish_ok):
            estimates.append(refit[: problem.k])
    needed = max(problem.k + 2, math.ceil(MIN_BOOTSTRAP_FRACTION * tried))
    capped = f" (stopped after {tried} of {n}: work cap)" if tried < n else ""
    if len(estimates) < needed:
        return None, (
            f"only {len(estimates)} of {tried} bootstrap refits converged (at least {needed} "
            f"needed){capped}"
        )
    cov = np.atleast_2d(np.cov(np.array(estimates), rowvar=False))
    return cov, f"{len(estimates)} of {tried} bootstrap refits converged{capped}"


def _pearson(error: str, y: np.ndarray, mu: np.ndarray, phi: np.ndarray) -> np.ndarray:
    """(y - E y) / sd(y) under the fitted observation model."""
    with np.errstate(all="ignore"):
        if error == "poisson":
            mean, variance = mu, mu
        elif error == "negative-binomial":
            mean, variance = mu, mu + mu**2 / phi[0]
        elif error == "lognormal":
            s2 = phi[0] ** 2  # median mu: mean mu e^(s^2/2), variance (e^(s^2) - 1) e^(s^2) mu^2
            mean, variance = mu * np.exp(0.5 * s2), np.expm1(s2) * np.exp(s2) * mu**2
        else:
            mean, variance = mu, np.full_like(mu, phi[0] ** 2)
        return (y - mean) / np.sqrt(variance)


def _check_data(error: str, times: np.ndarray, counts: np.ndarray) -> None:
    """Refuse counts the observation model cannot describe (user-fixable: InputError)."""
    if error not in ERROR_MODELS:
        raise InputError(
            f'unknown observation model "{error}"{did_you_mean(error, ERROR_MODELS)}; '
            f"expected one of {', '.join(ERROR_MODELS)}",
            where="[counts] error",
        )
    if error != "normal" and np.any(counts < 0):
        i = int(np.argmax(counts < 0))
        raise InputError(
            f"count {counts[i]:g} at time {times[i]:g} is negative; the {error} "
            "observation model needs counts of zero or more"
        )
    if error in ("poisson", "negative-binomial"):
        off = np.abs(counts - np.round(counts)) > INTEGER_TOLERANCE * np.maximum(1.0, counts)
        if np.any(off):
            i = int(np.argmax(off))
            raise InputError(
                f"count {counts[i]:g} at time {times[i]:g} is not a whole number; the {error} "
                "observation model needs whole counts (use lognormal or normal for densities)"
            )
    if error == "lognormal" and np.any(counts <= 0):
        i = int(np.argmax(counts <= 0))
        raise InputError(
            f"count {counts[i]:g} at time {times[i]:g} is zero; the lognormal observation "
            "model needs positive counts (use negative-binomial or poisson)"
        )


def fit_counts(
    simulate: Callable[[np.ndarray], np.ndarray],
    names: Sequence[str],
    start: Sequence[float] | np.ndarray,
    times: np.ndarray,
    counts: np.ndarray,
    error: str = "poisson",
    *,
    positive: Sequence[bool] | None = None,
    seed: int = 0,
    n_bootstrap: int = 200,
    uncertainty: str = "auto",
) -> FitResult:
    """Maximum-likelihood estimates of model parameters from counts, with their covariance.

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
        (y ~ N(mu, sigma^2), sigma fitted).
    positive : sequence of bool, optional
        Per parameter: estimate ln(value) (default True for all).
    seed : int
        Seed of the screening of starting points and of the bootstrap.
    n_bootstrap : int
        Refits in the parametric bootstrap, used where the observed information fails.
    uncertainty : str
        "auto" (observed information, bootstrap as fallback) or "bootstrap" (always).

    Returns
    -------
    FitResult
        Never raises on numerical failure: ``converged`` and ``message`` say what happened.

    Raises
    ------
    errbudget.errors.InputError
        Unknown observation model, or counts it cannot describe (negative, fractional for
        Poisson / negative binomial, zero for lognormal), or a non-positive start value of a
        positive parameter.
    """
    names = tuple(names)
    start = np.asarray(start, dtype=float)
    times = np.asarray(times, dtype=float)
    counts = np.asarray(counts, dtype=float)
    log_scale = np.ones(len(names), dtype=bool) if positive is None else np.array(positive, bool)
    if start.shape != (len(names),) or log_scale.shape != (len(names),):
        raise ValueError("names, start and positive must have one entry per parameter")
    if counts.ndim != 1 or times.shape != counts.shape:
        raise ValueError("times and counts must be 1-D arrays of the same length")
    if not (np.all(np.isfinite(counts)) and np.all(np.isfinite(start))):
        raise ValueError("counts and start values must be finite")
    if uncertainty not in ("auto", "bootstrap"):
        raise ValueError(f"uncertainty must be 'auto' or 'bootstrap', got {uncertainty!r}")
    _check_data(error, times, counts)
    for name, value, log in zip(names, start, log_scale, strict=True):
        if log and value <= 0:
            raise InputError(
                f"start value {value:g} of {name} is not positive; a positive "
                "parameter needs a positive starting value",
                where=name,
            )

    nuisance_names = NUISANCE_NAMES[error]
    problem = _Problem(simulate, counts, error, log_scale, len(nuisance_names))
    z_model = np.where(log_scale, np.log(np.where(log_scale, start, 1.0)), start)
    rng = np.random.default_rng(seed)
    n_estimated = len(names) + len(nuisance_names)

    def result(z, nll, converged, method, message, cov_log=None) -> FitResult:
        theta, phi = problem.split(z)
        values = theta[0]
        mu = problem.model(theta)[0]
        cov = sd = None
        if cov_log is not None:
            scale = np.where(log_scale, values, 1.0)
            cov = scale[:, None] * cov_log * scale[None, :]
            sd = np.sqrt(np.diag(cov))
        loglik = -nll
        return FitResult(
            names=names,
            values=values,
            cov=cov,
            sd=sd,
            log_scale=tuple(bool(b) for b in log_scale),
            cov_log=cov_log,
            error=error,
            nuisance={n: float(v) for n, v in zip(nuisance_names, phi[0], strict=True)},
            loglik=loglik,
            aic=2 * n_estimated - 2 * loglik,
            n_counts=counts.size,
            fitted=mu,
            residuals=_pearson(error, counts, mu, phi[0]),
            converged=converged,
            uncertainty_method=method,
            message=message,
        )

    starts = _starting_points(problem, z_model, rng)
    if counts.size < n_estimated:
        return result(
            starts[0],
            math.inf,
            False,
            "none",
            f"{counts.size} counts cannot determine {n_estimated} quantities "
            f"({', '.join((*names, *nuisance_names))}); no fit was made",
        )

    z, nll, nm_ok, polish_ok = _optimise(problem, starts)
    if not np.isfinite(nll):
        return result(
            z,
            nll,
            False,
            "none",
            "the likelihood is zero for every parameter set tried near the start "
            "values; check the start values and the counts",
        )
    # Every nuisance parameter is on the ln scale; a negative binomial dispersion may grow
    # without bound (the Poisson limit), which is a legitimate estimate, not a runaway.
    bounded = np.r_[log_scale, [error != "negative-binomial"] * len(nuisance_names)]
    moved = np.abs(z - starts[0]) > RUNAWAY
    every_name = (*names, *nuisance_names)
    runaway = [n for n, b, m in zip(every_name, bounded, moved, strict=True) if b and m]
    if runaway or not (nm_ok or polish_ok):
        reason = (
            f"{', '.join(runaway)} ran off towards 0 or infinity"
            if runaway
            else "the optimiser stopped before meeting its tolerances"
        )
        return result(
            z,
            nll,
            False,
            "none",
            f"the fit did not converge: {reason}; the counts may not determine these parameters",
        )

    if uncertainty == "auto":
        cov_log, detail = _information_covariance(_hessian(problem, z), len(names))
        weak = _poorly_determined(names, log_scale, cov_log)
        if cov_log is not None and not weak:
            return result(
                z,
                nll,
                True,
                "observed information",
                f"converged; uncertainty from the observed information ({detail})",
                cov_log,
            )
        if weak:
            detail = (
                f"the curvature leaves {', '.join(weak)} nearly undetermined (sd of the "
                f"ln value > {LOG_SD_LIMIT:g})"
            )
        reason = f"{detail}, so the uncertainty comes from a parametric bootstrap"
    else:
        reason = "uncertainty from a parametric bootstrap, as requested"
    cov_log, detail = _bootstrap(problem, z, n_bootstrap, rng)
    if cov_log is None:
        return result(
            z,
            nll,
            True,
            "none",
            f"converged, but {reason} and {detail}; no uncertainty is available",
        )
    weak = _poorly_determined(names, log_scale, cov_log)
    caution = (
        f"; {', '.join(weak)} {'is' if len(weak) == 1 else 'are'} poorly determined by the counts"
        if weak
        else ""
    )
    return result(
        z, nll, True, "parametric bootstrap", f"converged; {reason} ({detail}){caution}", cov_log
    )


def _poorly_determined(
    names: Sequence[str], log_scale: np.ndarray, cov_log: np.ndarray | None
) -> list[str]:
    """Ln-scale parameters whose sd of ln(value) exceeds :data:`LOG_SD_LIMIT`."""
    if cov_log is None:
        return []
    sd = np.sqrt(np.abs(np.diag(cov_log)))
    return [
        name
        for name, log, spread in zip(names, log_scale, sd, strict=True)
        if log and not spread <= LOG_SD_LIMIT
    ]


def _starting_points(
    problem: _Problem, z_model: np.ndarray, rng: np.random.Generator
) -> list[np.ndarray]:
    """The given start and the best of a random cloud around it, screened in one call.

    Nuisance parameters start at their moment estimates given each point's model values.
    """
    spread = rng.uniform(-1.0, 1.0, size=(N_SCREEN, z_model.size))
    linear_width = 0.5 * np.maximum(np.abs(z_model), 1e-8)
    cloud = z_model + spread * np.where(problem.log_scale, SCREEN_WIDTH, linear_width)
    candidates = np.vstack([z_model, cloud])
    theta, _ = problem.split(
        np.hstack([candidates, np.zeros((len(candidates), problem.n_nuisance))])
    )
    mu = problem.model(theta)
    log_phi = _initial_nuisance(problem.error, problem.y, mu)[:, : problem.n_nuisance]
    full = np.hstack([candidates, log_phi])
    f = _nll_from_mu(problem.error, problem.y, mu, np.exp(log_phi))
    starts = [full[0]]
    best = int(np.argmin(f))
    if best != 0 and np.isfinite(f[best]):
        starts.append(full[best])
    return starts
