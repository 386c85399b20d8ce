"""Tests of errbudget.case.load: loading the case-file contract, units and describe().

Bad input (every error class) is tested through the command line in tests/test_cli.py.
"""

from __future__ import annotations

import math
import textwrap
from pathlib import Path

import numpy as np
import pint
import pytest
from conftest import CRAYFISH_COUNTS, MARSH_COUNTS

from errbudget import load_case, run_case
from errbudget.case.load import describe
from errbudget.case.units import ureg

SAMPLES = 64  # base sample size of the Sobol design; a power of two, small for speed
REL = 1e-12  # the same case in days and in weeks must agree to this relative tolerance

# The example case of DESIGN.md §3, verbatim apart from the comments. Its counts file
# (MARSH_COUNTS) is only read by the fit, not by load_case, but it sits beside the case.
DESIGN_EXAMPLE = CRAYFISH_COUNTS.replace("samples = 64", "samples = 1024")


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def logistic_case(
    parameters: str,
    *,
    unit: str = "crayfish",
    step: str = "7 day",
    horizon: str = "210 day",
    form: str = "logistic",
    extra: str = "",
) -> str:
    """A small valid case whose [parameters] body and units the test chooses."""
    return (
        f'title = "test case"\n\n[model]\nform = "{form}"\nunit = "{unit}"\n{extra}\n'
        f"[parameters]\n{textwrap.dedent(parameters).strip()}\n\n"
        f'[simulation]\nscheme = "rk4"\nstep = "{step}"\nhorizon = "{horizon}"\n\n'
        '[[quantity]]\nname = "largest"\nkind = "peak"\n'
    )


# --------------------------------------------------------------------------- the contract


def test_design_example_loads_every_key(tmp_path):
    write(tmp_path, "marsh-counts.csv", MARSH_COUNTS)
    path = write(tmp_path, "marsh.toml", DESIGN_EXAMPLE)
    case = load_case(path)

    assert case.title == "Upper marsh crayfish pond, autumn harvest plan"
    assert case.path == path
    assert case.text == DESIGN_EXAMPLE
    assert len(case.sha256) == 64 and int(case.sha256, 16) >= 0
    assert case.model.form == "logistic-harvest"
    assert case.rate_text is None
    assert case.population_unit == "crayfish"
    assert case.time_unit == "day"
    assert case.scheme == "euler"
    assert case.step == 7.0
    assert case.horizon == 200.0

    assert list(case.parameters) == ["N0", "r", "K", "E"]
    r, k, e, n0 = (case.parameters[n] for n in ("r", "K", "E", "N0"))
    assert (r.dist.kind, r.nominal, r.dist.sd, r.unit) == ("normal", 0.06, 0.01, "1/day")
    assert (k.dist.kind, k.nominal, k.dist.low, k.dist.high, k.unit) == (
        "uniform",
        9000.0,
        7500.0,
        10500.0,
        "crayfish",
    )
    assert (e.dist, e.nominal, e.unit) == (None, 0.004, "1/day")
    assert n0.dist.kind == "lognormal"
    assert n0.nominal == 400.0
    assert n0.dist.sd == pytest.approx(0.2 * 400.0, rel=REL)  # cv times the value
    assert set(case.uncertain()) == {"r", "K", "N0"}
    assert case.nominal() == {"N0": 400.0, "r": 0.06, "K": 9000.0, "E": 0.004}

    stock, days = case.quantities
    assert (stock.name, stock.kind, stock.at, stock.level) == (
        "stock at harvest",
        "value",
        200.0,
        None,
    )
    assert (days.name, days.kind, days.at, days.level) == ("days to 6000", "time-to", None, 6000.0)
    assert case.quantity_unit(stock) == "crayfish"
    assert case.quantity_unit(days) == "day"

    assert (case.budget.fraction, case.budget.samples, case.budget.seed) == (0.1, 1024, 1)

    counts = case.counts
    assert counts.path == (tmp_path / "marsh-counts.csv").resolve()
    assert counts.path.read_text() == MARSH_COUNTS
    assert (counts.time_column, counts.count_column) == ("day", "count")
    assert counts.time_factor == 1.0
    assert counts.days_to_internal == 1.0
    assert counts.error == "poisson"
    assert counts.fit == ("r", "K", "N0")
    assert counts.start is None


