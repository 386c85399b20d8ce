"""Safe custom right-hand sides: ``rate = "r*N*(1 - N/K) - H*N/(N + M)"``.

The user's text is parsed with :mod:`ast` and every node is checked against a whitelist
(numbers, the names ``N`` [population unit] and ``t`` [time unit], parameter names, the
operators ``+ - * / **`` and the functions of :data:`ALLOWED_FUNCTIONS`). The checked tree is
then turned once into nested Python closures over numpy ufuncs: one tree evaluates the rate
dN/dt = f(t, N; p), a second one carries forward-mode derivatives and gives the partial
derivative df/dN by the sum, product, quotient and chain rules (Griewank & Walther 2008,
"Evaluating Derivatives", 2nd ed., SIAM, doi:10.1137/1.9780898717761, chapter 3). The user's
text is never given to ``eval``, ``exec`` or ``compile``.
"""

from __future__ import annotations

import ast
import math
import warnings
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from errbudget.errors import InputError, did_you_mean
from errbudget.laws.evaluate import BINARY, REDUCE, Dual, Evaluator, dual_tree, finish, value_tree

ALLOWED_FUNCTIONS = ("exp", "log", "sqrt", "abs", "min", "max")
VARIABLES = ("N", "t")

MAX_TEXT_LENGTH = 2000  # characters; a rate is one line of algebra, not a program
MAX_DEPTH = 40  # nesting levels; keeps every recursive walk far below Python's limit
MAX_NODES = 500  # expression nodes; bounds the work of one evaluation
MAX_LITERAL = 1e300  # |number| above this is a typo or an overflow waiting to happen
MAX_LITERAL_EXPONENT = 64  # |literal exponent| above this is refused ("huge exponents")
QUOTE_LENGTH = 60  # longest sub-expression quoted verbatim in a message

_ONE_ARGUMENT = ("exp", "log", "sqrt", "abs")
_OPERATOR_TEXT = {
    ast.FloorDiv: "//",
    ast.Mod: "%",
    ast.MatMult: "@",
    ast.LShift: "<<",
    ast.RShift: ">>",
    ast.BitOr: "|",
    ast.BitXor: "^",
    ast.BitAnd: "&",
    ast.Invert: "~",
}
_FUNCTION_LIST = ", ".join(ALLOWED_FUNCTIONS)
_SUFFIX = "in a rate expression"
# Node types refused outright, with the message that explains each.
_REFUSED = (
    (ast.Attribute, "attribute access (x.y) is not allowed"),
    (ast.Subscript, "subscripts (x[i]) are not allowed"),
    (ast.Lambda, "lambda functions are not allowed"),
    ((ast.ListComp, ast.SetComp, ast.DictComp, ast.GeneratorExp), "comprehensions are not allowed"),
    (ast.Compare, "comparisons (<, ==, ...) are not allowed"),
    ((ast.BoolOp, ast.Not), "boolean operators (and, or, not) are not allowed"),
    (ast.IfExp, "conditional expressions (a if c else b) are not allowed"),
    ((ast.JoinedStr, ast.FormattedValue), "f-strings are not allowed"),
    (ast.NamedExpr, "assignment expressions (:=) are not allowed"),
    ((ast.List, ast.Tuple, ast.Set, ast.Dict), "lists, tuples, sets and dicts are not allowed"),
    (ast.Starred, "starred arguments (*x) are not allowed"),
)
_HINT = {ast.Compare: "; use min or max", ast.IfExp: "; use min, max or abs"}
_WEAK = (float, int)  # Python scalars: numpy 2 lets the array operand choose the dtype


def quote(node: ast.AST) -> str:
    text = ast.unparse(node)
    return text if len(text) <= QUOTE_LENGTH else text[: QUOTE_LENGTH - 3] + "..."


# ----------------------------------------------------------------------------- checking


def _syntax_error(err: SyntaxError, text: str, stripped: str) -> str:
    """Describe ``err`` with a line/column in the user's (unstripped) text."""
    if err.offset is None:  # e.g. null bytes: no position to report
        return f"not a valid expression: {err.msg}"
    prefix = text[: len(text) - len(text.lstrip())]
    line = (err.lineno or 1) + prefix.count("\n")
    if err.offset < 1:  # the parser ran out of text
        place = "the end of the text"
    else:
        column = err.offset
        if (err.lineno or 1) == 1:  # put back the leading whitespace stripped before parsing
            column += len(prefix) - (prefix.rfind("\n") + 1)
        place = f"column {column}"
        if "\n" in stripped.rstrip():
            place = f"line {line}, {place}"
    return f"not a valid expression: {err.msg} at {place}"


