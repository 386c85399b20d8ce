"""Fuzzing the hostile-input guards (issue 13): quantity strings, distribution tables and
whole case files, mutated at random. Every input either loads, with every number finite,
within the limits and obeying the sign rules, or is refused with an InputError; the command
line exits 0 or 2, never 1.

Examples per run (fixed seed, derandomised): see the *_EXAMPLES constants.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
from conftest import CRAYFISH as BUILTIN
from conftest import DEMO_CASES, MARSH_COUNTS
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from errbudget.case import limits
from errbudget.case.load import load_case
from errbudget.case.units import parse_quantity
from errbudget.cli import main
from errbudget.errors import InputError

QUANTITY_EXAMPLES = 400  # random and mutated quantity strings
TABLE_EXAMPLES = 250  # random distribution tables for a positive, a rate and a pure parameter
FILE_EXAMPLES = 150  # byte-level mutants of the demo case files, loaded and checked by the CLI


def _settings(examples: int):
    return settings(
        max_examples=examples,
        deadline=None,
        derandomize=True,
        suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
    )


# --------------------------------------------------------------------- quantity strings

NUMBERS = st.sampled_from(
    ["0", "7", "0.06", ".5", "5.", "1e308", "1e309", "9" * 40, "007", "2", "9", "1e-400", "-3"]
)
NAMES = st.sampled_from(
    ["day", "week", "crayfish", "m", "degC", "degF", "K", "per", "squared", "_x", "e", "nan"]
)
OPERATORS = st.sampled_from(["*", "/", "**", "^", "(", ")", "-", "+", " ", "", ";", ".", "%"])
TOKENS = st.lists(st.one_of(NUMBERS, NAMES, OPERATORS), min_size=1, max_size=14)
SEEDS = ["7 day", "0.06 / day", "9000 crayfish", "12 crayfish / m**2", "3 day**-1", "(2 day)**2"]


@st.composite
def mutated_quantity(draw) -> str:
    """A valid quantity string with characters inserted, deleted or replaced."""
    text = list(draw(st.sampled_from(SEEDS)))
    for _ in range(draw(st.integers(1, 6))):
        position = draw(st.integers(0, len(text)))
        action = draw(st.sampled_from(["insert", "delete", "replace"]))
        piece = draw(st.sampled_from(list("*^()e9-+. /2") + ["**9", "**2**2", "degC", "1e99"]))
        if action == "insert" or not text:
            text.insert(position, piece)
        elif action == "delete":
            del text[min(position, len(text) - 1)]
        else:
            text[min(position, len(text) - 1)] = piece
    return "".join(text)


QUANTITY_TEXT = st.one_of(TOKENS.map("".join), TOKENS.map(" ".join), mutated_quantity())


@_settings(QUANTITY_EXAMPLES)
@given(QUANTITY_TEXT)
def test_any_quantity_string_parses_to_a_finite_number_or_is_refused(text):
    from errbudget.case.units import ensure_count_units, ureg

    ensure_count_units("crayfish")
    try:
        quantity = parse_quantity(text, "fuzz")
    except InputError as error:
        assert error.where == "fuzz" and error.message
        event("refused")
        return
    event("accepted")
    assert math.isfinite(float(quantity.magnitude))
    assert quantity._is_multiplicative  # no offset unit got through
    # What pint was given (operators made explicit) means what pint reads in the text.
    direct = ureg.Quantity(text)
    assert direct.units == quantity.units
    assert float(direct.magnitude) == float(quantity.magnitude)


# --------------------------------------------------------------------- distribution tables

# A case with a positive parameter (K), a rate (r) and a pure number (theta).
THETA = """\
[model]
form = "theta-logistic"
unit = "beetle"

[parameters]
r     = "0.3 / week"
K     = "800 beetle"
theta = 1.5
N0    = "40 beetle"

[simulation]
scheme = "rk4"
step = "1 week"
horizon = "30 week"

