"""The streaming pass run as separate chunk tasks (errbudget.solve.chunks) equals one pass.

The mapper here is Python's own ``map`` (in this process): the cutting, the per-chunk
read-offs and the joining are what is tested; tests/test_cluster.py runs the same chunks on
Dask workers.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from test_stream import LAWS, _case, _ensemble, _readout

import errbudget
from errbudget.solve import chunks
from errbudget.solve.stream import Readout, stream

FIELDS = ("finite", "largest", "smallest", "scale", "turns", "late_turns", "above", "below")


def assert_same_levels(whole, parts) -> None:
    """Every per-member result equal, bit for bit (NaN where NaN)."""
    assert len(whole) == len(parts)
    for a, b in zip(whole, parts, strict=True):
        assert a.step == b.step
        for name in ("values", "times", "kept"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
        if a.counted is None:
            assert b.counted is None
        else:
            np.testing.assert_array_equal(a.counted, b.counted)
        for name in FIELDS:
            np.testing.assert_array_equal(getattr(a.features, name), getattr(b.features, name))
        assert a.member_steps == b.member_steps


@pytest.mark.parametrize("chunk", [7, 512, 1 << 16])
def test_chunks_mapped_in_order_equal_one_pass(tmp_path, monkeypatch, chunk):
    case = _case(tmp_path, "logistic-harvest", "heun", LAWS[4][2])
    params, levels = _ensemble(case, members=1100)
    steps = [4.0, 0.5]
    whole = stream(case, params, steps, levels=levels, readout=_readout(steps))
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", chunk)
    told = []
    parts = stream(
        case, params, steps, levels=levels, readout=_readout(steps), mapper=map,
        progress=told.append,
    )  # fmt: skip
    assert_same_levels(whole, parts)
    assert len(told) == len(chunks.bounds(1100))
    assert sum(told) == sum(level.member_steps for level in whole)


def test_read_offs_of_unsorted_members_land_in_their_columns(tmp_path, monkeypatch):
    # keep_members and count_members in a scrambled order, spread over several chunks.
    case = _case(tmp_path, "logistic", "euler", LAWS[1][2])
    params, levels = _ensemble(case, members=300)
    steps = [2.0, 0.5]
    readout = Readout(
        keep={2.0: np.array([0, 4, 9])},
        keep_members=np.array([299, 3, 150, 0, 77]),
        count_times=np.array([1.0, 10.5, 40.0]),
        count_step=0.5,
        count_members=np.array([120, 5, 298]),
    )
    whole = stream(case, params, steps, levels=levels, readout=readout)
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", 64)
    assert_same_levels(whole, stream(case, params, steps, levels=levels, readout=readout,
                                     mapper=map))  # fmt: skip


def test_the_chunks_are_cut_from_the_size_alone():
    assert chunks.bounds(10, 4) == [(0, 4), (4, 8), (8, 10)]
    assert chunks.bounds(8, 4) == [(0, 4), (4, 8)]
    assert chunks.bounds(1, 4) == [(0, 1)]


def test_a_mapper_that_loses_a_chunk_is_an_error(tmp_path, monkeypatch):
    case = _case(tmp_path, "logistic", "euler", LAWS[1][2])
    params, _ = _ensemble(case, members=100)
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", 30)

    def lossy(function, items):
        return map(function, list(items)[:-1])

    with pytest.raises(RuntimeError, match="3 results for 4 chunks"):
        stream(case, params, [1.0], mapper=lossy)


def test_a_budget_with_its_passes_mapped_is_the_same(monkeypatch):
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "cases" / "crayfish-pond.toml"
    case = errbudget.load_case(path)

    def text(**options):
        data = errbudget.run_case(case, samples=32, **options).to_dict()
        for key in ("elapsed_seconds", "cost", "stages", "prediction"):
            data["run"].pop(key)
        return json.dumps(data, sort_keys=True)

    whole = text()
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", 100)  # 320 parameter sets: four chunks
    assert text(mapper=map) == whole
