"""The stored-trajectory reference path: quantities and features read off whole trajectories.

Every member's states on the fixed grid t_n = n h are kept, and each quantity of interest is
read off them with numpy, vectorised over the ensemble. This is the readable reference the
streaming kernel (:mod:`errbudget.solve.stream`) is tested against, and the path of the
float32 and long double runs of the round-off estimate. Between grid points the solution is
the cubic Hermite interpolant of :mod:`errbudget.solve.dense`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from errbudget.solve import dense
from errbudget.solve.problem import QuantitySpec

GRID_TOLERANCE = 1e-9  # relative distance below which a time counts as a grid point
BISECTION_ITERATIONS = dense.BISECTION_ITERATIONS
FLAT_SHARE = 1e-9  # an increment below this share of |N| at its ends counts as flat
CROSS_SHARE = 1e-12  # a state must pass a level by this share of it to count as crossing


def locate(time: float, step: float) -> tuple[int, int, float]:
    """Where ``time`` falls on the grid of ``step``: (grid index or -1, interval, s).

    A time within GRID_TOLERANCE (relative) of a grid point is that point; otherwise it lies
    in interval ``index`` at the fraction ``s`` of the step.
    """
    position = time / step
    nearest = round(position)
    if abs(position - nearest) <= GRID_TOLERANCE * max(1.0, position):
        return int(nearest), int(nearest), 0.0
    index = math.floor(position)
    return -1, int(index), position - index


def last_index(horizon: float, step: float) -> int:
    """Index of the last grid point at or before the horizon."""
    return int(np.floor(horizon / step + GRID_TOLERANCE))


def tail_start(last: int) -> int:
    """First grid index of the last quarter of the run (at least three points)."""
    rows = last + 1
    return rows - max(3, rows // 4)


@dataclass(frozen=True)
class Trajectory:
    """States of an ensemble on a fixed grid t_n = n h, n = 0..n_steps (t_last >= horizon).

    Zero is absorbing (see :func:`errbudget.solve.tableaux.integrate`): a state at zero has
    slope zero, and on the step where a member reached zero the read-offs interpolate towards
    the step's own end value ``cleared_value`` at ``cleared_at``.

    Attributes
    ----------
    states : ndarray, shape (n_steps + 1, S) [population]
    step : float [time]
    horizon : float [time]
    rate : callable f(t, N, params) [population / time]
    params : mapping of name to (S,) arrays
    cleared_at : ndarray (S,) of int, optional -- grid index where each member reached zero
    cleared_value : ndarray (S,), optional -- the step's own end value there [population]
    """

    states: np.ndarray
    step: float
    horizon: float
    rate: Callable
    params: Mapping[str, np.ndarray]
    cleared_at: np.ndarray | None = None
    cleared_value: np.ndarray | None = None

    def slope(self, index) -> np.ndarray:
        """f at grid points ``index`` (an int, or one per member); zero where N is zero."""
        members = np.arange(self.states.shape[1])
        index = np.broadcast_to(np.asarray(index), members.shape)
        states = self.states[index, members]
        with np.errstate(all="ignore"):
            slopes = np.asarray(
                self.rate(index * self.step, states, self.params), dtype=self.states.dtype
            )
        return np.where(states == 0, self.states.dtype.type(0), slopes)

    def interval(self, index) -> tuple[np.ndarray, ...]:
        """End values and step-scaled end slopes (y0, y1, d0, d1) of the interval ``index``.

        In binary64 at least (a float32 run's states and slopes are read exactly in binary64),
        in the run's own type when it is wider.
        """
        members = np.arange(self.states.shape[1])
        index = np.broadcast_to(np.asarray(index), members.shape)
        wide = np.promote_types(self.states.dtype, np.float64)
        y0 = self.states[index, members].astype(wide)
        y1 = self.states[index + 1, members].astype(wide)
        d0 = self.slope(index).astype(wide) * self.step
        d1 = self.slope(index + 1).astype(wide) * self.step
        if self.cleared_at is not None:
            reached = index + 1 == self.cleared_at
            if reached.any():
                value = self.cleared_value.astype(self.states.dtype)
                with np.errstate(all="ignore"):
                    slope = np.asarray(
                        self.rate((index + 1) * self.step, value, self.params),
                        dtype=self.states.dtype,
                    )
                y1 = np.where(reached, value.astype(wide), y1)
                d1 = np.where(reached, slope.astype(wide) * self.step, d1)
        return y0, y1, d0, d1

    def intervals(self, last: int) -> tuple[np.ndarray, ...]:
        """(y0, y1, d0, d1) of every interval 0..last-1 at once, shape (last, S) each.

        The same values as :meth:`interval` row by row, in binary64 at least.
        """
        states = self.states[: last + 1]
        wide = np.promote_types(self.states.dtype, np.float64)
        times = (np.arange(last + 1) * self.step)[:, None]
        with np.errstate(all="ignore"):
            slopes = np.asarray(self.rate(times, states, self.params), dtype=self.states.dtype)
        slopes = np.where(states == 0, self.states.dtype.type(0), slopes)
        d = slopes.astype(wide) * self.step
        y = states.astype(wide)
        y0, y1, d0, d1 = y[:-1], y[1:].copy(), d[:-1], d[1:].copy()
        if self.cleared_at is not None:
            for member in np.flatnonzero((self.cleared_at >= 1) & (self.cleared_at <= last)):
                row = int(self.cleared_at[member]) - 1
                y1[row, member], d1[row, member] = (
                    part[member] for part in self.interval(np.full(y.shape[1], row))[1::2]
                )
        return y0, y1, d0, d1

    def value_at(self, time: float) -> tuple[np.ndarray, bool]:
        """States at ``time``; the flag is True when ``time`` is off the grid."""
        grid, index, s = locate(time, self.step)
        if grid >= 0:
            return self.states[grid].astype(float), False
        with np.errstate(all="ignore"):
            return floor(dense.hermite(*self.interval(index), s)).astype(float), True

    @property
    def last_index(self) -> int:
        """Index of the last grid point at or before the horizon."""
        return last_index(self.horizon, self.step)


def floor(values):
    """Values read between grid points are never below zero (NaN stays NaN)."""
    return np.where(values < 0, 0, values)


def time_to(traj: Trajectory, level: float) -> np.ndarray:
    """First time the state reaches ``level`` [time]; NaN where it does not by the horizon.

    The crossing is bracketed on the grid and located by bisection on the Hermite cubic.
    """
    states = traj.states.astype(float)
    side = np.sign(states[0] - level)
    with np.errstate(invalid="ignore"):
        crossed = np.sign(states[1:] - level) != side[None, :]
    crossed &= np.isfinite(states[1:])
    crossed[traj.last_index + 1 :] = False
    found = crossed.any(axis=0)
    index = np.where(found, crossed.argmax(axis=0), 0)
    with np.errstate(all="ignore"):
        y0, y1, d0, d1 = (part.astype(float) for part in traj.interval(index))
        fraction = _bisect(y0, y1, d0, d1, level, side)
    result = (index + fraction) * traj.step
    result = np.where(side == 0, 0.0, result)
    result[~found & (side != 0)] = np.nan
    result[~np.isfinite(states[0])] = np.nan
    # The horizon may fall inside the last interval: a crossing after it does not count.
    result[result > traj.horizon * (1 + GRID_TOLERANCE)] = np.nan
    return result


def _bisect(y0, y1, d0, d1, level, side):
    """Fraction s of the interval where the cubic meets ``level``, by bisection."""
    c3, c2, c1 = dense.cubic(y0, y1, d0, d1)
    c0 = y0 - level
    low = np.zeros(np.shape(y0))
    high = np.ones(np.shape(y0))
    for _ in range(BISECTION_ITERATIONS):
        mid = 0.5 * (low + high)
        same = np.sign(((c3 * mid + c2) * mid + c1) * mid + c0) == side
        low = np.where(same, mid, low)
        high = np.where(same, high, mid)
    return 0.5 * (low + high)


def extremum(traj: Trajectory, largest: bool) -> np.ndarray:
    """Peak (``largest``) or minimum of the state over [0, horizon] [population]."""
    return extremum_with_time(traj, largest)[0]


def extremum_with_time(traj: Trajectory, largest: bool) -> tuple[np.ndarray, np.ndarray]:
    """Peak or minimum over [0, horizon] and the first time it is reached [population, time].

    Candidates, in time order: the grid values, the critical points of the Hermite cubic
    inside each step, and the value at the horizon; an interior extremum keeps the scheme's
    order wherever it falls. A member with a non-finite state gives NaN (value and time).
    """
    last = traj.last_index
    states = traj.states[: last + 1].astype(float)
    values, times = [states], [np.arange(last + 1) * traj.step]
    with np.errstate(all="ignore"):
        if last >= 1:
            index = np.arange(last)[:, None]
            y0, y1, d0, d1 = (part.astype(float) for part in traj.intervals(last))
            for s in critical_points(y0, y1, d0, d1):
                inside = (s > 0) & (s < 1)
                s = np.where(inside, s, 0.0)
                values.append(np.where(inside, floor(dense.hermite(y0, y1, d0, d1, s)), y0))
                times.append((index + s) * traj.step)
        end, _ = traj.value_at(traj.horizon)
        values.append(end[None, :])
        times.append(np.full(1, traj.horizon))
    value, time = _pick(values, times, largest, states.shape[1])
    bad = ~np.isfinite(states).all(axis=0)
    value[bad] = np.nan
    time[bad] = np.nan
    return value, time


def _pick(values, times, largest, members) -> tuple[np.ndarray, np.ndarray]:
    """The largest (smallest) candidate, NaN if any is NaN, and the earliest time it occurs."""
    stacked = np.concatenate([np.broadcast_to(v, (v.shape[0], members)) for v in values])
    moments = np.concatenate(
        [
            np.broadcast_to(np.reshape(t, (np.shape(t)[0], -1)), (np.shape(t)[0], members))
            for t in times
        ]
    )
    best = stacked.max(axis=0) if largest else stacked.min(axis=0)
    time = np.where(stacked == best[None, :], moments, np.inf).min(axis=0)
    return np.asarray(best, dtype=float).copy(), np.where(np.isfinite(time), time, np.nan)


def critical_points(y0, y1, d0, d1) -> tuple[np.ndarray, np.ndarray]:
    """Roots in s of the derivative of the Hermite cubic on each step (NaN if none)."""
    a, b, c = dense.derivative_coefficients(y0, y1, d0, d1)
    with np.errstate(all="ignore"):
        disc = b * b - 4 * a * c
        root = np.sqrt(np.where(disc >= 0, disc, np.nan))
        quadratic = np.abs(a) > dense.QUADRATIC_FLOOR
        s1 = np.where(quadratic, (-b + root) / (2 * a), -c / b)
        s2 = np.where(quadratic, (-b - root) / (2 * a), np.nan)
    return s1, s2


def evaluate(spec: QuantitySpec, traj: Trajectory) -> tuple[np.ndarray, bool]:
    """Values of one quantity for every member; the flag says a time was off the grid."""
    if spec.kind == "value":
        return traj.value_at(spec.at)
    if spec.kind == "time-to":
        return time_to(traj, spec.level), False
    return extremum(traj, largest=spec.kind == "peak"), False


# -------------------------------------------------------------------------------- features


@dataclass(frozen=True)
class Features:
    """What a level's solution did, per member: the inputs of the artefact checks.

    Attributes (arrays of shape (S,))
    ----------
    finite : bool -- every state up to the horizon is finite
    largest : float -- largest |N| over the finite states up to the horizon [population]
    smallest : float -- smallest state up to the horizon, non-finite states read as 0
    scale : float -- largest |N| over every finite state, the step past the horizon included
    turns : int -- sign changes of the increments up to the horizon (flat ones skipped)
    late_turns : int -- the same from ``tail_from`` on (the last quarter of the run)
    above, below : bool, shape (E, S) -- a state passed each stable level upward / downward
    """

    finite: np.ndarray
    largest: np.ndarray
    smallest: np.ndarray
    scale: np.ndarray
    turns: np.ndarray
    late_turns: np.ndarray
    above: np.ndarray
    below: np.ndarray


def features(
    states: np.ndarray, last: int, levels: np.ndarray, tail_from: int | None = None
) -> Features:
    """Features of stored states (T, S) with ``last`` the horizon's index.

    ``levels`` (E, S) holds the stable equilibria per member (NaN where absent). An increment
    is flat when it is at most FLAT_SHARE of the larger |N| at its two ends; a level is passed
    upward when a state exceeds it by CROSS_SHARE of it (downward likewise).
    """
    tail_from = tail_start(last) if tail_from is None else tail_from
    window = states[: last + 1].astype(float)
    with np.errstate(all="ignore"):
        ok = np.isfinite(window)
        safe = np.where(ok, window, 0.0)
        everything = states.astype(float)
        scale = np.abs(np.where(np.isfinite(everything), everything, 0.0)).max(axis=0)
        levels = np.asarray(levels, dtype=float).reshape(-1, window.shape[1])
        above = np.array(
            [(safe > lv * (1 + CROSS_SHARE) + 1e-300).any(axis=0) for lv in levels], dtype=bool
        )
        below = np.array(
            [(safe < lv * (1 - CROSS_SHARE) - 1e-300).any(axis=0) for lv in levels], dtype=bool
        )
    return Features(
        finite=ok.all(axis=0),
        largest=np.abs(safe).max(axis=0),
        smallest=safe.min(axis=0),
        scale=scale,
        turns=turns(safe),
        late_turns=turns(safe[tail_from:]),
        above=above.reshape(-1, window.shape[1]),
        below=below.reshape(-1, window.shape[1]),
    )


def turns(safe: np.ndarray) -> np.ndarray:
    """Sign changes of the increments of finite states (T, S), flat increments skipped."""
    if safe.shape[0] < 3:
        return np.zeros(safe.shape[1], dtype=np.int64)
    increments = np.diff(safe, axis=0)
    threshold = FLAT_SHARE * np.maximum(np.abs(safe[:-1]), np.abs(safe[1:]))
    signs = (increments > threshold).astype(np.int8) - (increments < -threshold).astype(np.int8)
    # Carry the last non-flat sign forward over flat increments, then count the flips.
    rows = np.arange(signs.shape[0], dtype=np.int64)[:, None]
    last = np.maximum.accumulate(np.where(signs != 0, rows, 0), axis=0)
    carried = np.take_along_axis(signs, last, axis=0)
    flips = (carried[1:] != carried[:-1]) & (carried[1:] != 0) & (carried[:-1] != 0)
    return flips.sum(axis=0).astype(np.int64)
