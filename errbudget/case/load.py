"""Load and validate a case file (TOML) into typed, unit-checked dataclasses.

Units are converted once, here: inside the package every parameter is a plain float in its
internal unit (built-in laws: the case's population unit P and time unit T; custom laws:
the unit the value was written in), and every time is in T, the unit of the case's step.
"""

from __future__ import annotations

import hashlib
import tomllib
from dataclasses import dataclass
from pathlib import Path

from errbudget.case.budget_table import BudgetSpec, budget_spec
from errbudget.case.correlations import describe_correlations, read_correlations
from errbudget.case.dates import date_text, is_date, moment, start_text
from errbudget.case.dates import elapsed as date_elapsed
from errbudget.case.distributions import Distribution
from errbudget.case.files import read_regular_file
from errbudget.case.limits import (
    LADDER_HALVINGS,
    MAX_CASE_BYTES,
    MAX_FINEST_STEPS,
)
from errbudget.case.parameters import Parameter, builtin_parameters, custom_model
from errbudget.case.reader import CaseReader
from errbudget.case.resources import check_design_size, check_resources, counts_path
from errbudget.case.units import (
    check_population_unit,
    ensure_count_units,
    format_unit,
    is_count,
    parse_quantity,
    parse_unit,
    spelling,
    ureg,
)
from errbudget.errors import InputError, did_you_mean
from errbudget.laws import models
from errbudget.solve.problem import QUANTITY_KINDS, QuantitySpec
from errbudget.solve.tableaux import get_scheme

TOP_KEYS = (
    "title",
    "model",
    "parameters",
    "simulation",
    "quantity",
    "budget",
    "counts",
    "correlations",
)
MODEL_KEYS = ("form", "unit", "rate")
SIMULATION_KEYS = ("scheme", "step", "horizon", "start", "time_unit")
QUANTITY_KEYS = ("name", "kind", "at", "level")
COUNTS_KEYS = ("file", "time", "time_unit", "count", "error", "fit", "start")
ERROR_MODELS = ("poisson", "negative-binomial", "lognormal", "normal")


@dataclass(frozen=True)
class CountsSpec:
    path: Path
    time_column: str
    time_factor: float  # one unit of the file's time_unit in T
    days_to_internal: float  # one day in T, for date columns
    count_column: str
    error: str
    fit: tuple[str, ...]
    start: str | None  # ISO text of time 0 of dated counts
    start_is_case_start: bool = False  # start is [simulation] start, not [counts] start


@dataclass(frozen=True)
class Calendar:
    """Time 0 of a case as a date: ``start`` (ISO text, naive UTC) and one T in days."""

    start: str | None
    days_per_unit: float

    def origin(self):
        return None if self.start is None else moment(self.start, "simulation.start")[0]

    def date(self, elapsed_time) -> str | None:
        """The date ``elapsed_time`` [T] after the start, or None without a start."""
        return date_text(self.start, elapsed_time, self.days_per_unit)


@dataclass(frozen=True)
class Case:
    """A validated case, every number in internal units."""

    title: str
    path: Path
    text: str
    sha256: str
    model: models.GrowthModel
    rate_text: str | None
    population_unit: str
    counted: bool  # the population is a count of individuals (not a mass or a density)
    time_unit: str
    scheme: str
    step: float
    horizon: float
    parameters: dict[str, Parameter]
    quantities: tuple[QuantitySpec, ...]
    budget: BudgetSpec
    counts: CountsSpec | None
    # Normal-score correlations (first, second, rho) of uncertain inputs, in the order given.
    correlations: tuple[tuple[str, str, float], ...] = ()
    calendar: Calendar = Calendar(None, 1.0)

    def quantity_unit(self, spec: QuantitySpec) -> str:
        return self.time_unit if spec.kind == "time-to" else self.population_unit

    def nominal(self) -> dict[str, float]:
        return {name: p.nominal for name, p in self.parameters.items()}

    def uncertain(self) -> dict[str, Distribution]:
        return {name: p.dist for name, p in self.parameters.items() if p.dist is not None}


