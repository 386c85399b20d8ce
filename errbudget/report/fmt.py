"""Number formatting for the report: a few significant digits, the unit always beside them.

Everything here returns plain text (never markup): the template escapes it. A missing
number becomes a :class:`Cell` marked ``missing`` with the reason when it is known, which
the template shows as "not available (reason)".
"""

from __future__ import annotations

import math
from dataclasses import dataclass

SIG_VALUE = 4  # significant digits of forecast values and references
SIG_ERROR = 3  # significant digits of errors, spreads, limits and ratios
SIG_STEP = 6  # steps and times are exact: enough digits for 0.21875 (7/32)
GROUP_FROM = 1e4  # numbers at or above this get digit groups (8 400 is easier to read as 8400)
FIXED_LOW, FIXED_HIGH = 1e-3, 1e6  # outside [FIXED_LOW, FIXED_HIGH) numbers use powers of ten
THIN_SPACE = "\u202f"  # narrow no-break space: digit groups and number-unit never split
SHARE_EDGE = 0.1  # shares within this many percent of 0 or 100 are shown as "< 0.1 %" / "> 99.9 %"
_SUPERSCRIPT = str.maketrans("0123456789-", "⁰¹²³⁴⁵⁶⁷⁸⁹⁻")
NOT_AVAILABLE = "not available"


@dataclass(frozen=True)
class Cell:
    """One displayed value: its text, or ``missing`` with the reason when it is known."""

    text: str
    missing: bool = False
    why: str | None = None
    tone: str | None = None  # "ok" or "no": the template marks the cell (text says it too)


def finite(value) -> float | None:
    """``value`` as a float when it is a finite real number, else None (bools are not numbers)."""
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError, OverflowError):
        return None
    return number if math.isfinite(number) else None


def number(value, sig: int = SIG_ERROR) -> str | None:
    """``value`` to ``sig`` significant digits ("6.76", "8400", "2.84 × 10⁻¹⁴"); None if absent.

    Trailing zeros are dropped, as Python's "g" format does (and as the verdict sentence
    shows its numbers), so an exact step reads "7", not "7.000".
    """
    x = finite(value)
    if x is None:
        return None
    if x == 0:
        return "0"
    rounded = float(f"{x:.{sig - 1}e}")  # round first, so 9.996 -> 10.0 gets the right exponent
    exponent = math.floor(math.log10(abs(rounded)))
    if FIXED_LOW <= abs(rounded) < FIXED_HIGH:
        decimals = max(sig - 1 - exponent, 0)
        text = _trim(f"{rounded:,.{decimals}f}")
        return text.replace(",", THIN_SPACE if abs(rounded) >= GROUP_FROM else "")
    mantissa = _trim(f"{rounded / 10**exponent:.{sig - 1}f}")
    return f"{mantissa} × 10{str(exponent).translate(_SUPERSCRIPT)}"


def _trim(text: str) -> str:
    return text.rstrip("0").rstrip(".") if "." in text else text


def with_unit(value, unit: str | None, sig: int = SIG_ERROR, *, why: str | None = None) -> Cell:
    """A number and its unit ("6.76 day"); "not available" with ``why`` when it is missing."""
    text = number(value, sig)
    if text is None:
        return Cell(NOT_AVAILABLE, True, why)
    return Cell(f"{text}{THIN_SPACE}{unit}" if unit else text)


def step(value, unit: str | None, *, why: str | None = None) -> Cell:
    """An exact step or time ("7 day", "0.4375 day"): up to six significant digits."""
    return with_unit(value, unit, SIG_STEP, why=why)


def ratio(value, *, why: str | None = None) -> Cell:
    """A dimensionless ratio ("0.393")."""
    text = number(value, SIG_ERROR)
    return Cell(text) if text is not None else Cell(NOT_AVAILABLE, True, why)


def percent(value, *, why: str | None = None) -> Cell:
    """A share in [0, 1] as a percentage ("99.9 %"), with "< 0.1 %" and "> 99.9 %" at the ends."""
    x = finite(value)
    if x is None:
        return Cell(NOT_AVAILABLE, True, why)
    pct = 100.0 * x
    if pct == 0:
        return Cell(f"0{THIN_SPACE}%")
    if 0 < pct < SHARE_EDGE:
        return Cell(f"<{THIN_SPACE}{SHARE_EDGE:g}{THIN_SPACE}%")
    if 100 - SHARE_EDGE < pct < 100:
        return Cell(f">{THIN_SPACE}{100 - SHARE_EDGE:g}{THIN_SPACE}%")
    return Cell(f"{number(pct, SIG_ERROR)}{THIN_SPACE}%")


def interval(low, high, unit: str | None, level, *, why: str | None = None) -> Cell:
    """A central interval "7 113 – 9 647 crayfish (90 %)"."""
    lo, hi = number(low, SIG_VALUE), number(high, SIG_VALUE)
    if lo is None or hi is None:
        return Cell(NOT_AVAILABLE, True, why)
    lvl = finite(level)
    suffix = f" ({number(100 * lvl, 3)}{THIN_SPACE}% central)" if lvl else ""
    return Cell(f"{lo} – {hi}{THIN_SPACE}{unit or ''}".rstrip() + suffix)


def scalar(value) -> Cell:
    """Any JSON scalar for generic tables: numbers formatted, booleans as yes/no, None missing."""
    if value is None:
        return Cell(NOT_AVAILABLE, True)
    if isinstance(value, bool):
        return Cell("yes" if value else "no")
    if isinstance(value, int):
        return Cell(str(value))  # counts, seeds, sample sizes: exact
    if isinstance(value, float):
        text = number(value, SIG_VALUE)
        return Cell(text) if text is not None else Cell(NOT_AVAILABLE, True)
    return Cell(str(value))


def plain(value, sig: int = SIG_ERROR) -> str:
    """Number text for figure labels and alt text; "not available" when missing."""
    text = number(value, sig)
    return NOT_AVAILABLE if text is None else text