def test_counts_time_unit_converted_to_the_case_time_unit(tmp_path):
    text = DESIGN_EXAMPLE.replace('time_unit = "day"', 'time_unit = "week"')
    assert text != DESIGN_EXAMPLE
    write(tmp_path, "marsh-counts.csv", MARSH_COUNTS)
    case = load_case(write(tmp_path, "marsh.toml", text))
    assert case.counts.time_factor == pytest.approx(7.0, rel=REL)  # one week is 7 days
    assert case.counts.days_to_internal == 1.0


# --------------------------------------------------------------------------- parameter tables

# (entry for r, expected kind, nominal, sd, low, high, mode); rates in 1/day, step in days.
TABLES = {
    "normal-sd": (
        '{ value = "0.06 / day", sd = "0.01 / day" }',
        "normal",
        0.06,
        0.01,
        -math.inf,
        math.inf,
        None,
    ),
    "uniform-low-high": (
        '{ low = "0.04 / day", high = "0.08 / day" }',
        "uniform",
        0.06,
        None,
        0.04,
        0.08,
        None,
    ),
    "uniform-with-value": (
        '{ value = "0.05 / day", low = "0.04 / day", high = "0.08 / day" }',
        "uniform",
        0.05,
        None,
        0.04,
        0.08,
        None,
    ),
    "lognormal-cv": (
        '{ value = "0.06 / day", cv = 0.25, dist = "lognormal" }',
        "lognormal",
        0.06,
        0.015,
        -math.inf,
        math.inf,
        None,
    ),
    "lognormal-sd": (
        '{ value = "0.06 / day", sd = "0.02 / day", dist = "lognormal" }',
        "lognormal",
        0.06,
        0.02,
        -math.inf,
        math.inf,
        None,
    ),
    "triangular": (
        '{ low = "0.03 / day", mode = "0.05 / day", high = "0.09 / day" }',
        "triangular",
        0.05,
        None,
        0.03,
        0.09,
        0.05,
    ),
    "truncated-normal": (
        '{ value = "0.06 / day", sd = "0.02 / day", low = "0.01 / day" }',
        "truncated-normal",
        0.06,
        0.02,
        0.01,
        math.inf,
        None,
    ),
    "truncated-normal-both": (
        '{ value = "0.06 / day", sd = "0.02 / day", low = "0.03 / day", high = "0.1 / day" }',
        "truncated-normal",
        0.06,
        0.02,
        0.03,
        0.1,
        None,
    ),
    "normal-cv": (
        '{ value = "0.06 / day", cv = 0.5 }',
        "normal",
        0.06,
        0.03,
        -math.inf,
        math.inf,
        None,
    ),
}


@pytest.mark.parametrize(
    "entry, kind, nominal, sd, low, high, mode", TABLES.values(), ids=TABLES.keys()
)
def test_parameter_table(tmp_path, entry, kind, nominal, sd, low, high, mode):
    text = logistic_case(f'r = {entry}\nK = "9000 crayfish"\nN0 = "400 crayfish"')
    case = load_case(write(tmp_path, "c.toml", text))
    r = case.parameters["r"]
    assert r.dist.kind == kind
    assert r.unit == "1/day"
    assert r.nominal == pytest.approx(nominal, rel=REL)
    assert r.dist.nominal == pytest.approx(nominal, rel=REL)
    if sd is not None:
        assert r.dist.sd == pytest.approx(sd, rel=REL)
    assert r.dist.low == pytest.approx(low, rel=REL)
    assert r.dist.high == pytest.approx(high, rel=REL)
    if mode is not None:
        assert r.dist.mode == pytest.approx(mode, rel=REL)
    assert set(case.uncertain()) == {"r"}
    # The distribution the run samples from is usable: its median lies inside the bounds.
    median = float(r.dist.ppf(np.array([0.5]))[0])
    assert low <= median <= high and math.isfinite(median)


