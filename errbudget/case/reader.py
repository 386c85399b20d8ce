"""Reading one case file's tables: every error names the file and the key."""

from __future__ import annotations

import math
from pathlib import Path

from errbudget.case.limits import MAX_MAGNITUDE
from errbudget.case.units import format_unit, parse_quantity
from errbudget.errors import InputError, did_you_mean


class CaseReader:
    """Reads one case file; every error names the file and the key."""

    def __init__(self, path: Path):
        self.path = path
        self.source = str(path)

    def fail(self, message: str, where: str | None = None) -> InputError:
        return InputError(message, self.source, where)

    def table(self, data: object, where: str, allowed: tuple[str, ...]) -> dict:
        if not isinstance(data, dict):
            raise self.fail(f"expected a table, got {type(data).__name__}", where)
        for key in data:
            if key not in allowed:
                raise self.fail(
                    f"unknown key {key!r}{did_you_mean(key, allowed)}; accepted: "
                    + ", ".join(allowed),
                    f"{where}.{key}" if where else key,
                )
        return data

    def required(self, data: dict, key: str, where: str):
        if key not in data:
            raise self.fail(f"missing required key {key!r}", f"{where}.{key}" if where else key)
        return data[key]

    def text(self, data: dict, key: str, where: str, default: str | None = None) -> str:
        value = data.get(key, default) if default is not None else self.required(data, key, where)
        if not isinstance(value, str) or not value.strip():
            raise self.fail(
                f"expected a non-empty string, got {value!r}", f"{where}.{key}" if where else key
            )
        return value

    def quantity(self, value: object, where: str, unit, meaning: str) -> float:
        try:
            parsed = parse_quantity(value, where)
            converted = float(parsed.to(unit).magnitude)
        except InputError as error:
            raise error.located(self.source, where) from None
        except Exception:  # pint's DimensionalityError and relatives
            raise self.fail(
                f"{value!r} has the wrong dimension for {meaning}: expected something "
                f'convertible to "{format_unit(unit)}"',
                where,
            ) from None
        self.magnitude(converted, f"{value!r}", where, unit)
        return converted

    def magnitude(self, value: float, given: str, where: str, unit=None) -> float:
        """Refuse a number beyond :data:`MAX_MAGNITUDE` (or not finite) in internal units."""
        label = f" {format_unit(unit)}" if unit is not None else ""
        if not math.isfinite(value) or abs(value) > MAX_MAGNITUDE:
            raise self.fail(
                f"{given} is {value:g}{label}, beyond the limit of {MAX_MAGNITUDE:g} in absolute "
                "value (a number this large is a typo or would overflow)",
                where,
            )
        return value

    def number(
        self,
        data: dict,
        key: str,
        where: str,
        default,
        low=None,
        high=None,
        integer=False,
        low_open=True,
        accepted="",
    ):
        value = data.get(key, default)
        full = f"{where}.{key}"
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or (integer and not isinstance(value, int))
        ):
            kind = "an integer" if integer else "a number"
            raise self.fail(f"expected {kind}, got {value!r}{accepted}", full)
        if not math.isfinite(value):
            raise self.fail(f"expected a finite number, got {value!r}", full)
        too_low = low is not None and (value <= low if low_open else value < low)
        if too_low or (high is not None and value > high):
            raise self.fail(f"{value!r} is out of range{accepted}", full)
        return value
