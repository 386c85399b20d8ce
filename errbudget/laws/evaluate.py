"""Evaluators of a checked rate tree: numpy closures for f(t, N; p) and forward-mode df/dN.

The tree (from :mod:`errbudget.laws.expression`) is turned once into nested closures over
numpy ufuncs: one evaluates the rate, a second carries forward-mode derivatives and gives
df/dN by the sum, product, quotient and chain rules (Griewank & Walther 2008, "Evaluating
Derivatives", 2nd ed., SIAM, doi:10.1137/1.9780898717761, chapter 3).
"""

from __future__ import annotations

import ast
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

UFUNC = {"exp": np.exp, "log": np.log, "sqrt": np.sqrt, "abs": np.abs}
REDUCE = {"min": np.minimum, "max": np.maximum}
BINARY = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}
_WEAK = (float, int)  # Python scalars: numpy 2 lets the array operand choose the dtype

Value = Any  # a Python float or a numpy array
Evaluator = Callable[[Any, Any, Mapping[str, Any]], Value]
Dual = Callable[[Any, Any, Mapping[str, Any]], tuple[Value, Value | None]]


def _keep_weak(out: Value, *inputs: Value) -> Value:
    """Return a Python float when every input was one, so the dtype of N is kept."""
    return float(out) if all(type(x) in _WEAK for x in inputs) else out


def value_tree(node: ast.AST) -> Evaluator:
    if isinstance(node, ast.Expression):
        return value_tree(node.body)
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
        inner = value_tree(node.operand)
        if isinstance(node.op, ast.UAdd):
            return inner
        return lambda t, n, p: -inner(t, n, p)
    if isinstance(node, ast.BinOp):
        ufunc = BINARY[type(node.op)]
        left, right = value_tree(node.left), value_tree(node.right)

        def binary(t, n, p):
            a, b = left(t, n, p), right(t, n, p)
            out = ufunc(a, b)
            return float(out) if type(a) in _WEAK and type(b) in _WEAK else out

        return binary
    assert isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
    args = [value_tree(arg) for arg in node.args]
    if node.func.id in UFUNC:
        ufunc, (arg,) = UFUNC[node.func.id], args

        def function(t, n, p):
            a = arg(t, n, p)
            return _keep_weak(ufunc(a), a)

        return function
    pairwise = REDUCE[node.func.id]

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


def dual_tree(node: ast.AST) -> Dual:
    """Closure returning (f, df/dN); the derivative is None where it is exactly zero."""
    if isinstance(node, ast.Expression):
        return dual_tree(node.body)
    if isinstance(node, ast.Name) and node.id == "N":
        return lambda t, n, p: (n, 1.0)
    if isinstance(node, ast.Constant | ast.Name):
        value = value_tree(node)
        return lambda t, n, p: (value(t, n, p), None)
    if isinstance(node, ast.UnaryOp):
        inner = dual_tree(node.operand)
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
    left, right = dual_tree(node.left), dual_tree(node.right)
    op = type(node.op)
    ufunc = BINARY[op]

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
    args = [dual_tree(arg) for arg in node.args]
    if name in UFUNC:
        ufunc, chain, (arg,) = UFUNC[name], _CHAIN[name], args

        def function(t, n, p):
            u, du = arg(t, n, p)
            f = _op(ufunc, u)
            return f, _times(du, chain(u, f))

        return function
    pairwise = REDUCE[name]
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


def finish(out: Value, n: np.ndarray, inputs: Mapping[str, Any]) -> np.ndarray:
    """Broadcast ``out`` to the shape of N in a float dtype, never aliasing an input."""
    kind = getattr(out, "dtype", None)
    usual = kind is not None and kind == n.dtype and kind.kind == "f" and np.shape(out) == n.shape
    # The usual case, at once: a fresh result of N's shape and type (a numpy scalar for a
    # 0-d N), not one of the inputs themselves.
    if usual and (
        not isinstance(out, np.ndarray)
        or (out is not n and all(out is not value for value in inputs.values()))
    ):
        return out
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
