"""Richardson extrapolation and convergence behaviour, vectorised over the ensemble.

The one Richardson extrapolation of the package: :func:`richardson` serves the ensemble's
per-member reference, the nominal reference of budget.json and the scalar Celik et al.
(2008) procedure of :mod:`errbudget.estimates.convergence`. :func:`observed_order` and
:func:`behaviour_of` apply that module's rules to arrays of shape (S,), one entry per member.

References
----------
Celik, I. B., Ghia, U., Roache, P. J., Freitas, C. J., Coleman, H., Raad, P. E. (2008).
Procedure for estimation and reporting of uncertainty due to discretization in CFD
applications. J. Fluids Eng. 130(7):078001. doi:10.1115/1.2960953
Stern, F., Wilson, R. V., Coleman, H. W., Paterson, E. G. (2001). Comprehensive approach to
verification and validation of CFD simulations, part 1. J. Fluids Eng. 123:793-802.
doi:10.1115/1.1412235
"""

from __future__ import annotations

import math

import numpy as np

# Differences within this many machine epsilons of max|phi| are round-off, not
# discretisation error (common practice, no source).
ROUNDOFF_FACTOR = 64.0
# Refinement ratios closer to 1 than this are duplicate steps: they carry no information.
MIN_RATIO_EXCESS = 1e-9
# exp() of more than this overflows double precision; r**p - 1 is capped there, which
# changes a correction of relative size 1e-304 at most.
MAX_EXPONENT = 700.0


def _roundoff_mask(difference: np.ndarray, scale: np.ndarray) -> np.ndarray:
    return np.abs(difference) <= ROUNDOFF_FACTOR * np.finfo(float).eps * scale


def _ensemble(coarse, medium, fine):
    c, m, f = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (coarse, medium, fine)))
    with np.errstate(invalid="ignore"):
        scale = np.maximum(np.maximum(np.abs(c), np.abs(m)), np.abs(f))
    return c, m, f, scale


def observed_order(coarse, medium, fine, ratio) -> tuple[np.ndarray, np.ndarray]:
    """Observed order of every ensemble member for a constant refinement ratio.

    p = ln(|coarse - medium| / |medium - fine|) / ln r  (Roache 1998; Celik et al. 2008,
    eq. 3a with q = 0, which is exact for a constant ratio).

    Parameters
    ----------
    coarse, medium, fine : array_like, shape (S,)
        The quantity on steps r^2 h, r h and h [unit of the quantity].
    ratio : float
        Constant refinement ratio r > 1 [-].

    Returns
    -------
    order : ndarray of float, shape (S,)
        The order where ``valid``, 0.0 elsewhere (never NaN) [-].
    valid : ndarray of bool, shape (S,)
        True where the values are finite, both differences exceed round-off and the
        differences shrink (p > 0, i.e. monotone or oscillatory convergence): exactly the
        members for which :func:`grid_convergence` reports an observed order.
    """
    ratio = float(ratio)
    if not ratio > 1.0 + MIN_RATIO_EXCESS:
        raise ValueError(f"ratio must be greater than 1, got {ratio!r}")
    c, m, f, scale = _ensemble(coarse, medium, fine)
    coarse_diff, fine_diff = c - m, m - f
    usable = np.isfinite(coarse_diff) & np.isfinite(fine_diff)
    usable &= ~_roundoff_mask(coarse_diff, scale) & ~_roundoff_mask(fine_diff, scale)
    safe_coarse = np.where(usable, np.abs(coarse_diff), 1.0)
    safe_fine = np.where(usable, np.abs(fine_diff), 1.0)
    order = np.log(safe_coarse / safe_fine) / math.log(ratio)
    valid = usable & (order > 0.0)
    return np.where(valid, order, 0.0), valid


def richardson(fine, coarse, ratio, order) -> np.ndarray:
    """Richardson extrapolation of every ensemble member.

    phi_ext = fine + (fine - coarse) / (r^p - 1)  (Richardson 1911, Phil. Trans. R. Soc. A
    210:307, doi:10.1098/rsta.1911.0009; Celik et al. 2008, eq. 4a).

    Parameters
    ----------
    fine, coarse : array_like, shape (S,)
        The quantity on steps h and r h [unit of the quantity].
    ratio : float or array_like, shape (S,)
        Refinement ratio r > 1 [-].
    order : float or array_like, shape (S,)
        Order p > 0 (observed or formal) [-]. Where :func:`observed_order` is not valid,
        pass a fallback, e.g. ``np.where(valid, order, formal_order)``.

    Returns
    -------
    ndarray of float, shape (S,)
        Extrapolated values [unit of the quantity].
    """
    f, c = np.asarray(fine, dtype=float), np.asarray(coarse, dtype=float)
    r, p = np.asarray(ratio, dtype=float), np.asarray(order, dtype=float)
    if not np.all(r > 1.0 + MIN_RATIO_EXCESS):
        raise ValueError("ratio must be greater than 1 everywhere")
    if not np.all(np.isfinite(p) & (p > 0.0)):
        raise ValueError("order must be finite and positive everywhere")
    return f + (f - c) / np.expm1(np.minimum(p * np.log(r), MAX_EXPONENT))


def behaviour_of(coarse, medium, fine, *, ratios=None) -> np.ndarray:
    """Convergence behaviour of every ensemble member, by the rule of :func:`grid_convergence`.

    With R = (medium - fine)/(coarse - medium) (Stern et al. 2001): "exact" when both
    differences are round-off (<= 64 eps max|phi|), "oscillatory" for -1 < R < 0,
    "monotone" for 0 <= R < ln r21/ln r32 (1 for a constant ratio), "divergent" otherwise.

    Parameters
    ----------
    coarse, medium, fine : array_like, shape (S,)
        The quantity on the three steps, coarsest first [unit of the quantity].
    ratios : (float, float), optional
        (r21, r32) = (h_medium/h_fine, h_coarse/h_medium) [-]; a constant ratio if omitted.

    Returns
    -------
    ndarray of str, shape (S,)
        "monotone", "oscillatory", "divergent" or "exact"; non-finite members "divergent".
    """
    c, m, f, scale = _ensemble(coarse, medium, fine)
    bound = 1.0 if ratios is None else math.log(ratios[0]) / math.log(ratios[1])
    e21, e32 = m - f, c - m
    finite = np.isfinite(e21) & np.isfinite(e32)
    fine_zero = finite & _roundoff_mask(e21, scale)
    coarse_zero = finite & _roundoff_mask(e32, scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(finite & ~coarse_zero, e21 / np.where(coarse_zero, 1.0, e32), np.inf)
    r = np.where(fine_zero, 0.0, r)
    out = np.full(c.shape, "divergent", dtype="<U11")
    out[(r >= 0.0) & (r < bound)] = "monotone"
    out[(r < 0.0) & (r > -1.0)] = "oscillatory"
    out[fine_zero & coarse_zero] = "exact"
    return out
