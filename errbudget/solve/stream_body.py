"""The streaming kernel: every level of an ensemble stepped once, everything read off on the way.

Compiled once (numba, cached beside this module). The law enters as two compiled functions
passed in as arguments, generated per law by :mod:`errbudget.solve.codegen`: ``advance_block``
steps a block of members (straight-line code that numba vectorises across members) and
``slope_block`` evaluates the right-hand side; one call per step and block, so the indirect
call costs nothing next to the block's arithmetic.

For one block of members at a time, each level (a step size) is stepped from t = 0 to the
end of its grid. After every step, the new grid point and the interval behind it are read
off: the quantities (value at a time with the Hermite readout, first crossing of a level,
peak and minimum with their times), the features of
:class:`errbudget.solve.trajectory.Features`, the states kept for the report's series and
the values at the count times. No trajectory is stored: memory is O(members x quantities x
levels). The arithmetic repeats, operation for operation, the stored-trajectory path of
:mod:`errbudget.solve.trajectory`, which the tests compare it with.
"""

# ruff: noqa: N803, N806, PLR0913
from __future__ import annotations

import math
import warnings

import numpy as np
from numba import njit, types
from numba.core.errors import NumbaExperimentalFeatureWarning

from errbudget.solve import dense
from errbudget.solve.codegen import BLOCK
from errbudget.solve.dense import BISECTION_ITERATIONS, QUADRATIC_FLOOR
from errbudget.solve.trajectory import CROSS_SHARE, FLAT_SHARE, GRID_TOLERANCE

# Positions in the features array: kept as numbers so one float64 array carries them all.
F_FINITE, F_LARGEST, F_SMALLEST, F_SCALE, F_TURNS, F_LATE = 0, 1, 2, 3, 4, 5
F_LEVELS = 6  # then, per stable level e: above at F_LEVELS + 2e, below at F_LEVELS + 2e + 1
VALUE, TIME_TO, PEAK, MINIMUM = 0, 1, 2, 3

_F1, _F2, _F3 = types.float64[::1], types.float64[:, ::1], types.float64[:, :, ::1]
_I1, _I2 = types.int64[::1], types.int64[:, ::1]
# The law's two compiled pieces (see the module docstring), with ``factors`` the array
# (t_factor, n_factor, out_factor) of errbudget.solve.engine.RateSpec:
# advance_block(y, y_next, f, t, h, p, first, m, factors); slope_block(y, f, t, p, first, m,
# factors). Member first + j of the parameter rows p (k, S) is y[j].
ADVANCE = types.void(_F1, _F1, _F1, types.float64, types.float64, _F2, types.int64,
                     types.int64, _F1)  # fmt: skip
SLOPE = types.void(_F1, _F1, types.float64, _F2, types.int64, types.int64, _F1)
STREAM = types.void(
    types.FunctionType(ADVANCE), types.FunctionType(SLOPE), _F2, _F1, types.int64,
    types.int64, _F1, _F1, _I1, _I1, _I1, types.float64, _I1, _F1, _I2, _I2, _F2, _I1, _I1,
    _F1, _F2, _I2, _I1, types.int64, _I1, _I1, _F1, _I1, _F3, _F3, _F3, _F3, _F2,
)  # fmt: skip

hermite = njit(cache=True, error_model="numpy")(dense.hermite)
cubic = njit(cache=True, error_model="numpy")(dense.cubic)
derivative_coefficients = njit(cache=True, error_model="numpy")(dense.derivative_coefficients)


@njit(cache=True, error_model="numpy")
def _sign(x):
    if x > 0.0:
        return 1.0
    if x < 0.0:
        return -1.0
    if x == 0.0:
        return 0.0
    return math.nan


@njit(cache=True, error_model="numpy")
def _floor(value):
    """A value read between grid points, never below zero (NaN stays NaN)."""
    return 0.0 if value < 0.0 else value


@njit(cache=True, error_model="numpy")
def _better(value, time, best, best_time, largest):
    """Whether a candidate replaces the best so far (NaN is kept once met; ties: earliest)."""
    if best != best:
        return False
    if value != value:
        return True
    if largest:
        return value > best or (value == best and time < best_time)
    return value < best or (value == best and time < best_time)


