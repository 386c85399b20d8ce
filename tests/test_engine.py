"""The compiled ensemble engine against the numpy reference stepping ``schemes.integrate``.

The numpy ``integrate`` is the reference implementation; the compiled kernels must give the
same states to 1e-12 relative for every scheme, every built-in law and custom expressions,
on one thread and on several.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from errbudget.case.load import load_case
from errbudget.laws import expression as expr
from errbudget.laws import models
from errbudget.solve import codegen, engine, ensemble
from errbudget.solve.tableaux import SCHEMES, integrate

CASES = Path(__file__).resolve().parent.parent / "cases"
RTOL = 1e-12  # the agreement the design asks for; the kernels repeat integrate's operations
MEMBERS = 3 * codegen.BLOCK + 77  # several blocks and a ragged last one, so threads split
STEPS = 40

pytestmark = pytest.mark.skipif(engine.numba_module() is None, reason="numba not installed")


def _ensemble(names, size=MEMBERS, seed=3):
    """Plausible parameter draws for every name a built-in law uses, and N0."""
    rng = np.random.default_rng(seed)
    ranges = {
        "r": (0.05, 0.5),
        "K": (500.0, 1500.0),
        "E": (0.0, 0.04),
        "H": (0.0, 5.0),
        "theta": (0.5, 2.0),
        "A": (20.0, 80.0),
    }
    params = {name: rng.uniform(*ranges[name], size) for name in names}
    return rng.uniform(100.0, 900.0, size), params


def _close(got, want):
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=0.0, equal_nan=True)


@pytest.mark.parametrize("scheme", list(SCHEMES.values()), ids=list(SCHEMES))
@pytest.mark.parametrize("form", list(models.BUILT_IN))
def test_built_in_laws_match_reference(form, scheme):
    model = models.built_in(form)
    spec = engine.rate_spec(model)
    kernel = engine.kernel_for(spec, scheme)
    assert kernel is not None
    n0, params = _ensemble(model.parameter_names)
    step = 0.7
    want = integrate(model.rate, n0, params, step, STEPS, scheme)
    single = engine.integrate_compiled(kernel, spec, n0, params, step, STEPS, scheme, threads=1)
    both = engine.integrate_compiled(kernel, spec, n0, params, step, STEPS, scheme, threads=2)
    _close(single, want)
    np.testing.assert_array_equal(both, single)  # threads split members, never arithmetic


def test_rate_text_is_each_law():
    # The text the kernels are generated from evaluates to the law's numpy rate.
    for form, text in models.RATE_TEXT.items():
        model = models.built_in(form)
        n0, params = _ensemble(model.parameter_names, size=50)
        parsed = expr.parse_rate(text, model.parameter_names)
        _close(parsed.evaluate(0.0, n0, params), model.rate(0.0, n0, params))
    assert set(models.RATE_TEXT) == set(models.BUILT_IN)


FUNCTIONS = "max(r*N*(1 - N/K), -H) + 0.1*abs(N - K)**0.5*exp(-t/30) - 0.01*log(N)*min(N, M, K)"


@pytest.mark.parametrize("scheme", list(SCHEMES.values()), ids=list(SCHEMES))
def test_custom_expression_with_every_function_matches_reference(scheme):
    names = ("r", "K", "H", "M")
    parsed = expr.parse_rate(FUNCTIONS, names)
    factors = {"r": 1 / 86400, "K": 1.0, "H": 1 / 86400, "M": 1.0}  # as for 1/day in seconds
    t_factor, n_factor, out_factor = 86400.0, 1.0, 86400.0

    def rate(t, n, p):  # the closure case.py builds around a custom law
        coherent = {k: p[k] * factors[k] for k in names}
        return parsed.evaluate(t * t_factor, n * n_factor, coherent) * out_factor

    spec = engine.RateSpec(
        parsed.tree, names, tuple(factors[k] for k in names), t_factor, n_factor, out_factor
    )
    rng = np.random.default_rng(11)
    params = {
        "r": rng.uniform(0.05, 0.3, MEMBERS),
        "K": rng.uniform(500, 1500, MEMBERS),
        "H": rng.uniform(0, 20, MEMBERS),
        "M": rng.uniform(50, 500, MEMBERS),
    }
    n0 = rng.uniform(-50, 900, MEMBERS)  # a few negative starts: log gives NaN, as in numpy
    kernel = engine.kernel_for(spec, scheme)
    want = integrate(rate, n0, params, 0.5, STEPS, scheme)
    single = engine.integrate_compiled(kernel, spec, n0, params, 0.5, STEPS, scheme, threads=1)
    both = engine.integrate_compiled(kernel, spec, n0, params, 0.5, STEPS, scheme, threads=2)
    assert np.isnan(want).any() and np.isfinite(want).any()  # both branches exercised
    _close(single, want)
    np.testing.assert_array_equal(both, single)


def _draws(case, size=MEMBERS):
    rng = np.random.default_rng(5)
    sampled = {
        name: dist.ppf(rng.uniform(0.02, 0.98, size)) for name, dist in case.uncertain().items()
    }
    return ensemble.ensemble_params(case, sampled)


@pytest.mark.parametrize("name", ["thistle-clearance.toml", "crayfish-pond.toml"])
def test_solve_uses_compiled_engine_and_matches_numpy(name, monkeypatch):
    case = load_case(CASES / name)
    params = _draws(case)
    assert ensemble.compiled(case.model, SCHEMES[case.scheme]) is not None
    fast = ensemble.solve(case, params, case.step / 4)
    monkeypatch.setattr(ensemble, "USE_COMPILED", False)
    slow = ensemble.solve(case, params, case.step / 4)
    _close(fast.states, slow.states)


def test_round_off_dtypes_keep_the_numpy_path():
    case = load_case(CASES / "crayfish-pond.toml")
    params = _draws(case, size=20)
    for dtype in (np.float32, np.longdouble):
        traj = ensemble.solve(case, params, case.step, dtype=dtype)
        assert traj.states.dtype == np.dtype(dtype)
        law = {k: np.asarray(v, dtype=dtype) for k, v in params.items() if k != "N0"}
        want = integrate(
            case.model.rate,
            params["N0"],
            law,
            case.step,
            traj.states.shape[0] - 1,
            SCHEMES[case.scheme],
            dtype=dtype,
        )
        np.testing.assert_array_equal(traj.states, want)


def test_without_numba_solve_falls_back_to_numpy(monkeypatch):
    case = load_case(CASES / "crayfish-pond.toml")
    params = _draws(case, size=30)
    monkeypatch.setitem(engine._STATE, "numba", False)  # as after a failed import
    monkeypatch.setattr(ensemble, "_COMPILED", {})
    assert engine.kernel_for(engine.rate_spec(case.model), SCHEMES[case.scheme]) is None
    traj = ensemble.solve(case, params, case.step)
    law = {k: v for k, v in params.items() if k != "N0"}
    want = integrate(
        case.model.rate,
        params["N0"],
        law,
        case.step,
        traj.states.shape[0] - 1,
        SCHEMES[case.scheme],
    )
    np.testing.assert_array_equal(traj.states, want)


def test_generated_source_holds_no_user_text(tmp_path, monkeypatch):
    parsed = expr.parse_rate("growth_rate_xyz*N - 12.5", ["growth_rate_xyz"])
    source = codegen.kernel_source(parsed.tree, ("growth_rate_xyz",), SCHEMES["heun"])
    assert "growth_rate_xyz" not in source
    assert "12.5" in source  # numbers are re-emitted as float literals
    monkeypatch.setenv(codegen.CACHE_ENV, str(tmp_path))
    path = codegen.write_module(source)
    assert path.parent == tmp_path and path.read_text() == source
    stamp = path.stat().st_mtime_ns
    assert codegen.write_module(source) == path and path.stat().st_mtime_ns == stamp


def test_emitter_refuses_nodes_outside_the_whitelist():
    import ast

    tree = ast.parse("__import__('os')", mode="eval")  # never reaches codegen via parse_rate
    with pytest.raises((ValueError, KeyError)):
        codegen.kernel_source(tree, (), SCHEMES["euler"])
