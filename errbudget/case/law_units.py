"""Units of a custom rate: symbolic propagation of pint units through its checked tree."""

from __future__ import annotations

import ast
import math
from collections.abc import Mapping

import numpy as np
import pint

from errbudget.case.units import format_unit, ureg
from errbudget.errors import InputError
from errbudget.laws.evaluate import REDUCE, value_tree
from errbudget.laws.expression import MAX_LITERAL_EXPONENT, RateExpression, free_names, quote


def result_unit(
    expression: RateExpression, units: Mapping[str, pint.Unit], where: str | None = None
) -> pint.Unit:
    """Unit of the rate from the units of ``N``, ``t`` and the parameters.

    Parameters
    ----------
    expression : RateExpression
        A checked rate (:func:`errbudget.laws.expression.parse_rate`).
    units : mapping of str to pint.Unit
        Unit of ``"N"``, ``"t"`` and every name in ``expression.names_used``.
    where : str, optional
        Location for messages; defaults to ``expression.where``.

    Returns
    -------
    pint.Unit
        E.g. crayfish / day for ``r*N*(1 - N/K)``. A dimension clash raises
        :class:`~errbudget.errors.InputError` naming the sub-expression and its units.
    """
    return _UnitWalk(units, where or expression.where).unit(expression.tree.body)


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
                f'{what} in "{quote(node)}": "{quote(first)}" is in {format_unit(a)} but '
                f'"{quote(other)}" is in {format_unit(b)}'
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
                f'the exponent in "{quote(node)}" must be dimensionless, but '
                f'"{quote(node.right)}" is in {format_unit(exponent)}'
            )
        if base.dimensionless:
            return ureg.dimensionless
        if free_names(node.right):
            self.fail(
                f'"{quote(node.left)}" is in {format_unit(base)}, so the exponent in '
                f'"{quote(node)}" must be a constant number, not "{quote(node.right)}"'
                "; make the base dimensionless first, e.g. (N/K)**theta"
            )
        with np.errstate(all="ignore"):
            power = float(value_tree(node.right)(0.0, 0.0, {}))
        if not math.isfinite(power) or abs(power) > MAX_LITERAL_EXPONENT:
            self.fail(
                f'the exponent of "{quote(node)}" is {power:g}; a base in '
                f"{format_unit(base)} needs an exponent of at most {MAX_LITERAL_EXPONENT} "
                "in absolute value"
            )
        return base ** (int(power) if power.is_integer() else power)

    def call(self, node: ast.Call) -> pint.Unit:
        name = node.func.id
        if name in REDUCE:
            for other in node.args[1:]:
                self.same(node, node.args[0], other, f"{name} needs arguments of one dimension")
            return self.unit(node.args[0])
        inner = self.unit(node.args[0])
        if name in ("exp", "log") and not inner.dimensionless:
            self.fail(
                f'{name} needs a dimensionless argument, but "{quote(node.args[0])}" in '
                f'"{quote(node)}" is in {format_unit(inner)}; combine it with parameters '
                "to cancel the unit, e.g. N/K or r*t"
            )
        if name in ("exp", "log"):
            return ureg.dimensionless
        return inner**0.5 if name == "sqrt" else inner