[[quantity]]
name = "beetles at week 30"
kind = "value"
at = "30 week"
"""
UNITS = {"K": "beetle", "r": "/ week", "theta": ""}
NOMINAL = {"K": 800.0, "r": 0.3, "theta": 1.5}
HOSTILE_NUMBERS = st.sampled_from(
    [0.0, -0.0, 1e-300, -1.0, 1e99, 1e101, 1e308, -1e308, math.nan, math.inf, -math.inf]
)
SHAPES = {  # the keys of each kind of distribution (and one with a redundant cv)
    "normal": ("value", "sd"),
    "lognormal": ("value", "cv"),
    "uniform": ("low", "high"),
    "triangular": ("low", "mode", "high"),
    "truncated-normal": ("value", "sd", "low"),
    "normal-cv-and-sd": ("value", "sd", "cv"),
}


@st.composite
def table_entry(draw, name: str):
    """A [parameters] table for ``name``: a distribution's keys, each number plausible (a
    multiple of the nominal value from 1/100 to 3, either sign) or hostile."""
    shape = draw(st.sampled_from(sorted(SHAPES)))
    keys = list(SHAPES[shape]) + draw(
        st.lists(st.sampled_from(["high", "mode", "dist"]), max_size=1)
    )
    ratios = {"value": 1.0, "low": 0.5, "mode": 1.0, "high": 2.0}
    table = {}
    for key in keys:
        if key == "dist":
            table[key] = draw(st.sampled_from(list(SHAPES)[:5] + ["gamma"]))
            continue
        if draw(st.integers(0, 3)) == 0:
            number = draw(HOSTILE_NUMBERS)
        elif key in ("sd", "cv"):
            number = draw(st.sampled_from([0.01, 0.1, 0.2, 0.5, 1.0, 3.0, 0.15]))
            number *= 1.0 if key == "cv" else NOMINAL[name]
        else:
            number = ratios[key] * NOMINAL[name] * draw(st.sampled_from([1.0, 1.0, 0.9, -1.0]))
        if key == "cv" or not UNITS[name] or not math.isfinite(number):
            table[key] = number
        else:
            table[key] = f"{number!r} {UNITS[name]}"
    if shape == "lognormal":
        table["dist"] = "lognormal"
    return table


def _toml_value(value) -> str:
    if isinstance(value, str):
        return '"' + value + '"'
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + "}"
    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return repr(value)


@_settings(TABLE_EXAMPLES)
@given(st.sampled_from(sorted(UNITS)).flatmap(lambda n: st.tuples(st.just(n), table_entry(n))))
def test_any_distribution_table_loads_finite_and_signed_or_is_refused(tmp_path_factory, drawn):
    name, table = drawn
    line = {"K": 'K     = "800 beetle"', "r": 'r     = "0.3 / week"', "theta": "theta = 1.5"}[name]
    text = THETA.replace(line, f"{name} = {_toml_value(table)}")
    path = tmp_path_factory.mktemp("tables") / "case.toml"
    path.write_text(text, encoding="utf-8")
    try:
        case = load_case(path)
    except InputError as error:
        assert error.source == str(path) and error.message
        event("refused")
        return
    parameter = case.parameters[name]
    event(f"loaded: {'fixed' if parameter.dist is None else parameter.dist.kind}")
    assert math.isfinite(parameter.nominal) and abs(parameter.nominal) <= limits.MAX_MAGNITUDE
    dist = parameter.dist
    if dist is None:
        return
    p = limits.SMALLEST_DESIGN_PROBABILITY
    with np.errstate(all="ignore"):
        draws = dist.ppf(np.array([p, 0.5, 1 - p]))
    assert np.all(np.isfinite(draws)) and np.all(np.abs(draws) <= limits.MAX_MAGNITUDE)
    assert math.isfinite(dist.spread())
    sign = case.model.terms[name].sign
    if sign is not None:
        # At most a negligible share of the distribution lies at or below zero, and nothing
        # at all unless it is a normal kept as written (see limits.NEGLIGIBLE_TAIL).
        assert float(dist.frozen().cdf(0.0)) < limits.NEGLIGIBLE_TAIL
        if dist.kind != "normal":
            assert draws[0] > 0 if sign == "positive" else draws[0] >= 0


# --------------------------------------------------------------------- whole files

SOURCES = [BUILTIN.encode()] + [path.read_bytes() for path in DEMO_CASES]
HOSTILE_BYTES = [
    b"\xef\xbb\xbf",
    b"\x00",
    b"\xff\xfe",
    b"**9**9",
    b"^9^9",
    b"nan",
    b"inf",
    b"1e308",
    b"degC",
    b'\n[[quantity]]\nname = "x"\nkind = "peak"\n',
    b"\nsamples = 4611686018427387904\n",
    b'"',
    b"[",
    b"=",
    b"-",
    b"\n",
    b"((((((",
    b"2**2**2**2**2",
]


HOSTILE_STRINGS = [  # the content of a quoted value in the file, replaced
    b"2**2**2**2**2 day",
    b"9**9**9",
    b"((((9**9)**9)**9)**9) day",
    b"20 degC",
    b"1e308 crayfish",
    b"1.7e308 / day",
    b"nan day",
    b"1 day squared squared",
    b"-7 day",
    b"0 crayfish",
    b"7 day; __import__('os')",
    b"=SUM(A1)",
    b"../../etc/passwd",
    b"/dev/zero",
    b"x" * 300,
]


@st.composite
def mutated_file(draw) -> bytes:
    data = bytearray(draw(st.sampled_from(SOURCES)))
    for _ in range(draw(st.integers(1, 3))):
        position = draw(st.integers(0, len(data)))
        action = draw(st.sampled_from(["insert", "delete", "replace", "flip", "string"]))
        strings = [m.span(1) for m in re.finditer(rb'"([^"\n]*)"', bytes(data))]
        if action == "string" and strings:
            start, end = draw(st.sampled_from(strings))
            data[start:end] = draw(st.sampled_from(HOSTILE_STRINGS))
        elif action == "insert":
            data[position:position] = draw(st.sampled_from(HOSTILE_BYTES))
        elif action == "delete":
            del data[position : position + draw(st.integers(1, 8))]
        elif action == "replace":
            piece = draw(st.sampled_from(HOSTILE_BYTES))
            data[position : position + len(piece)] = piece
        elif data:
            index = min(position, len(data) - 1)
            data[index] ^= 1 << draw(st.integers(0, 7))
    return bytes(data)


@_settings(FILE_EXAMPLES)
@given(mutated_file())
def test_mutated_case_file_loads_or_is_refused_and_check_never_fails_inside(
    tmp_path_factory, capsys, data
):
    folder = tmp_path_factory.mktemp("files")
    _counts_beside(folder)
    path = folder / "case.toml"
    path.write_bytes(data)
    try:
        case = load_case(path)
    except InputError as error:
        assert error.message
        loaded = False
    else:
        loaded = True
        assert len(case.quantities) <= limits.MAX_QUANTITIES
        assert all(math.isfinite(p.nominal) for p in case.parameters.values())
        assert math.isfinite(case.step) and math.isfinite(case.horizon)
    event("loaded" if loaded else "refused")
    status = main(["check", str(path)])
    captured = capsys.readouterr()
    assert status == (0 if loaded else 2), captured.err
    assert "Traceback" not in captured.err


def _counts_beside(folder: Path) -> None:
    """The counts files the sources name, beside them: the DESIGN.md case's and the demos'."""
    (folder / "marsh-counts.csv").write_text(MARSH_COUNTS)
    for path in DEMO_CASES[0].parent.glob("*.csv"):
        (folder / path.name).write_bytes(path.read_bytes())


def test_the_fuzz_sources_load(tmp_path):
    # The mutants start from loadable cases, so a refusal is the mutation's doing.
    _counts_beside(tmp_path)
    for index, source in enumerate(SOURCES):
        path = tmp_path / f"case{index}.toml"
        path.write_bytes(source)
        assert load_case(path).quantities
