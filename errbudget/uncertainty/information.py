"""Uncertainty of maximum-likelihood estimates: observed information and parametric bootstrap.

The covariance of the estimates on the estimation scale is the inverse of the observed
information, the Hessian of -ln L at the optimum (Pawitan 2001, In All Likelihood:
Statistical Modelling and Inference Using Likelihood, Oxford University Press); with priors
the same Hessian of the negative log posterior gives the Laplace approximation. Where that
matrix is not usable, a parametric bootstrap refits synthetic count series drawn from the
fitted observation model (Efron & Tibshirani 1993, An Introduction to the Bootstrap, Chapman
& Hall, ch. 6).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np
from scipy import linalg

from errbudget.uncertainty.likelihood import Problem
from errbudget.uncertainty.optimise import optimise

HESSIAN_STEP = 1e-3  # central-difference step on the estimation scale (ln units when positive)
MAX_CONDITION = 1e10  # common practice, no source: beyond this the inverse is mostly round-off
# common practice, no source: a ln-scale sd above this (a 90 % interval wider than a factor
# 700) means the quadratic approximation of the likelihood cannot be trusted.
LOG_SD_LIMIT = 2.0
BOOTSTRAP_SOLVES = 100_000  # parameter sets solved by all bootstrap refits together, at most
MIN_BOOTSTRAP_FRACTION = 0.5  # fewer successful refits than this share: no bootstrap estimate


def hessian(problem: Problem, z: np.ndarray, free: np.ndarray | None = None) -> np.ndarray | None:
    """Central-difference Hessian of the objective over the ``free`` coordinates of ``z``.

    H_ii = (f(z + h_i) - 2 f(z) + f(z - h_i)) / h_i^2 and
    H_ij = (f(++) - f(+-) - f(-+) + f(--)) / (4 h_i h_j), error O(h^2) (Abramowitz &
    Stegun 1964, Handbook of Mathematical Functions, eqs. 25.3.23 and 25.3.26, recalled).
    One batched call; None if any value is not finite. Coordinates not free (a nuisance
    parameter held at a bound of its support) keep their value.
    """
    index = np.flatnonzero(np.ones(z.size, bool) if free is None else free)
    d = index.size
    relative = HESSIAN_STEP * np.maximum(np.abs(z), 1e-8)
    h = np.where(problem.relative_step, relative, HESSIAN_STEP)[index]
    shift = np.zeros((d, z.size))
    shift[np.arange(d), index] = h
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
    result = np.empty((d, d))
    result[np.diag_indices(d)] = (f[1 : d + 1] - 2 * f[0] + f[d + 1 : 2 * d + 1]) / h**2
    for n, (i, j) in enumerate(pairs):
        pp, pm, mp, mm = f[2 * d + 1 + 4 * n : 2 * d + 5 + 4 * n]
        result[i, j] = result[j, i] = (pp - pm - mp + mm) / (4 * h[i] * h[j])
    return result


def inverse_information(matrix: np.ndarray | None, k: int) -> tuple[np.ndarray | None, str]:
    """Model-parameter block (k, k) of the inverse of a Hessian, or None and the reason."""
    if matrix is None:
        return None, "the likelihood is not finite next to the optimum"
    if not np.allclose(matrix, matrix.T, rtol=1e-8, atol=0.0):
        return None, "the observed information is not symmetric"
    try:
        factor = linalg.cho_factor(matrix)
    except linalg.LinAlgError:
        return None, "the observed information is not positive definite"
    condition = np.linalg.cond(matrix)
    if not condition < MAX_CONDITION:
        return None, (
            f"the observed information is ill-conditioned (condition number "
            f"{condition:.1e} > {MAX_CONDITION:.0e})"
        )
    inverse = linalg.cho_solve(factor, np.eye(matrix.shape[0]))
    return 0.5 * (inverse[:k, :k] + inverse[:k, :k].T), f"condition number {condition:.1e}"


def bootstrap(
    problem: Problem, z: np.ndarray, n: int, rng: np.random.Generator
) -> tuple[np.ndarray | None, str]:
    """Covariance (k, k) on the estimation scale of ``n`` refits to parametric resamples."""
    theta, phi = problem.split(z)
    mu = problem.model(theta)[0]
    if n < 2 or not np.all(np.isfinite(mu)) or np.any(mu < 0):
        return None, "no parametric bootstrap was possible"
    estimates = []
    stop_at = problem.solved[0] + BOOTSTRAP_SOLVES
    tried = 0
    nuisance = float(phi[0, 0]) if problem.m else math.nan
    positive_only = problem.observation.name == "lognormal"
    for counts in problem.observation.draw(mu, nuisance, rng, n):
        if problem.solved[0] > stop_at:
            break  # deterministic work cap: the same data give the same number of refits
        tried += 1
        if positive_only and np.any(counts <= 0):
            continue
        refit, value, nm_ok, polish_ok = optimise(replace(problem, y=counts), [z], restart=False)
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


def poorly_determined(
    names: Sequence[str], log_scale: Sequence[bool], cov_log: np.ndarray | None
) -> list[str]:
    """Ln-scale parameters whose sd of ln(value) exceeds :data:`LOG_SD_LIMIT` (flat profile)."""
    if cov_log is None:
        return []
    sd = np.sqrt(np.abs(np.diag(cov_log)))
    return [
        name
        for name, log, spread in zip(names, log_scale, sd, strict=True)
        if log and not spread <= LOG_SD_LIMIT
    ]
