"""The streaming kernel against the stored-trajectory numpy path (errbudget.solve.stream).

The compiled kernel reads every quantity, feature, kept state and count-time value while it
steps; the reference path stores whole trajectories and reads them with numpy. They must
agree to 1e-12 relative (the same operations in the same order; only the libm of exp, log
and pow may differ in the last bit) for every scheme, every built-in law and a custom law,
whatever the chunking of the members and the number of threads.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

import errbudget
from errbudget.estimates.artefacts import judge
from errbudget.laws.models import stable_equilibria
from errbudget.solve import stream as streaming
from errbudget.solve.stream import Readout, stream, stream_reference

RTOL = 1e-12
MEMBERS = 37  # not a multiple of anything: ragged blocks, chunks and thread shares

# (form, scheme, parameter lines): every law, every scheme at least twice.
LAWS = [
    ("exponential", "rk4", 'r = { value = "0.05 / day", sd = "0.02 / day" }'),
    ("logistic", "euler", 'r = { value = "0.3 / day", sd = "0.15 / day" }\nK = "1000 fish"'),
    ("gompertz", "heun", 'r = { value = "0.2 / day", sd = "0.05 / day" }\nK = "1000 fish"'),
    (
        "theta-logistic",
        "midpoint",
        'r = { value = "0.2 / day", sd = "0.05 / day" }\nK = "1000 fish"\n'
        "theta = { value = 1.5, low = 0.8, high = 2.5 }",
    ),
    (
        "logistic-harvest",
        "euler",
        'r = { value = "0.3 / day", sd = "0.2 / day" }\nK = "1000 fish"\nE = "0.05 / day"',
    ),
    (
        "logistic-harvest",
        "rk4",
        'r = { value = "0.3 / day", sd = "0.2 / day" }\nK = "1000 fish"\nE = "0.05 / day"',
    ),
    (
        "logistic-removal",
        "heun",
        'r = { value = "0.3 / day", sd = "0.1 / day" }\nK = "1000 fish"\nH = "40 fish / day"',
    ),
    (
        "allee",
        "midpoint",
        'r = { value = "0.002 / day", sd = "0.0005 / day" }\nK = "1000 fish"\nA = "120 fish"',
    ),
]
CUSTOM = [
    # Seasonal-looking forcing through t, min/max/abs/sqrt/exp/log: every function compiles.
    (
        "euler",
        "r*N*(1 - N/K) - H*N/(N + M) + 0.01*sqrt(abs(N*M))*exp(-t/T)/T"
        " - 0.001*log(max(N, M)/M)*min(N, M)/T",
    ),
    ("rk4", "r*N*(1 - N/K)*(N/A - 1)"),
]
QUANTITIES = """
[[quantity]]
name = "on the grid"
kind = "value"
at = "20 day"
[[quantity]]
name = "off the grid"
kind = "value"
at = "13.3 day"
[[quantity]]
name = "days to 500"
kind = "time-to"
level = "500 fish"
[[quantity]]
name = "days to 5"
kind = "time-to"
level = "5 fish"
[[quantity]]
name = "peak"
kind = "peak"
[[quantity]]
name = "minimum"
kind = "minimum"
"""


def _case(tmp_path, form: str, scheme: str, parameters: str, rate: str | None = None):
    model = f'form = "{form}"\nunit = "fish"' + (f'\nrate = "{rate}"' if rate else "")
    text = (
        f'title = "stream check"\n[model]\n{model}\n[parameters]\n{parameters}\n'
        'N0 = { value = "300 fish", sd = "280 fish", low = "1 fish" }\n'
        f'[simulation]\nscheme = "{scheme}"\nstep = "2 day"\nhorizon = "41 day"\n{QUANTITIES}'
    )
    path = tmp_path / f"{form}-{scheme}.toml"
    path.write_text(text, encoding="utf-8")
    return errbudget.load_case(path)


def _ensemble(case, members: int = MEMBERS):
    """Members spread over each uncertain input's central 98 %, N0 included."""
    rng = np.random.default_rng(7)
    params = {}
    for name, p in case.parameters.items():
        if p.dist is None:
            params[name] = np.full(members, p.nominal)
        else:
            params[name] = p.dist.ppf(rng.uniform(0.01, 0.99, members))
    law = {k: v for k, v in params.items() if k != "N0"}
    found = [np.broadcast_to(eq.value, (members,)) for eq in stable_equilibria(case.model, law)]
    return params, np.array(found, dtype=float).reshape(-1, members)


def _readout(steps):
    return Readout(
        keep={steps[0]: np.array([0, 3, 5]), steps[-1]: np.array([1, 2, 50, 100])},
        keep_members=np.array([0, 4, 36, 11]),
        count_times=np.array([0.0, 3.3, 20.0, 40.9, 99.0]),
        count_step=steps[-1],
        count_members=np.array([5, 1, 30]),
        tails={steps[-1]: 31},
    )


