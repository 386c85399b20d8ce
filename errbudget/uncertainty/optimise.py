"""Finding the optimum of a fit's objective: screened starts, Nelder-Mead, an L-BFGS-B polish.

The objective is that of :class:`errbudget.uncertainty.likelihood.Problem` (-ln L, or the
negative log posterior with priors), on the estimation scale. Numerical failure is returned
as data (a flag per stage), never raised.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np
from scipy import optimize

from errbudget.uncertainty.likelihood import Problem

GRADIENT_STEP = 1e-6  # central-difference step of the gradient used by the L-BFGS-B polish
N_SCREEN = 48  # random starting points screened in one batched call
SCREEN_WIDTH = 1.0  # half-width of the screening cloud on unbounded scales (a factor e in ln)
SIMPLEX_STEP = 0.2  # initial Nelder-Mead simplex edge [ln units, or relative for linear params]
NM_ITERATIONS_PER_DIM = 400  # Nelder-Mead iteration budget per estimated quantity
PENALTY = 1e100  # finite stand-in for an infinite objective, so that line searches stay defined


def _objective(problem: Problem) -> Callable[[np.ndarray], float]:
    return lambda x: float(problem.nll(x[None, :])[0])


def _value_and_gradient(problem: Problem) -> Callable[[np.ndarray], tuple[float, np.ndarray]]:
    """The objective and its central-difference gradient from one batched call (2d + 1 rows)."""

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


def _simplex(x0: np.ndarray, relative: np.ndarray) -> np.ndarray:
    """Initial Nelder-Mead simplex: fixed edges on unbounded scales, relative on linear ones."""
    edges = np.where(relative, SIMPLEX_STEP * np.maximum(np.abs(x0), 1e-8), SIMPLEX_STEP)
    return np.vstack([x0, x0 + np.diag(edges)])


def optimise(problem: Problem, starts: Sequence[np.ndarray], restart: bool = True):
    """Nelder-Mead from each start, a restart from the best, then an L-BFGS-B polish.

    Bootstrap refits skip the restart (they start at the original estimate already) and use
    looser Nelder-Mead tolerances; the polish brings them to the optimum all the same.

    Returns
    -------
    tuple
        (z, objective, nelder_mead_ok, polish_ok) for the best point found; ln(phi) is held
        inside its support.
    """
    d = starts[0].size
    relative = problem.relative_step
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
            options={**options, "initial_simplex": _simplex(x0, relative)},
        )
        if best is None or result.fun <= best.fun:
            best = result
    if best is None:
        return starts[0], math.inf, False, False
    if restart:  # a fresh simplex guards against one that collapsed too early
        simplex = _simplex(best.x, relative)
        result = optimize.minimize(
            fun, best.x, method="Nelder-Mead", options={**options, "initial_simplex": simplex}
        )
        if result.fun <= best.fun:
            best = result
    polish = optimize.minimize(
        _value_and_gradient(problem), best.x, jac=True, method="L-BFGS-B", options={"maxiter": 200}
    )
    polished = polish.success and polish.fun <= best.fun and polish.fun < PENALTY
    z = problem.clip_nuisance(polish.x if polished else best.x)
    return z, float(fun(z)), bool(best.success), bool(polished)


def starting_points(
    problem: Problem, z_model: np.ndarray, rng: np.random.Generator
) -> list[np.ndarray]:
    """The given start and the best of a random cloud around it, screened in one call.

    Nuisance parameters start at their moment estimates given each point's model values.
    """
    spread = rng.uniform(-1.0, 1.0, size=(N_SCREEN, z_model.size))
    linear = problem.relative_step[: problem.k]
    linear_width = 0.5 * np.maximum(np.abs(z_model), 1e-8)
    cloud = z_model + spread * np.where(linear, linear_width, SCREEN_WIDTH)
    candidates = np.vstack([z_model, cloud])
    theta, _ = problem.split(np.hstack([candidates, np.zeros((len(candidates), problem.m))]))
    mu = problem.model(theta)
    log_phi = problem.observation.initial_nuisance(problem.y, mu)[:, : problem.m]
    full = np.hstack([candidates, log_phi])
    f = problem.objective_from(full, mu)
    starts = [full[0]]
    best = int(np.argmin(f))
    if best != 0 and np.isfinite(f[best]):
        starts.append(full[best])
    return starts
