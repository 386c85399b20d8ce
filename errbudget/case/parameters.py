"""Parameter tables of a case: fixed values and distributions, unit-checked and converted.

Built-in laws fix the dimension of each parameter (a growth rate is 1/time, K and N0 are
populations, H is population per time, theta is a pure number); a custom law takes each
parameter in the unit it was written in and checks the rate expression's units instead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from errbudget.case.distributions import KINDS, Distribution
from errbudget.case.limits import (
    MAX_MAGNITUDE,
    NEGLIGIBLE_TAIL,
    NOTEWORTHY_TAIL,
    SMALLEST_DESIGN_PROBABILITY,
)
from errbudget.case.units import format_unit, parse_quantity, ureg
from errbudget.errors import InputError, did_you_mean
from errbudget.laws import models

TABLE_KEYS = ("value", "sd", "cv", "low", "high", "mode", "dist")


@dataclass(frozen=True)
class Parameter:
    """One model input: fixed (``dist`` None) or uncertain.

    ``nominal`` and the distribution are in ``unit`` (see module docstring); ``to_coherent``
    is the factor to the registry's root units, used only by custom laws.
    """

    name: str
    nominal: float
    unit: str
    given: str
    dist: Distribution | None
    to_coherent: float = 1.0
    rule: str | None = None  # what a sign-ruled parameter is ("a carrying capacity")


def builtin_parameters(
    reader, model, table, population, time_unit, spelled=None
) -> dict[str, Parameter]:
    expected = ("N0", *model.parameter_names)
    for name in table:
        if name not in expected:
            raise reader.fail(
                f"{model.form!r} has no parameter {name!r}{did_you_mean(name, expected)}; "
                "its parameters are " + ", ".join(expected),
                f"parameters.{name}",
            )
    units = {
        models.RATE: ureg.dimensionless / time_unit,
        models.POPULATION: population,
        models.FLUX: population / time_unit,
        models.PURE: ureg.dimensionless,
    }
    meanings = {
        models.RATE: "a rate (per time)",
        models.POPULATION: "a population level",
        models.FLUX: "a flux (population per time)",
        models.PURE: "a pure number",
    }
    parameters = {}
    for name in expected:
        where = f"parameters.{name}"
        if name not in table:
            raise reader.fail(f"missing parameter {name!r} of the {model.form!r} law", where)
        term = model.terms[name]
        parameter = _parameter(
            reader, name, table[name], units[term.kind], meanings[term.kind], spelled
        )
        parameters[name] = _check_sign(reader, parameter, where, term)
    return parameters


def custom_model(reader, rate_text, table, population, time_unit, spelled=None):
    """The case's own growth law from ``model.rate`` and its parameters, with units checked."""
    expression, allowed = _custom_rate(reader, rate_text, table)
    initial = _parameter(reader, "N0", table["N0"], population, "a population level", spelled)
    parameters = {"N0": _check_sign(reader, initial, "parameters.N0", models.INITIAL)}
    for name in allowed:
        given_unit = _given_unit(reader, name, table[name])
        parameters[name] = _parameter(
            reader, name, table[name], given_unit, "this parameter", spelled
        )
    units = {"N": population, "t": time_unit}
    units.update(
        {
            name: ureg.Unit(parameters[name].unit)
            if parameters[name].unit != "1"
            else ureg.dimensionless
            for name in allowed
        }
    )
    target = population / time_unit
    result = _rate_unit(reader, expression, units, target)
    # Evaluate in the registry's coherent root units, where every dimensionless combination
    # has its true magnitude, then convert the result to P/T.
    factors = {name: parameters[name].to_coherent for name in allowed}
    n_factor = float(ureg.Quantity(1, population).to_root_units().magnitude)
    t_factor = float(ureg.Quantity(1, time_unit).to_root_units().magnitude)
    root_of_result = ureg.Quantity(1, result).to_root_units().units
    out_factor = float(ureg.Quantity(1, root_of_result).to(target).magnitude)

    def coherent(p):
        return {name: p[name] * factors[name] for name in allowed}

    def rate(t, n, p):
        return expression.evaluate(t * t_factor, n * n_factor, coherent(p)) * out_factor

    def d_dn(t, n, p):
        return expression.d_dN(t * t_factor, n * n_factor, coherent(p)) * (out_factor * n_factor)

    equilibria = _numeric_equilibria(
        expression, rate, parameters, units, population, n_factor, allowed
    )
    coherent_form = {
        "expression": expression,
        "factors": factors,
        "t_factor": t_factor,
        "n_factor": n_factor,
        "out_factor": out_factor,
    }
    model = models.GrowthModel(
        "custom",
        f"dN/dt = {rate_text}",
        {n: "custom" for n in allowed},
        rate,
        d_dn,
        equilibria,
        coherent=coherent_form,
    )
    return model, parameters


