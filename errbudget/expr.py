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
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pint

from errbudget.errors import InputError, did_you_mean
from errbudget.units import format_unit, ureg

ALLOWED_FUNCTIONS = ("exp", "log", "sqrt", "abs", "min", "max")
VARIABLES = ("N", "t")

MAX_TEXT_LENGTH = 2000  # characters; a rate is one line of algebra, not a program
MAX_DEPTH = 40  # nesting levels; keeps every recursive walk far below Python's limit
MAX_NODES = 500  # expression nodes; bounds the work of one evaluation
MAX_LITERAL = 1e300  # |number| above this is a typo or an overflow waiting to happen
MAX_LITERAL_EXPONENT = 64  # |literal exponent| above this is refused ("huge exponents")
QUOTE_LENGTH = 60  # longest sub-expression quoted verbatim in a message

_ONE_ARGUMENT = ("exp", "log", "sqrt", "abs")
_UFUNC = {"exp": np.exp, "log": np.log, "sqrt": np.sqrt, "abs": np.abs}
_REDUCE = {"min": np.minimum, "max": np.maximum}
_BINARY = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}
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

Value = Any  # a Python float or a numpy array
Evaluator = Callable[[Any, Any, Mapping[str, Any]], Value]
Dual = Callable[[Any, Any, Mapping[str, Any]], tuple[Value, Value | None]]


def _quote(node: ast.AST) -> str:
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


