"""Discretisation error from a refinement ladder of fixed time steps.

The scalar entry point :func:`grid_convergence` follows the procedure of Celik et al. (2008)
(apparent order for any refinement ratios, Richardson extrapolation, grid convergence index
with Roache's safety factor). The vectorised helpers :func:`observed_order`,
:func:`richardson` and :func:`behaviour_of` apply the same rules to a whole parameter
ensemble at once (arrays of shape (S,), one entry per parameter set).

Steps and values are plain floats: the steps in any one time unit, the values in the unit of
the quantity; results that carry a unit (``extrapolated``, ``error_fine``, ``gci_fine_abs``)
are in the unit of the values, relative results are fractions (not percent).

References
----------
.. [1] Celik, I. B., Ghia, U., Roache, P. J., Freitas, C. J., Coleman, H., Raad, P. E.
   (2008). Procedure for estimation and reporting of uncertainty due to discretization in
   CFD applications. J. Fluids Eng. 130(7):078001. doi:10.1115/1.2960953
.. [2] Roache, P. J. (1994). Perspective: a method for uniform reporting of grid refinement
   studies. J. Fluids Eng. 116:405-413. doi:10.1115/1.2910291
.. [3] Roache, P. J. (1998). Verification and Validation in Computational Science and
   Engineering. Hermosa, Albuquerque.
.. [4] Stern, F., Wilson, R. V., Coleman, H. W., Paterson, E. G. (2001). Comprehensive
   approach to verification and validation of CFD simulations, part 1. J. Fluids Eng.
   123:793-802. doi:10.1115/1.1412235
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import NamedTuple

import numpy as np
from scipy.optimize import brentq

from errbudget.estimates.richardson import (
    MAX_EXPONENT,
    MIN_RATIO_EXCESS,
    ROUNDOFF_FACTOR,
    richardson,
)

# Roache's (1994, 1998) safety factors: with a trusted observed order from three or more
# levels, and otherwise (two levels, formal order assumed, or doubtful observed order).
SAFETY_TRUSTED = 1.25
SAFETY_UNTRUSTED = 3.0
# An observed order within this fraction of the formal order counts as matching it
# (common practice, no source).
FORMAL_ORDER_TOLERANCE = 0.10
# |asymptotic_ratio - 1| at most this puts the ladder in the asymptotic range
# (common practice, no source).
ASYMPTOTIC_TOLERANCE = 0.10
# Celik's fixed-point iteration: relative change that counts as converged, and the cap on
# iterations (it converges in a handful when it converges at all).
ORDER_TOLERANCE = 1e-12
MAX_ITERATIONS = 200
# Smallest order tried by the bracketing solve; below it the order is numerically zero.
ORDER_FLOOR = 1e-12

BEHAVIOURS = ("monotone", "oscillatory", "divergent", "exact")


@dataclass(frozen=True)
class GridConvergence:
    """Discretisation-error estimate from one refinement ladder (all levels finest first).

    Attributes
    ----------
    steps : tuple of float
        Step sizes, finest first [time unit of the caller].
    values : tuple of float
        The quantity on each step, same order [unit of the quantity].
    ratios : tuple of float
        Refinement ratios r21 = h2/h1, r32 = h3/h2, ... [-].
    observed_order : float or None
        Apparent order p of the three finest levels (Celik et al. 2008, eqs. 3-5) [-];
        None when it cannot be estimated (exact, divergent, or finest pair equal).
    orders_by_triplet : tuple of (float or None)
        The apparent order of every consecutive triplet (1,2,3), (2,3,4), ... [-].
    extrapolated : float or None
        Richardson extrapolation phi_ext21 [unit of the quantity].
    approx_rel_error, extrapolated_rel_error : float or None
        e_a21 = |(phi1 - phi2)/phi1| and e_ext21 = |(phi_ext21 - phi1)/phi_ext21| [-].
    gci_fine : float or None
        Grid convergence index of the finest level, relative, as a fraction [-].
    gci_fine_abs : float or None
        The same in the unit of the quantity: Fs |phi1 - phi2| / (r21^p - 1).
    error_fine : float or None
        |phi_ext21 - phi1| [unit of the quantity].
    safety_factor : float
        Fs used (or that would be used) in the GCI [-].
    order_trusted : bool
        Monotone, order equation solved, and within 10 % of the formal order if given.
    behaviour : str
        One of "monotone", "oscillatory", "divergent", "exact".
    asymptotic_ratio : float or None
        Roache's GCI_32 / (r21^p GCI_21) [-]; near 1 in the asymptotic range.
    in_asymptotic_range : bool
        ``asymptotic_ratio`` within ``ASYMPTOTIC_TOLERANCE`` of 1.
    note : str
        Which order was used and anything unusual about the ladder.
    """

    steps: tuple[float, ...]
    values: tuple[float, ...]
    ratios: tuple[float, ...]
    observed_order: float | None
    orders_by_triplet: tuple[float | None, ...]
    extrapolated: float | None
    approx_rel_error: float | None
    extrapolated_rel_error: float | None
    gci_fine: float | None
    gci_fine_abs: float | None
    error_fine: float | None
    safety_factor: float
    order_trusted: bool
    behaviour: str
    asymptotic_ratio: float | None
    in_asymptotic_range: bool
    note: str

    def to_dict(self) -> dict:
        """Plain JSON-able types; NaN and infinity become None."""
        return {key: _plain(value) for key, value in asdict(self).items()}


def _plain(value):
    if isinstance(value, (tuple, list)):
        return [_plain(item) for item in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, float, np.integer, np.floating)):
        number = float(value)
        return number if math.isfinite(number) else None
    return value


class _Triplet(NamedTuple):
    behaviour: str
    order: float | None  # apparent order, None when not estimable
    solved_by: str  # "fixed-point", "bracketing" or "" (no order)


def _log_expm1(x: float) -> float:
    """ln(e^x - 1) for x > 0 without overflow or cancellation."""
    return x + math.log(-math.expm1(-x))


def _log_rp_minus_s(p: float, log_r: float, sign: float) -> float:
    """ln(r^p - s) for s = +1 or -1, p > 0, r > 1, in logs so large p cannot overflow."""
    if sign > 0:
        return _log_expm1(p * log_r)
    return p * log_r + math.log1p(math.exp(-p * log_r))


def _expm1_capped(x: float) -> float:
    """r^p - 1 = expm1(p ln r), capped below overflow (see ``MAX_EXPONENT``)."""
    return math.expm1(min(x, MAX_EXPONENT))


def _is_roundoff(difference: float, scale: float) -> bool:
    return abs(difference) <= ROUNDOFF_FACTOR * np.finfo(float).eps * scale


def _classify(e21: float, e32: float, r21: float, r32: float, scale: float) -> str:
    """Behaviour of one triplet from its differences eps21 = phi2 - phi1, eps32 = phi3 - phi2.

    With R = eps21/eps32: oscillatory for -1 < R < 0, monotone for 0 <= R < ln r21/ln r32,
    divergent otherwise; exact when both differences are round-off. The monotone bound is 1
    for a constant ratio (Stern et al. 2001); for unequal ratios it is exactly the condition
    under which Celik's order equation has a positive root (see :func:`_apparent_order`).
    R <= -1 (oscillation growing as the step shrinks) is divergent, as in Stern et al.
    """
    fine_zero, coarse_zero = _is_roundoff(e21, scale), _is_roundoff(e32, scale)
    if fine_zero and coarse_zero:
        return "exact"
    if fine_zero:
        return "monotone"  # converged on the two finest levels
    if coarse_zero:
        return "divergent"  # a difference appears as the step shrinks
    ratio = e21 / e32
    if ratio < 0.0:
        return "oscillatory" if ratio > -1.0 else "divergent"
    return "monotone" if ratio < math.log(r21) / math.log(r32) else "divergent"


def _apparent_order(e21: float, e32: float, r21: float, r32: float) -> tuple[float, str]:
    """Apparent order p of one convergent triplet (Celik et al. 2008, eqs. 3a-3c).

    p = |ln|eps32/eps21| + q(p)| / ln r21,  q(p) = ln((r21^p - s)/(r32^p - s)),
    s = sign(eps32/eps21), solved by Celik's fixed-point iteration. With ln r32 much larger
    than ln r21 the iteration is not a contraction; the same equation (without the outer
    absolute value) is then solved by bracketing. Written as
    ln[r21^p (r32^p - s)/(r21^p - s)] = ln|eps32/eps21| its left side increases with p, so
    a convergent triplet (see :func:`_classify`) has exactly one positive root.

    Returns the order [-] and how it was found ("fixed-point" or "bracketing").
    """
    sign = math.copysign(1.0, e32 / e21)
    log_ratio = math.log(abs(e32 / e21))
    a, b = math.log(r21), math.log(r32)

    def q(p: float) -> float:
        return _log_rp_minus_s(p, a, sign) - _log_rp_minus_s(p, b, sign)

    order = abs(log_ratio) / a  # q = 0: the constant-ratio order
    if order < ORDER_FLOOR:
        order = 1.0
    for _ in range(MAX_ITERATIONS):
        inner = log_ratio + q(order)
        new = abs(inner) / a
        if not math.isfinite(new) or new < ORDER_FLOOR:
            break
        if abs(new - order) <= ORDER_TOLERANCE * max(1.0, new):
            if inner > 0.0:  # the root of the equation, not of its mirror image
                return new, "fixed-point"
            break
        order = new

    def residual(p: float) -> float:
        return p * a - q(p) - log_ratio

    low, high = ORDER_FLOOR, 1.0
    if residual(low) >= 0.0:
        return low, "bracketing"
    while residual(high) < 0.0:
        high *= 2.0
    return brentq(residual, low, high, xtol=1e-14, rtol=4 * np.finfo(float).eps), "bracketing"


def _triplet(phi: np.ndarray, h: np.ndarray) -> _Triplet:
    e21, e32 = phi[1] - phi[0], phi[2] - phi[1]
    r21, r32 = h[1] / h[0], h[2] / h[1]
    behaviour = _classify(e21, e32, r21, r32, float(np.max(np.abs(phi))))
    if behaviour in ("exact", "divergent") or _is_roundoff(e21, float(np.max(np.abs(phi)))):
        return _Triplet(behaviour, None, "")
    order, how = _apparent_order(e21, e32, r21, r32)
    return _Triplet(behaviour, order, how)


def _clean_ladder(values, steps) -> tuple[np.ndarray, np.ndarray]:
    """Steps and values as float arrays sorted finest first; misuse raises ValueError."""
    phi = np.asarray(values, dtype=float)
    h = np.asarray(steps, dtype=float)
    if phi.ndim != 1 or h.ndim != 1:
        raise ValueError("values and steps must be one-dimensional sequences")
    if phi.size != h.size:
        raise ValueError(f"got {phi.size} values for {h.size} steps; they must pair up")
    if h.size < 3:
        raise ValueError(f"a refinement ladder needs at least 3 steps, got {h.size}")
    if not np.all(np.isfinite(h)) or np.any(h <= 0.0):
        raise ValueError(f"steps must be finite and positive, got {h.tolist()}")
    if not np.all(np.isfinite(phi)):
        raise ValueError(f"values must be finite, got {phi.tolist()}")
    order = np.argsort(h, kind="stable")
    h, phi = h[order], phi[order]
    if np.any(h[1:] / h[:-1] - 1.0 <= MIN_RATIO_EXCESS):
        raise ValueError(f"steps must all differ, got duplicates in {h.tolist()}")
    return h, phi


def grid_convergence(values, steps, safety_factor=None, *, formal_order=None) -> GridConvergence:
    """Observed order, Richardson extrapolation and GCI from a refinement ladder.

    With levels 1 (finest), 2, 3 and r21 = h2/h1, r32 = h3/h2 (Celik et al. 2008):
    eps21 = phi2 - phi1, eps32 = phi3 - phi2, s = sign(eps32/eps21),
    p = |ln|eps32/eps21| + q(p)| / ln r21, q(p) = ln((r21^p - s)/(r32^p - s));
    phi_ext21 = (r21^p phi1 - phi2)/(r21^p - 1);
    e_a21 = |(phi1 - phi2)/phi1|, e_ext21 = |(phi_ext21 - phi1)/phi_ext21|;
    GCI_fine21 = Fs e_a21/(r21^p - 1), and in the unit of phi Fs |phi1 - phi2|/(r21^p - 1).

    Safety factor Fs (Roache 1994, 1998): 1.25 when the observed order is trusted
    (monotone, order equation solved, within 10 % of ``formal_order`` if given), 3 otherwise.
    With ``formal_order`` given and the observed order not trusted, the extrapolation and
    the GCI use the formal order with Fs = 3 (Roache 1998). ``safety_factor`` overrides Fs.

    Asymptotic range (Roache 1998): GCI_32 / (r21^p GCI_21) near 1, with the relative GCIs
    and the order used for the GCI. Caution: with the observed order of the same three
    levels, Celik's p fits phi = phi_ext + C h^p through all three points, so for a
    monotone triplet the ratio equals |phi1/phi2| identically; the check has teeth when the
    formal order is used, and ``orders_by_triplet`` of a longer ladder shows whether the
    order has settled.

    Parameters
    ----------
    values : sequence of float, shape (L,), L >= 3
        The quantity on each step [unit of the quantity].
    steps : sequence of float, shape (L,)
        The steps, positive and distinct, in any order and any ratios [any time unit].
    safety_factor : float, optional
        Fs to use instead of Roache's choice [-].
    formal_order : float, optional
        Formal order of the scheme (1 for explicit Euler, 4 for classical RK4) [-].

    Returns
    -------
    GridConvergence
        All levels sorted finest first; with more than three levels the three finest give
        the estimate and every consecutive triplet's order is listed.

    Raises
    ------
    ValueError
        Fewer than 3 levels, mismatched lengths, non-positive or duplicate steps, non-finite
        values or a non-positive safety factor / formal order.
    """
    h, phi = _clean_ladder(values, steps)
    _check_options(safety_factor, formal_order)
    triplets = [_triplet(phi[i : i + 3], h[i : i + 3]) for i in range(h.size - 2)]
    finest = triplets[0]
    p_obs = finest.order
    trusted = finest.behaviour == "monotone" and p_obs is not None
    if trusted and formal_order is not None:
        trusted = abs(p_obs - formal_order) <= FORMAL_ORDER_TOLERANCE * formal_order
    fs = (
        float(safety_factor)
        if safety_factor is not None
        else (SAFETY_TRUSTED if trusted else SAFETY_UNTRUSTED)
    )
    estimate, notes = _estimate(phi, h, triplets, formal_order, trusted, fs)
    if safety_factor is not None:
        notes.append(f"safety factor {fs:g} given by the caller")

    return GridConvergence(
        steps=tuple(float(x) for x in h),
        values=tuple(float(x) for x in phi),
        ratios=tuple(float(x) for x in h[1:] / h[:-1]),
        observed_order=p_obs,
        orders_by_triplet=tuple(t.order for t in triplets),
        **estimate._asdict(),
        safety_factor=fs,
        order_trusted=trusted,
        behaviour=finest.behaviour,
        note="; ".join(notes),
    )


class _Estimate(NamedTuple):
    extrapolated: float | None
    approx_rel_error: float | None
    extrapolated_rel_error: float | None
    gci_fine: float | None
    gci_fine_abs: float | None
    error_fine: float | None
    asymptotic_ratio: float | None
    in_asymptotic_range: bool


def _check_options(safety_factor, formal_order) -> None:
    if safety_factor is not None and not (math.isfinite(safety_factor) and safety_factor > 0):
        raise ValueError(f"safety_factor must be a positive number, got {safety_factor!r}")
    if formal_order is not None and not (math.isfinite(formal_order) and formal_order > 0):
        raise ValueError(f"formal_order must be a positive number, got {formal_order!r}")


def _estimate(phi, h, triplets, formal_order, trusted, fs) -> tuple[_Estimate, list[str]]:
    """The estimate of the finest triplet by its behaviour, with the notes that explain it."""
    finest = triplets[0]
    phi1, phi2, phi3 = (float(x) for x in phi[:3])
    r21, r32 = float(h[1] / h[0]), float(h[2] / h[1])
    e21, e32 = phi2 - phi1, phi3 - phi2
    approx_rel = abs(e21 / phi1) if phi1 != 0.0 else None
    notes: list[str] = []
    if phi1 == 0.0:
        notes.append("the finest value is 0, so relative errors are undefined (None)")
    if finest.behaviour == "exact":
        notes.insert(0, "the three finest levels agree to round-off: no discretisation error")
        return _Estimate(phi1, 0.0, 0.0, 0.0, 0.0, 0.0, None, False), notes
    if finest.behaviour == "divergent":
        notes.insert(0, _divergence_note(e21, e32, float(np.max(np.abs(phi[:3])))))
        return _Estimate(None, approx_rel, None, None, None, None, None, False), notes
    p_used = _order_used(finest, formal_order, trusted, notes)
    if finest.order is not None and finest.solved_by == "bracketing":
        notes.append(
            "Celik's fixed-point iteration does not contract for these ratios; "
            "the order equation was solved by bracketing"
        )
    if finest.behaviour == "oscillatory":
        notes.append("oscillatory convergence: the extrapolation is less reliable")
    if p_used is None:  # the two finest levels agree to round-off, the coarser does not
        notes.insert(
            0,
            "the two finest levels agree to round-off: taken as converged, order not estimable",
        )
        zero_rel = 0.0 if phi1 != 0.0 else None
        return _Estimate(phi1, approx_rel, zero_rel, zero_rel, 0.0, 0.0, None, False), notes
    notes.extend(_settling_note(triplets))
    return _richardson_gci(phi1, phi2, phi3, r21, r32, p_used, fs), notes


def _order_used(finest: _Triplet, formal_order, trusted: bool, notes: list[str]) -> float | None:
    """The observed order, or the formal one when given and the observed is not trusted."""
    p_obs = finest.order
    if p_obs is None:  # the two finest levels agree to round-off: nothing to extrapolate
        return None
    if formal_order is not None and not trusted:
        why = "not monotone"
        if finest.behaviour == "monotone":
            why = f"{p_obs:.3g} is not within 10 % of it"
        notes.append(
            f"formal order {float(formal_order):g} used with Fs = 3 (observed order {why})"
        )
        return float(formal_order)
    notes.append(f"observed order {p_obs:.4g} used")
    return p_obs


def _richardson_gci(phi1, phi2, phi3, r21, r32, p, fs) -> _Estimate:
    """Celik et al. (2008) eqs. 4-5 and Roache's asymptotic ratio for order ``p``."""
    e21, e32 = phi2 - phi1, phi3 - phi2
    approx_rel = abs(e21 / phi1) if phi1 != 0.0 else None
    denom21 = _expm1_capped(p * math.log(r21))  # r21^p - 1
    extrapolated = float(richardson(phi1, phi2, r21, p))  # (r21^p phi1 - phi2)/(r21^p - 1)
    ext_rel = abs((extrapolated - phi1) / extrapolated) if extrapolated != 0.0 else None
    gci_rel = fs * approx_rel / denom21 if approx_rel is not None else None
    ratio = _asymptotic_ratio(phi1, phi2, e21, e32, r21, r32, p)
    in_range = ratio is not None and abs(ratio - 1.0) <= ASYMPTOTIC_TOLERANCE
    return _Estimate(
        extrapolated,
        approx_rel,
        ext_rel,
        gci_rel,
        fs * abs(e21) / denom21,
        abs(extrapolated - phi1),
        ratio,
        in_range,
    )