def _custom_rate(reader, rate_text, table):
    """The parsed rate expression and its parameter names (every one in [parameters] used)."""
    from errbudget.laws import expression as expr  # custom laws only

    if not isinstance(rate_text, str):
        raise reader.fail(
            'form = "custom" needs a rate expression, e.g. rate = "r*N*(1 - N/K)"', "model.rate"
        )
    try:
        used = expr.names_in(rate_text)
    except InputError as error:
        raise error.located(reader.source, "model.rate") from None
    allowed = tuple(name for name in table if name != "N0")
    for name in sorted(used):
        if name not in table:
            raise reader.fail(
                f"the rate uses {name!r}, which is not in [parameters]"
                f"{did_you_mean(name, allowed)}",
                "model.rate",
            )
    if "N0" not in table:
        raise reader.fail("missing parameter 'N0' (the initial population)", "parameters.N0")
    for name in allowed:
        if name not in used:
            raise reader.fail(
                f"parameter {name!r} is not used by the rate expression", f"parameters.{name}"
            )
    try:
        return expr.parse_rate(rate_text, allowed), allowed
    except InputError as error:
        raise error.located(reader.source, "model.rate") from None


def _rate_unit(reader, expression, units, target):
    """The unit the rate comes out in, refused unless it is a population per time."""
    from errbudget.case.law_units import result_unit

    try:
        result = result_unit(expression, units, "model.rate")
    except InputError as error:
        raise error.located(reader.source, "model.rate") from None
    if ureg.Quantity(1, result).dimensionality != ureg.Quantity(1, target).dimensionality:
        raise reader.fail(
            f'the rate comes out in "{format_unit(result)}"; it must be a population per time '
            f'such as "{format_unit(target)}"',
            "model.rate",
        )
    return result


def _numeric_equilibria(expression, rate, parameters, units, population, n_factor, allowed):
    """``params -> list of Equilibrium`` for a custom law, found numerically per member.

    The search range is [0, RANGE_FACTOR x the largest of N0 and every parameter with the
    dimension of a population], per member; N0 is the member's own when given, else the
    upper end of its distribution's 99.8 % interval (or its fixed value). A law that depends
    on t has no equilibria.
    """
    from errbudget.laws.equilibria import RANGE_FACTOR, numeric_equilibria

    if expression.uses_time:
        return lambda p: []
    dimension = ureg.Quantity(1, population).dimensionality
    levels = {
        name: parameters[name].to_coherent / n_factor
        for name in allowed
        if ureg.Quantity(1, units[name]).dimensionality == dimension
    }
    start = parameters["N0"]
    n0_high = start.nominal
    if start.dist is not None:
        n0_high = max(n0_high, start.dist.interval(0.998)[1])

    def equilibria(p):
        arrays = {k: np.asarray(v, dtype=float) for k, v in p.items()}
        shape = np.broadcast_shapes(*(a.shape for a in arrays.values()), (1,))
        reached = np.broadcast_to(arrays.get("N0", n0_high), shape)
        for name, factor in levels.items():
            reached = np.fmax(reached, arrays[name] * factor)
        law = {k: np.broadcast_to(v, shape) for k, v in arrays.items() if k != "N0"}
        return numeric_equilibria(rate, law, RANGE_FACTOR * reached)

    return equilibria