@njit(cache=True, error_model="numpy")
def _crossing(y0, y1, d0, d1, level, side):
    """Fraction of the interval where the Hermite cubic meets ``level`` (bisection)."""
    c3, c2, c1 = cubic(y0, y1, d0, d1)
    c0 = y0 - level
    low, high = 0.0, 1.0
    for _ in range(BISECTION_ITERATIONS):
        mid = 0.5 * (low + high)
        if _sign(((c3 * mid + c2) * mid + c1) * mid + c0) == side:
            low = mid
        else:
            high = mid
    return 0.5 * (low + high)


@njit(cache=True, error_model="numpy", nogil=True)
def step_level(
    advance_block, slope_block, p, n0, first, m, factors, h, n_steps, last, tail, horizon,
    kinds, levels, at_grid, at_index, at_s, end_grid, end_index, end_s, equilibria,
    records, record_slot, counting, count_grid, count_index, count_s, count_slot,
    values, times, features, kept, counted,
):  # fmt: skip
    """One level for one block of members: step, and read everything off as it goes.

    The loops over the block's members are written without calls or data-dependent
    branches where they run at every step, so that numba vectorises them; what happens
    rarely (a crossing found, a read-off time reached) runs in loops of its own.
    """
    Q = kinds.size
    y, y_next, y_prev = n0[first : first + m].copy(), np.empty(m), np.empty(m)
    f, f_now, f_prev = np.empty(m), np.empty(m), np.empty(m)
    # Zero is absorbing. A member that reaches zero at point n keeps, for the interval
    # behind n, the step's own end value (``reached``) and the slope there (``reached_f``).
    just = np.zeros(m, dtype=np.bool_)
    reached, reached_f = np.zeros(m), np.zeros(m)
    end_y, end_f = np.empty(m), np.empty(m)
    track, above, below, high, low = _new_track(equilibria, first, m)
    side, found, hit = np.zeros((Q, m)), np.zeros((Q, m), dtype=np.bool_), np.zeros(m, np.bool_)
    best, best_time, out = np.zeros((Q, m)), np.zeros((Q, m)), np.full((Q, m), math.nan)
    for q in range(Q):
        for j in range(m):
            side[q, j] = _sign(y[j] - levels[q])
            best[q, j] = y[j]
    record = 0
    late_ok = last + 1 - tail >= 3  # as the trajectory path: fewer rows hold no turn
    for n in range(n_steps + 1):
        t = float(n) * h
        if n < n_steps:  # the law's step over the block (vectorised in its own code)
            advance_block(y, y_next, f, t, h, p, first, m, factors)
        else:
            slope_block(y, f, t, p, first, m, factors)
        ends = _interval_ends(slope_block, y, f, f_now, end_y, end_f, just, reached, reached_f, t,
                              p, first, m, factors)  # fmt: skip
        if n >= 1:
            y_end, f_end = (end_y, end_f) if ends else (y, f_now)
            _interval(
                n, m, first, y_prev, y_end, f_prev, f_end, y, h, last, horizon, kinds, levels,
                at_grid, at_index, at_s, end_grid, end_index, end_s, side, found, hit, best,
                best_time, out, counting, count_grid, count_index, count_s, count_slot,
                counted,
            )  # fmt: skip
        _point(y, n, last, tail, late_ok, track, above, below, high, low, m)
        if n <= last:
            _grid_extrema(y, t, kinds, best, best_time, m)
        _grid_point(
            n, m, first, y, horizon, kinds, at_grid, end_grid, best, best_time, out,
            counting, count_grid, count_slot, counted,
        )  # fmt: skip
        while record < records.size and records[record] == n:
            for j in range(m):
                slot = record_slot[first + j]
                if slot >= 0:
                    kept[record, slot] = y[j]
            record += 1
        for j in range(m):
            track[T_SAFE_PREV, j] = y[j] if math.isfinite(y[j]) else 0.0
        if n < n_steps:
            _absorb(y, y_next, just, reached, m)
        y_prev, y, y_next = y, y_next, y_prev
        f_prev, f_now = f_now, f_prev
    _store_features(first, m, track, above, below, features)
    _finish(first, m, horizon, kinds, side, found, best, best_time, out, values, times, n0,
            track[T_FINITE])  # fmt: skip


