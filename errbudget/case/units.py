"""The package's single pint registry and the unit helpers used at the boundaries.

Every quantity read from a case file passes through :func:`parse_quantity` once; inside the
numerical core only plain floats in the case's population unit and time unit circulate.
"""

from __future__ import annotations

import math
import re

import pint

from errbudget.case.quantity_text import Grammar
from errbudget.errors import InputError


def _registry() -> pint.UnitRegistry:
    """The registry, from pint's own cache of its definitions when the user's cache folder
    can hold one (a tenth of a second at every start), else read afresh."""
    try:
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True, cache_folder=":auto:")
    except Exception:  # noqa: BLE001 - a cache folder we cannot use: read the definitions
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True)


ureg = _registry()
Quantity = ureg.Quantity

COUNT_DIMENSIONS: set[str] = set()  # dimensions created here for population names
_NAME = re.compile(r"[A-Za-z_][A-Za-z_0-9]*")


def ensure_count_units(unit_text: str) -> None:
    """Define every name in ``unit_text`` that pint does not know as a count unit of its own.

    A population measured in "crayfish" gets the new base dimension ``[crayfish]``; a name
    pint knows (``tonne``, ``m``) keeps its meaning, so "mussel / m**2" is a density. The text
    is checked against the grammar first, so nothing is defined from a refused string.
    """
    names = Grammar(unit_text, None).check()[2]
    for name in names:
        try:
            ureg.parse_units(name)
        except pint.errors.UndefinedUnitError:
            ureg.define(f"{name} = [{name}]")
            COUNT_DIMENSIONS.add(f"[{name}]")
        except (pint.errors.PintError, ValueError, TypeError, AttributeError):
            raise InputError(f'"{name}" cannot be used as a unit name') from None


def _refuse_offset_units(names: list[str], text: str, where: str) -> None:
    """degC and degF carry an offset: products and ratios of them have no single meaning."""
    for name in names:
        try:
            multiplicative = ureg.Quantity(1, ureg.parse_units(name))._is_multiplicative
        except (pint.errors.PintError, ValueError, TypeError, AttributeError):
            continue  # unknown names are reported by pint with the text
        if not multiplicative:
            raise InputError(
                f'"{text}" uses "{name}", a temperature scale with an offset, which cannot be '
                'converted by a factor; give temperatures in kelvin ("293.15 K" for 20 degC) '
                'and a spread or difference in kelvin too ("2 K" for 2 degC)',
                where=where,
            )


def check_population_unit(unit: pint.Unit, text: str, where: str) -> None:
    """A population is a count, a mass (biomass), or either per area or per volume.

    Catches names that pint already knows as something else: "perch" is a length (a rod).
    """
    dims = dict(ureg.Quantity(1, unit).dimensionality)
    counts = [d for d in dims if d in COUNT_DIMENSIONS]
    mass = dims.get("[mass]", 0)
    length = dims.get("[length]", 0)
    others = [d for d in dims if d not in COUNT_DIMENSIONS and d not in ("[mass]", "[length]")]
    ok = (
        not others
        and length in (0, -2, -3)
        and (
            (len(counts) == 1 and dims[counts[0]] == 1 and mass == 0) or (not counts and mass == 1)
        )
    )
    if not ok:
        known = ", ".join(f"{d}^{e:g}" for d, e in dims.items()) or "a pure number"
        raise InputError(
            f'"{text}" resolves to {known}, not a population: use a count name of your own '
            '(e.g. "fish", "plant", "perch_fish" -- some animal names are old units of '
            'length), a mass such as "tonne", or either per area or volume ("mussel / m**2")',
            where=where,
        )


def is_count(unit: pint.Unit) -> bool:
    """Whether ``unit`` counts individuals (one count dimension, not per area or volume)."""
    dims = dict(ureg.Quantity(1, unit).dimensionality)
    return (
        len(dims) == 1 and next(iter(dims)) in COUNT_DIMENSIONS and next(iter(dims.values())) == 1
    )


def parse_unit(text: str, where: str) -> pint.Unit:
    """Parse a unit expression such as ``"mussel / m**2"``."""
    if not isinstance(text, str) or not text.strip():
        raise InputError('expected a unit name such as "fish" or "plant / m**2"', where=where)
    canonical, _, names = Grammar(text, where).check()
    _refuse_offset_units(names, text, where)
    try:
        return ureg.parse_units(canonical)
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError):
        raise InputError(f'"{text}" is not a unit pint understands', where=where) from None


def parse_quantity(text: object, where: str) -> pint.Quantity:
    """Parse ``"0.06 / day"`` or ``"9000 crayfish"`` (a bare number is dimensionless)."""
    if isinstance(text, bool):
        raise InputError(f'expected a quantity such as "7 day", got {text!r}', where=where)
    if isinstance(text, int | float):
        if not math.isfinite(text):
            raise InputError(f"expected a finite number, got {text!r}", where=where)
        return Quantity(float(text), ureg.dimensionless)
    if not isinstance(text, str) or not text.strip():
        raise InputError(f'expected a quantity such as "7 day", got {text!r}', where=where)
    canonical, _, names = Grammar(text, where).check()
    _refuse_offset_units(names, text, where)
    try:
        value = ureg.Quantity(canonical)
    except pint.errors.UndefinedUnitError as error:
        unknown = error.unit_names if isinstance(error.unit_names, str) else error.unit_names[0]
        raise InputError(f'"{text}" uses the unknown unit "{unknown}"', where=where) from None
    except (
        pint.errors.PintError,
        ValueError,
        TypeError,
        AttributeError,
        SyntaxError,
        KeyError,
        IndexError,
        ZeroDivisionError,
        OverflowError,
    ):
        raise InputError(f'"{text}" is not a quantity such as "7 day"', where=where) from None
    if not isinstance(value, pint.Quantity):
        value = Quantity(float(value), ureg.dimensionless)
    try:
        magnitude = float(value.magnitude)
    except (TypeError, ValueError, OverflowError):
        raise InputError(f'"{text}" does not have a single numeric value', where=where) from None
    if not math.isfinite(magnitude):
        raise InputError(f'"{text}" is not a finite number', where=where)
    return value


def format_unit(unit: pint.Unit | str) -> str:
    """A short, readable unit label (``1 / day``, ``mussel / m²``)."""
    unit = ureg.Unit(unit) if isinstance(unit, str) else unit
    if unit == ureg.dimensionless:
        return "1"
    text = f"{unit:P}"
    return text or str(unit)
