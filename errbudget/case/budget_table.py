"""The [budget] table of a case: the verdict's fraction and percentile, the design's size
and seed, the interval level, the limits of a run and the population's resolution."""

from __future__ import annotations

from dataclasses import dataclass, replace

from errbudget.case.limits import MIN_SAMPLES, is_design_size
from errbudget.case.units import is_count, ureg

BUDGET_KEYS = (
    "fraction",
    "samples",
    "seed",
    "percentile",
    "level",
    "memory_limit",
    "time_limit",
    "resolution",
)
DEFAULT_MEMORY_LIMIT_MB = 4096  # resource ceiling for one run, overridable per case
DEFAULT_TIME_LIMIT_S = 60.0  # a run predicted to take longer is refused unless asked for
HALF_AN_INDIVIDUAL = 0.5  # default resolution of a count [individuals]


@dataclass(frozen=True)
class BudgetSpec:
    fraction: float = 0.1
    samples: int = 1024
    seed: int = 1
    percentile: float = 95.0
    level: float = 0.9
    memory_limit_mb: float = DEFAULT_MEMORY_LIMIT_MB
    time_limit_s: float = DEFAULT_TIME_LIMIT_S
    # Smallest difference of a population that can change a decision [population unit];
    # None: half an individual for count units, else RESOLUTION_SHARE of the largest state.
    resolution: float | None = None


def budget_spec(reader, table, population) -> BudgetSpec:
    spec = _budget_values(reader, table)
    if isinstance(table, dict) and "resolution" in table:
        value = reader.quantity(
            table["resolution"], "budget.resolution", population, "a population difference"
        )
        if not value > 0:
            raise reader.fail("the resolution must be positive", "budget.resolution")
        spec = replace(spec, resolution=value)
    elif is_count(population):
        spec = replace(spec, resolution=HALF_AN_INDIVIDUAL)
    if not is_design_size(spec.samples):
        raise reader.fail(
            f"{spec.samples} is not a power of two of at least {MIN_SAMPLES}; accepted: a "
            "power of two such as 512 or 1024 (the Sobol design needs one)",
            "budget.samples",
        )
    return spec


def _budget_values(reader, table) -> BudgetSpec:
    table = reader.table(table, "budget", BUDGET_KEYS)
    defaults = BudgetSpec()

    def read(key: str, default, accepted: str, **limits):
        return reader.number(
            table, key, "budget", default, accepted=f"; accepted: {accepted}", **limits
        )

    return BudgetSpec(
        fraction=float(read("fraction", defaults.fraction, "0 < fraction <= 1", low=0, high=1)),
        samples=read(
            "samples", defaults.samples, "a power of two such as 512 or 1024", low=0, integer=True
        ),
        seed=read("seed", defaults.seed, "an integer >= 0", low=0, integer=True, low_open=False),
        percentile=float(read("percentile", defaults.percentile, "0 < p <= 100", low=0, high=100)),
        level=float(read("level", defaults.level, "0 < level < 1", low=0, high=0.999)),
        memory_limit_mb=float(
            read("memory_limit", defaults.memory_limit_mb, "megabytes, e.g. 2048", low=0)
        ),
        time_limit_s=_time_limit(reader, table, defaults.time_limit_s),
    )


def _time_limit(reader, table, default: float) -> float:
    """``[budget] time_limit``: a time such as "90 s" or "5 min", or a number of seconds."""
    if "time_limit" not in table or not isinstance(table["time_limit"], str):
        return float(
            reader.number(
                table,
                "time_limit",
                "budget",
                default,
                low=0,
                accepted='; accepted: a time such as "90 s" or "5 min", or seconds',
            )
        )
    seconds = reader.quantity(table["time_limit"], "budget.time_limit", ureg.second, "a time")
    if not seconds > 0:
        raise reader.fail("the time limit must be positive", "budget.time_limit")
    return seconds
