"""Run the case's law over an ensemble of parameter sets at one step, and read quantities."""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from errbudget.solve import engine
from errbudget.solve.problem import Problem
from errbudget.solve.tableaux import Scheme, get_scheme, integrate
from errbudget.solve.trajectory import Trajectory, evaluate

USE_COMPILED = True  # False forces the numpy reference path (tests, benchmarks)
_COMPILED: dict[tuple, tuple] = {}  # (id(law), scheme) -> (law, (module, spec) or None)


def n_steps_for(horizon: float, step: float) -> int:
    """Steps needed to reach the horizon (the last may pass it) [count]."""
    return max(1, math.ceil(horizon / step - 1e-9))


def solve(
    case: Problem,
    params: Mapping[str, np.ndarray],
    step: float,
    scheme: Scheme | None = None,
    dtype: type = np.float64,
) -> Trajectory:
    """Integrate the case's law for every member of ``params`` (which includes N0).

    Parameters
    ----------
    case : Problem
    params : mapping of str to ndarray of shape (S,)
        Every parameter of the law, and N0 [internal units].
    step : float
        Time step [case time unit].
    scheme : Scheme, optional
        Defaults to the case's scheme.
    dtype : numpy float type
        Arithmetic of the run.
    """
    scheme = scheme or get_scheme(case.scheme)
    law = {name: np.asarray(value, dtype=dtype) for name, value in params.items() if name != "N0"}
    n_steps = n_steps_for(case.horizon, step)
    found = compiled(case.model, scheme) if np.dtype(dtype) == np.float64 else None
    cleared: dict = {}
    if found is not None:
        module, spec = found
        states = engine.integrate_compiled(
            module.kernel, spec, params["N0"], law, step, n_steps, scheme, cleared=cleared
        )
    else:  # the numpy reference: float32 / long double, or numba unavailable
        states = integrate(
            case.model.rate, params["N0"], law, step, n_steps, scheme, dtype=dtype,
            cleared=cleared,
        )  # fmt: skip
    return Trajectory(
        states, step, case.horizon, case.model.rate, law,
        cleared_at=cleared["index"], cleared_value=cleared["value"],
    )  # fmt: skip


def compiled(model, scheme: Scheme) -> tuple[object, engine.RateSpec] | None:
    """The generated kernel module and rate description of ``model``, or None (use numpy).

    Remembered per (law object, scheme): the tree walk and the kernel lookup happen once
    per process. Any failure to generate or compile falls back to the numpy path.
    """
    if not USE_COMPILED:
        return None
    key = (id(model), scheme.name)
    found = _COMPILED.get(key)
    if found is None or found[0] is not model:
        try:
            spec = engine.rate_spec(model)
            module = engine.module_for(spec, scheme) if spec is not None else None
        except Exception:  # noqa: BLE001 - e.g. a read-only cache folder: numpy still works
            module = None
        found = (model, (module, spec) if module is not None else None)
        _COMPILED[key] = found
    return found[1]


def quantity_values(case: Problem, traj: Trajectory) -> tuple[np.ndarray, list[bool]]:
    """Values of every quantity of the case, shape (Q, S), and per quantity an off-grid flag."""
    values, off_grid = [], []
    for spec in case.quantities:
        value, off = evaluate(spec, traj)
        values.append(np.asarray(value, dtype=float))
        off_grid.append(off)
    return np.vstack(values), off_grid


def nominal_params(case: Problem) -> dict[str, np.ndarray]:
    """The nominal parameter set as one-member arrays."""
    return {name: np.array([value]) for name, value in case.nominal().items()}


def ensemble_params(case: Problem, sampled: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Sampled values for the uncertain inputs, nominal values broadcast for the fixed ones."""
    size = len(next(iter(sampled.values()))) if sampled else 1
    return {
        name: np.asarray(sampled[name], dtype=float) if name in sampled else np.full(size, value)
        for name, value in case.nominal().items()
    }
