"""Dense output between grid points: the cubic Hermite interpolant of one step, written once.

Between t_n and t_{n+1} = t_n + h the solution is read from the cubic through the end values
y0, y1 with end slopes f0, f1 (the right-hand side at both ends). With s = (t - t_n)/h in
[0, 1] and d = h f (the slope scaled by the step),

    p(s) = (2s^3 - 3s^2 + 1) y0 + (s^3 - 2s^2 + s) d0 + (-2s^3 + 3s^2) y1 + (s^3 - s^2) d1.

Its local error is O(h^4), so a value off the grid, a crossing time or an interior extremum
does not lower the observed order of schemes up to order 4 (Hairer, Norsett & Wanner 1993,
Solving Ordinary Differential Equations I, 2nd ed., sec. II.6, doi:10.1007/978-3-540-78862-1).

The functions are plain arithmetic: they take numpy arrays (the stored-trajectory reference
path) or floats, and the streaming kernel compiles the very same functions with numba, so
both paths perform the same operations in the same order.
"""

from __future__ import annotations

BISECTION_ITERATIONS = 53  # halvings of [0, 1]: down to the spacing of doubles near 1
QUADRATIC_FLOOR = 1e-300  # |leading coefficient| below this: the derivative is linear in s


def hermite(y0, y1, d0, d1, s):
    """p(s) of the module docstring [population]; d0, d1 are h times the end slopes."""
    s2 = s * s
    s3 = s2 * s
    return (
        (2.0 * s3 - 3.0 * s2 + 1.0) * y0
        + (s3 - 2.0 * s2 + s) * d0
        + (-2.0 * s3 + 3.0 * s2) * y1
        + (s3 - s2) * d1
    )


def cubic(y0, y1, d0, d1):
    """Coefficients (c3, c2, c1) of p(s) = ((c3 s + c2) s + c1) s + y0."""
    c3 = 2.0 * y0 + d0 - 2.0 * y1 + d1
    c2 = -3.0 * y0 - 2.0 * d0 + 3.0 * y1 - d1
    return c3, c2, d0


def derivative_coefficients(y0, y1, d0, d1):
    """Coefficients (a, b, c) of p'(s) = a s^2 + b s + c."""
    a = 6.0 * y0 + 3.0 * d0 - 6.0 * y1 + 3.0 * d1
    b = -6.0 * y0 - 4.0 * d0 + 6.0 * y1 - 2.0 * d1
    return a, b, d0
