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
    """

    form: str
    equation: str
    kinds: dict[str, str]
    rate: Callable[[float, Array, Params], Array]
    d_dn: Callable[[float, Array, Params], Array]
    equilibria: Callable[[Params], list[Equilibrium]] = field(default=lambda p: [])
    exact: Callable[[Array, Array, Params], Array] | None = None
    # Custom laws only: the checked expression and its factors to coherent root units
    # (keys expression, factors, t_factor, n_factor, out_factor), for the compiled engine.
    coherent: dict | None = None

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(self.kinds)


def _ones(p: Params) -> Array:
    return np.ones(np.broadcast(*p.values()).shape) if p else np.ones(())


def _exponential() -> GrowthModel:
    return GrowthModel(
        "exponential",
        "dN/dt = r N",
        {"r": RATE},
        lambda t, n, p: p["r"] * n,
        lambda t, n, p: p["r"] * np.ones_like(n),
        lambda p: [Equilibrium("extinction", 0.0 * _ones(p))],
        lambda t, n0, p: n0 * np.exp(p["r"] * t),
    )


def _logistic() -> GrowthModel:
    return GrowthModel(
        "logistic",
        "dN/dt = r N (1 - N/K)",
        {"r": RATE, "K": POPULATION},
        lambda t, n, p: p["r"] * n * (1 - n / p["K"]),
        lambda t, n, p: p["r"] * (1 - 2 * n / p["K"]),
        lambda p: [Equilibrium("extinction", 0.0 * p["K"]), Equilibrium("K", p["K"] * _ones(p))],
        lambda t, n0, p: p["K"] / (1 + (p["K"] / n0 - 1) * np.exp(-p["r"] * t)),
    )


def _gompertz() -> GrowthModel:
    return GrowthModel(
        "gompertz",
        "dN/dt = r N ln(K/N)",
        {"r": RATE, "K": POPULATION},
        lambda t, n, p: p["r"] * n * np.log(p["K"] / n),
        lambda t, n, p: p["r"] * (np.log(p["K"] / n) - 1),
        lambda p: [Equilibrium("K", p["K"] * _ones(p))],
        lambda t, n0, p: p["K"] * np.exp(np.log(n0 / p["K"]) * np.exp(-p["r"] * t)),
    )


def _theta_logistic() -> GrowthModel:
    return GrowthModel(
        "theta-logistic",
        "dN/dt = r N (1 - (N/K)^theta)",
        {"r": RATE, "K": POPULATION, "theta": PURE},
        lambda t, n, p: p["r"] * n * (1 - (n / p["K"]) ** p["theta"]),
        lambda t, n, p: p["r"] * (1 - (1 + p["theta"]) * (n / p["K"]) ** p["theta"]),
        lambda p: [Equilibrium("extinction", 0.0 * p["K"]), Equilibrium("K", p["K"] * _ones(p))],
    )


def _logistic_harvest() -> GrowthModel:
    def equilibria(p: Params) -> list[Equilibrium]:
        carrying = p["K"] * (1 - p["E"] / p["r"])
        return [
            Equilibrium("extinction", 0.0 * carrying),
            Equilibrium("harvested level K(1 - E/r)", np.where(carrying > 0, carrying, np.nan)),
        ]

    return GrowthModel(
        "logistic-harvest",
        "dN/dt = r N (1 - N/K) - E N",
        {"r": RATE, "K": POPULATION, "E": RATE},
        lambda t, n, p: p["r"] * n * (1 - n / p["K"]) - p["E"] * n,
        lambda t, n, p: p["r"] * (1 - 2 * n / p["K"]) - p["E"],
        equilibria,
        lambda t, n0, p: _logistic().exact(
            t, n0, {"r": p["r"] - p["E"], "K": p["K"] * (1 - p["E"] / p["r"])}
        ),
    )


def _logistic_removal() -> GrowthModel:
    def equilibria(p: Params) -> list[Equilibrium]:
        # r N (1 - N/K) = H  =>  N = K/2 (1 +/- sqrt(1 - 4H/(rK))); none when H > rK/4.
        disc = 1 - 4 * p["H"] / (p["r"] * p["K"])
        root = np.sqrt(np.where(disc >= 0, disc, np.nan))
        return [
            Equilibrium("lower (unstable) level", p["K"] / 2 * (1 - root)),
            Equilibrium("upper (stable) level", p["K"] / 2 * (1 + root)),
        ]

    return GrowthModel(
        "logistic-removal",
        "dN/dt = r N (1 - N/K) - H",
        {"r": RATE, "K": POPULATION, "H": FLUX},
        lambda t, n, p: p["r"] * n * (1 - n / p["K"]) - p["H"],
        lambda t, n, p: p["r"] * (1 - 2 * n / p["K"]) * np.ones_like(n),
        equilibria,
    )


def _allee() -> GrowthModel:
    def d_dn(t: float, n: Array, p: Params) -> Array:
        # f = r N (1 - N/K)(N/A - 1); product rule on the three factors.
        r, k, a = p["r"], p["K"], p["A"]
        return r * ((1 - n / k) * (n / a - 1) - n / k * (n / a - 1) + n * (1 - n / k) / a)

    return GrowthModel(
        "allee",
        "dN/dt = r N (1 - N/K) (N/A - 1)",
        {"r": RATE, "K": POPULATION, "A": POPULATION},
        lambda t, n, p: p["r"] * n * (1 - n / p["K"]) * (n / p["A"] - 1),
        d_dn,
        lambda p: [
            Equilibrium("extinction", 0.0 * p["K"]),
            Equilibrium("Allee threshold A", p["A"] * _ones(p)),
            Equilibrium("K", p["K"] * _ones(p)),
        ],
    )


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

# The right-hand side of each built-in law in the custom-expression language, written with
# the same operations in the same order as its numpy lambda above. The compiled engine
# (errbudget.solve.engine) builds its kernels from these through the expression whitelist.
RATE_TEXT: dict[str, str] = {
    "exponential": "r * N",
    "logistic": "r * N * (1 - N / K)",
    "gompertz": "r * N * log(K / N)",
    "theta-logistic": "r * N * (1 - (N / K) ** theta)",
    "logistic-harvest": "r * N * (1 - N / K) - E * N",
    "logistic-removal": "r * N * (1 - N / K) - H",
    "allee": "r * N * (1 - N / K) * (N / A - 1)",
}


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