# Rows of the per-member running state of a level (one float64 array for them all).
T_FINITE, T_LARGEST, T_SMALLEST, T_SCALE, T_SAFE_PREV = 0, 1, 2, 3, 4
T_SIGN, T_TURNS, T_SIGN_LATE, T_LATE = 5, 6, 7, 8


@njit(cache=True, error_model="numpy")
def _new_track(equilibria, first, m):
    """Running features of a block, and each member's bands around its stable levels."""
    E = equilibria.shape[0]
    track = np.zeros((9, m))
    track[T_FINITE] = 1.0
    track[T_SMALLEST] = math.inf
    above, below = np.zeros((E, m), dtype=np.bool_), np.zeros((E, m), dtype=np.bool_)
    high, low = np.empty((E, m)), np.empty((E, m))
    for e in range(E):
        for j in range(m):
            high[e, j] = equilibria[e, first + j] * (1 + CROSS_SHARE) + 1e-300
            low[e, j] = equilibria[e, first + j] * (1 - CROSS_SHARE) - 1e-300
    return track, above, below, high, low


@njit(cache=True, error_model="numpy")
def _interval_ends(slope_block, y, f, f_now, end_y, end_f, just, reached, reached_f, t, p, first,
                   m, factors):  # fmt: skip
    """Effective slopes at point n (zero where absorbed) and the end of the interval behind it:
    the state, or where a member reached zero at n, the step's own end value and its slope.

    Returns whether any member reached zero at n: then the ends are in ``end_y``, ``end_f``;
    otherwise they are ``y`` and ``f_now`` themselves (no copy)."""
    any_reached = False
    for j in range(m):  # an absorbed member does not move: its slope is zero
        f_now[j] = 0.0 if y[j] == 0.0 else f[j]
        any_reached |= just[j]
    if any_reached:  # rare: the interval that reaches zero ends at the step's own value
        slope_block(reached, reached_f, t, p, first, m, factors)
        for j in range(m):
            end_y[j] = reached[j] if just[j] else y[j]
            end_f[j] = reached_f[j] if just[j] else f_now[j]
    return any_reached


@njit(cache=True, error_model="numpy")
def _point(y, n, last, tail, late_ok, track, above, below, high, low, m):
    """Features at grid point n: scale always, the rest up to the horizon."""
    for j in range(m):
        value = y[j]
        safe = value if math.isfinite(value) else 0.0
        track[T_SCALE, j] = max(track[T_SCALE, j], abs(safe))
    if n > last:
        return
    for j in range(m):
        value = y[j]
        finite = math.isfinite(value)
        safe = value if finite else 0.0
        track[T_FINITE, j] = track[T_FINITE, j] if finite else 0.0
        track[T_LARGEST, j] = max(track[T_LARGEST, j], abs(safe))
        track[T_SMALLEST, j] = min(track[T_SMALLEST, j], safe)
    for e in range(above.shape[0]):
        for j in range(m):
            value = y[j] if math.isfinite(y[j]) else 0.0
            above[e, j] = above[e, j] | (value > high[e, j])
            below[e, j] = below[e, j] | (value < low[e, j])
    if n >= 1 and last >= 2:
        _count_turns(y, track[T_SAFE_PREV], track[T_SIGN], track[T_TURNS], m)
        if late_ok and n >= tail + 1:
            _count_turns(y, track[T_SAFE_PREV], track[T_SIGN_LATE], track[T_LATE], m)


@njit(cache=True, error_model="numpy")
def _grid_extrema(y, t, kinds, best, best_time, m):
    """Grid values as candidates of every peak and minimum."""
    for q in range(kinds.size):
        if kinds[q] >= PEAK:
            largest_kind = kinds[q] == PEAK
            for j in range(m):
                if _better(y[j], t, best[q, j], best_time[q, j], largest_kind):
                    best[q, j] = y[j]
                    best_time[q, j] = t


@njit(cache=True, error_model="numpy")
def _absorb(y, y_next, just, reached, m):
    """Zero is absorbing: a step ending at or below it ends at it; a state at it stays."""
    for j in range(m):
        stepped = y_next[j]
        stop = y[j] == 0.0 or stepped <= 0.0
        just[j] = y[j] != 0.0 and stepped <= 0.0
        reached[j] = stepped
        y_next[j] = 0.0 if stop else stepped