def _given_unit(reader, name, entry):
    where = f"parameters.{name}"
    probe = entry
    if isinstance(entry, dict):
        for key in ("value", "low", "mode", "high", "sd"):
            if key in entry:
                probe = entry[key]
                break
    try:
        return parse_quantity(probe, where).units
    except InputError as error:
        raise error.located(reader.source, where) from None


def _parameter(reader, name, entry, unit, meaning, spelled=None) -> Parameter:
    where = f"parameters.{name}"
    label = format_unit(unit, spelled)
    coherent = float(ureg.Quantity(1, unit).to_root_units().magnitude)
    if not isinstance(entry, dict):
        value = reader.quantity(entry, where, unit, meaning)
        return Parameter(name, value, label, str(entry), None, coherent)
    reader.table(entry, where, TABLE_KEYS)

    def get(key):
        return (
            reader.quantity(entry[key], f"{where}.{key}", unit, meaning) if key in entry else None
        )

    value, sd, low, high, mode = (get(k) for k in ("value", "sd", "low", "high", "mode"))
    cv = None
    if "cv" in entry:
        cv = reader.number(entry, "cv", where, None, low=0, accepted="; cv is a positive number")
    kind = _kind(reader, entry, where, sd is not None or cv is not None, low, high, mode)
    if cv is not None:
        if value is None:
            raise reader.fail("cv needs a value to be relative to", f"{where}.cv")
        if sd is not None:
            raise reader.fail("give sd or cv, not both", f"{where}.cv")
        sd = cv * abs(value)
    if sd is not None and sd <= 0:
        raise reader.fail("sd must be positive", f"{where}.sd")
    if sd is not None and "cv" in entry:
        reader.magnitude(sd, f"cv = {cv!r} of {value:g}", f"{where}.cv", unit)
    stated = dict(value=value, sd=sd, low=low, high=high, mode=mode)
    dist = _distribution(reader, kind, stated, where)
    if dist.low >= dist.high:
        raise reader.fail("low must be below high", f"{where}.low")
    if kind == "triangular" and not dist.low <= dist.mode <= dist.high:
        raise reader.fail("mode must lie between low and high", f"{where}.mode")
    if not dist.low <= dist.nominal <= dist.high:
        raise reader.fail("value must lie between low and high", f"{where}.value")
    _check_draws(reader, dist, where, label)
    given = ", ".join(f"{k} = {v}" for k, v in entry.items())
    return Parameter(name, float(dist.nominal), label, given, dist, coherent)


def _kind(reader, entry, where, spread_given, low, high, mode) -> str:
    """The distribution named by ``dist``, or the one the given keys imply."""
    kind = entry.get("dist")
    if kind is not None and kind not in KINDS:
        raise reader.fail(
            f"unknown distribution {kind!r}{did_you_mean(str(kind), KINDS)}; "
            "accepted: " + ", ".join(KINDS),
            f"{where}.dist",
        )
    if kind is not None:
        return kind
    if mode is not None:
        return "triangular"
    if spread_given and (low is not None or high is not None):
        return "truncated-normal"
    if spread_given:
        return "normal"
    if low is not None and high is not None:
        return "uniform"
    raise reader.fail(
        "an uncertain parameter needs sd or cv (normal), low and high (uniform), "
        'low, mode and high (triangular), or dist = "lognormal" with cv or sd',
        where,
    )


def _distribution(reader, kind: str, given: dict, where: str) -> Distribution:
    """The distribution of ``kind`` from the given value, sd, low, high and mode."""

    def need(*keys):
        for key in keys:
            if given[key] is None:
                missing = "sd or cv" if key == "sd" else key
                raise reader.fail(f"a {kind} distribution needs {missing}", f"{where}.{key}")

    value, sd, low, high, mode = (given[k] for k in ("value", "sd", "low", "high", "mode"))
    if kind in ("normal", "lognormal"):
        need("value", "sd")
        if kind == "lognormal" and value <= 0:
            raise reader.fail("a lognormal parameter needs a positive value", f"{where}.value")
        return Distribution(kind, value, sd=sd)
    if kind == "uniform":
        need("low", "high")
        return Distribution(kind, (low + high) / 2 if value is None else value, low=low, high=high)
    if kind == "triangular":
        need("low", "mode", "high")
        return Distribution(kind, mode if value is None else value, low=low, high=high, mode=mode)
    need("value", "sd")
    return Distribution(
        kind,
        value,
        sd=sd,
        low=-math.inf if low is None else low,
        high=math.inf if high is None else high,
    )