def _parse(text: str, where: str) -> ast.Expression:
    """Pre-checks on the raw text, then :func:`ast.parse` with its failures made user errors."""
    if not isinstance(text, str):
        raise InputError(
            f"expected the rate as a text string, got {type(text).__name__}", where=where
        )
    if not text.strip():
        raise InputError('the rate expression is empty; write e.g. "r*N*(1 - N/K)"', where=where)
    if len(text) > MAX_TEXT_LENGTH:
        raise InputError(
            f"the rate expression has {len(text)} characters; at most "
            f"{MAX_TEXT_LENGTH} are accepted",
            where=where,
        )
    depth = deepest = 0
    for char in text:  # bracket depth first: the parser itself may recurse on deep input
        depth += (char in "([{") - (char in ")]}")
        deepest = max(deepest, depth)
    if deepest > MAX_DEPTH:
        raise InputError(
            f"the rate expression nests brackets {deepest} levels deep; at most "
            f"{MAX_DEPTH} are accepted",
            where=where,
        )
    stripped = text.lstrip()  # eval mode refuses leading indentation
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # e.g. SyntaxWarning for "1(2)"
            return ast.parse(stripped, mode="eval")
    except SyntaxError as err:
        raise InputError(_syntax_error(err, text, stripped), where=where) from None
    except (RecursionError, MemoryError):
        raise InputError(
            "the rate expression is too complex to read; simplify it", where=where
        ) from None
    except ValueError:  # null bytes, lone surrogates
        raise InputError(
            "the rate expression contains characters that cannot be read "
            "(control characters or invalid Unicode)",
            where=where,
        ) from None


def _literal(node: ast.AST) -> float | int | None:
    """Value of a number literal with optional unary signs, else None (ints stay exact)."""
    negative = False
    while isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd):
        negative ^= isinstance(node.op, ast.USub)
        node = node.operand
    if isinstance(node, ast.Constant) and type(node.value) in _WEAK:
        return -node.value if negative else node.value
    return None


def free_names(node: ast.AST) -> set[str]:
    """Names of values in a checked tree (function names excluded)."""
    return {
        sub.id
        for sub in ast.walk(node)
        if isinstance(sub, ast.Name) and sub.id not in ALLOWED_FUNCTIONS
    }


