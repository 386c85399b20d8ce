"""errbudget: is the time step of a population forecast small enough, given the data?

Public API: :func:`load_case`, :func:`run_case`, :func:`grid_convergence`.
"""

__version__ = "0.1.0"

from errbudget.case import load_case  # noqa: E402
from errbudget.convergence import grid_convergence  # noqa: E402
from errbudget.errors import InputError  # noqa: E402
from errbudget.run import run_case  # noqa: E402

__all__ = ["InputError", "__version__", "grid_convergence", "load_case", "run_case"]