def load_case(path: str | Path, *, samples: int | None = None) -> Case:
    """Read, validate and convert a case file.

    Parameters
    ----------
    path : str or Path
        The TOML case file.
    samples : int, optional
        A base sample size that will replace ``[budget] samples`` in the run (the command
        line's ``--samples``): checked against the design limits with the case's own, before
        anything else in the file is parsed.

    Returns
    -------
    Case

    Raises
    ------
    InputError
        Naming the file, the key (or TOML line) and what would be accepted.
    """
    path = Path(path)
    reader = CaseReader(path)
    raw_bytes, text, data = _parse_toml(reader, path)
    reader.table(data, "", TOP_KEYS)
    check_resources(path, data, samples)
    title = reader.text(data, "title", "", default="untitled case")

    model_table = reader.table(reader.required(data, "model", ""), "model", MODEL_KEYS)
    form = reader.text(model_table, "form", "model")
    unit_text = reader.text(model_table, "unit", "model")
    population = _population_unit(reader, unit_text)
    spelled = spelling(unit_text)
    sim = reader.table(reader.required(data, "simulation", ""), "simulation", SIMULATION_KEYS)
    scheme_name = reader.text(sim, "scheme", "simulation")
    try:
        get_scheme(scheme_name)
    except InputError as error:
        raise error.located(reader.source) from None
    step, horizon, time_unit, calendar = _timing(reader, sim)
    model, parameters = _model_and_parameters(
        reader, form, model_table.get("rate"), data, population, time_unit, spelled
    )
    quantities = _quantities(reader, data.get("quantity"), population, time_unit, horizon, calendar)
    budget = budget_spec(reader, data.get("budget", {}), population)
    counts = _counts(reader, data.get("counts"), time_unit, parameters, calendar)
    fitted = counts.fit if counts is not None else ()
    correlations = read_correlations(reader, data.get("correlations"), parameters, fitted)

    case = Case(
        title=title,
        path=path,
        text=text,
        sha256=hashlib.sha256(raw_bytes).hexdigest(),
        model=model,
        rate_text=model_table.get("rate"),
        population_unit=format_unit(population, spelled),
        counted=is_count(population),
        time_unit=format_unit(time_unit),
        scheme=scheme_name,
        step=step,
        horizon=horizon,
        parameters=parameters,
        quantities=quantities,
        budget=budget,
        counts=counts,
        correlations=correlations,
        calendar=calendar,
    )
    check_design_size(case, budget.samples, str(path), "budget.samples")  # as checked raw
    return case


def _parse_toml(reader: CaseReader, path: Path) -> tuple[bytes, str, dict]:
    """The file's bytes, its text and the parsed TOML; anything unreadable names the file."""
    raw_bytes = read_regular_file(path, MAX_CASE_BYTES, "case file")
    try:
        # A byte-order mark at the start (some editors on Windows write one) is not TOML.
        text = raw_bytes.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise reader.fail("case file is not UTF-8 text") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise reader.fail(f"invalid TOML: {error}") from None
    except RecursionError:
        raise reader.fail("invalid TOML: nested too deeply") from None
    return raw_bytes, text, data


def _population_unit(reader: CaseReader, unit_text: str):
    """``model.unit`` as a pint unit, checked to be a population (a count, mass or density)."""
    try:
        ensure_count_units(unit_text, population=True)
        population = parse_unit(unit_text, "model.unit")
        check_population_unit(population, unit_text, "model.unit")
    except InputError as error:
        raise error.located(reader.source, "model.unit") from None
    return population


def _timing(reader: CaseReader, sim: dict):
    """Step and horizon in the case's time unit, that unit, and the calendar (start date)."""
    step_q = _time_quantity(reader, reader.required(sim, "step", "simulation"), "simulation.step")
    time_unit = step_q.units
    if "time_unit" in sim:
        time_text = reader.text(sim, "time_unit", "simulation")
        time_unit = _time_quantity(reader, f"1 {time_text}", "simulation.time_unit").units
    step = float(step_q.to(time_unit).magnitude)
    calendar = _calendar(reader, sim, time_unit)
    horizon = _time_or_date(
        reader, reader.required(sim, "horizon", "simulation"), "simulation.horizon",
        time_unit, "a time span", calendar,
    )  # fmt: skip
    if step <= 0:
        raise reader.fail(f"the step must be positive, got {step_q:P}", "simulation.step")
    if horizon <= 0:
        raise reader.fail("the horizon must be positive", "simulation.horizon")
    if step > horizon:
        raise reader.fail(
            f"the step ({step:g} {format_unit(time_unit)}) is longer than the horizon "
            f"({horizon:g} {format_unit(time_unit)})",
            "simulation.step",
        )
    _check_step_count(reader, step, horizon, time_unit)
    return step, horizon, time_unit, calendar


def _model_and_parameters(reader, form, rate_text, data, population, time_unit, spelled):
    """The growth law (built in, or the case's own rate) and its parameters."""
    params_table = reader.required(data, "parameters", "")
    if not isinstance(params_table, dict):
        raise reader.fail("expected a table of parameters", "parameters")
    if form == "custom":
        return custom_model(reader, rate_text, params_table, population, time_unit, spelled)
    if rate_text is not None:
        raise reader.fail('"rate" is only used with form = "custom"', "model.rate")
    try:
        model = models.built_in(form)
    except InputError as error:
        raise error.located(reader.source) from None
    parameters = builtin_parameters(reader, model, params_table, population, time_unit, spelled)
    return model, parameters