def _draws(dist: Distribution) -> tuple[np.ndarray, float]:
    """The smallest, middle and largest draw the design can make (or bounds on them), and
    the spread (or a bound on it); closed forms, no SciPy."""
    low, high = dist.extremes(SMALLEST_DESIGN_PROBABILITY)
    return np.array([low, dist.nominal, high]), dist.spread_bound()


def _check_draws(reader, dist: Distribution, where: str, unit: str) -> None:
    """Every draw the design can make, and the spread, are finite numbers within the limit."""
    edges, spread = _draws(dist)
    finite = bool(np.all(np.isfinite(edges))) and math.isfinite(spread)
    if not finite or float(np.max(np.abs(edges))) > MAX_MAGNITUDE:
        shown = ", ".join(f"{x:g}" for x in edges)
        raise reader.fail(
            f"this {dist.kind} distribution draws values from {shown} {unit} (smallest, median, "
            f"largest) with spread {spread:g}; every draw must be a finite number within "
            f"{MAX_MAGNITUDE:g} in absolute value: check sd, cv, low and high",
            where,
        )


def _check_sign(reader, parameter: Parameter, where: str, term: models.Term) -> Parameter:
    """The sign rule of the law's ``term`` for this parameter, on the whole support.

    The nominal value and any bound given must obey the rule. A normal (or a normal bounded
    only above) that puts at least :data:`NEGLIGIBLE_TAIL` of its draws at or below zero is
    truncated at zero: those draws would be silently impossible members. The truncation is
    said by ``check`` (see :meth:`Distribution.describe`) and kept in
    ``Distribution.truncated_share``.
    """
    if term.sign is None:
        return parameter
    positive = term.sign == "positive"
    rule = term.meaning
    parameter = replace(parameter, rule=rule)
    dist = parameter.dist
    given_low = dist.low if dist is not None and math.isfinite(dist.low) else parameter.nominal
    open_zero = dist is not None and dist.kind == "truncated-normal" and given_low == 0
    lowest = min(parameter.nominal, given_low)
    if (lowest <= 0 and not open_zero) if positive else lowest < 0:
        verb = "must be positive" if positive else "cannot be negative"
        raise reader.fail(f"{rule} {verb}, got {parameter.given}", where)
    if dist is None or dist.kind not in ("normal", "truncated-normal") or dist.low > 0:
        return parameter
    below = dist.share_at_or_below_zero()
    if below >= NEGLIGIBLE_TAIL:
        dist = Distribution(
            "truncated-normal",
            dist.nominal,
            sd=dist.sd,
            low=0.0,
            high=dist.high,
            truncated_share=below,
        )
        _check_draws(reader, dist, where, parameter.unit)
        if positive and not dist.extremes(SMALLEST_DESIGN_PROBABILITY)[0] > 0:
            raise reader.fail(
                f"{rule} must be positive, but this normal, even truncated at zero, draws "
                f'zero; give a smaller sd, or a lognormal (dist = "lognormal"), got '
                f"{parameter.given}",
                where,
            )
        return replace(parameter, dist=dist)
    return parameter


def input_flags(parameters: dict[str, Parameter]) -> list[dict]:
    """Flags for budget.json about the inputs as loaded: each normal truncated at zero where
    the truncation moves its mean or sd noticeably (NOTEWORTHY_TAIL of its draws or more)."""
    flags = []
    for p in parameters.values():
        if p.dist is None or p.dist.truncated_share < NOTEWORTHY_TAIL:
            continue
        rule = p.rule or "a parameter that must be positive"
        flags.append(
            {
                "code": "truncated-at-zero",
                "message": (
                    f"{p.name} ({rule}): the normal distribution as written puts "
                    f"{100 * p.dist.truncated_share:.3g} % of its draws at or below zero; it is "
                    "truncated at zero, so its mean and sd differ from those written"
                ),
            }
        )
    return flags
