"""Tests of errbudget.laws.expression: safe parsing, evaluation, d/dN and unit inference of
custom rates."""

from __future__ import annotations

import ast
import inspect
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from errbudget.case.law_units import result_unit
from errbudget.case.units import ensure_count_units, ureg
from errbudget.errors import InputError
from errbudget.laws import expression as expr
from errbudget.laws.expression import ALLOWED_FUNCTIONS, RateExpression, names_in, parse_rate

NAMES = ("r", "K", "H", "M", "E", "theta", "tau")
S = 7  # ensemble size used throughout


def refusal(text: str, names=NAMES, where: str = "model.rate") -> InputError:
    with pytest.raises(InputError) as caught:
        parse_rate(text, names, where=where)
    assert caught.value.where == where
    return caught.value


@pytest.fixture
def params():
    rng = np.random.default_rng(20240611)
    return {
        "r": rng.uniform(0.02, 0.1, S),
        "K": rng.uniform(7000.0, 11000.0, S),
        "H": rng.uniform(10.0, 50.0, S),
        "M": rng.uniform(100.0, 900.0, S),
        "E": 0.004,
        "theta": rng.uniform(0.5, 2.0, S),
        "tau": 30.0,
    }


@pytest.fixture
def population():
    return np.linspace(50.0, 12000.0, S)


# ------------------------------------------------------------------------------ refusals

REFUSED = [
    ("N.real", "attribute access (x.y) is not allowed in a rate expression"),
    ("np.exp(N)", "attribute access (x.y) is not allowed in a rate expression"),
    ("r*N[0]", "subscripts (x[i]) are not allowed in a rate expression"),
    ("(lambda: N)()", "lambda functions are not allowed in a rate expression"),
    ("[N for N in r]", "comprehensions are not allowed in a rate expression"),
    ("max(N for N in r)", "comprehensions are not allowed in a rate expression"),
    ("{k: 1 for k in r}", "comprehensions are not allowed in a rate expression"),
    ("'N'", "strings are not allowed in a rate expression"),
    ("b'N' * 2", "strings are not allowed in a rate expression"),
    ("f'{N}'", "f-strings are not allowed in a rate expression"),
    ("N < K", "comparisons (<, ==, ...) are not allowed in a rate expression; use min or max"),
    ("N and K", "boolean operators (and, or, not) are not allowed in a rate expression"),
    ("not N", "boolean operators (and, or, not) are not allowed in a rate expression"),
    (
        "r*N if N < K else 0",
        "conditional expressions (a if c else b) are not allowed in a rate expression; "
        "use min, max or abs",
    ),
    ("(x := N) * 2", "assignment expressions (:=) are not allowed in a rate expression"),
    ("(N, K)", "lists, tuples, sets and dicts are not allowed in a rate expression"),
    ("[N]", "lists, tuples, sets and dicts are not allowed in a rate expression"),
    ("max(*N)", "starred arguments (*x) are not allowed in a rate expression"),
    ("True * N", "True is not a number; use 1 or 0"),
    ("None", "None is not allowed in a rate expression; only numbers are"),
    ("2j * N", "complex numbers (2j) are not allowed in a rate expression"),
    ("N // 2", "the operator // is not allowed in a rate expression; use + - * / **"),
    ("N % 2", "the operator % is not allowed in a rate expression; use + - * / **"),
    ("N ^ 2", "the operator ^ is not allowed in a rate expression; use + - * / ** (for a power"),
    ("~N", "the operator ~ is not allowed in a rate expression; use + - * / **"),
    (
        "sin(N)",
        'the function "sin" is not available (did you mean "min"?); the allowed functions '
        "are exp, log, sqrt, abs, min, max",
    ),
    (
        "r(N)",
        'the function "r" is not available; the allowed functions are exp, log, sqrt, abs, '
        "min, max",
    ),
    (
        "(N + 1)(2)",
        '"(N + 1)(2)" does not call a function by name; only exp, log, sqrt, abs, min, max '
        "can be called",
    ),
    ("exp(N, K)", 'exp takes exactly one argument, "exp(N, K)" gives 2'),
    ("sqrt()", 'sqrt takes exactly one argument, "sqrt()" gives 0'),
    ("min(N)", 'min needs two or more arguments, "min(N)" gives 1'),
    ("exp(x=N)", 'keyword arguments are not allowed in "exp(x=N)"'),
    ("exp * N", '"exp" is a function: call it as exp(...)'),
    ("__import__('os')", 'names containing a double underscore ("__import__") are not allowed'),
    ("N.__class__", "attribute access (x.y) is not allowed in a rate expression"),
    ("a__b * N", 'names containing a double underscore ("a__b") are not allowed'),
    (
        "rr*N*(1 - N/K)",
        'unknown name "rr" (did you mean "r"?); the rate may use N, t, E, H, K, M, r, tau, '
        "theta and the functions exp, log, sqrt, abs, min, max",
    ),
    ("zzz", 'unknown name "zzz"; the rate may use N, t,'),
    ("N**65", 'huge exponents are not allowed: "N ** 65" has exponent 65; at most 64'),
    ("N**-65", 'huge exponents are not allowed: "N ** (-65)" has exponent -65; at most 64'),
    ("2**(-(+100.5))", "huge exponents are not allowed"),
    ("N**" + "9" * 400, "huge exponents are not allowed"),
    ("1e301 * N", "the number 1e+301 is too large: numbers must be finite and at most 1e+300"),
    ("-1e999 + N", "the number 1e309 is too large"),
    ("N + 1" + "0" * 400, "is too large: numbers must be finite"),
    ("", 'the rate expression is empty; write e.g. "r*N*(1 - N/K)"'),
    (" \t\n", "the rate expression is empty"),
]


