"""The streaming pass: every level of an ensemble stepped once, everything read off on the way.

:func:`stream` runs the compiled kernel of :mod:`errbudget.solve.stream_body` over the members
(threads share them) and returns, per level (step size), the quantities, the peak and minimum
times, the :class:`~errbudget.solve.trajectory.Features` the artefact checks need, the states
kept for the report's series and the values at the count times. No trajectory is stored, so
memory grows with members x quantities x levels, not with the number of steps.

:func:`stream_reference` gives the same results from stored trajectories and numpy
(:mod:`errbudget.solve.trajectory`): the readable reference the tests hold the kernel to,
and the path used when numba is not available.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from errbudget.solve import engine, ensemble
from errbudget.solve.problem import Problem
from errbudget.solve.tableaux import Scheme, get_scheme, integrate
from errbudget.solve.trajectory import (
    Features,
    Trajectory,
    extremum_with_time,
    last_index,
    locate,
    tail_start,
    time_to,
)
from errbudget.solve.trajectory import features as trajectory_features

KINDS = {"value": 0, "time-to": 1, "peak": 2, "minimum": 3}
N_FEATURES = 6  # finite, largest, smallest, scale, turns, late turns; then two per level
CHUNK_MEMBERS = 1 << 16  # members per kernel call at most
PROGRESS_WORK = 50_000_000  # member-steps per kernel call when progress is reported
# A mapper runs ``function`` on each item and yields the results in the items' order:
# the builtin ``map`` (in this process) or a cluster's (errbudget.batch.cluster.DaskMapper).
Mapper = Callable[[Callable, Sequence], Iterable]


@dataclass(frozen=True)
class Readout:
    """What to keep besides the quantities, and for which members.

    Attributes
    ----------
    keep : mapping of step to int array
        Grid indices (sorted, distinct) whose states are kept, per level.
    keep_members : int array
        Members (rows) whose kept states are returned, in this order.
    count_times : float array or None
        Times [T] read (Hermite) on the level ``count_step``, for ``count_members``;
        times after the horizon give NaN.
    count_step : float or None
    count_members : int array or None
    tails : mapping of step to int
        First grid index of the "late" window of the features, per level (default: the
        last quarter of the level's own grid).
    """

    keep: Mapping[float, np.ndarray] = field(default_factory=dict)
    keep_members: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    count_times: np.ndarray | None = None
    count_step: float | None = None
    count_members: np.ndarray | None = None
    tails: Mapping[float, int] = field(default_factory=dict)


@dataclass(frozen=True)
class Level:
    """One level's results over the ensemble.

    Attributes
    ----------
    step : float [T]
    values : ndarray (Q, S) -- quantities (NaN where undefined) [quantity units]
    times : ndarray (Q, S) -- time of each peak and minimum, NaN for other kinds [T]
    features : Features
    kept : ndarray (R, M) -- states at the kept grid indices, for ``keep_members``
    counted : ndarray (C, M) or None -- states at the count times, for ``count_members``
    member_steps : int -- steps taken by all members together
    seconds : float -- wall time of the level's kernel work (shared when levels run together)
    """

    step: float
    values: np.ndarray
    times: np.ndarray
    features: Features
    kept: np.ndarray
    counted: np.ndarray | None
    member_steps: int
    seconds: float


def stream(
    problem: Problem,
    params: Mapping[str, np.ndarray],
    steps: Sequence[float],
    *,
    levels: np.ndarray | None = None,
    readout: Readout | None = None,
    scheme: Scheme | None = None,
    threads: int | None = None,
    progress: Callable[[int], None] | None = None,
    mapper: Mapper | None = None,
) -> list[Level]:
    """Step every member of ``params`` at each of ``steps`` and read everything off.

    Parameters
    ----------
    problem : Problem
        The law, scheme, horizon [T] and quantities.
    params : mapping of str to ndarray (S,)
        Every parameter of the law and N0 [internal units].
    steps : sequence of float
        The levels' step sizes [T].
    levels : ndarray (E, S), optional
        Stable equilibria per member (NaN where absent) for the overshoot features.
    readout : Readout, optional
        States to keep for the series and the count times.
    scheme : Scheme, optional
        Defaults to the problem's scheme.
    threads : int, optional
        Threads sharing the members (the results do not depend on it).
    progress : callable, optional
        Called with the member-steps of each chunk of members as it is done.
    mapper : callable, optional
        Runs the chunks of :data:`MAPPED_CHUNK` members as separate tasks,
        ``mapper(run_chunk, chunks)``, yielding each chunk's levels in order (see
        :func:`errbudget.solve.chunks.mapped`); the results are the same, bit for bit.

    Returns
    -------
    list of Level, in the order of ``steps``.
    """
    scheme = scheme or get_scheme(problem.scheme)
    if mapper is not None:
        from errbudget.solve.chunks import mapped

        return mapped(problem, params, steps, mapper, levels=levels, readout=readout,
                      scheme=scheme, progress=progress)  # fmt: skip
    found = ensemble.compiled(problem.model, scheme)
    if found is None:
        return stream_reference(problem, params, steps, levels=levels, readout=readout,
                                scheme=scheme)  # fmt: skip
    from errbudget.solve import stream_body  # numba: compiled on first use, then cached

    module, spec = found
    plan = _Plan(problem, params, steps, levels, readout or Readout())
    rows = engine.parameter_rows(spec, plan.law, plan.size)
    factors = np.array([spec.t_factor, spec.n_factor, spec.out_factor])
    law = (module.advance_block, module.slope_block, rows, plan.n0)

    def run(lo: int, hi: int, offset: int) -> None:
        stream_body.stream(*law, offset + lo, offset + hi, factors, *plan.arguments)

    started = time.perf_counter()
    per_member = max(int(plan.n_steps.sum()), 1)
    chunk = CHUNK_MEMBERS
    if progress is not None:  # chunks of about PROGRESS_WORK member-steps, whole blocks
        chunk = min(chunk, max(stream_body.BLOCK * engine.THREADS, PROGRESS_WORK // per_member))
    for offset in range(0, plan.size, chunk):
        size = min(plan.size - offset, chunk)
        engine.run_threaded(run, size, threads, offset)
        if progress is not None:
            progress(size * per_member)
    seconds = time.perf_counter() - started
    return plan.results(seconds)


class _Plan:
    """The kernel's arguments for one call: grid positions of every read-off, output arrays."""

    def __init__(self, problem, params, steps, levels, readout: Readout):
        self.steps = np.array([float(s) for s in steps])
        self.n0 = np.array(params["N0"], dtype=np.float64).reshape(-1)  # a writable copy
        self.size = self.n0.size
        self.law = {k: v for k, v in params.items() if k != "N0"}
        horizon = float(problem.horizon)
        specs = problem.quantities
        L, Q = self.steps.size, len(specs)
        self.n_steps = np.array([ensemble.n_steps_for(horizon, h) for h in self.steps])
        lasts = np.array([last_index(horizon, h) for h in self.steps])
        tails = np.array(
            [max(0, int(readout.tails.get(h, tail_start(last)))) for h, last in zip(
                self.steps, lasts, strict=True)]
        )  # fmt: skip
        kinds = np.array([KINDS[q.kind] for q in specs], dtype=np.int64)
        targets = np.array([np.nan if q.level is None else q.level for q in specs])
        at = np.full((3, L, Q), -1.0)
        end = np.full((3, L), -1.0)
        for lv, h in enumerate(self.steps):
            end[:, lv] = locate(horizon, h)
            for q, spec in enumerate(specs):
                if spec.kind == "value":
                    at[:, lv, q] = locate(spec.at, h)
        equilibria = np.zeros((0, self.size)) if levels is None else np.asarray(levels, float)
        equilibria = np.ascontiguousarray(equilibria.reshape(-1, self.size))
        R = max((len(readout.keep.get(h, ())) for h in self.steps), default=0)
        records = np.full((L, max(R, 1)), -1, dtype=np.int64)
        for lv, h in enumerate(self.steps):
            index = np.asarray(readout.keep.get(h, ()), dtype=np.int64)
            records[lv, : index.size] = np.sort(index)
        self.keep_slot = _slots(readout.keep_members, self.size)
        count = _counts(readout, self.steps, horizon, self.size)
        self.count_inside, count_at, self.count_slot, count_level = count
        M = max(len(readout.keep_members), 1)
        self.values = np.full((L, Q, self.size), np.nan)
        self.times = np.full((L, Q, self.size), np.nan)
        self.features = np.zeros((L, N_FEATURES + 2 * equilibria.shape[0], self.size))
        self.kept = np.full((L, records.shape[1], M), np.nan)
        self.counted = np.full((max(count_at.shape[1], 1), _slot_count(self.count_slot)), np.nan)
        self.records = records
        self.readout = readout
        self.equilibria = equilibria
        self.arguments = (
            self.steps, self.n_steps, lasts, tails, horizon, kinds, targets,
            at[0].astype(np.int64), at[1].astype(np.int64), at[2].copy(),
            end[0].astype(np.int64), end[1].astype(np.int64), end[2].copy(), equilibria,
            records, self.keep_slot, count_level, count_at[0].astype(np.int64),
            count_at[1].astype(np.int64), count_at[2].copy(), self.count_slot,
            self.values, self.times, self.features, self.kept, self.counted,
        )  # fmt: skip

    def results(self, seconds: float) -> list[Level]:
        levels = []
        total = max(int(self.n_steps.sum()), 1)
        for lv, h in enumerate(self.steps):
            kept_rows = len(self.readout.keep.get(h, ()))
            counted = None
            if self.readout.count_step is not None and h == self.readout.count_step:
                counted = np.full((self.count_inside.size, _slot_count(self.count_slot)), np.nan)
                counted[self.count_inside] = self.counted[: int(self.count_inside.sum())]
            levels.append(
                Level(
                    step=float(h),
                    values=self.values[lv],
                    times=self.times[lv],
                    features=_features(self.features[lv], self.equilibria.shape[0]),
                    kept=self.kept[lv, :kept_rows, : len(self.readout.keep_members)],
                    counted=counted,
                    member_steps=int(self.n_steps[lv]) * self.size,
                    seconds=seconds * int(self.n_steps[lv]) / total,
                )
            )
        return levels


