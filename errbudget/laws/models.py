"""Growth laws dN/dt = f(t, N; theta), vectorised over an ensemble of parameter sets.

Each built-in law carries its parameter names with the dimension each must have, its
right-hand side, the derivative of the right-hand side with respect to N (for linear
stability), and its equilibria with their stability where they are known in closed form.
Parameters arrive as plain floats in the case's population unit P and time unit T.

References
----------
Verhulst (1838), Notice sur la loi que la population suit dans son accroissement,
Corresp. Math. Phys. 10:113 (logistic). Gompertz (1825), Phil. Trans. R. Soc. 115:513,
doi:10.1098/rstl.1825.0026. Gilpin & Ayala (1973), PNAS 70:3590,
doi:10.1073/pnas.70.12.3590 (theta-logistic). Schaefer (1954), Bull. Inter-Am. Trop. Tuna
Comm. 1:27 (logistic with proportional harvest). Courchamp, Berec & Gascoigne (2008),
Allee Effects in Ecology and Conservation, Oxford UP (strong Allee effect).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from errbudget.errors import InputError, did_you_mean

Array = np.ndarray
Params = Mapping[str, Array]

# Dimension kinds of parameters, in terms of population P and time T.
RATE = "1/T"  # a per-capita rate, e.g. 1/day
POPULATION = "P"  # a population level, e.g. crayfish
FLUX = "P/T"  # individuals per unit time, e.g. crayfish/day
PURE = "1"  # dimensionless


@dataclass(frozen=True)
class Equilibrium:
    """A steady state N* of the law for each member of the ensemble.

    Attributes
    ----------
    name : str
        Short label ("K", "extinction", "Allee threshold").
    value : ndarray, shape (S,)
        N* [population]; NaN where it does not exist for that member.
    """

    name: str
    value: Array


@dataclass(frozen=True)
class Term:
    """One parameter of a built-in law: its dimension kind, what it means, its sign rule."""

    kind: str
    meaning: str
    sign: str | None = None  # "positive", "non-negative" or None (any sign)


# The initial population, a parameter of every law.
INITIAL = Term(POPULATION, "an initial population", "positive")


@dataclass(frozen=True)
class GrowthModel:
    """A growth law.

    Attributes
    ----------
    form : str
        Case-file name of the law.
    equation : str
        The law written out, for reports.
    kinds : dict of str to str
        Parameter name (N0 excluded) -> dimension kind (RATE, POPULATION, FLUX, PURE).
    rate : callable
        f(t, N, params) [P / T].
    d_dn : callable
        df/dN (t, N, params) [1 / T].
    equilibria : callable
        params -> list of Equilibrium.
    exact : callable or None
        Closed-form solution N(t; N0, params), where one is known.
    coherent : dict or None
        Custom laws only: the checked expression and its factors to coherent root units
        (keys expression, factors, t_factor, n_factor, out_factor), for the compiled engine.
    rate_text : str or None
        Built-in laws: the right-hand side in the custom-expression language, from which
        ``rate``, ``d_dn`` and the compiled kernels are all made.
    terms : dict of str to Term
        Built-in laws: every parameter's kind, meaning and sign rule (N0 included).
    """

    form: str
    equation: str
    kinds: dict[str, str]
    rate: Callable[[float, Array, Params], Array]
    d_dn: Callable[[float, Array, Params], Array]
    equilibria: Callable[[Params], list[Equilibrium]] = field(default=lambda p: [])
    exact: Callable[[Array, Array, Params], Array] | None = None
    coherent: dict | None = None
    rate_text: str | None = None
    terms: dict[str, Term] = field(default_factory=dict)

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(self.kinds)


def law(
    form: str,
    equation: str,
    rate_text: str,
    terms: dict[str, Term],
    equilibria: Callable[[Params], list[Equilibrium]],
    exact: Callable | None = None,
) -> GrowthModel:
    """A built-in law from its one declaration: the rate, written once in the expression
    language (its numpy evaluation and its derivative d/dN come from that text, as do the
    compiled kernels), the parameters with their kinds and sign rules, the equilibria and,
    where one is known, the exact solution."""
    from errbudget.laws.expression import parse_rate

    expression = parse_rate(rate_text, tuple(terms))
    return GrowthModel(
        form,
        equation,
        {name: term.kind for name, term in terms.items()},
        expression.quick,  # the steppers set numpy's error state themselves
        expression.d_dN,
        equilibria,
        exact,
        rate_text=rate_text,
        terms={"N0": INITIAL, **terms},
    )


def _ones(p: Params) -> Array:
    return np.ones(np.broadcast(*p.values()).shape) if p else np.ones(())


GROWTH = Term(RATE, "a growth rate")
CAPACITY = Term(POPULATION, "a carrying capacity", "positive")


def _exponential() -> GrowthModel:
    return law(
        "exponential",
        "dN/dt = r N",
        "r * N",
        {"r": GROWTH},
        lambda p: [Equilibrium("extinction", 0.0 * _ones(p))],
        lambda t, n0, p: n0 * np.exp(p["r"] * t),
    )


def _logistic_exact(t, n0, p):
    return p["K"] / (1 + (p["K"] / n0 - 1) * np.exp(-p["r"] * t))


def _logistic() -> GrowthModel:
    return law(
        "logistic",
        "dN/dt = r N (1 - N/K)",
        "r * N * (1 - N / K)",
        {"r": GROWTH, "K": CAPACITY},
        lambda p: [Equilibrium("extinction", 0.0 * p["K"]), Equilibrium("K", p["K"] * _ones(p))],
        _logistic_exact,
    )


def _gompertz() -> GrowthModel:
    return law(
        "gompertz",
        "dN/dt = r N ln(K/N)",
        "r * N * log(K / N)",
        {"r": GROWTH, "K": CAPACITY},
        lambda p: [Equilibrium("K", p["K"] * _ones(p))],
        lambda t, n0, p: p["K"] * np.exp(np.log(n0 / p["K"]) * np.exp(-p["r"] * t)),
    )


def _theta_logistic() -> GrowthModel:
    return law(
        "theta-logistic",
        "dN/dt = r N (1 - (N/K)^theta)",
        "r * N * (1 - (N / K) ** theta)",
        {"r": GROWTH, "K": CAPACITY, "theta": Term(PURE, "a shape exponent", "positive")},
        lambda p: [Equilibrium("extinction", 0.0 * p["K"]), Equilibrium("K", p["K"] * _ones(p))],
    )


def _harvest_equilibria(p: Params) -> list[Equilibrium]:
    carrying = p["K"] * (1 - p["E"] / p["r"])
    return [
        Equilibrium("extinction", 0.0 * carrying),
        Equilibrium("harvested level K(1 - E/r)", np.where(carrying > 0, carrying, np.nan)),
    ]


def _logistic_harvest() -> GrowthModel:
    return law(
        "logistic-harvest",
        "dN/dt = r N (1 - N/K) - E N",
        "r * N * (1 - N / K) - E * N",
        {"r": GROWTH, "K": CAPACITY, "E": Term(RATE, "a harvest rate", "non-negative")},
        _harvest_equilibria,
        lambda t, n0, p: _logistic_exact(
            t, n0, {"r": p["r"] - p["E"], "K": p["K"] * (1 - p["E"] / p["r"])}
        ),
    )


def _removal_equilibria(p: Params) -> list[Equilibrium]:
    # r N (1 - N/K) = H  =>  N = K/2 (1 +/- sqrt(1 - 4H/(rK))); none when H > rK/4.
    disc = 1 - 4 * p["H"] / (p["r"] * p["K"])
    root = np.sqrt(np.where(disc >= 0, disc, np.nan))
    return [
        Equilibrium("lower (unstable) level", p["K"] / 2 * (1 - root)),
        Equilibrium("upper (stable) level", p["K"] / 2 * (1 + root)),
    ]


def _logistic_removal() -> GrowthModel:
    return law(
        "logistic-removal",
        "dN/dt = r N (1 - N/K) - H",
        "r * N * (1 - N / K) - H",
        {"r": GROWTH, "K": CAPACITY, "H": Term(FLUX, "a removal rate", "non-negative")},
        _removal_equilibria,
    )


def _allee() -> GrowthModel:
    return law(
        "allee",
        "dN/dt = r N (1 - N/K) (N/A - 1)",
        "r * N * (1 - N / K) * (N / A - 1)",
        {"r": GROWTH, "K": CAPACITY, "A": Term(POPULATION, "an Allee threshold", "positive")},
        lambda p: [
            Equilibrium("extinction", 0.0 * p["K"]),
            Equilibrium("Allee threshold A", p["A"] * _ones(p)),
            Equilibrium("K", p["K"] * _ones(p)),
        ],
    )


# Every built-in law: adding one means writing its factory above and naming it here.
BUILT_IN: dict[str, Callable[[], GrowthModel]] = {
    "exponential": _exponential,
    "logistic": _logistic,
    "gompertz": _gompertz,
    "theta-logistic": _theta_logistic,
    "logistic-harvest": _logistic_harvest,
    "logistic-removal": _logistic_removal,
    "allee": _allee,
}
FORMS = (*BUILT_IN, "custom")
# The right-hand side of each built-in law in the expression language (from its factory).
RATE_TEXT: dict[str, str] = {form: make().rate_text for form, make in BUILT_IN.items()}


def built_in(form: str, where: str = "model.form") -> GrowthModel:
    """The built-in law called ``form``."""
    if form not in BUILT_IN:
        raise InputError(
            f"unknown form {form!r}{did_you_mean(str(form), FORMS)}; accepted: " + ", ".join(FORMS),
            where=where,
        )
    return BUILT_IN[form]()


def stable_equilibria(model: GrowthModel, params: Params) -> list[Equilibrium]:
    """The equilibria at which df/dN < 0 (linearly stable for the exact flow), per member."""
    stable = []
    for eq in model.equilibria(params):
        with np.errstate(all="ignore"):
            slope = model.d_dn(0.0, np.asarray(eq.value, dtype=float), params)
        value = np.where(np.asarray(slope) < 0, eq.value, np.nan)
        if np.any(np.isfinite(value)):
            stable.append(Equilibrium(eq.name, value))
    return stable
