"""The streaming pass as separate tasks: chunks of members, stepped anywhere, joined in order.

:func:`mapped` cuts an ensemble into chunks of :data:`MAPPED_CHUNK` members, hands each chunk
(a :class:`Chunk`: the problem, the chunk's parameters and equilibria, the read-offs of its
members) to a mapper -- the builtin ``map`` in this process, or a Dask client's tasks on
workers (:class:`errbudget.batch.cluster.DaskMapper`) -- and joins the chunks' levels in member
order. Every member's arithmetic is the same whichever chunk or process steps it (the kernel
works member by member, see :mod:`errbudget.solve.stream`), and the chunks are cut before
anything runs, from the ensemble's size alone: the joined levels equal one local pass bit for
bit, and the memory of a task is bounded by the chunk, not by the ensemble.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, fields, replace

import numpy as np

from errbudget.solve.problem import Problem
from errbudget.solve.stream import Level, Mapper, Readout, stream
from errbudget.solve.tableaux import Scheme
from errbudget.solve.trajectory import Features

# Members per task: fixed, whatever the number of workers, so the split never depends on
# where it runs; about 20 MB of results per task for three levels and two quantities.
MAPPED_CHUNK = 1 << 16


@dataclass(frozen=True)
class Chunk:
    """Members ``lo`` to ``hi`` (excluded) of an ensemble, with everything a pass needs.

    ``params``, ``levels`` and the members named in ``readout`` are the chunk's own
    (numbered from 0 within the chunk).
    """

    problem: Problem
    params: dict[str, np.ndarray]
    steps: tuple[float, ...]
    levels: np.ndarray | None
    readout: Readout
    scheme: Scheme
    lo: int
    hi: int

    @property
    def size(self) -> int:
        return self.hi - self.lo


def run_chunk(chunk: Chunk) -> list[Level]:
    """The streaming pass over one chunk (in this process, or on a worker)."""
    return stream(
        chunk.problem, chunk.params, chunk.steps, levels=chunk.levels, readout=chunk.readout,
        scheme=chunk.scheme,
    )  # fmt: skip


def bounds(size: int, chunk: int | None = None) -> list[tuple[int, int]]:
    """Member ranges of the chunks of an ensemble of ``size`` members."""
    chunk = chunk or MAPPED_CHUNK
    return [(lo, min(lo + chunk, size)) for lo in range(0, size, chunk)]


def split(
    problem: Problem,
    params: Mapping[str, np.ndarray],
    steps: Sequence[float],
    scheme: Scheme,
    *,
    levels: np.ndarray | None = None,
    readout: Readout | None = None,
) -> list[Chunk]:
    """The chunks of an ensemble, cut from its size alone (:data:`MAPPED_CHUNK` members)."""
    readout = readout or Readout()
    size = np.asarray(params["N0"]).reshape(-1).size
    equilibria = None if levels is None else np.asarray(levels, float).reshape(-1, size)
    chunks = []
    for lo, hi in bounds(size):
        part = {name: _members(value, size, lo, hi) for name, value in params.items()}
        chunks.append(
            Chunk(
                problem=problem,
                params=part,
                steps=tuple(float(h) for h in steps),
                levels=None if equilibria is None else equilibria[:, lo:hi],
                readout=_chunk_readout(readout, lo, hi),
                scheme=scheme,
                lo=lo,
                hi=hi,
            )
        )
    return chunks


def mapped(
    problem: Problem,
    params: Mapping[str, np.ndarray],
    steps: Sequence[float],
    mapper: Mapper,
    *,
    levels: np.ndarray | None = None,
    readout: Readout | None = None,
    scheme: Scheme,
    progress: Callable[[int], None] | None = None,
) -> list[Level]:
    """:func:`errbudget.solve.stream.stream` with the chunks run by ``mapper``.

    ``mapper(run_chunk, chunks)`` must yield each chunk's levels in the chunks' order;
    ``progress`` is told the member-steps of each chunk as its result arrives.
    """
    readout = readout or Readout()
    started = time.perf_counter()
    chunks = split(problem, params, steps, scheme, levels=levels, readout=readout)
    parts = []
    for found in mapper(run_chunk, chunks):
        parts.append(found)
        if progress is not None:
            progress(sum(level.member_steps for level in found))
    if len(parts) != len(chunks):
        raise RuntimeError(f"the mapper returned {len(parts)} results for {len(chunks)} chunks")
    return join(parts, chunks, readout, time.perf_counter() - started)


def join(
    parts: Sequence[list[Level]], chunks: Sequence[Chunk], readout: Readout, seconds: float
) -> list[Level]:
    """The levels of the whole ensemble from its chunks' levels, in member order.

    ``seconds`` (the wall time of the mapped pass) is shared among the levels as the chunks'
    own kernel times are.
    """
    size = chunks[-1].hi
    kernel = [sum(part[lv].seconds for part in parts) for lv in range(len(parts[0]))]
    total = sum(kernel) or 1.0
    joined = []
    for lv, first in enumerate(parts[0]):
        pieces = [part[lv] for part in parts]
        counted = None
        if first.counted is not None:
            members = readout.count_members
            members = np.arange(size) if members is None else np.asarray(members, np.int64)
            counted = _placed([p.counted for p in pieces], chunks, members)
        joined.append(
            Level(
                step=first.step,
                values=np.concatenate([p.values for p in pieces], axis=1),
                times=np.concatenate([p.times for p in pieces], axis=1),
                features=Features(
                    **{
                        f.name: np.concatenate([getattr(p.features, f.name) for p in pieces], -1)
                        for f in fields(Features)
                    }
                ),
                kept=_placed(
                    [p.kept for p in pieces], chunks, np.asarray(readout.keep_members, np.int64)
                ),
                counted=counted,
                member_steps=sum(p.member_steps for p in pieces),
                seconds=seconds * kernel[lv] / total,
            )
        )
    return joined


def _members(value, size: int, lo: int, hi: int):
    """The chunk's part of a parameter: per-member arrays are cut, constants kept."""
    array = np.asarray(value)
    return array[lo:hi] if array.ndim and array.shape[0] == size else value


def _inside(members: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Positions, in ``members``, of the members inside [lo, hi)."""
    return np.flatnonzero((members >= lo) & (members < hi))


def _chunk_readout(readout: Readout, lo: int, hi: int) -> Readout:
    """The read-offs of the chunk's own members, renumbered from 0, in the given order."""
    keep = np.asarray(readout.keep_members, dtype=np.int64)
    count = readout.count_members
    if count is not None:
        count = np.asarray(count, dtype=np.int64)
        count = count[_inside(count, lo, hi)] - lo
    return replace(readout, keep_members=keep[_inside(keep, lo, hi)] - lo, count_members=count)


def _placed(pieces: Sequence[np.ndarray], chunks: Sequence[Chunk], members) -> np.ndarray:
    """Columns (one per member of ``members``, in its order) from the chunks' columns."""
    rows = pieces[0].shape[0]
    out = np.full((rows, members.size), np.nan)
    for piece, chunk in zip(pieces, chunks, strict=True):
        where = _inside(members, chunk.lo, chunk.hi)
        out[:, where] = piece[:, : where.size]
    return out