def _settling_note(triplets: list[_Triplet]) -> list[str]:
    """A remark when the two finest triplets disagree on the order by more than 10 %."""
    if len(triplets) < 2 or triplets[0].order is None or triplets[1].order is None:
        return []
    first, second = triplets[0].order, triplets[1].order
    if abs(first - second) <= FORMAL_ORDER_TOLERANCE * first:
        return []
    return [f"the order has not settled along the ladder ({second:.3g} on the next triplet)"]


def _divergence_note(e21: float, e32: float, scale: float) -> str:
    if _is_roundoff(e32, scale):
        return "divergent: the two coarsest levels agree but the finest differs; no extrapolation"
    if e21 / e32 < 0.0:
        return "divergent: the oscillation grows as the step shrinks; no extrapolation"
    return "divergent: the differences grow as the step shrinks; no extrapolation"


def _asymptotic_ratio(phi1, phi2, e21, e32, r21, r32, p) -> float | None:
    """Roache's GCI_32 / (r21^p GCI_21) with relative GCIs, computed in logs; Fs cancels."""
    if phi1 == 0.0 or phi2 == 0.0 or e21 == 0.0 or e32 == 0.0:
        return None
    a, b = math.log(r21), math.log(r32)
    log_value = (
        math.log(abs(e32 / phi2))
        - _log_expm1(p * b)
        - p * a
        - math.log(abs(e21 / phi1))
        + _log_expm1(p * a)
    )
    return math.exp(log_value) if log_value < MAX_EXPONENT else None