def _check_step_count(reader: CaseReader, step: float, horizon: float, time_unit) -> None:
    """Refuse a step so small that the refinement ladder could not reach its five levels.

    The ladder (errbudget.estimates.ladder) halves the case's step at least
    LADDER_HALVINGS times and stops at ``MAX_FINEST_STEPS`` steps on its finest level; a case
    beyond that could not be judged.
    """
    most = MAX_FINEST_STEPS // 2**LADDER_HALVINGS
    if horizon / step > most:
        label = format_unit(time_unit)
        raise reader.fail(
            f"the horizon ({horizon:g} {label}) holds {horizon / step:.3g} steps of "
            f"{step:g} {label}; at most {most} are accepted (the refinement ladder halves the "
            f"step {LADDER_HALVINGS} times): use a step of at least {horizon / most:.3g} {label}",
            "simulation.step",
        )


def _time_quantity(reader: CaseReader, value: object, where: str):
    try:
        q = parse_quantity(value, where)
    except InputError as error:
        raise error.located(reader.source, where) from None
    if q.dimensionality != ureg.day.dimensionality:
        raise reader.fail(f'{value!r} is not a time: give it with a unit such as "7 day"', where)
    return q


def _calendar(reader: CaseReader, sim: dict, time_unit) -> Calendar:
    """``[simulation] start`` (optional) and the length of one time unit in days."""
    days = float(ureg.Quantity(1, time_unit).to("day").magnitude)
    if "start" not in sim:
        return Calendar(None, days)
    try:
        origin, plain = moment(sim["start"], "simulation.start")
    except InputError as error:
        raise error.located(reader.source, "simulation.start") from None
    return Calendar(start_text(origin, plain), days)


def _time_or_date(reader, value, where, time_unit, meaning, calendar: Calendar) -> float:
    """An elapsed time [T] from a quantity string ("200 day") or a date (with a start)."""
    if not is_date(value):
        return reader.quantity(value, where, time_unit, meaning)
    try:
        return date_elapsed(value, calendar.origin(), calendar.days_per_unit, where)
    except InputError as error:
        raise error.located(reader.source, where) from None


def _quantities(
    reader, entries, population, time_unit, horizon, calendar
) -> tuple[QuantitySpec, ...]:
    if entries is None:
        raise reader.fail(
            "at least one [[quantity]] is needed (what the forecast is for)", "quantity"
        )
    if not isinstance(entries, list) or not entries:
        raise reader.fail("write quantities as [[quantity]] tables", "quantity")
    specs, names = [], set()
    for index, entry in enumerate(entries, start=1):
        where = f"quantity[{index}]"
        reader.table(entry, where, QUANTITY_KEYS)
        name = reader.text(entry, "name", where)
        if name in names:
            raise reader.fail(f"duplicate quantity name {name!r}", f"{where}.name")
        names.add(name)
        kind = reader.text(entry, "kind", where)
        if kind not in QUANTITY_KINDS:
            raise reader.fail(
                f"unknown kind {kind!r}{did_you_mean(kind, QUANTITY_KINDS)}; "
                "accepted: " + ", ".join(QUANTITY_KINDS),
                f"{where}.kind",
            )
        at = level = None
        if kind == "value":
            at = _time_or_date(
                reader, reader.required(entry, "at", where), f"{where}.at", time_unit, "a time",
                calendar,
            )  # fmt: skip
            if not 0 < at <= horizon * (1 + 1e-12):
                raise reader.fail(
                    f"at = {at:g} {format_unit(time_unit)} is outside the horizon "
                    f"(0, {horizon:g}] {format_unit(time_unit)}",
                    f"{where}.at",
                )
            at = min(at, horizon)
        elif "at" in entry:
            raise reader.fail('"at" is only used with kind = "value"', f"{where}.at")
        if kind == "time-to":
            level = reader.quantity(
                reader.required(entry, "level", where),
                f"{where}.level",
                population,
                "a population level",
            )
            if level < 0:
                raise reader.fail(
                    "the level cannot be negative; accepted: 0 (clearance, extinction) or a "
                    "positive population",
                    f"{where}.level",
                )
        elif "level" in entry:
            raise reader.fail('"level" is only used with kind = "time-to"', f"{where}.level")
        specs.append(QuantitySpec(name, kind, at, level))
    return tuple(specs)