@pytest.mark.parametrize(("text", "fragment"), REFUSED)
def test_refused_constructs_have_specific_messages(text, fragment):
    assert fragment in refusal(text).message


def test_attribute_message_is_exact_and_reads_well_when_located():
    err = refusal("N.real")
    assert err.message == "attribute access (x.y) is not allowed in a rate expression"
    located = InputError(err.message, source="cases/pond.toml", where=err.where)
    assert str(located) == (
        "cases/pond.toml, model.rate: attribute access (x.y) is not allowed in a rate expression"
    )


def test_where_is_passed_through():
    assert refusal("N.real", where="models.custom.rate").where == "models.custom.rate"


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("r*N*(1 - N/K", "not a valid expression: '(' was never closed at column 5"),
        ("N + * 2", "not a valid expression: invalid syntax at column 5"),
        ("r*N*(1 - N/K))", "not a valid expression: unmatched ')' at column 14"),
        ("N +", "not a valid expression: invalid syntax at the end of the text"),
        # leading whitespace is stripped before parsing, the column still counts it
        ("   N + * 2", "not a valid expression: invalid syntax at column 8"),
        ("r*N\n* (1 - N/K)) ", "not a valid expression: unmatched ')' at line 2, column 12"),
        ("N import", "not a valid expression: invalid syntax at column 3"),
    ],
)
def test_syntax_errors_name_the_column(text, message):
    assert refusal(text).message == message


def test_unreadable_characters_are_input_errors():
    assert "not a valid expression" in refusal("N\x00").message
    assert "cannot be read" in refusal("N + \ud800").message


def test_text_length_limit():
    text = "N" + "+N" * 1000
    assert len(text) == 2001
    assert refusal(text).message == (
        "the rate expression has 2001 characters; at most 2000 are accepted"
    )
    # 1999 characters but many terms: refused by the node count, not the length
    assert "at most 500 are accepted" in refusal("N" + "+N" * 999).message


def test_bracket_depth_is_checked_before_parsing(monkeypatch):
    text = "(" * 41 + "N" + ")" * 41
    seen = []
    real_parse = ast.parse

    def spy(source, *args, **kwargs):  # delegates, so pytest's own use of ast still works
        seen.append(source)
        return real_parse(source, *args, **kwargs)

    monkeypatch.setattr(expr.ast, "parse", spy)
    assert refusal(text).message == (
        "the rate expression nests brackets 41 levels deep; at most 40 are accepted"
    )
    monkeypatch.undo()
    assert text not in seen


def test_forty_bracket_levels_are_accepted():
    rate = parse_rate("(" * 40 + "r*N" + ")" * 40, NAMES)
    assert rate.names_used == {"r"}


def test_tree_depth_limit_counts_operators_too():
    assert "nested more than 40 levels deep" in refusal("-" * 45 + "N").message
    assert "nested more than 40 levels deep" in refusal("N" + "+N" * 45).message
    parse_rate("-" * 38 + "N", NAMES)  # Expression + 38 signs + Name = depth 39


def test_node_limit():
    wide = "max(" + ",".join(["N"] * 501) + ")"  # depth 2, 503 expression nodes
    assert refusal(wide).message == (
        "the rate expression has 503 terms and operations; at most 500 are accepted"
    )
    parse_rate("max(" + ",".join(["N"] * 498) + ")", NAMES)  # 500 nodes