class _Checker:
    """One pass over the tree: whitelist, depth, names used."""

    def __init__(self, allowed: frozenset[str] | None, where: str):
        self.allowed = allowed
        self.where = where
        self.used: set[str] = set()

    def fail(self, message: str) -> None:
        raise InputError(message, where=self.where)

    def check(self, node: ast.AST, depth: int) -> None:
        if depth > MAX_DEPTH:
            self.fail(
                f"the rate expression is nested more than {MAX_DEPTH} levels deep "
                "(brackets, calls and chained operators all count); simplify it"
            )
        for kinds, message in _REFUSED:
            if isinstance(node, kinds) or isinstance(getattr(node, "op", None), kinds):
                self.fail(f"{message} {_SUFFIX}{_HINT.get(type(node), '')}")
        if isinstance(node, ast.Constant):
            self.constant(node)
        elif isinstance(node, ast.Name):
            self.name(node)
        elif isinstance(node, ast.UnaryOp):
            if not isinstance(node.op, ast.USub | ast.UAdd):
                op = _OPERATOR_TEXT.get(type(node.op), type(node.op).__name__)
                self.fail(f"the operator {op} is not allowed {_SUFFIX}; use + - * / **")
            self.check(node.operand, depth + 1)
        elif isinstance(node, ast.BinOp):
            self.binary(node, depth)
        elif isinstance(node, ast.Call):
            self.call(node, depth)
        elif not isinstance(node, ast.Expression):
            self.fail(f"{type(node).__name__} ({quote(node)}) is not allowed {_SUFFIX}")
        else:
            self.check(node.body, depth + 1)

    def constant(self, node: ast.Constant) -> None:
        value = node.value
        if isinstance(value, str | bytes):
            self.fail(f"strings are not allowed {_SUFFIX}")
        if isinstance(value, bool):
            self.fail(f"{value} is not a number; use 1 or 0")
        if isinstance(value, complex):
            self.fail(f"complex numbers ({quote(node)}) are not allowed {_SUFFIX}")
        if type(value) not in _WEAK:
            self.fail(f"{quote(node)} is not allowed {_SUFFIX}; only numbers are")
        if abs(value) > MAX_LITERAL or not math.isfinite(float(value)):
            self.fail(
                f"the number {quote(node)} is too large: numbers must be finite and at "
                f"most {MAX_LITERAL:g} in absolute value"
            )

    def name(self, node: ast.Name) -> None:
        ident = node.id
        if not isinstance(node.ctx, ast.Load):
            self.fail(f'"{ident}" cannot be assigned {_SUFFIX}')
        if "__" in ident:
            self.fail(f'names containing a double underscore ("{ident}") are not allowed {_SUFFIX}')
        if ident in VARIABLES:
            return
        if ident in ALLOWED_FUNCTIONS:
            self.fail(f'"{ident}" is a function: call it as {ident}(...)')
        if self.allowed is not None and ident not in self.allowed:
            known = sorted(self.allowed)
            hint = did_you_mean(ident, [*VARIABLES, *known])
            listed = ", ".join([*VARIABLES, *known])
            self.fail(
                f'unknown name "{ident}"{hint}; the rate may use {listed} and the '
                f"functions {_FUNCTION_LIST}"
            )
        self.used.add(ident)

    def binary(self, node: ast.BinOp, depth: int) -> None:
        if type(node.op) not in BINARY:
            op = _OPERATOR_TEXT.get(type(node.op), type(node.op).__name__)
            hint = " (for a power write **)" if isinstance(node.op, ast.BitXor) else ""
            self.fail(f"the operator {op} is not allowed {_SUFFIX}; use + - * / **{hint}")
        if isinstance(node.op, ast.Pow):
            exponent = _literal(node.right)
            if exponent is not None and abs(exponent) > MAX_LITERAL_EXPONENT:
                self.fail(
                    f'huge exponents are not allowed: "{quote(node)}" has exponent '
                    f"{quote(node.right)}; at most {MAX_LITERAL_EXPONENT} in absolute value"
                )
        self.check(node.left, depth + 1)
        self.check(node.right, depth + 1)

    def call(self, node: ast.Call, depth: int) -> None:
        func = node.func
        if not isinstance(func, ast.Name):
            self.check(func, depth + 1)  # reports x.y, x[i], lambda ... in the callee first
            self.fail(
                f'"{quote(node)}" does not call a function by name; only '
                f"{_FUNCTION_LIST} can be called"
            )
        if "__" in func.id:
            self.fail(
                f'names containing a double underscore ("{func.id}") are not allowed {_SUFFIX}'
            )
        if func.id not in ALLOWED_FUNCTIONS:
            hint = did_you_mean(func.id, ALLOWED_FUNCTIONS)
            self.fail(
                f'the function "{func.id}" is not available{hint}; the allowed '
                f"functions are {_FUNCTION_LIST}"
            )
        if node.keywords:
            self.fail(f'keyword arguments are not allowed in "{quote(node)}"')
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                self.fail(f"starred arguments (*x) are not allowed {_SUFFIX}")
        for arg in node.args:  # a refused argument explains more than a wrong count
            self.check(arg, depth + 1)
        count = len(node.args)
        if func.id in _ONE_ARGUMENT and count != 1:
            self.fail(f'{func.id} takes exactly one argument, "{quote(node)}" gives {count}')
        if func.id in REDUCE and count < 2:
            self.fail(f'{func.id} needs two or more arguments, "{quote(node)}" gives {count}')


def _checked(text: str, allowed: frozenset[str] | None, where: str):
    tree = _parse(text, where)
    nodes = sum(isinstance(node, ast.expr) for node in ast.walk(tree))
    if nodes > MAX_NODES:
        raise InputError(
            f"the rate expression has {nodes} terms and operations; at most "
            f"{MAX_NODES} are accepted",
            where=where,
        )
    checker = _Checker(allowed, where)
    checker.check(tree, 0)
    return tree, frozenset(checker.used)


