"""Fixed-step explicit Runge-Kutta schemes as Butcher tableaux, and the ensemble stepper.

A scheme is data (its tableau, formal order and name); the stepping code exists once, in
:func:`integrate`, and advances a whole ensemble of parameter sets together as arrays.

References
----------
Hairer, Norsett & Wanner (1993), Solving Ordinary Differential Equations I, 2nd ed.,
Springer, doi:10.1007/978-3-540-78862-1 (tableaux, orders, stability functions).
Butcher (2016), Numerical Methods for Ordinary Differential Equations, 3rd ed., Wiley,
doi:10.1002/9781119121534.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from errbudget.errors import InputError, did_you_mean

Rate = Callable[[float, np.ndarray, Mapping[str, np.ndarray]], np.ndarray]


@dataclass(frozen=True)
class Scheme:
    """An explicit Runge-Kutta scheme.

    Attributes
    ----------
    name : str
        Key used in case files.
    label : str
        Readable name for reports.
    order : int
        Formal order of the global error.
    a : tuple of tuple of float
        Strictly lower-triangular coupling coefficients A (s x s).
    b : tuple of float
        Weights (s).
    c : tuple of float
        Nodes (s).
    """

    name: str
    label: str
    order: int
    a: tuple[tuple[float, ...], ...]
    b: tuple[float, ...]
    c: tuple[float, ...]

    @property
    def stages(self) -> int:
        return len(self.b)

    def stability_coefficients(self) -> np.ndarray:
        """Coefficients g_j of the stability polynomial R(z) = sum_j g_j z^j.

        For an explicit scheme R(z) = 1 + sum_{j>=1} z^j b^T A^(j-1) 1 (Hairer, Norsett &
        Wanner 1993, sec. IV.2), a polynomial of degree at most s.
        """
        a = np.array(self.a, dtype=float)
        b = np.array(self.b, dtype=float)
        coefficients = [1.0]
        power = np.ones(self.stages)
        for _ in range(self.stages):
            coefficients.append(float(b @ power))
            power = a @ power
        return np.array(coefficients)

    def stability(self, z: np.ndarray | complex) -> np.ndarray:
        """Stability function R(z) for the linear test equation y' = lambda y, z = h lambda.

        One step multiplies the deviation from an equilibrium by R(h J), J the Jacobian there.
        """
        return np.polynomial.polynomial.polyval(z, self.stability_coefficients())


SCHEMES: dict[str, Scheme] = {
    scheme.name: scheme
    for scheme in (
        Scheme("euler", "explicit Euler", 1, ((0.0,),), (1.0,), (0.0,)),
        Scheme(
            "heun",
            "Heun (explicit trapezoidal)",
            2,
            ((0.0, 0.0), (1.0, 0.0)),
            (0.5, 0.5),
            (0.0, 1.0),
        ),
        Scheme(
            "midpoint", "explicit midpoint", 2, ((0.0, 0.0), (0.5, 0.0)), (0.0, 1.0), (0.0, 0.5)
        ),
        Scheme(
            "rk4",
            "classical Runge-Kutta",
            4,
            (
                (0.0, 0.0, 0.0, 0.0),
                (0.5, 0.0, 0.0, 0.0),
                (0.0, 0.5, 0.0, 0.0),
                (0.0, 0.0, 1.0, 0.0),
            ),
            (1 / 6, 1 / 3, 1 / 3, 1 / 6),
            (0.0, 0.5, 0.5, 1.0),
        ),
    )
}


def get_scheme(name: str, where: str = "simulation.scheme") -> Scheme:
    """The scheme called ``name``; an :class:`InputError` lists the valid names."""
    try:
        return SCHEMES[name]
    except (KeyError, TypeError):
        valid = ", ".join(SCHEMES)
        hint = did_you_mean(str(name), SCHEMES)
        raise InputError(f"unknown scheme {name!r}{hint}; accepted: {valid}", where=where) from None


def integrate(
    rate: Rate,
    n0: np.ndarray,
    params: Mapping[str, np.ndarray],
    step: float,
    n_steps: int,
    scheme: Scheme,
    *,
    dtype: type = np.float64,
    cleared: dict | None = None,
    absorbing: bool = True,
) -> np.ndarray:
    """Advance every member of an ensemble with a fixed step; zero is absorbing.

    y_{n+1} = y_n + h sum_i b_i k_i,  k_i = f(t_n + c_i h, y_n + h sum_j a_ij k_j).

    A population that reaches zero stays there (common practice in population models): a
    step that ends at or below zero ends at zero, and a state at zero is not stepped.
    ``absorbing=False`` steps any ODE as it is (states may be negative).

    Parameters
    ----------
    rate : callable
        Right-hand side f(t, N, params), vectorised over the ensemble
        [population / time].
    n0 : ndarray, shape (S,)
        Initial values [population].
    params : mapping of str to ndarray of shape (S,) or scalar
        Parameters in the model's internal units.
    step : float
        Time step h [time].
    n_steps : int
        Number of steps.
    scheme : Scheme
        The tableau.
    dtype : numpy float type
        Arithmetic used throughout (float32, float64 or longdouble for round-off studies).
    cleared : dict, optional
        Filled with ``index`` (S,), the grid index at which each member reached zero (-1:
        never), and ``value`` (S,), the step's own end value there before it was set to
        zero (what read-offs on that last step interpolate towards) [population].

    Returns
    -------
    ndarray, shape (n_steps + 1, S)
        States at t = 0, h, ..., n_steps h. A member that overflows or becomes undefined
        keeps non-finite values; callers detect and flag it (no exception is raised).
    """
    y = np.array(n0, dtype=dtype, copy=True).reshape(-1)
    size = y.size
    p = {name: np.asarray(value, dtype=dtype) for name, value in params.items()}
    out = np.empty((n_steps + 1, size), dtype=dtype)
    single = size == 1 and np.dtype(dtype) == np.longdouble
    if single:
        # One member in long double (the round-off reference runs): the same operations on
        # numpy scalars, several times faster than on one-element arrays. (float32 stays on
        # arrays: numpy's float32 scalar power is not the array ufunc's.)
        y = y[0]
        p = {name: value.reshape(-1)[0] if value.size == 1 else value for name, value in p.items()}
    h = dtype(step)
    a = [[dtype(x) for x in row] for row in scheme.a]
    b = [dtype(x) for x in scheme.b]
    c = [dtype(x) for x in scheme.c]
    zero = dtype(0)
    out[0] = y
    first = np.full(size, -1, dtype=np.int64)
    last_value = np.zeros(size, dtype=dtype)
    k = [None] * scheme.stages
    with np.errstate(all="ignore"):
        for n in range(n_steps):
            t = dtype(n) * h
            for i in range(scheme.stages):
                stage = y
                for j in range(i):
                    if a[i][j] != 0:
                        stage = stage + (h * a[i][j]) * k[j]
                k[i] = np.asarray(rate(t + c[i] * h, stage, p), dtype=dtype)
            increment = b[0] * k[0]
            for i in range(1, scheme.stages):
                if b[i] != 0:
                    increment = increment + b[i] * k[i]
            stepped = y + h * increment
            if absorbing and single:  # one member: plain comparisons on scalars
                if y != 0 and stepped <= 0 and first[0] < 0:
                    first[0], last_value[0] = n + 1, stepped
                if y == 0 or stepped <= 0:
                    stepped = zero
            elif absorbing:
                reached = ((y != 0) & (stepped <= 0)) & (first < 0)
                first = np.where(reached, n + 1, first)
                last_value = np.where(reached, stepped, last_value)
                stepped = np.where((y == 0) | (stepped <= 0), zero, stepped)
            y = stepped
            out[n + 1] = y
    if cleared is not None:
        cleared["index"] = first
        cleared["value"] = last_value
    return out
