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


def ensure_count_units(unit_text: str, *, population: bool = False) -> None:
    """Define every name in ``unit_text`` that pint does not know as a count unit of its own.

    A population measured in "crayfish" gets the new base dimension ``[crayfish]``; a name
    pint knows (``tonne``, ``m``) keeps its meaning, so "mussel / m**2" is a density. The text
    is checked against the grammar first, so nothing is defined from a refused string.

    With ``population`` (the case's ``model.unit``), the first name (what is counted) that pint
    only reads by splitting off a prefix or a plural ending -- "rats" as ronto-technical-
    atmospheres, "hares" as hecto-ares, "moles" as the amount of substance -- and that does
    not come out as a mass, becomes a count unit of its own too: an ordinary plural animal name
    just works. A name pint holds as it is written ("perch", an old unit of length) keeps its
    meaning and is refused with advice by :func:`check_population_unit`.
    """
    names = Grammar(unit_text, None).check()[2]
    for position, name in enumerate(names):
        try:
            # parse_unit_name, not parse_units: the latter caches what it read, and a name
            # defined below must be read afresh.
            known = bool(ureg.parse_unit_name(name))
        except (pint.errors.PintError, ValueError, TypeError, AttributeError):
            raise InputError(f'"{name}" cannot be used as a unit name') from None
        if not known or (population and position == 0 and _read_by_splitting(name)):
            _define_count(name)


def _define_count(name: str) -> None:
    ureg.define(f"{name} = [{name}]")
    COUNT_DIMENSIONS.add(f"[{name}]")


def _read_by_splitting(name: str) -> bool:
    """Whether pint reads ``name`` only as a prefix plus a unit, or a plural, and not as a mass."""
    if name in COUNT_DIMENSIONS or f"[{name}]" in COUNT_DIMENSIONS:
        return False
    readings = ureg.parse_unit_name(name)
    if any(prefix == "" and unit == name for prefix, unit, _ in readings):
        return False  # defined under this very name
    if any(prefix == "" and ureg.get_symbol(unit) == name for prefix, unit, _ in readings):
        return False  # the unit's own symbol
    if _is_alias(name):
        return False
    # Dimensions of what pint reads, taken from its unit names: asking for ``name`` itself
    # would cache the reading, and the count unit defined next would not be seen.
    return all(dict(ureg.get_dimensionality(unit)) != {"[mass]": 1} for _, unit, _ in readings)


def _is_alias(name: str) -> bool:
    """Whether ``name`` is a name or alias pint lists for a unit (not read through a prefix)."""
    try:
        definition = ureg._units.get(name)  # pint's table of names, symbols and aliases
    except AttributeError:
        return False
    return definition is not None


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


def format_unit(unit: pint.Unit | str, spelled: dict[str, str] | None = None) -> str:
    """A unit as a short string pint reads back: ``1/day``, ``fish/day**2``, ``mussel/m**2``.

    The convention of every unit string in budget.json (documented in its schema): names
    joined by ``*``, the denominator after one ``/`` (several names in it joined by ``/``),
    integer powers as ``**n``, a pure number as ``1``. ``spelled`` maps pint's name of a unit
    to the user's spelling of it (``{"kilogram": "kg"}``), kept where the user gave one.
    """
    unit = ureg.Unit(unit) if isinstance(unit, str) else unit
    spelled = spelled or {}
    up, down = [], []
    for name, exponent in dict(unit._units).items():
        label = spelled.get(name, name)
        power = abs(exponent)
        power_text = f"{power:g}" if float(power).is_integer() else f"({power:g})"
        part = label if power == 1 else f"{label}**{power_text}"
        (up if exponent > 0 else down).append(part)
    text = "*".join(up) or "1"
    if down:
        text += "/" + "/".join(down)
    return text


def spelling(unit_text: str) -> dict[str, str]:
    """pint's name -> the user's spelling, for each name in ``unit_text`` written as a symbol
    or as the unit's own name (``kg`` -> kilogram); plurals and prefixed names are not kept."""
    kept = {}
    for name in _NAME.findall(unit_text):
        try:
            canonical = ureg.get_name(name)
        except (pint.errors.PintError, ValueError, TypeError, AttributeError):
            continue
        if name == canonical or ureg.get_symbol(canonical) == name or _is_alias(name):
            kept[canonical] = name
    return kept