def _slots(members, size: int) -> np.ndarray:
    """Output slot of every member (-1: not kept), from the chosen members in order."""
    slots = np.full(size, -1, dtype=np.int64)
    members = np.asarray(members, dtype=np.int64)
    slots[members] = np.arange(members.size)
    return slots


def _slot_count(slots: np.ndarray) -> int:
    return max(int(slots.max()) + 1 if slots.size else 0, 1)


def _counts(readout: Readout, steps: np.ndarray, horizon: float, size: int):
    """Count-time read-offs: which times are inside the horizon, their grid positions, slots."""
    if readout.count_times is None or readout.count_step is None:
        return np.zeros(0, dtype=bool), np.full((3, 0), -1.0), np.full(size, -1, np.int64), -1
    times = np.asarray(readout.count_times, dtype=float)
    inside = times <= horizon * (1 + 1e-9)
    at = np.array([locate(float(t), readout.count_step) for t in times[inside]]).T
    at = at.reshape(3, -1)
    level = int(np.flatnonzero(steps == readout.count_step)[0])
    members = readout.count_members if readout.count_members is not None else np.arange(size)
    return inside, at, _slots(members, size), level


def _features(array: np.ndarray, n_levels: int) -> Features:
    """Features from the kernel's float array (F, S)."""
    pairs = array[N_FEATURES:].reshape(n_levels, 2, array.shape[1])
    return Features(
        finite=array[0] == 1.0,
        largest=array[1].copy(),
        smallest=array[2].copy(),
        scale=array[3].copy(),
        turns=array[4].astype(np.int64),
        late_turns=array[5].astype(np.int64),
        above=pairs[:, 0] == 1.0,
        below=pairs[:, 1] == 1.0,
    )