@njit(cache=True, error_model="numpy")
def _store_features(first, m, track, above, below, features):
    """The block's features into the output array (see errbudget.solve.trajectory.Features)."""
    for j in range(m):
        s = first + j
        features[F_FINITE, s] = track[T_FINITE, j]
        features[F_LARGEST, s] = track[T_LARGEST, j]
        features[F_SMALLEST, s] = track[T_SMALLEST, j]
        features[F_SCALE, s] = track[T_SCALE, j]
        features[F_TURNS, s] = track[T_TURNS, j]
        features[F_LATE, s] = track[T_LATE, j]
        for e in range(above.shape[0]):
            features[F_LEVELS + 2 * e, s] = 1.0 if above[e, j] else 0.0
            features[F_LEVELS + 2 * e + 1, s] = 1.0 if below[e, j] else 0.0


@njit(cache=True, error_model="numpy", inline="always")
def _count_turns(y, safe_prev, carried, turns, m):
    """Sign changes of the increments (flat ones skipped), for every member of the block."""
    for j in range(m):
        value = y[j] if math.isfinite(y[j]) else 0.0
        increment = value - safe_prev[j]
        threshold = FLAT_SHARE * max(abs(value), abs(safe_prev[j]))
        sign = (increment > threshold) * 1.0 - (increment < -threshold) * 1.0
        flip = (sign != 0.0) & (carried[j] != 0.0) & (sign != carried[j])  # no branches
        turns[j] += 1.0 if flip else 0.0
        carried[j] = sign if sign != 0.0 else carried[j]


@njit(cache=True, error_model="numpy")
def _interval(
    n, m, first, y0s, y1s, f0s, f1s, states, h, last, horizon, kinds, levels, at_grid,
    at_index, at_s, end_grid, end_index, end_s, side, found, hit, best, best_time, out,
    counting, count_grid, count_index, count_s, count_slot, counted,
):  # fmt: skip
    """Read-offs on the interval [n-1, n]: crossings, interior extrema, off-grid values.

    The interval runs from state n-1 to (y1s, f1s): state n, or where a member reached zero
    at n, the step's own end value and the slope there. ``states`` holds the states at n,
    which decide whether a level was crossed. Values read between grid points are never
    below zero (the population is absorbed there).
    """
    for q in range(kinds.size):
        kind = kinds[q]
        if kind == TIME_TO and n <= last + 1:
            level = levels[q]
            anything = 0
            for j in range(m):  # vectorised test (no branches); the bisection below is rare
                y1 = y1s[j]
                d = y1 - level  # finite where it counts: _sign(d) without its NaN branch
                sign = (d > 0.0) * 1.0 - (d < 0.0) * 1.0
                crossed = (not found[q, j]) & math.isfinite(y1) & (sign != side[q, j])
                hit[j] = crossed
                anything += crossed
            if anything > 0:
                for j in range(m):
                    if hit[j]:
                        found[q, j] = True
                        fraction = _crossing(
                            y0s[j], y1s[j], f0s[j] * h, f1s[j] * h, level, side[q, j]
                        )
                        out[q, j] = (float(n - 1) + fraction) * h
        elif kind == VALUE:
            if at_grid[q] < 0 and at_index[q] == n - 1:
                for j in range(m):
                    out[q, j] = _floor(hermite(y0s[j], y1s[j], f0s[j] * h, f1s[j] * h, at_s[q]))
        elif kind >= PEAK:
            largest = kind == PEAK
            if n <= last:
                for j in range(m):
                    _interior_extrema(
                        q, j, y0s[j], y1s[j], f0s[j] * h, f1s[j] * h, float(n - 1), h, largest,
                        best, best_time,
                    )  # fmt: skip
            if end_grid < 0 and end_index == n - 1:
                for j in range(m):
                    value = _floor(hermite(y0s[j], y1s[j], f0s[j] * h, f1s[j] * h, end_s))
                    if _better(value, horizon, best[q, j], best_time[q, j], largest):
                        best[q, j] = value
                        best_time[q, j] = horizon
    if counting:
        for c in range(count_grid.size):
            if count_grid[c] < 0 and count_index[c] == n - 1:
                for j in range(m):
                    slot = count_slot[first + j]
                    if slot >= 0:
                        d0, d1 = f0s[j] * h, f1s[j] * h
                        counted[c, slot] = _floor(hermite(y0s[j], y1s[j], d0, d1, count_s[c]))


