"""Ensemble sweeps over the design in chunks of parameter sets, so memory stays bounded.

Every member of the ensemble is integrated independently, so a chunked sweep gives the same
numbers as one over all members at once; only per-member results (quantity values, artefact
masks, a thinned time series) are kept across chunks, never whole trajectories.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from errbudget.case.load import Case
from errbudget.estimates import artefacts
from errbudget.estimates.convergence import richardson
from errbudget.laws.models import stable_equilibria
from errbudget.solve.ensemble import n_steps_for, quantity_values, solve

TRAJECTORY_BUDGET_MB = 32  # float64 trajectory storage allowed for one chunk
TRAJECTORIES_PER_CHUNK = 4  # trajectories alive at once in a chunk (coarse, finer, finest, spare)
MIN_CHUNK = 64  # fewer members per chunk would waste the vectorised engine
SERIES_POINTS = 400  # most time points kept for the report's time series
SERIES_MEMBERS = 4096  # independent draws kept for the report's bands (first ones of the design)
BYTES = 8


def chunk_rows(case: Case, finest_step: float, rows: int) -> int:
    """Members per chunk so that the chunk's trajectories fit in TRAJECTORY_BUDGET_MB."""
    per_member = (n_steps_for(case.horizon, finest_step) + 1) * BYTES * TRAJECTORIES_PER_CHUNK
    return int(max(MIN_CHUNK, min(rows, TRAJECTORY_BUDGET_MB * 1e6 // per_member)))


def memory_mb(case: Case, rows: int, finest_step: float, quantities: int, levels: int) -> float:
    """Peak memory of a run [MB]: one chunk's trajectories plus the per-member results."""
    chunk = chunk_rows(case, finest_step, rows)
    trajectories = chunk * (n_steps_for(case.horizon, finest_step) + 1) * BYTES
    per_member = rows * quantities * (levels + 4) * BYTES
    series = 2 * min(rows, SERIES_MEMBERS) * SERIES_POINTS * BYTES
    return (trajectories * TRAJECTORIES_PER_CHUNK + per_member + series) / 1e6


def _slices(rows: int, size: int):
    for start in range(0, rows, size):
        yield slice(start, min(start + size, rows))


def _take(params: dict, part: slice) -> dict:
    return {name: np.asarray(values)[part] for name, values in params.items()}


def _levels(case: Case, params: dict) -> list[np.ndarray]:
    law = {k: v for k, v in params.items() if k != "N0"}
    return [eq.value for eq in stable_equilibria(case.model, law)]


def fine_at(finest, times: np.ndarray) -> np.ndarray:
    """A trajectory's states at ``times`` by linear interpolation, shape (T, S)."""
    position = np.clip(times / finest.step, 0, finest.states.shape[0] - 1)
    low = np.floor(position).astype(int)
    high = np.minimum(low + 1, finest.states.shape[0] - 1)
    weight = (position - low)[:, None]
    states = finest.states.astype(float)
    return (1 - weight) * states[low] + weight * states[high]


@dataclass
class ReferencePass:
    """Per-member results of the case's step against the reference levels."""

    case_values: np.ndarray  # (Q, S) at the case's step
    reference: np.ndarray  # (Q, S) Richardson from the finer and finest levels
    masks: dict  # artefact masks (S,) at the case's step
    scale: float  # largest |N| on the finest level [population]
    series_index: np.ndarray  # case-grid indices kept for the series
    series_coarse: np.ndarray  # (T_s, M) case's step, at the kept indices, series members
    series_fine: np.ndarray  # (T_s, M) finest level at the same times and members
    count_values: np.ndarray | None  # (T_c, M) finest level at the count times, series members
    finer_step: float
    finest_step: float


def reference_pass(
    case: Case,
    params: dict,
    order: int,
    finer_step: float,
    finest_step: float,
    series_members: np.ndarray,
    count_times: np.ndarray | None,
) -> ReferencePass:
    """Run the case's step and the two reference levels over every member, chunk by chunk."""
    rows = len(params["N0"])
    size = chunk_rows(case, finest_step, rows)
    last = None
    values, refs, masks, scale = [], [], [], 0.0
    series_c, series_f, counts = [], [], []
    keep = np.zeros(rows, dtype=bool)
    keep[series_members] = True
    stride = round(case.step / finest_step)
    for part in _slices(rows, size):
        p = _take(params, part)
        coarse = solve(case, p, case.step)
        finer = solve(case, p, finer_step)
        finest = solve(case, p, finest_step)
        case_values, _ = quantity_values(case, coarse)
        finer_values, _ = quantity_values(case, finer)
        finest_values, _ = quantity_values(case, finest)
        del finer
        values.append(case_values)
        refs.append(richardson(finest_values, finer_values, 2, order))
        fine_case = finest.states[::stride][: coarse.states.shape[0]]
        masks.append(
            artefacts.detect(coarse.states, fine_case, _levels(case, p), coarse.last_index)
        )
        with np.errstate(invalid="ignore"):
            finite = np.abs(finest.states[np.isfinite(finest.states)])
        scale = max(scale, float(finite.max()) if finite.size else 0.0)
        if last is None:
            last = coarse.last_index
            index = np.unique(
                np.linspace(0, last, min(last + 1, SERIES_POINTS)).round().astype(int)
            )
        chosen = keep[part]
        series_c.append(coarse.states[index][:, chosen].astype(float))
        series_f.append(fine_case[: last + 1][index][:, chosen].astype(float))
        if count_times is not None:
            inside = count_times <= case.horizon * (1 + 1e-9)
            at = np.full((count_times.size, int(chosen.sum())), np.nan)
            for i, t in enumerate(count_times):
                if inside[i]:
                    at[i] = finest.value_at(float(t))[0][chosen]
            counts.append(at)
    return ReferencePass(
        case_values=np.concatenate(values, axis=1),
        reference=np.concatenate(refs, axis=1),
        masks={key: np.concatenate([m[key] for m in masks]) for key in masks[0]},
        scale=scale,
        series_index=index,
        series_coarse=np.concatenate(series_c, axis=1),
        series_fine=np.concatenate(series_f, axis=1),
        count_values=np.concatenate(counts, axis=1) if count_times is not None else None,
        finer_step=finer_step,
        finest_step=finest_step,
    )


def candidate_pass(case: Case, params: dict, finest_step: float, steps: list[float]) -> dict:
    """Quantity values and artefacts at each of ``steps``, over every member, chunk by chunk.

    Returns
    -------
    dict
        step -> {"values": (Q, S), "artefacts": list of codes present, "member_steps": int,
        "seconds": float}
    """
    rows = len(params["N0"])
    size = chunk_rows(case, finest_step, rows)
    results = {step: {"values": [], "artefacts": set(), "seconds": 0.0} for step in steps}
    for part in _slices(rows, size):
        p = _take(params, part)
        finest = solve(case, p, finest_step)
        levels = _levels(case, p)
        for step in steps:
            started = time.perf_counter()
            traj = solve(case, p, step)
            values, _ = quantity_values(case, traj)
            times = np.arange(traj.last_index + 1) * step
            found = artefacts.detect(
                traj.states, fine_at(finest, times), levels, traj.last_index, sustained=False
            )
            result = results[step]
            result["values"].append(values)
            result["artefacts"].update(code for code in artefacts.MESSAGES if found[code].any())
            result["seconds"] += time.perf_counter() - started
    for step, result in results.items():
        result["values"] = np.concatenate(result["values"], axis=1)
        result["artefacts"] = [code for code in artefacts.MESSAGES if code in result["artefacts"]]
        result["member_steps"] = n_steps_for(case.horizon, step) * rows
    return results
