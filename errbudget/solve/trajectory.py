"""Quantities of interest read off fixed-step trajectories, vectorised over the ensemble.

Between grid points the solution is represented by the cubic Hermite interpolant built
from the states and the right-hand side at both ends. Its local error is O(h^4), so a value
off the step grid, a crossing time or an interior extremum does not lower the observed order
of schemes up to order 4 (Hairer, Norsett & Wanner 1993, Solving Ordinary Differential
Equations I, sec. II.6, dense output).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from errbudget.solve.problem import QuantitySpec

GRID_TOLERANCE = 1e-9  # relative distance below which a time counts as a grid point
BISECTION_ITERATIONS = 53  # halvings of [0, 1]: down to the spacing of doubles near 1


@dataclass(frozen=True)
class Trajectory:
    """States of an ensemble on a fixed grid t_n = n h, n = 0..n_steps (t_last >= horizon).

    Attributes
    ----------
    states : ndarray, shape (n_steps + 1, S) [population]
    step : float [time]
    horizon : float [time]
    rate : callable f(t, N, params) [population / time]
    params : mapping of name to (S,) arrays
    """

    states: np.ndarray
    step: float
    horizon: float
    rate: Callable
    params: Mapping[str, np.ndarray]

    def slope(self, index: np.ndarray) -> np.ndarray:
        """f at the grid points ``index`` (one per member) [population / time]."""
        members = np.arange(self.states.shape[1])
        with np.errstate(all="ignore"):
            return np.asarray(
                self.rate(index * self.step, self.states[index, members], self.params),
                dtype=self.states.dtype,
            )

    def hermite(self, index: np.ndarray, s: np.ndarray) -> np.ndarray:
        """Interpolant at t = (index + s) h, 0 <= s <= 1, one (index, s) per member."""
        members = np.arange(self.states.shape[1])
        y0 = self.states[index, members]
        y1 = self.states[index + 1, members]
        f0, f1 = self.slope(index), self.slope(index + 1)
        h = self.step
        s2, s3 = s * s, s * s * s
        return (
            (2 * s3 - 3 * s2 + 1) * y0
            + (s3 - 2 * s2 + s) * h * f0
            + (-2 * s3 + 3 * s2) * y1
            + (s3 - s2) * h * f1
        )

    def value_at(self, time: float) -> tuple[np.ndarray, bool]:
        """States at ``time``; the flag is True when ``time`` is off the grid."""
        position = time / self.step
        nearest = round(position)
        members = self.states.shape[1]
        if abs(position - nearest) <= GRID_TOLERANCE * max(1.0, position):
            return self.states[int(nearest)].astype(float), False
        index = np.full(members, int(np.floor(position)))
        s = np.full(members, position - np.floor(position))
        with np.errstate(all="ignore"):
            return self.hermite(index, s).astype(float), True

    @property
    def last_index(self) -> int:
        """Index of the last grid point at or before the horizon."""
        return int(np.floor(self.horizon / self.step + GRID_TOLERANCE))


def time_to(traj: Trajectory, level: float) -> np.ndarray:
    """First time the state reaches ``level`` [time]; NaN where it does not by the horizon.

    The crossing is bracketed on the grid and located by bisection on the Hermite cubic.
    """
    states = traj.states.astype(float)
    members = np.arange(states.shape[1])
    side = np.sign(states[0] - level)
    with np.errstate(invalid="ignore"):
        crossed = np.sign(states[1:] - level) != side[None, :]
    crossed &= np.isfinite(states[1:])
    crossed[traj.last_index + 1 :] = False
    found = crossed.any(axis=0)
    index = np.where(found, crossed.argmax(axis=0), 0)
    low = np.zeros(states.shape[1])
    high = np.ones(states.shape[1])
    with np.errstate(all="ignore"):
        # The cubic's coefficients once, then bisection on p(s) - level (same basis as hermite).
        y0, y1 = states[index, members], states[index + 1, members]
        f0 = traj.slope(index).astype(float) * traj.step
        f1 = traj.slope(index + 1).astype(float) * traj.step
        c3 = 2 * y0 + f0 - 2 * y1 + f1
        c2 = -3 * y0 - 2 * f0 + 3 * y1 - f1
        c0 = y0 - level
        for _ in range(BISECTION_ITERATIONS):
            mid = 0.5 * (low + high)
            same = np.sign(((c3 * mid + c2) * mid + f0) * mid + c0) == side
            low = np.where(same, mid, low)
            high = np.where(same, high, mid)
    result = (index + 0.5 * (low + high)) * traj.step
    result = np.where(side == 0, 0.0, result)
    result[~found & (side != 0)] = np.nan
    result[~np.isfinite(states[0, members])] = np.nan
    # The horizon may fall inside the last interval: a crossing after it does not count.
    result[result > traj.horizon * (1 + GRID_TOLERANCE)] = np.nan
    return result


def extremum(traj: Trajectory, largest: bool) -> np.ndarray:
    """Peak (``largest``) or minimum of the state over [0, horizon] [population].

    Candidates are the grid values, the value at the horizon, and the critical points of the
    Hermite cubic on every step, so that an interior extremum keeps the scheme's order
    wherever it falls.
    """
    last = traj.last_index
    states = traj.states[: last + 1].astype(float)
    members = states.shape[1]
    with np.errstate(all="ignore"):
        times = (np.arange(last + 1) * traj.step)[:, None]
        slopes = np.broadcast_to(
            np.asarray(traj.rate(times, traj.states[: last + 1], traj.params), dtype=float),
            states.shape,
        )
        end_value, _ = traj.value_at(traj.horizon)
        candidates = [states, end_value[None, :]]
        if last >= 1:
            y0, y1 = states[:-1], states[1:]
            f0, f1 = slopes[:-1] * traj.step, slopes[1:] * traj.step
            for s in _critical_points(y0, y1, f0, f1):
                inside = (s > 0) & (s < 1)
                s = np.where(inside, s, 0.0)
                s2, s3 = s * s, s * s * s
                value = (
                    (2 * s3 - 3 * s2 + 1) * y0
                    + (s3 - 2 * s2 + s) * f0
                    + (-2 * s3 + 3 * s2) * y1
                    + (s3 - s2) * f1
                )
                candidates.append(np.where(inside, value, y0))
        stacked = np.concatenate(candidates, axis=0)
        result = stacked.max(axis=0) if largest else stacked.min(axis=0)
    result = np.asarray(result, dtype=float).reshape(members)
    result[~np.isfinite(states).all(axis=0)] = np.nan
    return result


def _critical_points(y0, y1, f0, f1) -> tuple[np.ndarray, np.ndarray]:
    """Roots in s of the derivative of the Hermite cubic on each step (NaN if none).

    ``f0`` and ``f1`` are the end slopes times the step.
    """
    # p'(s) = a s^2 + b s + c for the Hermite basis of Trajectory.hermite.
    a = 6 * y0 + 3 * f0 - 6 * y1 + 3 * f1
    b = -6 * y0 - 4 * f0 + 6 * y1 - 2 * f1
    c = f0
    with np.errstate(all="ignore"):
        disc = b * b - 4 * a * c
        root = np.sqrt(np.where(disc >= 0, disc, np.nan))
        quadratic = np.abs(a) > 1e-300
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
