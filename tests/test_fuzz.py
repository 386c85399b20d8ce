"""Fuzzing: any input either loads or raises InputError; the CLI exits 0 or 2, never 1.

The expression parser has its own property tests (tests/test_expr.py).
"""

from __future__ import annotations

import json
import math
import random
import re
import tomllib

from conftest import (
    CRAYFISH,
    CRAYFISH_COUNTS,
    DEMO_CASES,
    MARSH_COUNTS,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from errbudget.case.counts import read_counts
from errbudget.case.load import load_case
from errbudget.cli import main
from errbudget.errors import InputError

LOADER_EXAMPLES = 150  # random case documents per run
READER_EXAMPLES = 150  # random counts files per run
MUTANTS = 40  # mutated demo cases run through the CLI
FUZZ_SEED = 20261201  # fixed, so a failure is reproducible

FUZZ_SETTINGS = settings(
    max_examples=LOADER_EXAMPLES,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


# --------------------------------------------------------------------- a small TOML writer


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ("nan" if value != value else "inf")
    if isinstance(value, str):
        return json.dumps(value)  # JSON string escapes are valid TOML basic-string escapes
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return (
            "{" + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items()) + "}"
        )
    raise TypeError(type(value))


def _toml(document: dict) -> str:
    """Top-level scalars first, then every table as an inline table (always valid TOML)."""
    return "".join(f"{json.dumps(k)} = {_toml_value(v)}\n" for k, v in document.items())


# --------------------------------------------------------------------- loader fuzz

BASE_DOCS = [tomllib.loads(CRAYFISH), tomllib.loads(CRAYFISH_COUNTS)] + [
    tomllib.loads(p.read_text(encoding="utf-8")) for p in DEMO_CASES
]
KEYS = sorted(
    {k for d in BASE_DOCS for k in d}
    | {k for d in BASE_DOCS for v in d.values() if isinstance(v, dict) for k in v}
    | {"value", "sd", "cv", "low", "high", "mode", "dist", "at", "level", "kind", "name"}
)
UNIT_TEXT = st.sampled_from(
    [
        "7 day",
        "0.06 / day",
        "9000 crayfish",
        "1 week",
        "-3 day",
        "0 fish",
        "5 kg",
        "day",
        "",
        "1e400 day",
        "nan day",
        "fish / m**2",
        "__class__",
        "crayfish**2",
        "3 / kg",
        "1/0 day",
    ]
)
SCALARS = (
    st.integers(-(10**20), 10**20)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.booleans()
    | UNIT_TEXT
    | st.text(max_size=20)
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: (
        st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from(KEYS), inner, max_size=3)
    ),
    max_leaves=8,
)


def _paths(document: dict, prefix=()) -> list[tuple]:
    found = []
    for key, value in document.items():
        found.append((*prefix, key))
        if isinstance(value, dict):
            found.extend(_paths(value, (*prefix, key)))
        elif isinstance(value, list):
            for index, item in enumerate(value):
                if isinstance(item, dict):
                    found.extend(_paths(item, (*prefix, key, index)))
    return found


@st.composite
def mutated_documents(draw):
    document = json.loads(json.dumps(draw(st.sampled_from(BASE_DOCS))))
    for _ in range(draw(st.integers(1, 2))):
        paths = _paths(document)
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = document
        for step in path[:-1]:
            parent = parent[step]
        action = draw(st.sampled_from(["replace", "delete", "add"]))
        if action == "delete":
            del parent[path[-1]]
        elif action == "replace":
            parent[path[-1]] = draw(VALUES)
        elif isinstance(parent, dict):
            parent[draw(st.sampled_from(KEYS))] = draw(VALUES)
    return document


def test_loader_fuzz_loads_or_raises_input_error(tmp_path):
    (tmp_path / "marsh-counts.csv").write_text(MARSH_COUNTS)
    (tmp_path / "perch-reservoir-counts.csv").write_text(MARSH_COUNTS)
    path = tmp_path / "fuzz.toml"
    tried = []

    @FUZZ_SETTINGS
    @given(mutated_documents())
    def check(document):
        tried.append(1)
        path.write_text(_toml(document), encoding="utf-8")
        try:
            load_case(path)
        except InputError as error:
            assert error.source == str(path) or str(path) in error.format(), error.format()

    check()
    print(f"loader fuzz: {len(tried)} case documents tried")
    assert len(tried) >= LOADER_EXAMPLES // 2, f"only {len(tried)} documents tried"


# --------------------------------------------------------------------- counts reader fuzz

