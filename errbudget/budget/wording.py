"""Numbers and units in the budget's sentences: "7 days", "7/16 day", "0.5 day"."""

from __future__ import annotations

from fractions import Fraction

TIME_WORDS = ("second", "minute", "hour", "day", "week", "month", "year")


def plain_step(step: float) -> str:
    """1.75 -> '1.75', 3.5 -> '3.5', 0.4375 -> '7/16' (readable step values for sentences)."""
    if float(step).is_integer():
        return str(int(step))
    if abs(round(step, 3) - step) < 1e-12:
        return f"{round(step, 3):g}"
    fraction = Fraction(step).limit_denominator(4096)
    if abs(float(fraction) - step) < 1e-12 and fraction.denominator <= 64:
        return f"{fraction.numerator}/{fraction.denominator}"
    return f"{step:.4g}"


def with_unit(text: str, value: float, unit: str) -> str:
    """'7' and 'day' -> '7 days' in sentences (time words only; counts keep their name)."""
    plural = unit in TIME_WORDS and value > 1
    return f"{text} {unit}s" if plural else f"{text} {unit}"