def test_fixed_parameters_are_quantity_strings_in_any_unit(tmp_path):
    text = logistic_case(
        """
        r = "0.42 / week"
        K = "9 kilocrayfish"
        E = "0.004 / day"
        N0 = "400 crayfish"
        """,
        form="logistic-harvest",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    assert case.uncertain() == {}
    assert all(p.dist is None for p in case.parameters.values())
    assert case.parameters["r"].nominal == pytest.approx(0.06, rel=REL)  # 0.42 / 7
    assert case.parameters["K"].nominal == pytest.approx(9000.0, rel=REL)
    assert case.parameters["E"].nominal == 0.004
    assert case.parameters["N0"].nominal == 400.0
    assert case.parameters["r"].given == "0.42 / week"


# --------------------------------------------------------------------------- unit conversion


def test_rate_per_week_is_converted_to_per_day_when_the_step_is_in_days(tmp_path):
    text = logistic_case(
        """
        r = { value = "0.42 / week", sd = "0.07 / week" }
        K = "9000 crayfish"
        N0 = "400 crayfish"
        """,
        step="1 day",
        horizon="30 week",
    ).replace('kind = "peak"', 'kind = "value"\nat = "20 week"')
    case = load_case(write(tmp_path, "c.toml", text))
    r = case.parameters["r"]
    assert case.time_unit == "day"
    assert r.unit == "1/day"
    assert r.nominal == pytest.approx(0.06, rel=REL)
    assert r.dist.sd == pytest.approx(0.01, rel=REL)
    assert case.horizon == pytest.approx(210.0, rel=REL)
    assert case.quantities[0].at == pytest.approx(140.0, rel=REL)


def test_rate_per_day_is_converted_to_per_week_when_the_step_is_in_weeks(tmp_path):
    text = logistic_case(
        'r = "0.06 / day"\nK = "9000 crayfish"\nN0 = "400 crayfish"',
        step="1 week",
        horizon="210 day",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    assert case.time_unit == "week"
    assert case.parameters["r"].unit == "1/week"
    assert case.parameters["r"].nominal == pytest.approx(0.42, rel=REL)
    assert case.step == 1.0
    assert case.horizon == pytest.approx(30.0, rel=REL)


def test_flux_parameter_is_converted_to_population_per_case_time(tmp_path):
    text = logistic_case(
        'r = "0.06 / day"\nK = "9000 crayfish"\nH = "70 crayfish / week"\nN0 = "4000 crayfish"',
        form="logistic-removal",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    assert case.parameters["H"].unit == "crayfish/day"
    assert case.parameters["H"].nominal == pytest.approx(10.0, rel=REL)


def test_unknown_population_unit_becomes_a_count_unit(tmp_path):
    name = "zanderfry"  # an invented unit name used by no other test
    with pytest.raises(pint.errors.UndefinedUnitError):
        ureg.parse_units(name)
    text = logistic_case(f'r = "0.06 / day"\nK = "9000 {name}"\nN0 = "400 {name}"', unit=name)
    case = load_case(write(tmp_path, "c.toml", text))
    assert case.population_unit == name
    assert dict(ureg.Quantity(1, name).dimensionality) == {f"[{name}]": 1}
    assert not ureg.Quantity(1, name).dimensionless
    assert case.parameters["K"].nominal == 9000.0


def test_density_unit_keeps_the_meaning_of_known_names(tmp_path):
    text = logistic_case(
        """
        r = { value = "0.9 / year", sd = "0.1 / year" }
        K = { value = "0.18 mussel / cm**2", sd = "150 mussel / m**2" }
        N0 = "6e5 mussel / hectare"
        """,
        unit="mussel / m**2",
        form="gompertz",
        step="8 week",
        horizon="312 week",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    density = ureg.Quantity(1, "mussel / m**2").dimensionality
    assert dict(density) == {"[mussel]": 1, "[length]": -2}
    assert case.population_unit == "mussel/m**2"  # the user's spelling of metre kept
    assert case.parameters["K"].nominal == pytest.approx(1800.0, rel=REL)  # 1 cm² = 1e-4 m²
    assert case.parameters["K"].dist.sd == pytest.approx(150.0, rel=REL)
    assert case.parameters["N0"].nominal == pytest.approx(60.0, rel=REL)  # 1 ha = 1e4 m²
    # pint's year is the Julian year of 365.25 days (pint default registry, recalled).
    assert case.parameters["r"].nominal == pytest.approx(0.9 * 7 / 365.25, rel=REL)


def test_custom_rate_is_evaluated_in_the_case_units(tmp_path):
    text = logistic_case(
        'r = "0.7 / week"\nK = "9000 crayfish"\nN0 = "400 crayfish"',
        form="custom",
        extra='rate = "r*N*(1 - N/K)"',
        step="1 day",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    assert case.rate_text == "r*N*(1 - N/K)"
    # Custom laws keep each parameter in the unit it was written in (case.py docstring).
    assert case.parameters["r"].unit == "1/week"
    assert case.parameters["r"].nominal == pytest.approx(0.7, rel=REL)
    n = np.array([100.0, 4500.0, 8000.0])
    params = {k: np.full(3, v) for k, v in case.nominal().items() if k != "N0"}
    per_day = 0.1  # 0.7 per week
    np.testing.assert_allclose(
        case.model.rate(0.0, n, params), per_day * n * (1 - n / 9000.0), rtol=REL
    )
    np.testing.assert_allclose(
        case.model.d_dn(0.0, n, params), per_day * (1 - 2 * n / 9000.0), rtol=1e-10
    )


# --------------------------------------------------------------------------- describe()


def test_describe_lists_the_resolved_units(tmp_path):
    write(tmp_path, "marsh-counts.csv", MARSH_COUNTS)
    case = load_case(write(tmp_path, "marsh.toml", DESIGN_EXAMPLE))
    text = describe(case)
    lines = text.splitlines()
    assert lines[0] == f"case: {case.title}"
    assert "  population unit: crayfish; time unit: day" in lines
    assert any("step 7 day, horizon 200 day" in line for line in lines)
    assert "    r = 0.06 1/day (normal, mean 0.06 1/day, sd 0.01 1/day)" in lines
    assert "    K = 9000 crayfish (uniform on [7500, 10500] crayfish)" in lines
    assert "    E = 0.004 1/day (fixed)" in lines
    assert any(line.startswith("    N0 = 400 crayfish (lognormal") for line in lines)
    assert "    stock at harvest: value at 200 day [crayfish]" in lines
    assert "    days to 6000: time-to level 6000 crayfish [day]" in lines
    assert any("fitting r, K, N0" in line and "marsh-counts.csv" in line for line in lines)


def test_describe_shows_converted_units_of_a_density_case(tmp_path):
    text = logistic_case(
        'r = "0.9 / year"\nK = "1800 mussel / m**2"\nN0 = "60 mussel / m**2"',
        unit="mussel / m**2",
        step="8 week",
        horizon="312 week",
    )
    case = load_case(write(tmp_path, "c.toml", text))
    out = describe(case)
    assert f"population unit: {case.population_unit}; time unit: week" in out
    assert f"K = 1800 {case.population_unit} (fixed)" in out
    assert "r = 0.0172485 1/week (fixed)" in out  # 0.9 * 7 / 365.25 = 0.017248...
    line = next(line for line in out.splitlines() if "largest:" in line)
    assert line.split() == ["largest:", "peak", f"[{case.population_unit}]"]


def test_describe_has_single_spaces_for_quantities_without_detail(tmp_path):
    text = logistic_case('r = "0.06 / day"\nK = "9000 crayfish"\nN0 = "400 crayfish"')
    out = describe(load_case(write(tmp_path, "c.toml", text)))
    assert "    largest: peak [crayfish]" in out.splitlines()


# --------------------------------------------------------------------------- days vs weeks

IN_DAYS = """\
title = "crayfish pond, in days"

[model]
form = "logistic-harvest"
unit = "crayfish"

[parameters]
r  = { value = "0.06 / day", sd = "0.01 / day" }
K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }
E  = "0.004 / day"
N0 = { value = "400 crayfish", cv = 0.2, dist = "lognormal" }

[simulation]
scheme = "heun"
step = "7 day"
horizon = "210 day"

[[quantity]]
name = "stock in autumn"
kind = "value"
at = "140 day"

[[quantity]]
name = "time to 6000"
kind = "time-to"
level = "6000 crayfish"

[[quantity]]
name = "largest stock"
kind = "peak"

[[quantity]]
name = "smallest stock"
kind = "minimum"

[budget]
seed = 5
"""

DAYS_TO_WEEKS = (
    ('"0.06 / day"', '"0.42 / week"'),
    ('"0.01 / day"', '"0.07 / week"'),
    ('"0.004 / day"', '"0.028 / week"'),
    ('"7 day"', '"1 week"'),
    ('"210 day"', '"30 week"'),
    ('"140 day"', '"20 week"'),
)


def _in_weeks(text: str) -> str:
    for old, new in DAYS_TO_WEEKS:
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    return text


def test_same_case_in_days_and_in_weeks_gives_the_same_budget(tmp_path):
    days_case = load_case(write(tmp_path, "days.toml", IN_DAYS))
    weeks_case = load_case(write(tmp_path, "weeks.toml", _in_weeks(IN_DAYS)))
    assert (days_case.time_unit, days_case.step) == ("day", 7.0)
    assert (weeks_case.time_unit, weeks_case.step) == ("week", 1.0)

    days = run_case(days_case, samples=SAMPLES).to_dict()
    weeks = run_case(weeks_case, samples=SAMPLES).to_dict()
    assert days["simulation"]["step"] == {"value": 7.0, "unit": "day"}
    assert weeks["simulation"]["step"] == {"value": 1.0, "unit": "week"}
    assert len(days["quantities"]) == len(weeks["quantities"]) == 4

    def close(a, b):
        assert a is not None and b is not None
        assert a == pytest.approx(b, rel=REL, abs=0)

    for d, w in zip(days["quantities"], weeks["quantities"], strict=True):
        assert d["name"] == w["name"]
        # Times to a level come out in the case's time unit: weeks times 7 are days.
        factor = 7.0 if d["name"] == "time to 6000" else 1.0
        assert d["unit"] == ("day" if factor == 7.0 else "crayfish")
        assert w["unit"] == ("week" if factor == 7.0 else "crayfish")
        close(d["value"], factor * w["value"])
        close(d["reference"], factor * w["reference"])
        close(d["parameter"]["sd"], factor * w["parameter"]["sd"])
        close(d["parameter"]["low"], factor * w["parameter"]["low"])
        close(d["parameter"]["high"], factor * w["parameter"]["high"])
        close(d["discretisation"]["error"], factor * w["discretisation"]["error"])
        for ld, lw in zip(
            d["discretisation"]["ladder"], w["discretisation"]["ladder"], strict=True
        ):
            close(ld["step"], 7.0 * lw["step"])  # ladder steps are always times
            close(ld["value"], factor * lw["value"])
        # Sobol indices are pure numbers; near zero a relative test is meaningless.
        for name, index in d["parameter"]["indices"].items():
            for key in ("first", "total"):
                assert index[key] == pytest.approx(w["parameter"]["indices"][name][key], abs=1e-12)
        close(d["numerical_to_parameter"], w["numerical_to_parameter"])
