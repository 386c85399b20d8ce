"""errbudget: is the time step of a population forecast small enough, given the data?

Public API: :func:`load_case`, :func:`run_case`, :func:`grid_convergence`, and
:func:`run_cases` for a programme of cases (in this process or on a Dask cluster). They are
loaded on first use, so that ``import errbudget`` (and ``errbudget --version``) stays cheap.
"""

from __future__ import annotations

from importlib import import_module

from errbudget.errors import InputError

_LAZY = {
    "load_case": "errbudget.case.load",
    "run_case": "errbudget.budget.run",
    "grid_convergence": "errbudget.estimates.convergence",
    "run_cases": "errbudget.batch.driver",
}

__all__ = ["InputError", "__version__", "grid_convergence", "load_case", "run_case", "run_cases"]


def __getattr__(name: str):
    if name == "__version__":
        from errbudget.version import package_version

        return package_version()
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'errbudget' has no attribute {name!r}")