@pytest.mark.parametrize("error", [RecursionError, MemoryError])
def test_parser_exhaustion_becomes_input_error(monkeypatch, error):
    real_parse = ast.parse

    def exhausted(source, *args, **kwargs):
        if source == "r*N":
            raise error()
        return real_parse(source, *args, **kwargs)

    monkeypatch.setattr(expr.ast, "parse", exhausted)
    message = refusal("r*N").message
    monkeypatch.undo()
    assert message == "the rate expression is too complex to read; simplify it"


@pytest.mark.parametrize(
    "text",
    [
        "-" * 1999 + "N",
        "2**" * 600 + "2",
        "not " * 450 + "N",
        "lambda:" * 250 + "N",
        "N if N else " * 150 + "N",
        "f(" * 500,
        "[" * 1000,
        "a." * 999 + "b",
    ],
)
def test_pathological_inputs_are_input_errors(text):
    refusal(text)


def test_non_string_is_input_error():
    assert "expected the rate as a text string, got int" in refusal(5).message


def test_module_never_evaluates_text():
    # the whole point of the module: no eval/exec/compile/__import__ anywhere in its code
    tree = ast.parse(inspect.getsource(expr))
    called = {
        node.func.id
        for node in ast.walk(tree)
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
    }
    assert not called & {"eval", "exec", "compile", "__import__"}


# ------------------------------------------------------------------------------ accepted


def test_accepted_expression_properties():
    rate = parse_rate("r*N*(1 - N/K) - H*N/(N + M)", NAMES)
    assert isinstance(rate, RateExpression)
    assert rate.text == "r*N*(1 - N/K) - H*N/(N + M)"
    assert rate.names_used == frozenset({"r", "K", "H", "M"})
    assert rate.uses_time is False
    assert parse_rate("r*N*exp(-t/tau)", NAMES).uses_time is True
    assert ALLOWED_FUNCTIONS == ("exp", "log", "sqrt", "abs", "min", "max")


def test_whitespace_inside_is_fine():
    rate = parse_rate("\n  r*N*(1 -\n\tN/K)\n", NAMES)
    assert rate.names_used == {"r", "K"}
    assert rate.evaluate(0.0, np.array([10.0]), {"r": 0.5, "K": 20.0}) == pytest.approx(2.5)


def test_names_in_lists_free_parameters():
    assert names_in("r*N*exp(-t/tau) + c*min(N, Nmax)") == {"r", "tau", "c", "Nmax"}
    assert names_in("2*N") == frozenset()
    with pytest.raises(InputError, match="attribute access"):
        names_in("os.system")
    with pytest.raises(InputError) as caught:
        names_in("N +", where="models.x.rate")
    assert caught.value.where == "models.x.rate"


def test_exponent_limits_are_inclusive():
    for text in ("N**64", "N**-64", "N**(-64.0)", "(N/K)**(2**10)"):
        parse_rate(text, NAMES)


# ---------------------------------------------------------------------------- evaluation

# Growth laws written directly in numpy; logistic: Verhulst 1838; Gompertz:
# dN/dt = r N ln(K/N) (Gompertz 1825, as stated in the project's DESIGN.md).
EQUIVALENTS = [
    ("r*N*(1 - N/K)", lambda t, N, p: p["r"] * N * (1 - N / p["K"])),
    ("r*N*(1 - N/K) - E*N", lambda t, N, p: p["r"] * N * (1 - N / p["K"]) - p["E"] * N),
    (
        "r*N*(1 - N/K) - H*N/(N + M)",
        lambda t, N, p: p["r"] * N * (1 - N / p["K"]) - p["H"] * N / (N + p["M"]),
    ),
    ("r*N*log(K/N)", lambda t, N, p: p["r"] * N * np.log(p["K"] / N)),
    ("min(r*N, H)", lambda t, N, p: np.minimum(p["r"] * N, p["H"])),
    (
        "max(N/K, 0.2, theta/4)",
        lambda t, N, p: np.maximum(np.maximum(N / p["K"], 0.2), p["theta"] / 4),
    ),
    ("-abs(N - K)*r + sqrt(N)", lambda t, N, p: -np.abs(N - p["K"]) * p["r"] + np.sqrt(N)),
    ("r*N*(1 - (N/K)**theta)", lambda t, N, p: p["r"] * N * (1 - (N / p["K"]) ** p["theta"])),
    ("r*N*exp(-t/tau)", lambda t, N, p: p["r"] * N * np.exp(-t / p["tau"])),
    ("+N**2/K - -3", lambda t, N, p: N**2 / p["K"] + 3),
]