@njit(cache=True, error_model="numpy")
def _interior_extrema(q, j, y0, y1, d0, d1, start, h, largest, best, best_time):
    """Candidates at the critical points of the cubic inside the step (y0 where outside)."""
    a, b, c = derivative_coefficients(y0, y1, d0, d1)
    disc = b * b - 4 * a * c
    root = math.sqrt(disc) if disc >= 0 else math.nan
    quadratic = abs(a) > QUADRATIC_FLOOR
    for k in range(2):
        if quadratic:
            sk = (-b + root) / (2 * a) if k == 0 else (-b - root) / (2 * a)
        else:
            sk = -c / b if k == 0 else math.nan
        inside = sk > 0 and sk < 1
        if not inside:
            sk = 0.0
        value = _floor(hermite(y0, y1, d0, d1, sk)) if inside else y0
        if _better(value, (start + sk) * h, best[q, j], best_time[q, j], largest):
            best[q, j] = value
            best_time[q, j] = (start + sk) * h


@njit(cache=True, error_model="numpy")
def _grid_point(
    n, m, first, y, horizon, kinds, at_grid, end_grid, best, best_time, out, counting,
    count_grid, count_slot, counted,
):  # fmt: skip
    """Read-offs that fall on grid point n: values on the grid and the end of the run."""
    for q in range(kinds.size):
        if kinds[q] == VALUE and at_grid[q] == n:
            for j in range(m):
                out[q, j] = y[j]
        elif kinds[q] >= PEAK and end_grid == n:
            for j in range(m):
                if _better(y[j], horizon, best[q, j], best_time[q, j], kinds[q] == PEAK):
                    best[q, j] = y[j]
                    best_time[q, j] = horizon
    if counting:
        for c in range(count_grid.size):
            if count_grid[c] == n:
                for j in range(m):
                    slot = count_slot[first + j]
                    if slot >= 0:
                        counted[c, slot] = y[j]


@njit(cache=True, error_model="numpy")
def _finish(
    first, m, horizon, kinds, side, found, best, best_time, out, values, times, n0, finite_all
):  # fmt: skip
    """Quantities of the block once the run is over (the rules of the trajectory path)."""
    for j in range(m):
        s = first + j
        for q in range(kinds.size):
            kind = kinds[q]
            values[q, s] = math.nan
            times[q, s] = math.nan
            if kind == VALUE:
                values[q, s] = out[q, j]
            elif kind == TIME_TO:
                if side[q, j] == 0.0:
                    result = 0.0
                elif not found[q, j]:
                    result = math.nan
                else:
                    result = out[q, j]
                if not math.isfinite(n0[s]) or result > horizon * (1 + GRID_TOLERANCE):
                    result = math.nan
                values[q, s] = result
            elif finite_all[j] == 1.0:
                values[q, s] = best[q, j]
                if best[q, j] == best[q, j]:
                    times[q, s] = best_time[q, j]


def _stream(
    advance_block, slope_block, p, n0, lo, hi, factors, steps, n_steps, lasts, tails,
    horizon, kinds, levels, at_grid, at_index, at_s, end_grid, end_index, end_s,
    equilibria, records, record_slot, count_level, count_grid, count_index, count_s,
    count_slot, values, times, features, kept, counted,
):  # fmt: skip
    """Step members lo..hi-1 at every level and fill the output arrays (see the wrapper)."""
    for first in range(lo, hi, BLOCK):
        m = min(BLOCK, hi - first)
        for lv in range(steps.size):
            step_level(
                advance_block, slope_block, p, n0, first, m, factors, steps[lv], n_steps[lv],
                lasts[lv], tails[lv], horizon, kinds, levels, at_grid[lv], at_index[lv],
                at_s[lv], end_grid[lv], end_index[lv], end_s[lv], equilibria, records[lv],
                record_slot, lv == count_level, count_grid, count_index, count_s, count_slot,
                values[lv], times[lv], features[lv], kept[lv], counted,
            )  # fmt: skip


with warnings.catch_warnings():
    # The law's compiled functions are passed in as arguments (what keeps this loop compiled
    # once for every law); numba labels that feature experimental. The tests hold the
    # results to the numpy path.
    warnings.simplefilter("ignore", NumbaExperimentalFeatureWarning)
    stream = njit(STREAM, cache=True, error_model="numpy", nogil=True)(_stream)