CELLS = st.sampled_from(
    [
        "0",
        "28",
        "410",
        "-3",
        "",
        "NA",
        "1e400",
        "nan",
        "2024-01-01",
        "2024-02-30",
        "x",
        "1.5",
        "  7 ",
        "\ufeff",
        "\x00",
        '"',
        "2024-05-01T08:30+02:00",
        "day",
        "count",
    ]
) | st.text(max_size=6)


@st.composite
def csv_texts(draw):
    if draw(st.booleans()):
        return draw(st.text(max_size=200))
    delimiter = draw(st.sampled_from([",", ";", "\t", "|"]))
    header = draw(
        st.sampled_from([["day", "count"], ["count", "day"], ["day"], ["day", "count", "x"]])
    )
    rows = draw(st.lists(st.lists(CELLS, min_size=1, max_size=4), max_size=8))
    return "\n".join(delimiter.join(r) for r in [header, *rows]) + draw(st.sampled_from(["", "\n"]))


def test_counts_reader_fuzz_reads_or_raises_input_error(tmp_path):
    path = tmp_path / "counts.csv"
    tried = []

    @FUZZ_SETTINGS
    @given(csv_texts(), st.booleans())
    def check(text, with_start):
        tried.append(1)
        path.write_bytes(text.encode("utf-8", "surrogatepass"))
        try:
            counts = read_counts(
                path,
                time_column="day",
                count_column="count",
                days_to_internal=1.0,
                start="2024-01-01" if with_start else None,
            )
        except InputError:
            return
        assert (counts.counts >= 0).all() and (counts.times >= 0).all()
        assert (counts.times[1:] > counts.times[:-1]).all()

    check()
    print(f"counts reader fuzz: {len(tried)} files tried")
    assert len(tried) >= READER_EXAMPLES // 2, f"only {len(tried)} files tried"


# --------------------------------------------------------------------- CLI fuzz

UNIT_SWAPS = [("day", "crayfish"), ("/ day", "/ kg"), ("fish", "day"), ("day", "week")]
VALUE_LINE = re.compile(r"^(\s*[A-Za-z0-9_]+\s*=\s*)(.+)$")


def _mutate(text: str, rng: random.Random) -> str:
    lines = text.splitlines()
    kind = rng.choice(["delete", "type", "unit", "unit", "type"])
    if kind == "delete":
        del lines[rng.randrange(len(lines))]
    elif kind == "unit":
        old, new = rng.choice(UNIT_SWAPS)
        hits = [i for i, line in enumerate(lines) if old in line]
        if hits:
            i = rng.choice(hits)
            lines[i] = lines[i].replace(old, new, 1)
    else:
        hits = [i for i, line in enumerate(lines) if VALUE_LINE.match(line)]
        i = rng.choice(hits)
        head, value = VALUE_LINE.match(lines[i]).groups()
        if value.startswith('"'):
            swapped = rng.choice(["7", "{ value = 7 }", "[1, 2]", "true"])
        elif value[:1].isdigit() or value[:1] == "-":
            swapped = rng.choice([f'"{value}"', "{ value = 1 }", "-1", "0"])
        else:
            swapped = rng.choice(['"x"', "3", "0.5"])
        lines[i] = head + swapped
    return "\n".join(lines) + "\n"


def test_cli_fuzz_on_mutated_demo_cases(capsys, tmp_path):
    rng = random.Random(FUZZ_SEED)
    outcomes = {0: 0, 2: 0}
    tried = 0
    for number in range(MUTANTS):
        source = rng.choice(DEMO_CASES)
        folder = tmp_path / f"m{number}"
        folder.mkdir()
        for csv in source.parent.glob("*.csv"):
            (folder / csv.name).write_bytes(csv.read_bytes())
        text = source.read_text(encoding="utf-8")
        for _ in range(rng.randint(1, 2)):
            text = _mutate(text, rng)
        case = folder / source.name
        case.write_text(text, encoding="utf-8")
        code = main(["run", str(case), "--out", str(folder / "out"), "--samples", "16", "--quiet"])
        captured = capsys.readouterr()
        tried += 1
        assert code in (0, 2), (number, code, captured.err, text)
        if code == 2:
            assert captured.err.count("\n") == 1 and "Traceback" not in captured.err, captured.err
            assert not (folder / "out").exists()
        else:
            assert captured.err == "", captured.err
        outcomes[code] += 1
    print(f"CLI fuzz: {tried} mutated cases tried, exit codes {outcomes}")
    assert tried == MUTANTS, f"{tried} of {MUTANTS} mutants tried ({outcomes})"