def _free_names(node: ast.AST) -> set[str]:
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
            self.fail(f"{type(node).__name__} ({_quote(node)}) is not allowed {_SUFFIX}")
        else:
            self.check(node.body, depth + 1)

    def constant(self, node: ast.Constant) -> None:
        value = node.value
        if isinstance(value, str | bytes):
            self.fail(f"strings are not allowed {_SUFFIX}")
        if isinstance(value, bool):
            self.fail(f"{value} is not a number; use 1 or 0")
        if isinstance(value, complex):
            self.fail(f"complex numbers ({_quote(node)}) are not allowed {_SUFFIX}")
        if type(value) not in _WEAK:
            self.fail(f"{_quote(node)} is not allowed {_SUFFIX}; only numbers are")
        if abs(value) > MAX_LITERAL or not math.isfinite(float(value)):
            self.fail(
                f"the number {_quote(node)} is too large: numbers must be finite and at "
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
        if type(node.op) not in _BINARY:
            op = _OPERATOR_TEXT.get(type(node.op), type(node.op).__name__)
            hint = " (for a power write **)" if isinstance(node.op, ast.BitXor) else ""
            self.fail(f"the operator {op} is not allowed {_SUFFIX}; use + - * / **{hint}")
        if isinstance(node.op, ast.Pow):
            exponent = _literal(node.right)
            if exponent is not None and abs(exponent) > MAX_LITERAL_EXPONENT:
                self.fail(
                    f'huge exponents are not allowed: "{_quote(node)}" has exponent '
                    f"{_quote(node.right)}; at most {MAX_LITERAL_EXPONENT} in absolute value"
                )
        self.check(node.left, depth + 1)
        self.check(node.right, depth + 1)

    def call(self, node: ast.Call, depth: int) -> None:
        func = node.func
        if not isinstance(func, ast.Name):
            self.check(func, depth + 1)  # reports x.y, x[i], lambda ... in the callee first
            self.fail(
                f'"{_quote(node)}" does not call a function by name; only '
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
            self.fail(f'keyword arguments are not allowed in "{_quote(node)}"')
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                self.fail(f"starred arguments (*x) are not allowed {_SUFFIX}")
        for arg in node.args:  # a refused argument explains more than a wrong count
            self.check(arg, depth + 1)
        count = len(node.args)
        if func.id in _ONE_ARGUMENT and count != 1:
            self.fail(f'{func.id} takes exactly one argument, "{_quote(node)}" gives {count}')
        if func.id in _REDUCE and count < 2:
            self.fail(f'{func.id} needs two or more arguments, "{_quote(node)}" gives {count}')


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


# ------------------------------------------------------------------ closures (value tree)


def _keep_weak(out: Value, *inputs: Value) -> Value:
    """Return a Python float when every input was one, so the dtype of N is kept."""
    return float(out) if all(type(x) in _WEAK for x in inputs) else out


def _value_tree(node: ast.AST) -> Evaluator:
    if isinstance(node, ast.Expression):
        return _value_tree(node.body)
    if isinstance(node, ast.Constant):
        number = float(node.value)
        return lambda t, n, p: number
    if isinstance(node, ast.Name):
        ident = node.id
        if ident == "N":
            return lambda t, n, p: n
        if ident == "t":
            return lambda t, n, p: t
        return lambda t, n, p: p[ident]
    if isinstance(node, ast.UnaryOp):
        inner = _value_tree(node.operand)
        if isinstance(node.op, ast.UAdd):
            return inner
        return lambda t, n, p: -inner(t, n, p)
    if isinstance(node, ast.BinOp):
        ufunc = _BINARY[type(node.op)]
        left, right = _value_tree(node.left), _value_tree(node.right)

        def binary(t, n, p):
            a, b = left(t, n, p), right(t, n, p)
            return _keep_weak(ufunc(a, b), a, b)

        return binary
    assert isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
    args = [_value_tree(arg) for arg in node.args]
    if node.func.id in _UFUNC:
        ufunc, (arg,) = _UFUNC[node.func.id], args

        def function(t, n, p):
            a = arg(t, n, p)
            return _keep_weak(ufunc(a), a)

        return function
    pairwise = _REDUCE[node.func.id]

    def reduce(t, n, p):
        values = [f(t, n, p) for f in args]
        out = values[0]
        for value in values[1:]:
            out = pairwise(out, value)
        return _keep_weak(out, *values)

    return reduce


# ------------------------------------------------------- closures (forward-mode d/dN tree)


def _op(ufunc: Callable[..., Value], *args: Value) -> Value:
    """``ufunc(*args)`` through numpy (no ZeroDivisionError), weak when all args are."""
    return _keep_weak(ufunc(*args), *args)


def _plus(a: Value | None, b: Value | None) -> Value | None:
    """Sum of two derivative terms where None stands for an exact zero."""
    if a is None or b is None:
        return b if a is None else a
    return _op(np.add, a, b)


def _times(a: Value | None, b: Value) -> Value | None:
    return None if a is None else _op(np.multiply, a, b)


def _dual_tree(node: ast.AST) -> Dual:
    """Closure returning (f, df/dN); the derivative is None where it is exactly zero."""
    if isinstance(node, ast.Expression):
        return _dual_tree(node.body)
    if isinstance(node, ast.Name) and node.id == "N":
        return lambda t, n, p: (n, 1.0)
    if isinstance(node, ast.Constant | ast.Name):
        value = _value_tree(node)
        return lambda t, n, p: (value(t, n, p), None)
    if isinstance(node, ast.UnaryOp):
        inner = _dual_tree(node.operand)
        if isinstance(node.op, ast.UAdd):
            return inner

        def negate(t, n, p):
            u, du = inner(t, n, p)
            return -u, (None if du is None else -du)

        return negate
    if isinstance(node, ast.BinOp):
        return _dual_binary(node)
    return _dual_call(node)


def _dual_binary(node: ast.BinOp) -> Dual:
    left, right = _dual_tree(node.left), _dual_tree(node.right)
    op = type(node.op)
    ufunc = _BINARY[op]

    def binary(t, n, p):
        (u, du), (v, dv) = left(t, n, p), right(t, n, p)
        f = _op(ufunc, u, v)
        if op is ast.Add:
            return f, _plus(du, dv)
        if op is ast.Sub:
            return f, _plus(du, None if dv is None else -dv)
        if op is ast.Mult:  # (uv)' = u'v + uv'
            return f, _plus(_times(du, v), _times(dv, u))
        if op is ast.Div:  # (u/v)' = u'/v - (u/v) v'/v
            first = None if du is None else _op(np.divide, du, v)
            second = None if dv is None else _op(np.divide, _op(np.multiply, f, dv), v)
            return f, _plus(first, None if second is None else -second)
        if dv is None:  # (u^c)' = c u^(c-1) u'
            return f, _times(du, _op(np.multiply, v, _op(np.power, u, v - 1)))
        # (u^v)' = u^v (v' ln u + v u'/u)
        inner = _plus(
            _times(dv, _op(np.log, u)),
            None if du is None else _op(np.divide, _op(np.multiply, v, du), u),
        )
        return f, _times(inner, f)

    return binary


_CHAIN = {  # d f(u) / du from u and f = f(u)
    "exp": lambda u, f: f,
    "log": lambda u, f: _op(np.divide, 1.0, u),
    "sqrt": lambda u, f: _op(np.divide, 0.5, f),
    "abs": lambda u, f: _op(np.sign, u),
}


def _dual_call(node: ast.Call) -> Dual:
    name = node.func.id
    args = [_dual_tree(arg) for arg in node.args]
    if name in _UFUNC:
        ufunc, chain, (arg,) = _UFUNC[name], _CHAIN[name], args

        def function(t, n, p):
            u, du = arg(t, n, p)
            f = _op(ufunc, u)
            return f, _times(du, chain(u, f))

        return function
    pairwise = _REDUCE[name]
    keep_first = np.less_equal if pairwise is np.minimum else np.greater_equal

    def reduce(t, n, p):
        pairs = [f(t, n, p) for f in args]
        out, dout = pairs[0]
        for value, dvalue in pairs[1:]:
            if dout is not None or dvalue is not None:
                # the derivative of whichever argument is selected, elementwise
                dout = np.where(
                    keep_first(out, value),
                    0.0 if dout is None else dout,
                    0.0 if dvalue is None else dvalue,
                )
            out = _op(pairwise, out, value)
        return out, dout

    return reduce


# ------------------------------------------------------------------------- public API


def _finish(out: Value, n: np.ndarray, inputs: Mapping[str, Any]) -> np.ndarray:
    """Broadcast ``out`` to the shape of N in a float dtype, never aliasing an input."""
    dtype = np.result_type(out, n)
    if not np.issubdtype(dtype, np.inexact):
        dtype = np.dtype(np.float64)
    shape = np.broadcast_shapes(np.shape(out), n.shape)
    fresh = (
        isinstance(out, np.ndarray)
        and out is not n
        and all(out is not value for value in inputs.values())
    )
    if fresh and out.shape == shape and out.dtype == dtype:
        return out
    return np.array(np.broadcast_to(np.asarray(out, dtype=dtype), shape))


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
        object.__setattr__(self, "_value", _value_tree(self.tree))
        object.__setattr__(self, "_dual", _dual_tree(self.tree))

    def _arguments(self, n, params: Mapping[str, Any]) -> np.ndarray:
        missing = self.names_used - set(params)
        if missing:
            raise ValueError(f"no value given for parameter(s) {', '.join(sorted(missing))}")
        return np.asarray(n)

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
            return _finish(self._value(t, n, params), n, params)

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
            return _finish(0.0 if derivative is None else derivative, n, params)

    def result_unit(self, units: Mapping[str, pint.Unit], where: str | None = None) -> pint.Unit:
        """Unit of the rate from the units of ``N``, ``t`` and the parameters.

        Parameters
        ----------
        units : mapping of str to pint.Unit
            Unit of ``"N"``, ``"t"`` and every name in :attr:`names_used`.
        where : str, optional
            Location for messages; defaults to :attr:`where`.

        Returns
        -------
        pint.Unit
            E.g. crayfish / day for ``r*N*(1 - N/K)``. A dimension clash raises
            :class:`~errbudget.errors.InputError` naming the sub-expression and its units.
        """
        return _UnitWalk(units, where or self.where).unit(self.tree.body)


class _UnitWalk:
    """Symbolic propagation of pint units through a checked tree."""

    def __init__(self, units: Mapping[str, pint.Unit], where: str):
        self.units = units
        self.where = where

    def fail(self, message: str) -> None:
        raise InputError(message, where=self.where)

    def unit(self, node: ast.AST) -> pint.Unit:
        if isinstance(node, ast.Constant):
            return ureg.dimensionless
        if isinstance(node, ast.Name):
            if node.id not in self.units:
                raise ValueError(f'result_unit needs the unit of "{node.id}"')
            return ureg.Unit(self.units[node.id])
        if isinstance(node, ast.UnaryOp):
            return self.unit(node.operand)
        if isinstance(node, ast.BinOp):
            return self.binary(node)
        return self.call(node)

    def same(self, node: ast.AST, first: ast.AST, other: ast.AST, what: str) -> pint.Unit:
        a, b = self.unit(first), self.unit(other)
        if a.dimensionality != b.dimensionality:
            self.fail(
                f'{what} in "{_quote(node)}": "{_quote(first)}" is in {format_unit(a)} but '
                f'"{_quote(other)}" is in {format_unit(b)}'
            )
        return a

    def binary(self, node: ast.BinOp) -> pint.Unit:
        if isinstance(node.op, ast.Add | ast.Sub):
            return self.same(
                node,
                node.left,
                node.right,
                "cannot add or subtract quantities of different dimensions",
            )
        base = self.unit(node.left)
        if isinstance(node.op, ast.Mult):
            return base * self.unit(node.right)
        if isinstance(node.op, ast.Div):
            return base / self.unit(node.right)
        exponent = self.unit(node.right)
        if not exponent.dimensionless:
            self.fail(
                f'the exponent in "{_quote(node)}" must be dimensionless, but '
                f'"{_quote(node.right)}" is in {format_unit(exponent)}'
            )
        if base.dimensionless:
            return ureg.dimensionless
        if _free_names(node.right):
            self.fail(
                f'"{_quote(node.left)}" is in {format_unit(base)}, so the exponent in '
                f'"{_quote(node)}" must be a constant number, not "{_quote(node.right)}"'
                "; make the base dimensionless first, e.g. (N/K)**theta"
            )
        with np.errstate(all="ignore"):
            power = float(_value_tree(node.right)(0.0, 0.0, {}))
        if not math.isfinite(power) or abs(power) > MAX_LITERAL_EXPONENT:
            self.fail(
                f'the exponent of "{_quote(node)}" is {power:g}; a base in '
                f"{format_unit(base)} needs an exponent of at most {MAX_LITERAL_EXPONENT} "
                "in absolute value"
            )
        return base ** (int(power) if power.is_integer() else power)

    def call(self, node: ast.Call) -> pint.Unit:
        name = node.func.id
        if name in _REDUCE:
            for other in node.args[1:]:
                self.same(node, node.args[0], other, f"{name} needs arguments of one dimension")
            return self.unit(node.args[0])
        inner = self.unit(node.args[0])
        if name in ("exp", "log") and not inner.dimensionless:
            self.fail(
                f'{name} needs a dimensionless argument, but "{_quote(node.args[0])}" in '
                f'"{_quote(node)}" is in {format_unit(inner)}; combine it with parameters '
                "to cancel the unit, e.g. N/K or r*t"
            )
        if name in ("exp", "log"):
            return ureg.dimensionless
        return inner**0.5 if name == "sqrt" else inner


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
    uses_time = "t" in _free_names(tree)
    return RateExpression(text, used, uses_time, tree, where)


def names_in(text: str, where: str = "model.rate") -> frozenset[str]:
    """Parameter names a rate expression needs (``N``, ``t`` and functions excluded).

    The text goes through the same checks as :func:`parse_rate`, except that any name is
    accepted as a parameter.
    """
    return _checked(text, None, where)[1]
