"""Numbers and units in the budget's sentences: "7 days", "7/16 day", "4.3 plants"."""

from __future__ import annotations

from fractions import Fraction

from errbudget.case.units import TIME_WORDS, in_words

__all__ = ["TIME_WORDS", "plain_step", "with_unit"]


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
    """'7' and 'day' -> '7 days'; '4.32' and 'plant' -> '4.32 plants'; '1' and 'fish' ->
    '1 fish'; a fraction of a unit ('7/16') reads 'of a day' style as '7/16 day'."""
    if "/" in text:  # 7/16 day: a fraction of one unit stays singular
        return in_words(text, 1.0, unit)
    return in_words(text, value, unit)