def pretty_unit(text: str) -> str:
    """A unit string of budget.json for people: ``mussel/m**2`` -> ``mussel/m²``."""
    return re.sub(r"\*\*(-?\d+)", lambda m: m.group(1).translate(_SUPERSCRIPT), str(text))


_SUPERSCRIPT = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")

# Words that take a plural in sentences: time units and common mass units. Count units
# (names the case defined) do too; symbols (d, kg, m) never do.
TIME_WORDS = ("second", "minute", "hour", "day", "week", "month", "year")
MASS_WORDS = ("gram", "kilogram", "tonne", "pound", "ton", "metric_ton")
# Animal and plant names whose plural is the singular, or irregular (common English usage).
SAME_IN_PLURAL = frozenset(
    {
        "fish",
        "sheep",
        "deer",
        "moose",
        "bison",
        "salmon",
        "trout",
        "carp",
        "cod",
        "pike",
        "perch",
        "bass",
        "tuna",
        "krill",
        "plankton",
        "elk",
        "reindeer",
        "grouse",
        "quail",
        "squid",
        "shrimp",
        "swine",
        "chub",
        "roach",
        "bream",
        "tench",
        "dace",
        "rudd",
        "zander",
        "char",
        "grayling",
        "herring",
        "mackerel",
        "hake",
        "haddock",
        "plaice",
        "sole",
    }
)
IRREGULAR_PLURAL = {
    "mouse": "mice",
    "goose": "geese",
    "louse": "lice",
    "ox": "oxen",
    "wolf": "wolves",
    "calf": "calves",
    "leaf": "leaves",
    "loaf": "loaves",
    "child": "children",
    "person": "people",
    "larva": "larvae",
    "pupa": "pupae",
    "nymph": "nymphs",
    "cactus": "cacti",
    "fungus": "fungi",
}


def plural_name(name: str) -> str:
    """The English plural of a unit or animal name: plant -> plants, fish -> fish, mouse -> mice.

    A name already in the plural ("rats", "sedges") is kept. Rules of common English usage.
    """
    lower = name.lower()
    if lower in IRREGULAR_PLURAL:
        return IRREGULAR_PLURAL[lower]
    if lower in SAME_IN_PLURAL or lower.endswith("fish") or lower in IRREGULAR_PLURAL.values():
        return name
    if lower.endswith(("ss", "sh", "ch", "x", "z", "us")):
        return name + "es"
    if lower.endswith("s"):
        return name  # already a plural
    if lower.endswith("y") and lower[-2:-1] not in tuple("aeiou"):
        return name[:-1] + "ies"
    return name + "s"


def in_words(text: str, value: float | None, unit: str) -> str:
    """A number and its unit in a sentence: "2 days", "4.3 plants", "1 fish", "68.8 kg",
    "3.1 mussels per m²". ``text`` is the number as shown, ``value`` the number itself,
    ``unit`` a unit string of budget.json (see :func:`format_unit`)."""
    if not unit or unit == "1":
        return text
    first, slash, rest = str(unit).partition("/")
    head = first
    if value is not None and abs(value) != 1 and "*" not in first and _takes_plural(first):
        head = plural_name(first)
    if not slash:
        return f"{text} {pretty_unit(head)}"
    if first == "1":
        return f"{text} per {pretty_unit(rest)}"
    return f"{text} {pretty_unit(head)} per {pretty_unit(rest.replace('/', ' per '))}"


def _takes_plural(name: str) -> bool:
    if name in TIME_WORDS or name in MASS_WORDS:
        return True
    return f"[{name}]" in COUNT_DIMENSIONS or (
        _NAME.fullmatch(name) is not None and name not in ureg and len(name) > 2
    )


def product_unit(first: str, second: str, power: int = 1) -> str:
    """The unit string of ``first`` x ``second``**``power`` (both unit strings of budget.json,
    names as spelled there): ``("day", "day", -1)`` -> ``"1"``, ``("fish", "day", -2)`` ->
    ``"fish/day**2"``, ``("kg", "day", 1)`` -> ``"kg*day"``."""
    for text in (first, second):
        ensure_count_units(text)  # a count name of the case, if it is not yet defined here
    names = _NAME.findall(f"{first} {second}")
    spelled = {ureg.get_name(n): n for n in names if n != "1"}
    unit = ureg.parse_units(first) * ureg.parse_units(second) ** power
    return format_unit(unit, spelled)
