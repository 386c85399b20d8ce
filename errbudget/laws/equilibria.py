"""Equilibria of a growth law found numerically, per ensemble member.

For a law without closed-form equilibria (a custom rate), the steady states N* with
f(N*) = 0 are found for each member by scanning the rate on a grid of N over [0, N_max]
and refining every sign change by bisection to full precision. The grid is the union of
97 equal steps and of 48 steps equal in ln N (down to 1e-8 N_max), so that a root near
zero is bracketed as well as one near N_max. A grid point where the rate is exactly zero
(N = 0 for most laws) is a root itself. Where |f| dips between two neighbours of the same
sign, two close roots may hide: that stretch is scanned again 16 times finer, up to five
times, so roots as close as about 1e-8 N_max are separated. Stability is classified as
for the built-in laws, from the sign of df/dN at the root
(:func:`errbudget.laws.models.stable_equilibria`, with the symbolic derivative of a custom
rate).

Limits: a root where f touches zero without changing sign (a double root, e.g. removal at
exactly r K / 4) is not bracketed, and two roots closer than about 1e-8 N_max, or a pair
hidden without a dip of |f| on the grid, are missed together; all are non-generic. The
range [0, N_max] is the caller's choice (a few times the largest population-valued
parameter or initial value).

References
----------
Press, W. H., Teukolsky, S. A., Vetterling, W. T., Flannery, B. P. (2007). Numerical
    Recipes, 3rd ed., Cambridge University Press, sec. 9.1 (bracketing and bisection).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np

from errbudget.laws.models import Equilibrium

# Search range [0, RANGE_FACTOR x the largest population level of the case] (common practice,
# no source): a few times the largest of N0 and every population-valued parameter covers the
# states a growth law reaches from N0 without reaching far into states it never visits.
RANGE_FACTOR = 4.0
LINEAR_POINTS = 97  # equal steps on [0, N_max] in the first scan
LOG_POINTS = 48  # equal ln steps on [LOG_FLOOR N_max, N_max] in the first scan
LOG_FLOOR = 1e-8  # smallest nonzero grid point, relative to N_max
REFINE_POINTS = 33  # points of a zoomed scan around a dip of |f|
MAX_ZOOMS = 5  # zoom levels: resolution about N_max / 97 / 16^5 ~ 1e-8 N_max
BISECTIONS = 200  # more than enough: the loop stops when the bracket stops shrinking
CHUNK_ELEMENTS = 1_000_000  # members x grid points evaluated at once (about 8 MB)

Rate = Callable[[float, np.ndarray, Mapping[str, np.ndarray]], np.ndarray]


def unit_grid() -> np.ndarray:
    """Grid points of the first scan on [0, 1], increasing, 0 and 1 included."""
    linear = np.linspace(0.0, 1.0, LINEAR_POINTS)
    geometric = np.geomspace(LOG_FLOOR, 1.0, LOG_POINTS)
    return np.unique(np.concatenate([linear, geometric]))


def _bisect(rate: Rate, low, high, f_low, params) -> np.ndarray:
    """Refine brackets [low, high] (f changes sign) to adjacent floating-point numbers."""
    for _ in range(BISECTIONS):
        mid = 0.5 * (low + high)
        moving = (mid > low) & (mid < high)
        if not moving.any():
            break
        with np.errstate(all="ignore"):
            f_mid = np.asarray(rate(0.0, mid, params), dtype=float)
        same = np.sign(f_mid) == np.sign(f_low)
        exact = f_mid == 0
        low = np.where(moving & same & ~exact, mid, low)
        f_low = np.where(moving & same & ~exact, f_mid, f_low)
        high = np.where(moving & (~same | exact), mid, high)
        low = np.where(exact, mid, low)
    return np.where(np.abs(f_low) == 0, low, 0.5 * (low + high))


def _scan(rate, params, member, low, high, grid, zoom, found) -> None:
    """Roots of the members ``member`` on [low, high]: sign changes, exact zeros, and dips.

    A dip is a grid point where |f| is smallest among its neighbours and all three have the
    same sign: two close roots (or a touch) may hide there, so [left, right] neighbour is
    scanned again on a finer grid, up to MAX_ZOOMS times. ``found`` collects (owner, root)
    arrays. The end points of a zoomed scan were examined by the coarser scan already.
    """
    local = {k: v[member][:, None] for k, v in params.items()}
    states = low[:, None] + (high - low)[:, None] * grid[None, :]
    with np.errstate(all="ignore"):
        f = np.asarray(rate(0.0, states, local), dtype=float)
    f = np.broadcast_to(f, states.shape)
    sign = np.where(np.isfinite(f), np.sign(f), np.nan)
    zero = sign == 0
    if zoom:
        zero[:, [0, -1]] = False
    row, point = np.nonzero(zero)
    found.append((member[row], states[row, point]))
    row, point = np.nonzero(sign[:, :-1] * sign[:, 1:] < 0)
    if row.size:
        refined = _bisect(
            rate,
            states[row, point],
            states[row, point + 1],
            f[row, point],
            {k: v[member[row]] for k, v in params.items()},
        )
        found.append((member[row], refined))
    if zoom >= MAX_ZOOMS:
        return
    size = np.abs(f)
    same = (sign[:, :-2] == sign[:, 1:-1]) & (sign[:, 1:-1] == sign[:, 2:]) & (sign[:, 1:-1] != 0)
    dip = same & (size[:, 1:-1] <= size[:, :-2]) & (size[:, 1:-1] <= size[:, 2:])
    row, point = np.nonzero(dip)
    if row.size:
        fine = np.linspace(0.0, 1.0, REFINE_POINTS)
        _scan(
            rate, params, member[row], states[row, point], states[row, point + 2], fine,
            zoom + 1, found,
        )  # fmt: skip


def roots(rate: Rate, params: Mapping[str, np.ndarray], upper: np.ndarray) -> list[np.ndarray]:
    """Roots of N -> rate(0, N, params) on [0, upper] per member, in increasing order.

    Parameters
    ----------
    rate : callable
        f(t, N, params) [population / time], vectorised; broadcasting (S, 1) parameters
        against (S, G) states.
    params : mapping of str to ndarray (S,)
        Parameters of the law [internal units].
    upper : ndarray (S,)
        N_max per member [population].

    Returns
    -------
    list of ndarray (S,)
        The i-th lowest root of each member, NaN where a member has fewer roots.
    """
    upper = np.asarray(upper, dtype=float)
    size = upper.shape[0]
    params = {k: np.broadcast_to(np.asarray(v, dtype=float), (size,)) for k, v in params.items()}
    grid = unit_grid()
    found: list[tuple[np.ndarray, np.ndarray]] = []
    chunk = max(1, CHUNK_ELEMENTS // grid.size)
    for start in range(0, size, chunk):
        member = np.arange(start, min(start + chunk, size))
        _scan(rate, params, member, np.zeros(member.size), upper[member], grid, 0, found)
    owner = np.concatenate([o for o, _ in found]) if found else np.zeros(0, dtype=int)
    value = np.concatenate([v for _, v in found]) if found else np.zeros(0)
    order = np.lexsort((value, owner))
    owner, value = owner[order], value[order]
    first = np.searchsorted(owner, owner, side="left")  # first entry of each member
    rank = np.arange(owner.size) - first
    most = int(rank.max()) + 1 if rank.size else 0
    table = np.full((most, size), np.nan)
    table[rank, owner] = value
    return list(table)


def numeric_equilibria(
    rate: Rate, params: Mapping[str, np.ndarray], upper: np.ndarray
) -> list[Equilibrium]:
    """Equilibria of ``rate`` on [0, upper], per member (see the module docstring).

    Returns
    -------
    list of Equilibrium
        "extinction" for the root N = 0 where the rate vanishes there, then "equilibrium 1",
        "equilibrium 2", ... for the positive roots from the lowest up; values NaN where a
        member has no such root.
    """
    found = roots(rate, params, upper)
    if not found:
        return []
    table = np.array(found)
    zero = np.where(np.any(table == 0.0, axis=0), 0.0, np.nan)
    positive = np.where(table > 0.0, table, np.nan)
    positive = np.sort(positive, axis=0)  # NaN sort last: each member's positive roots first
    result = [Equilibrium("extinction", zero)] if np.isfinite(zero).any() else []
    for i, values in enumerate(positive, start=1):
        if np.isfinite(values).any():
            result.append(Equilibrium(f"equilibrium {i}", values))
    return result
