"""The compiled ensemble engine: numba kernels generated from checked rate expressions.

:func:`errbudget.solve.tableaux.integrate` (numpy, vectorised over the ensemble) stays the
reference implementation and the path for float32 / long double round-off runs. This module
gives the same states for binary64 runs. The kernels release the GIL and each thread fills
its own columns (members) of the output, so both cores are used; each member's arithmetic is
the same whatever the thread count, so a parallel run equals a single-core run bit for bit.

Built-in laws are compiled from the rate written in their declaration (``rate_text``),
custom laws from the checked tree of their
:class:`~errbudget.laws.expression.RateExpression`, through the same whitelist. Without
numba, :func:`kernel_for` returns None and the caller (:func:`errbudget.solve.ensemble.solve`)
uses the numpy reference.
"""

from __future__ import annotations

import importlib.util
import os
import sys
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from errbudget.solve.tableaux import Scheme

# Threads sharing an ensemble: the cores this process may run on.
THREADS = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
_KERNELS: dict[str, object] = {}  # generated source -> compiled kernel, for this process
_STATE = {"numba": None}  # None: not tried yet; False: unavailable; else the module


@dataclass(frozen=True)
class RateSpec:
    """What the kernel needs to evaluate a law: checked tree, parameter order, unit factors.

    The rate is f(t, N, p) = out_factor * g(t * t_factor, N * n_factor, p_i * factor_i), g
    the expression; built-in laws have every factor equal to 1 (exact in binary64).
    """

    tree: object
    names: tuple[str, ...]
    factors: tuple[float, ...]
    t_factor: float = 1.0
    n_factor: float = 1.0
    out_factor: float = 1.0


def numba_module():
    """The numba module, or None when it cannot be imported (imported on first use only)."""
    if _STATE["numba"] is None:
        try:
            import numba
        except Exception:  # noqa: BLE001 - any import failure means: use the numpy path
            _STATE["numba"] = False
        else:
            _STATE["numba"] = numba
    return _STATE["numba"] or None


def rate_spec(model) -> RateSpec | None:
    """The compilable description of a :class:`~errbudget.laws.models.GrowthModel`, or None."""
    from errbudget.laws import expression as expr

    if model.rate_text is not None:  # a built-in law: its one written rate
        names = model.parameter_names
        tree = expr.parse_rate(model.rate_text, names).tree
        return RateSpec(tree, tuple(names), (1.0,) * len(names))
    if model.form != "custom":
        return None
    form = model.coherent
    if not form or not isinstance(form.get("expression"), expr.RateExpression):
        return None
    factors = form["factors"]
    names = tuple(sorted(factors))
    return RateSpec(
        form["expression"].tree,
        names,
        tuple(float(factors[name]) for name in names),
        float(form["t_factor"]),
        float(form["n_factor"]),
        float(form["out_factor"]),
    )


def module_for(spec: RateSpec, scheme: Scheme):
    """The generated kernel module for ``spec`` and ``scheme`` (loaded once), or None.

    The module holds ``kernel`` (whole trajectories) and ``stream`` (the streaming pass).
    """
    numba = numba_module()
    if numba is None:
        return None
    from errbudget.solve import codegen

    source = codegen.kernel_source(spec.tree, spec.names, scheme)
    if source not in _KERNELS:
        path = codegen.write_module(source)
        name = f"errbudget_kernels_{path.stem}"
        loader = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(loader)
        sys.modules[name] = module  # numba's cache re-imports the module by name on load
        loader.loader.exec_module(module)
        _KERNELS[source] = module
    return _KERNELS[source]


def kernel_for(spec: RateSpec, scheme: Scheme):
    """The compiled whole-trajectory kernel for ``spec`` and ``scheme``, or None."""
    module = module_for(spec, scheme)
    return None if module is None else module.kernel


def parameter_rows(spec: RateSpec, params: Mapping[str, np.ndarray], size: int) -> np.ndarray:
    """The law's parameters as rows (k, S) in the order of ``spec.names``, coherent units."""
    rows = np.empty((max(len(spec.names), 1), size))
    for index, (name, factor) in enumerate(zip(spec.names, spec.factors, strict=True)):
        value = np.broadcast_to(np.asarray(params[name], dtype=np.float64), (size,))
        # same product as case.py's coherent(p); skipped when exact (factor 1)
        rows[index] = value * factor if factor != 1.0 else value
    return rows


def run_threaded(function, size: int, threads: int | None, *args) -> None:
    """Call ``function(lo, hi, *args)`` on column ranges of ``size`` members, one per thread.

    The compiled functions release the GIL and write only their own members' columns, so
    the result does not depend on the thread count.
    """
    parts = _partition(size, threads if threads is not None else THREADS)
    if len(parts) == 1:
        function(*parts[0], *args)
        return
    pool = _pool(len(parts))
    jobs = [pool.submit(function, lo, hi, *args) for lo, hi in parts]
    for job in jobs:
        job.result()


def integrate_compiled(
    kernel,
    spec: RateSpec,
    n0: np.ndarray,
    params: Mapping[str, np.ndarray],
    step: float,
    n_steps: int,
    scheme: Scheme,
    threads: int | None = None,
    cleared: dict | None = None,
) -> np.ndarray:
    """Same contract as :func:`errbudget.solve.tableaux.integrate` with ``dtype=float64``.

    ``n0``, ``params``, ``step``, ``n_steps`` and ``scheme`` are as there (``scheme`` must be
    the tableau ``kernel`` was generated for by :func:`kernel_for` from ``spec``).
    ``threads`` shares the members among threads (default :data:`THREADS`); the states do
    not depend on it. Returns the states, shape (n_steps + 1, S), float64.
    """
    y0 = np.array(n0, dtype=np.float64).reshape(-1)
    size = y0.size
    rows = parameter_rows(spec, params, size)
    out = np.empty((n_steps + 1, size))
    out[0] = y0
    factors = (spec.t_factor, spec.n_factor, spec.out_factor)
    first = np.full(size, -1, dtype=np.int64)
    value = np.zeros(size)

    def fill(lo, hi):
        kernel(out, rows, float(step), int(n_steps), lo, hi, *factors, first, value)

    run_threaded(fill, size, threads)
    if cleared is not None:
        cleared["index"], cleared["value"] = first, value
    return out


_POOLS: dict[int, ThreadPoolExecutor] = {}


def _pool(threads: int) -> ThreadPoolExecutor:
    """One long-lived pool per thread count: starting threads for every solve costs more
    than many small solves themselves."""
    if threads not in _POOLS:
        _POOLS[threads] = ThreadPoolExecutor(threads, thread_name_prefix="errbudget")
    return _POOLS[threads]


def _partition(size: int, threads: int) -> list[tuple[int, int]]:
    """Column ranges, one per thread, in whole blocks; a single range for small ensembles."""
    from errbudget.solve.codegen import BLOCK

    blocks = -(-size // BLOCK)
    threads = max(1, min(threads, blocks))
    if threads == 1:
        return [(0, size)]
    edges = [min(size, BLOCK * (blocks * i // threads)) for i in range(threads + 1)]
    return [(lo, hi) for lo, hi in zip(edges[:-1], edges[1:], strict=True) if hi > lo]