@pytest.mark.parametrize(("text", "reference"), EQUIVALENTS)
def test_evaluate_matches_numpy(text, reference, params, population):
    rate = parse_rate(text, NAMES)
    got = rate.evaluate(12.5, population, params)
    want = reference(12.5, population, params)
    assert got.shape == (S,)
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=0)


def test_scalar_results_are_broadcast_and_fresh(params, population):
    constant = parse_rate("2.5", NAMES).evaluate(0.0, population, params)
    np.testing.assert_array_equal(constant, np.full(S, 2.5))
    identity = parse_rate("N", NAMES).evaluate(0.0, population, params)
    assert identity is not population
    np.testing.assert_array_equal(identity, population)
    identity[0] = -1.0
    assert population[0] == 50.0
    only_t = parse_rate("t/tau", NAMES).evaluate(3.0, population, params)
    np.testing.assert_array_equal(only_t, np.full(S, 0.1))


def test_bad_arithmetic_is_silent_inf_and_nan(params):
    N = np.array([5.0, 10.0, 40.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ratio = parse_rate("1/(N - 10)", NAMES).evaluate(0.0, N, params)
        logs = parse_rate("log(N - 20)", NAMES).evaluate(0.0, N, params)
        scalar = parse_rate("1/0 + 1e300*1e300 + N", NAMES).evaluate(0.0, N, {})
        power = parse_rate("(-1)**0.5 + N", NAMES).evaluate(0.0, N, {})
    assert ratio[1] == np.inf and np.isfinite(ratio[[0, 2]]).all()
    assert np.isnan(logs[:2]).all() and np.isfinite(logs[2])
    assert np.isinf(scalar).all()
    assert np.isnan(power).all()


def test_missing_parameter_is_a_programming_error(population):
    rate = parse_rate("r*N*(1 - N/K)", NAMES)
    with pytest.raises(ValueError, match="no value given for parameter"):
        rate.evaluate(0.0, population, {"r": 0.1})
    with pytest.raises(ValueError, match="K"):
        rate.d_dN(0.0, population, {"r": 0.1})


@pytest.mark.parametrize("dtype", [np.float32, np.longdouble])
@pytest.mark.parametrize("text", [text for text, _ in EQUIVALENTS] + ["2.5", "N", "1/3 + 0*N"])
def test_dtype_of_population_is_kept(dtype, text, params, population):
    N = population.astype(dtype)
    typed = {k: np.asarray(v, dtype=dtype) for k, v in params.items()}
    rate = parse_rate(text, NAMES)
    assert rate.evaluate(dtype(1.5), N, typed).dtype == dtype
    assert rate.d_dN(dtype(1.5), N, typed).dtype == dtype


def test_python_float_parameters_do_not_promote_float32(population):
    N = population.astype(np.float32)
    rate = parse_rate("r*N*(1 - N/K) - 1/3*N + exp(0.5)*min(N, K)", NAMES)
    got = rate.evaluate(0.0, N, {"r": 0.05, "K": 9000.0})
    assert got.dtype == np.float32


def test_longdouble_keeps_its_extra_precision():
    if np.finfo(np.longdouble).eps >= np.finfo(np.float64).eps:
        pytest.skip("long double is plain double on this platform")
    N = np.array([1.0, 3.0, 7.0], dtype=np.longdouble)
    got = parse_rate("N/3 + 1/7", NAMES).evaluate(0.0, N, {})
    want = N / np.longdouble(3) + np.longdouble(1) / np.longdouble(7)
    # the constant 1/7 is computed in double (a Python float), so allow one double ulp there
    assert np.all(np.abs(got - want) <= 2 * np.finfo(np.float64).eps)
    assert np.any(got != (N / 3).astype(np.float64) + 1 / 7)


# ------------------------------------------------------------------------------- d / dN

DERIVATIVE_CASES = [
    "r*N*(1 - N/K)",
    "r*N*(1 - N/K) - H*N/(N + M)",
    "r*N*log(K/N)",
    "r*N*(1 - (N/K)**theta)",
    "exp(-N/K)*sqrt(N)*r",
    "N**(N/K)",
    "2**(N/K) - (N/K)**0.5",
    "abs(N - 5000)*r",
    "min(r*N, 400, H*N/M)",
    "max(N/K, 0.5) - r/N",
    "-(N/(K - N))**3 + t*N",
    "log(N)/(1 + N/M)",
]


def central_difference(rate, N, params, t=2.0):
    step = 1e-6 * N
    return (rate.evaluate(t, N + step, params) - rate.evaluate(t, N - step, params)) / (2 * step)


@pytest.mark.parametrize("text", DERIVATIVE_CASES)
def test_d_dN_matches_central_difference(text, params, population):
    # population points avoid the kinks of abs/min/max for these parameters
    rate = parse_rate(text, NAMES)
    exact = rate.d_dN(2.0, population, params)
    approx = central_difference(rate, population, params)
    # central difference error ~ h^2 f''' + eps f / h: relative 1e-7 is ample (common
    # practice, no source)
    np.testing.assert_allclose(exact, approx, rtol=2e-7, atol=1e-9)


# Hand-derived derivatives (elementary calculus).
HAND = [
    ("r*N*(1 - N/K)", lambda N, p: p["r"] * (1 - 2 * N / p["K"])),
    (
        "r*N*(1 - N/K) - H*N/(N + M)",
        lambda N, p: p["r"] * (1 - 2 * N / p["K"]) - p["H"] * p["M"] / (N + p["M"]) ** 2,
    ),
    ("r*N*log(K/N)", lambda N, p: p["r"] * (np.log(p["K"] / N) - 1)),
    ("N**theta", lambda N, p: p["theta"] * N ** (p["theta"] - 1)),
    ("(N/K)**(N/K)", lambda N, p: (N / p["K"]) ** (N / p["K"]) * (np.log(N / p["K"]) + 1) / p["K"]),
    ("2**(N/K)", lambda N, p: 2 ** (N / p["K"]) * np.log(2) / p["K"]),
    ("abs(N - 5000)*r", lambda N, p: np.sign(N - 5000) * p["r"]),
    ("min(N, 5000)", lambda N, p: np.where(N <= 5000, 1.0, 0.0)),
    ("max(r*N, 300)", lambda N, p: np.where(p["r"] * N >= 300, p["r"], 0.0)),
    ("exp(-N/K)", lambda N, p: -np.exp(-N / p["K"]) / p["K"]),
    ("sqrt(N)", lambda N, p: 0.5 / np.sqrt(N)),
    ("1/N", lambda N, p: -1 / N**2),
    ("r*K + t", lambda N, p: np.zeros_like(N)),
    ("t*N", lambda N, p: np.full_like(N, 3.0)),
]


@pytest.mark.parametrize(("text", "derivative"), HAND)
def test_d_dN_matches_hand_derivatives(text, derivative, params, population):
    got = parse_rate(text, NAMES).d_dN(3.0, population, params)
    assert got.shape == (S,)
    np.testing.assert_allclose(got, derivative(population, params), rtol=1e-13, atol=1e-300)


def test_d_dN_of_min_picks_the_smaller_argument_elementwise():
    N = np.array([1.0, 2.0, 3.0, 4.0])
    got = parse_rate("min(2*N, 5, N + 3)", NAMES).d_dN(0.0, N, {})
    # 2N is smallest for N = 1, 2; 5 for N = 3; N + 3 is 7 > 5 at N = 4, so 5 again
    np.testing.assert_array_equal(got, [2.0, 2.0, 0.0, 0.0])
    got = parse_rate("max(2*N, 5, N + 3)", NAMES).d_dN(0.0, N, {})
    # 5 is largest for N = 1, 2 (tied with N + 3 at 2: the first wins); 2N from N = 3 on
    np.testing.assert_array_equal(got, [0.0, 0.0, 2.0, 2.0])


# --------------------------------------------------------------------------------- units


@pytest.fixture
def units():
    ensure_count_units("crayfish")
    per_day = ureg.Unit("1 / day")
    return {
        "N": ureg.Unit("crayfish"),
        "t": ureg.Unit("day"),
        "r": per_day,
        "E": per_day,
        "K": ureg.Unit("crayfish"),
        "H": ureg.Unit("crayfish") / ureg.Unit("day"),
        "M": ureg.Unit("crayfish"),
        "theta": ureg.dimensionless,
        "tau": ureg.Unit("day"),
    }


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("r*N*(1 - N/K)", "crayfish / day"),
        ("r*N*(1 - N/K) - H*N/(N + M)", "crayfish / day"),
        ("r*N*(1 - (N/K)**theta)", "crayfish / day"),
        ("r*N*log(K/N)*exp(-t/tau)", "crayfish / day"),
        ("sqrt(N*K)/tau", "crayfish / day"),
        ("N**2/K*r", "crayfish / day"),
        ("N**(1 + 1)/(K*tau)", "crayfish / day"),
        ("abs(N - K)*min(r, E, 1/tau)", "crayfish / day"),
        ("-N/K", "dimensionless"),
        ("2", "dimensionless"),
        ("N**0.5", "crayfish ** 0.5"),
    ],
)
def test_result_unit(text, expected, units):
    unit = result_unit(parse_rate(text, NAMES), units)
    assert unit == ureg.Unit(expected)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            "N + r",
            'cannot add or subtract quantities of different dimensions in "N + r": "N" is in '
            'crayfish but "r" is in 1/day',
        ),
        (
            "exp(N)",
            'exp needs a dimensionless argument, but "N" in "exp(N)" is in crayfish; combine '
            "it with parameters to cancel the unit, e.g. N/K or r*t",
        ),
        ("log(t)*N", 'log needs a dimensionless argument, but "t" in "log(t)" is in day'),
        (
            "N**theta",
            '"N" is in crayfish, so the exponent in "N ** theta" must be a constant number, '
            'not "theta"; make the base dimensionless first, e.g. (N/K)**theta',
        ),
        ("(N/K)**r", 'the exponent in "(N / K) ** r" must be dimensionless, but "r" is in 1/day'),
        ("min(N, r)", 'min needs arguments of one dimension in "min(N, r)": "N" is in crayfish'),
        ("N**(2**7)", 'the exponent of "N ** 2 ** 7" is 128; a base in crayfish needs an exponent'),
        ("r - E + N/tau", 'in "r - E + N / tau": "r - E" is in 1/day but "N / tau" is in'),
    ],
)
def test_result_unit_refusals(text, message, units):
    with pytest.raises(InputError) as caught:
        result_unit(parse_rate(text, NAMES), units)
    assert message in caught.value.message
    assert caught.value.where == "model.rate"


