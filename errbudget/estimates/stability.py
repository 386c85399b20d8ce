"""Step limits in advance, from linear stability of the scheme at the law's equilibria.

Near an equilibrium N* the deviation obeys d' = J d with J = df/dN(N*); one step of a
Runge-Kutta scheme multiplies it by R(h J), R the scheme's stability function. For a stable
equilibrium (J < 0) the scheme keeps it stable while |R(h J)| <= 1 and approaches it without
alternating sides while R(h J) >= 0 (Hairer & Wanner 1996, Solving Ordinary Differential
Equations II, sec. IV.2, doi:10.1007/978-3-642-05221-7). For explicit Euler on the logistic
law J = -r at N = K, so the limits are h < 2/r and h <= 1/r (May 1976, Nature 261:459,
doi:10.1038/261459a0).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from errbudget.laws.models import GrowthModel, stable_equilibria
from errbudget.solve.tableaux import Scheme

SCAN_LIMIT = 50.0  # furthest |z| = h |J| examined on the negative real axis
SCAN_POINTS = 50_001  # scan resolution before bisection refines the limit


def real_axis_limits(scheme: Scheme) -> tuple[float, float | None]:
    """Largest x such that |R(-z)| <= 1 on [0, x], and largest with R(-z) >= 0 (None: never).

    Returns
    -------
    stable : float
        2 for explicit Euler, Heun and midpoint, about 2.785 for classical RK4.
    monotone : float or None
        1 for explicit Euler; None when R stays positive on the whole stable interval.
    """
    x = np.linspace(0.0, SCAN_LIMIT, SCAN_POINTS)
    r = scheme.stability(-x)
    unstable = np.abs(r) > 1 + 1e-12
    if not unstable[1:].any():
        return SCAN_LIMIT, None
    first = int(np.argmax(unstable))
    stable = _refine(lambda v: abs(scheme.stability(-v)) <= 1 + 1e-12, x[first - 1], x[first])
    negative = (r < 0) & (x <= stable)
    if not negative.any():
        return stable, None
    first = int(np.argmax(negative))
    monotone = _refine(lambda v: scheme.stability(-v) >= 0, x[first - 1], x[first])
    return stable, monotone


def _refine(good, low: float, high: float) -> float:
    """Bisect between a point where ``good`` holds and one where it fails."""
    for _ in range(60):
        mid = 0.5 * (low + high)
        low, high = (mid, high) if good(mid) else (low, mid)
    return low


def step_limits(model: GrowthModel, scheme: Scheme, params: Mapping[str, np.ndarray]) -> dict:
    """Largest stable step and largest step without oscillation, per ensemble member.

    Parameters
    ----------
    model : GrowthModel
    scheme : Scheme
    params : mapping of str to ndarray of shape (S,)
        Parameters of the law [internal units].

    Returns
    -------
    dict
        ``stable`` and ``monotone``: arrays (S,) of step limits [time] (inf where the law has
        no stable equilibrium or the scheme no such limit), and ``equilibrium``: its name.
    """
    stable_x, monotone_x = real_axis_limits(scheme)
    size = np.broadcast(*params.values()).shape if params else (1,)
    stable = np.full(size, np.inf)
    monotone = np.full(size, np.inf)
    names = []
    for eq in stable_equilibria(model, params):
        with np.errstate(all="ignore"):
            slope = np.asarray(model.d_dn(0.0, np.asarray(eq.value, float), params), float)
            rate = np.where(np.isfinite(slope) & (slope < 0), -slope, np.nan)
            stable = np.fmin(stable, stable_x / rate)
            if monotone_x is not None:
                monotone = np.fmin(monotone, monotone_x / rate)
        names.append(eq.name)
    return {"stable": stable, "monotone": monotone, "equilibrium": ", ".join(names)}
