"""The grammar of quantity and unit strings, checked before pint sees the text.

Light on purpose (no pint, no numpy): the command line checks every quantity string of a
case with it before the rest of the package is loaded.

quantity := [sign] product
product  := power (("*" | "/" | nothing) power)*      -- a space multiplies, as in "7 day"
power    := atom [("**" | "^") exponent]
atom     := NUMBER | NAME | "(" [sign] product ")"
exponent := [sign] NUMBER | "(" [sign] NUMBER ")"      -- a literal, |exponent| <= limit

Checked before pint sees the text: pint evaluates powers of integers exactly, so a short
tower such as "9**9**9" would run for hours. The numeric part is evaluated here in floats
along the way; every intermediate must stay finite, which bounds pint's exact integers too.
"""

from __future__ import annotations

import math
import re

from errbudget.case.limits import MAX_NESTING, MAX_QUANTITY_TEXT, MAX_UNIT_EXPONENT
from errbudget.errors import InputError

_TOKEN = re.compile(
    r"\s*(?:(?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)"
    r"|(?P<name>[A-Za-z_][A-Za-z_0-9]*)|(?P<op>\*\*|[*/^()+-]))"
)
# Words pint's text preprocessor turns into operators ("m squared" -> "m**2"): refused, so
# that what pint evaluates is exactly what was checked here.
_OPERATOR_WORDS = frozenset({"per", "sq", "square", "squared", "cubic", "cubed"})
_ACCEPTED = (
    "accepted: numbers, unit names, *, /, ** (or ^) with a literal exponent, and parentheses, "
    'e.g. "7 day", "0.06 / day", "12 mussel / m**2"'
)


class Grammar:
    """Recursive-descent check of one quantity string; ``canonical`` is what pint gets."""

    def __init__(self, text: str, where: str | None):
        self.text = text
        self.where = where
        self.tokens = self._tokens(text)
        self.position = 0
        self.out: list[str] = []
        self.names: list[str] = []

    def fail(self, message: str) -> InputError:
        return InputError(f'"{self.text}" {message}', where=self.where)

    def _tokens(self, text: str) -> list[tuple[str, str]]:
        if len(text) > MAX_QUANTITY_TEXT:
            raise self.fail(f"is longer than the limit of {MAX_QUANTITY_TEXT} characters")
        tokens, index = [], 0
        while index < len(text):
            if text[index:].strip() == "":
                break
            match = _TOKEN.match(text, index)
            if match is None:
                bad = text[index:].lstrip()[0]
                raise self.fail(f"holds {bad!r}, which a quantity cannot hold; {_ACCEPTED}")
            kind = match.lastgroup
            tokens.append((kind, match.group(kind)))
            index = match.end()
        return tokens

    def peek(self) -> tuple[str, str] | None:
        return self.tokens[self.position] if self.position < len(self.tokens) else None

    def take(self) -> tuple[str, str]:
        token = self.peek()
        if token is None:
            raise self.fail(f"ends too early; {_ACCEPTED}")
        self.position += 1
        return token

    def check(self) -> tuple[str, float, list[str]]:
        """The canonical text, the size of its number (unit names count as 1), the names."""
        if not self.tokens:
            raise self.fail('is empty; expected a quantity such as "7 day"')
        value = self.signed(depth=0)
        if self.peek() is not None:
            raise self.fail(f"has {self.peek()[1]!r} where it should end; {_ACCEPTED}")
        return " ".join(self.out), value, self.names

    def signed(self, depth: int) -> float:
        sign = 1.0
        if self.peek() in (("op", "-"), ("op", "+")):
            sign = -1.0 if self.take()[1] == "-" else 1.0
            self.out.append("-" if sign < 0 else "+")
        return sign * self.product(depth)

    def product(self, depth: int) -> float:
        value = self.power(depth)
        while (token := self.peek()) is not None and token not in (("op", ")"),):
            if token in (("op", "*"), ("op", "/")):
                self.take()
                self.out.append(token[1])
                other = self.power(depth)
                if token[1] == "/" and other == 0:
                    raise self.fail("divides by zero")
                value = value * other if token[1] == "*" else value / other
            elif token[0] in ("number", "name") or token == ("op", "("):
                self.out.append("*")  # a space multiplies ("7 day")
                value *= self.power(depth)
            else:
                raise self.fail(f"has {token[1]!r} where a number or unit should be; {_ACCEPTED}")
            self.finite(value)
        return value

    def power(self, depth: int) -> float:
        base = self.atom(depth)
        if self.peek() not in (("op", "**"), ("op", "^")):
            return base
        self.take()
        self.out.append("**")
        exponent = self.exponent()
        if self.peek() in (("op", "**"), ("op", "^")):
            raise self.fail(
                'raises a power to a power (as in "2**2**2"), which is not accepted; '
                "write the number out or in e-notation (1e6)"
            )
        if base == 0 and exponent < 0:
            raise self.fail("divides by zero")
        try:
            value = math.pow(abs(base), exponent)
        except OverflowError:
            raise self.fail("is not a finite number (it is beyond the range of a float)") from None
        return self.finite(value)

    def exponent(self) -> float:
        parenthesised = self.peek() == ("op", "(")
        if parenthesised:
            self.take()
            self.out.append("(")
        sign = ""
        if self.peek() in (("op", "-"), ("op", "+")):
            sign = self.take()[1]
        kind, literal = self.take()
        if kind != "number" or "e" in literal.lower():
            raise self.fail(
                f"has the exponent {literal!r}; an exponent must be a literal number such as "
                f"2, -1 or 0.5, at most {MAX_UNIT_EXPONENT} in absolute value"
            )
        value = float(sign + literal)
        if abs(value) > MAX_UNIT_EXPONENT:
            raise self.fail(
                f"has the exponent {sign}{literal}, above the limit of {MAX_UNIT_EXPONENT} in "
                "absolute value; write large numbers in e-notation (1e9)"
            )
        self.out.append(f"({sign}{literal})" if sign else literal)
        if parenthesised:
            if self.take() != ("op", ")"):
                raise self.fail(f"has an exponent that is not a literal number; {_ACCEPTED}")
            self.out.append(")")
        return value

    def atom(self, depth: int) -> float:
        kind, token = self.take()
        if kind == "number":
            if re.match(r"0\d", token):
                raise self.fail(f"has the number {token!r} with a leading zero; write it without")
            self.out.append(token)
            return self.finite(float(token))
        if kind == "name":
            if token.startswith("_"):
                raise InputError(
                    f'"{token}" cannot be used as a unit name (it starts with "_")',
                    where=self.where,
                )
            if token.lower() in _OPERATOR_WORDS:
                raise self.fail(
                    f'uses the word "{token}"; write the operator instead ("/" for per, '
                    '"**2" for square)'
                )
            self.out.append(token)
            self.names.append(token)
            return 1.0
        if token == "(":
            if depth >= MAX_NESTING:
                raise self.fail(f"nests parentheses deeper than the limit of {MAX_NESTING}")
            self.out.append("(")
            value = self.signed(depth + 1)
            if self.take() != ("op", ")"):
                raise self.fail(f"has an unclosed parenthesis; {_ACCEPTED}")
            self.out.append(")")
            return value
        raise self.fail(f"has {token!r} where a number or unit should be; {_ACCEPTED}")

    def finite(self, value: float) -> float:
        if not math.isfinite(value):
            raise self.fail("is not a finite number (it is beyond the range of a float)")
        return value