def _counts(reader, table, time_unit, parameters, calendar: Calendar) -> CountsSpec | None:
    if table is None:
        return None
    table = reader.table(table, "counts", COUNTS_KEYS)
    resolved = counts_path(reader.path, reader.text(table, "file", "counts"))
    file_unit = _time_quantity(
        reader, "1 " + reader.text(table, "time_unit", "counts", default="day"), "counts.time_unit"
    )
    error = reader.text(table, "error", "counts", default="poisson")
    if error not in ERROR_MODELS:
        raise reader.fail(
            f"unknown observation model {error!r}{did_you_mean(error, ERROR_MODELS)}"
            "; accepted: " + ", ".join(ERROR_MODELS),
            "counts.error",
        )
    fit = reader.required(table, "fit", "counts")
    if not isinstance(fit, list) or not fit or not all(isinstance(n, str) for n in fit):
        raise reader.fail('expected a list of parameter names such as ["r", "K"]', "counts.fit")
    for name in fit:
        if name not in parameters:
            raise reader.fail(
                f"cannot fit {name!r}: not a parameter{did_you_mean(name, parameters)}",
                "counts.fit",
            )
    if len(set(fit)) != len(fit):
        raise reader.fail("a parameter is listed twice", "counts.fit")
    start = table.get("start")
    if start is not None and calendar.start is not None:
        raise reader.fail(
            "the case has [simulation] start, which is also time 0 of the counts' dates; "
            "remove [counts] start (or give the counts as elapsed times)",
            "counts.start",
        )
    if calendar.start is not None:
        start = calendar.start
    elif start is not None:
        try:
            start = start_text(*moment(start, "counts.start"))
        except InputError:
            raise reader.fail(
                f"{start!r} is not an ISO date such as 2026-04-01", "counts.start"
            ) from None
    return CountsSpec(
        path=resolved,
        time_column=reader.text(table, "time", "counts", default="time"),
        time_factor=float(file_unit.to(time_unit).magnitude),
        days_to_internal=float(ureg.Quantity(1, "day").to(time_unit).magnitude),
        count_column=reader.text(table, "count", "counts", default="count"),
        error=error,
        fit=tuple(fit),
        start=start,
        start_is_case_start=calendar.start is not None,
    )


def describe(case: Case, counts=None) -> str:
    """What ``errbudget check`` prints: the case as resolved, with units (and a summary of
    its counts when ``counts``, the :class:`~errbudget.case.counts.Counts` read, is given)."""
    lines = [
        f"case: {case.title}",
        f"  file: {case.path}",
        f"  law: {case.model.form}: {case.model.equation}",
        f"  population unit: {case.population_unit}; time unit: {case.time_unit}",
        f"  scheme: {get_scheme(case.scheme).label} (order {get_scheme(case.scheme).order}), "
        f"step {case.step:g} {case.time_unit}, horizon {case.horizon:g} {case.time_unit}"
        + _dated(case, case.horizon),
        "  parameters:",
    ]
    if case.calendar.start is not None:
        lines.insert(4, f"  start (time 0): {case.calendar.start}")
    for p in case.parameters.values():
        spread = "fixed" if p.dist is None else p.dist.describe(p.unit)
        lines.append(f"    {p.name} = {p.nominal:g} {p.unit} ({spread})")
    lines.extend(describe_correlations(case.correlations))
    lines.append("  quantities:")
    for q in case.quantities:
        detail = ""
        if q.kind == "value":
            detail = f"at {q.at:g} {case.time_unit}" + _dated(case, q.at)
        elif q.kind == "time-to":
            detail = f"level {q.level:g} {case.population_unit}"
        kind = f"{q.kind} {detail}" if detail else q.kind
        lines.append(f"    {q.name}: {kind} [{case.quantity_unit(q)}]")
    b = case.budget
    lines.append(
        f"  budget: fraction {b.fraction:g}, samples {b.samples}, seed {b.seed}, "
        f"percentile {b.percentile:g}, level {b.level:g}"
    )
    if case.counts:
        c = case.counts
        lines.append(f"  counts: {c.path.name} ({c.error}), fitting {', '.join(c.fit)}")
        priors = [n for n in c.fit if case.parameters[n].dist is not None]
        if priors:
            lines.append(f"    priors (their distributions above): {', '.join(priors)}")
        if counts is not None:
            first, last = counts.times[0], counts.times[-1]
            lines.append(
                f"    {len(counts.times)} counts read from columns {c.time_column!r} and "
                f"{c.count_column!r}, at {first:g}{_dated(case, first)} to {last:g} "
                f"{case.time_unit}{_dated(case, last)}"
            )
    return "\n".join(lines)


def _dated(case: Case, elapsed_time: float) -> str:
    date = case.calendar.date(elapsed_time)
    return f" ({date})" if date else ""
