"""The ``[correlations]`` table: normal-score correlations between uncertain inputs.

``r.K = -0.7`` (TOML dotted keys, read as ``{"r": {"K": -0.7}}``) sets the correlation of the
normal scores of r and K: the inputs keep the distributions stated in ``[parameters]`` and
are joined by a Gaussian copula (draw z ~ N(0, C), map each z_i through the standard normal
CDF and then the input's inverse CDF; Nelsen 2006, An Introduction to Copulas, 2nd ed.,
Springer, sec. 2.9). The rank correlation of the inputs is then Spearman's
rho_S = (6 / pi) asin(rho / 2) (Kruskal 1958, J. Am. Stat. Assoc. 53:814).

Every error names the key (``correlations.r.K``) and what would be accepted.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from errbudget.errors import did_you_mean

Pair = tuple[str, str, float]


def read_correlations(reader, table, parameters: Mapping, fitted: tuple[str, ...]) -> tuple:
    """Validated pairs (a, b, rho) in the order given; () when the table is absent.

    Checks: names known, uncertain (a distribution in [parameters]) and not fitted from
    counts; no input paired with itself; each pair once; -1 < rho < 1; the matrix of each
    group of linked inputs (pairs not given are 0) positive definite.
    """
    if table is None:
        return ()
    if not isinstance(table, dict):
        raise reader.fail("expected a table of pairs such as r.K = -0.7", "correlations")
    pairs: list[Pair] = []
    seen: dict[frozenset, str] = {}
    for first, row in table.items():
        _check_name(reader, first, parameters, fitted, f"correlations.{first}")
        if not isinstance(row, dict):
            raise reader.fail(
                f"write a pair as {first}.OTHER = value, e.g. {first}.K = -0.7 (a correlation "
                "between -1 and 1)",
                f"correlations.{first}",
            )
        for second, value in row.items():
            where = f"correlations.{first}.{second}"
            _check_name(reader, second, parameters, fitted, where)
            if second == first:
                raise reader.fail(
                    f"{first} is paired with itself; accepted: a pair of two different inputs",
                    where,
                )
            key = frozenset((first, second))
            if key in seen:
                raise reader.fail(
                    f"the pair {first}, {second} is already given as {seen[key]}; accepted: "
                    "each pair once",
                    where,
                )
            seen[key] = where
            pairs.append((first, second, _check_value(reader, value, where)))
    _check_definite(reader, pairs, list(seen.values()))
    return tuple(pairs)


def _check_name(reader, name, parameters, fitted, where) -> None:
    if name not in parameters:
        raise reader.fail(
            f"{name!r} is not a parameter{did_you_mean(name, parameters)}; accepted: the "
            "uncertain parameters " + ", ".join(_uncertain(parameters, fitted)),
            where,
        )
    if name in fitted:
        raise reader.fail(
            f"{name} is fitted from the counts, and its correlation with the other fitted "
            "parameters comes from the fit; accepted: inputs that are not fitted",
            where,
        )
    if parameters[name].dist is None:
        raise reader.fail(
            f"{name} is fixed; accepted: uncertain parameters (with a distribution in "
            "[parameters]): " + ", ".join(_uncertain(parameters, fitted)),
            where,
        )


def _uncertain(parameters, fitted) -> list[str]:
    return [n for n, p in parameters.items() if p.dist is not None and n not in fitted] or [
        "(none)"
    ]


def _check_value(reader, value, where) -> float:
    is_number = isinstance(value, int | float) and not isinstance(value, bool)
    if not is_number or not math.isfinite(value) or not -1.0 < value < 1.0:
        raise reader.fail(
            f"{value!r} is not a correlation; accepted: a number strictly between -1 and 1",
            where,
        )
    return float(value)


def correlation_matrix(names: tuple[str, ...], pairs) -> np.ndarray:
    """The correlation matrix of ``names`` (unit diagonal) from pairs (a, b, rho)."""
    index = {name: i for i, name in enumerate(names)}
    matrix = np.eye(len(names))
    for first, second, rho in pairs:
        if first in index and second in index:
            matrix[index[first], index[second]] = matrix[index[second], index[first]] = rho
    return matrix


def _check_definite(reader, pairs, keys) -> None:
    """Each group of linked inputs must have a positive definite correlation matrix.

    Pairs not given are 0. The error names the last pair given in the failing group.
    """
    for names in components(pairs):
        matrix = correlation_matrix(names, pairs)
        smallest = float(np.linalg.eigvalsh(matrix)[0])
        if smallest > 0:
            continue
        last = max(i for i, (a, b, _) in enumerate(pairs) if a in names and b in names)
        raise reader.fail(
            f"the correlations of {', '.join(names)} cannot hold together (with unlisted "
            f"pairs at 0 the matrix is not positive definite: smallest eigenvalue "
            f"{smallest:.3g}); accepted: values that form a valid correlation matrix, e.g. "
            "weaker correlations or the missing pairs given",
            keys[last],
        )


def components(pairs) -> list[tuple[str, ...]]:
    """Groups of inputs linked by correlations (connected components), in order of mention."""
    order = list(dict.fromkeys(n for a, b, _ in pairs for n in (a, b)))
    parent = {name: name for name in order}

    def root(name: str) -> str:
        while parent[name] != name:
            name = parent[name]
        return name

    for first, second, _ in pairs:
        parent[root(second)] = root(first)
    groups: dict[str, list[str]] = {}
    for name in order:
        groups.setdefault(root(name), []).append(name)
    return [tuple(g) for g in groups.values()]


def describe_correlations(pairs) -> list[str]:
    """Lines for ``errbudget check``."""
    if not pairs:
        return []
    lines = ["  correlations (of normal scores, Gaussian copula):"]
    for first, second, rho in pairs:
        spearman = 6.0 / math.pi * math.asin(rho / 2.0)
        lines.append(f"    {first}, {second}: {rho:g} (rank correlation {spearman:.3g})")
    return lines