def _same(a, b, what):
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    assert a.shape == b.shape, what
    np.testing.assert_allclose(a, b, rtol=RTOL, atol=0, equal_nan=True, err_msg=what)


def _compare(fast, slow, levels):
    for f, s in zip(fast, slow, strict=True):
        where = f"step {f.step}"
        _same(f.values, s.values, f"values at {where}")
        _same(f.times, s.times, f"peak and minimum times at {where}")
        for name in ("finite", "largest", "smallest", "scale", "turns", "late_turns"):
            _same(getattr(f.features, name), getattr(s.features, name), f"{name} at {where}")
        np.testing.assert_array_equal(f.features.above, s.features.above)
        np.testing.assert_array_equal(f.features.below, s.features.below)
        _same(f.kept, s.kept, f"kept states at {where}")
        if s.counted is not None:
            _same(f.counted, s.counted, f"count-time values at {where}")
        for code, mask in judge(f.features, fast[-1].features, levels).items():
            expected = judge(s.features, slow[-1].features, levels)[code]
            np.testing.assert_array_equal(mask, expected, err_msg=f"{code} at {where}")


@pytest.mark.parametrize(("form", "scheme", "parameters"), LAWS, ids=lambda x: str(x)[:16])
def test_kernel_equals_the_numpy_path_for_every_law(tmp_path, form, scheme, parameters):
    case = _case(tmp_path, form, scheme, parameters)
    params, levels = _ensemble(case)
    # Coarse steps give overshoot, oscillation and divergence in some members.
    steps = [6.0, 2.0, 0.7, 0.25]
    fast = stream(case, params, steps, levels=levels, readout=_readout(steps))
    slow = stream_reference(case, params, steps, levels=levels, readout=_readout(steps))
    _compare(fast, slow, levels)


@pytest.mark.parametrize(("scheme", "rate"), CUSTOM, ids=["euler", "rk4"])
def test_kernel_equals_the_numpy_path_for_a_custom_law(tmp_path, scheme, rate):
    parameters = (
        'r = { value = "0.3 / day", sd = "0.1 / day" }\nK = "1000 fish"\nA = "120 fish"'
        if "A" in rate
        else 'r = { value = "0.3 / day", sd = "0.1 / day" }\nK = "1000 fish"\n'
        'H = "40 fish / day"\nM = "200 fish"\nT = "10 day"'
    )
    case = _case(tmp_path, "custom", scheme, parameters, rate=rate)
    params, levels = _ensemble(case)
    steps = [5.0, 1.0, 0.125]
    fast = stream(case, params, steps, levels=levels, readout=_readout(steps))
    slow = stream_reference(case, params, steps, levels=levels, readout=_readout(steps))
    _compare(fast, slow, levels)


@pytest.mark.parametrize(("chunk", "threads"), [(7, 1), (7, 2), (16, 3), (1 << 16, 2)])
def test_chunks_and_threads_do_not_change_a_bit(tmp_path, monkeypatch, chunk, threads):
    case = _case(tmp_path, "logistic-harvest", "heun", LAWS[4][2])
    params, levels = _ensemble(case, members=1100)  # more than two blocks of 512
    steps = [4.0, 0.5]
    whole = stream(case, params, steps, levels=levels, readout=_readout(steps), threads=1)
    monkeypatch.setattr(streaming, "CHUNK_MEMBERS", chunk)
    parts = stream(case, params, steps, levels=levels, readout=_readout(steps), threads=threads)
    for a, b in zip(whole, parts, strict=True):
        np.testing.assert_array_equal(a.values, b.values)
        np.testing.assert_array_equal(a.times, b.times)
        np.testing.assert_array_equal(a.features.largest, b.features.largest)
        np.testing.assert_array_equal(a.features.turns, b.features.turns)
        np.testing.assert_array_equal(a.kept, b.kept)


def test_a_budget_does_not_depend_on_the_chunk_size(monkeypatch, tmp_path):
    case = errbudget.load_case(errbudget_case("crayfish-pond.toml"))

    def text():
        data = errbudget.run_case(case, samples=32).to_dict()
        for key in ("elapsed_seconds", "cost", "stages", "prediction"):
            data["run"].pop(key)
        return json.dumps(data, sort_keys=True)

    whole = text()
    monkeypatch.setattr(streaming, "CHUNK_MEMBERS", 50)
    assert text() == whole


def test_memory_grows_with_members_not_with_steps(tmp_path):
    from errbudget.budget.run import estimate_memory_mb

    case = errbudget.load_case(errbudget_case("crayfish-pond.toml"))
    one, two, four = (estimate_memory_mb(case, rows, 0.1) for rows in (8_192, 16_384, 32_768))
    assert four - two == pytest.approx(2 * (two - one))  # per-member results: linear
    small = estimate_memory_mb(case, 6_144, 0.1)
    # Nothing is stored per step: a step 100 times finer needs no more memory.
    assert estimate_memory_mb(case, 6_144, 0.001) == small


def errbudget_case(name: str):
    from pathlib import Path

    return Path(__file__).resolve().parents[1] / "cases" / name