def test_result_unit_where_override_and_missing_unit(units):
    rate = parse_rate("N + r", NAMES, where="model.rate")
    with pytest.raises(InputError) as caught:
        result_unit(rate, units, where="models.pond.rate")
    assert caught.value.where == "models.pond.rate"
    with pytest.raises(ValueError, match='unit of "r"'):
        result_unit(parse_rate("r*N", NAMES), {"N": units["N"], "t": units["t"]})


def test_constant_exponent_of_dimensional_base_uses_its_value(units):
    assert result_unit(parse_rate("N**(3 - 1)", NAMES), units) == ureg.Unit("crayfish") ** 2
    assert result_unit(parse_rate("N**exp(0)", NAMES), units) == ureg.Unit("crayfish")


# ---------------------------------------------------------------------------- properties


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.text(max_size=300))
def test_any_text_is_accepted_or_refused_cleanly(text):
    try:
        result = parse_rate(text, NAMES)
    except InputError:
        return
    assert isinstance(result, RateExpression)


TOKENS = [
    "N",
    "t",
    "r",
    "K",
    "theta",
    "0",
    "2",
    "0.5",
    "1e3",
    "+",
    "-",
    "*",
    "/",
    "**",
    "(",
    ")",
    ",",
    " ",
    "exp(",
    "log(",
    "sqrt(",
    "abs(",
    "min(",
    "max(",
    "x",
    ".",
    "[",
    "]",
    "<",
    "if",
    "__",
    "'",
    "65",
]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.sampled_from(TOKENS), max_size=40).map("".join))
def test_token_soup_never_breaks_any_stage(text):
    # near-valid input reaches evaluation, differentiation and unit inference
    try:
        rate = parse_rate(text, ("r", "K", "theta"))
    except InputError:
        return
    N = np.array([0.0, 1.0, 250.0, -3.0])
    p = {"r": np.full(4, 0.3), "K": 500.0, "theta": np.array([0.5, 1.0, 2.0, 3.0])}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        value = rate.evaluate(1.0, N, p)
        slope = rate.d_dN(1.0, N, p)
    assert value.shape == slope.shape == (4,)
    assert value.dtype == slope.dtype == np.float64
    ensure_count_units("crayfish")
    units = {
        "N": ureg.Unit("crayfish"),
        "t": ureg.Unit("day"),
        "r": ureg.Unit("1 / day"),
        "K": ureg.Unit("crayfish"),
        "theta": ureg.dimensionless,
    }
    try:
        unit = result_unit(rate, units)
    except InputError:
        return
    assert isinstance(unit, type(ureg.Unit("day")))