def stream_reference(
    problem: Problem,
    params: Mapping[str, np.ndarray],
    steps: Sequence[float],
    *,
    levels: np.ndarray | None = None,
    readout: Readout | None = None,
    scheme: Scheme | None = None,
) -> list[Level]:
    """:func:`stream` from whole trajectories and numpy (same arguments, same results)."""
    scheme = scheme or get_scheme(problem.scheme)
    readout = readout or Readout()
    law = {k: np.asarray(v, float) for k, v in params.items() if k != "N0"}
    n0 = np.asarray(params["N0"], dtype=float).reshape(-1)
    equilibria = np.zeros((0, n0.size)) if levels is None else np.asarray(levels, float)
    out = []
    for h in steps:
        started = time.perf_counter()
        n_steps = ensemble.n_steps_for(problem.horizon, h)
        cleared: dict = {}
        with np.errstate(all="ignore"):
            states = integrate(problem.model.rate, n0, law, h, n_steps, scheme, cleared=cleared)
        traj = Trajectory(states, h, problem.horizon, problem.model.rate, law, **_at(cleared))
        values, moments = _quantities(problem, traj)
        last = traj.last_index
        tail = max(0, int(readout.tails.get(h, tail_start(last))))
        keep = np.sort(np.asarray(readout.keep.get(h, ()), dtype=np.int64))
        members = np.asarray(readout.keep_members, dtype=np.int64)
        counted = None
        if readout.count_times is not None and h == readout.count_step:
            chosen = np.arange(n0.size) if readout.count_members is None else readout.count_members
            counted = np.full((len(readout.count_times), len(chosen)), np.nan)
            for c, t in enumerate(readout.count_times):
                if t <= problem.horizon * (1 + 1e-9):
                    counted[c] = traj.value_at(float(t))[0][chosen]
        out.append(
            Level(
                step=float(h),
                values=values,
                times=moments,
                features=trajectory_features(states, last, equilibria, tail),
                kept=states[keep][:, members].astype(float),
                counted=counted,
                member_steps=n_steps * n0.size,
                seconds=time.perf_counter() - started,
            )
        )
    return out


def _at(cleared: dict) -> dict:
    """Trajectory keywords from integrate's ``cleared`` record."""
    return {"cleared_at": cleared["index"], "cleared_value": cleared["value"]}


def _quantities(problem: Problem, traj: Trajectory) -> tuple[np.ndarray, np.ndarray]:
    """Values (Q, S) and peak / minimum times (Q, S) read off a stored trajectory."""
    members = traj.states.shape[1]
    values = np.full((len(problem.quantities), members), np.nan)
    moments = np.full_like(values, np.nan)
    for q, spec in enumerate(problem.quantities):
        if spec.kind == "value":
            values[q] = traj.value_at(spec.at)[0]
        elif spec.kind == "time-to":
            values[q] = time_to(traj, spec.level)
        else:
            values[q], moments[q] = extremum_with_time(traj, spec.kind == "peak")
    return values, moments