@dataclass(frozen=True)
class RateExpression:
    """A checked custom rate dN/dt = f(t, N; parameters) [population unit / time unit].

    Build it with :func:`parse_rate`; the evaluators assume a tree that passed its checks.

    Attributes
    ----------
    text : str
        The expression as the user wrote it.
    names_used : frozenset of str
        Parameter names the expression uses (``N`` and ``t`` excluded).
    uses_time : bool
        Whether ``t`` appears, i.e. the model is non-autonomous.
    tree : ast.Expression
        The checked syntax tree the evaluators were built from.
    where : str
        Where the text came from, for messages (e.g. ``"model.rate"``).
    """

    text: str
    names_used: frozenset[str]
    uses_time: bool
    tree: ast.Expression = field(repr=False, compare=False)
    where: str = "model.rate"
    _value: Evaluator = field(init=False, repr=False, compare=False)
    _dual: Dual = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_value", value_tree(self.tree))
        object.__setattr__(self, "_dual", dual_tree(self.tree))

    def _arguments(self, n, params: Mapping[str, Any]) -> np.ndarray:
        if not self.names_used <= params.keys():
            missing = self.names_used - set(params)
            raise ValueError(f"no value given for parameter(s) {', '.join(sorted(missing))}")
        return np.asarray(n)

    def quick(self, t, N, params: Mapping[str, Any]):
        """:meth:`evaluate` without its checks and its error state, for the steppers that
        set their own (numpy's state all="ignore") and pass every parameter."""
        n = np.asarray(N)
        return finish(self._value(t, n, params), n, params)

    def evaluate(
        self, t: float, N: np.ndarray, params: Mapping[str, np.ndarray | float]
    ) -> np.ndarray:
        """The rate f(t, N; p) [population unit / time unit], one value per member.

        Parameters
        ----------
        t : float
            Time [time unit]; a Python float or a scalar of N's dtype, so that it does not
            promote the result.
        N : numpy.ndarray, shape (S,)
            Population of each ensemble member [population unit]; its dtype is kept when
            the parameters are Python floats or arrays of the same dtype.
        params : mapping of str to float or numpy.ndarray of shape (S,)
            Parameter values in the case's coherent internal units.

        Returns
        -------
        numpy.ndarray, shape (S,)
            The rate; division by zero or log of a negative number give inf/nan silently,
            for the caller to flag as divergence.
        """
        n = self._arguments(N, params)
        with np.errstate(all="ignore"):
            return finish(self._value(t, n, params), n, params)

    def d_dN(self, t: float, N: np.ndarray, params: Mapping[str, np.ndarray | float]) -> np.ndarray:
        """Partial derivative df/dN [1 / time unit] at the same arguments as :meth:`evaluate`.

        Computed by forward-mode differentiation of the checked tree (Griewank & Walther
        2008): d|u| = sign(u) du; d min(a, b) is the derivative of the smaller argument
        (the first one on ties), likewise for max; d(u**v) = v u**(v-1) du when v does not
        depend on N, else u**v (dv ln u + v du / u).
        """
        n = self._arguments(N, params)
        with np.errstate(all="ignore"):
            derivative = self._dual(t, n, params)[1]
            return finish(0.0 if derivative is None else derivative, n, params)


def parse_rate(text: str, names: Collection[str], where: str = "model.rate") -> RateExpression:
    """Check a custom rate expression and build its evaluators.

    Parameters
    ----------
    text : str
        Arithmetic in ``N`` [population unit], ``t`` [time unit] and the parameter names,
        with ``+ - * / **``, unary minus, numbers and the functions of
        :data:`ALLOWED_FUNCTIONS`; at most 2000 characters.
    names : collection of str
        Parameter names the expression may use besides ``N`` and ``t``.
    where : str
        Location for messages, e.g. ``"model.rate"``.

    Returns
    -------
    RateExpression

    Raises
    ------
    InputError
        For anything outside the whitelist, unknown names (with a suggestion), syntax
        errors (with the column), huge literals or exponents, and oversized input.
    """
    tree, used = _checked(text, frozenset(names), where)
    uses_time = "t" in free_names(tree)
    return RateExpression(text, used, uses_time, tree, where)


def names_in(text: str, where: str = "model.rate") -> frozenset[str]:
    """Parameter names a rate expression needs (``N``, ``t`` and functions excluded).

    The text goes through the same checks as :func:`parse_rate`, except that any name is
    accepted as a parameter.
    """
    return _checked(text, None, where)[1]
