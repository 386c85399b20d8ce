"""Probability distributions of uncertain inputs, in the case's internal units.

Each distribution maps uniform numbers in (0, 1) to parameter values through its inverse
cumulative distribution function, so that one uniform design (plain Monte Carlo or the
Saltelli design of SALib) serves every kind of input.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

KINDS = ("normal", "lognormal", "uniform", "triangular", "truncated-normal")


@dataclass(frozen=True)
class Distribution:
    """One uncertain input.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    nominal : float
        The value used for the nominal run [internal unit of the parameter].
    sd : float
        Standard deviation for ``normal``, ``truncated-normal`` (of the parent normal) and
        ``lognormal`` (of the variable itself, not of its logarithm) [same unit].
    low, high : float
        Bounds for ``uniform``, ``triangular`` and ``truncated-normal`` (may be infinite
        for the last) [same unit].
    mode : float
        Mode of ``triangular`` [same unit].
    """

    kind: str
    nominal: float
    sd: float = 0.0
    low: float = -math.inf
    high: float = math.inf
    mode: float = math.nan

    def frozen(self):
        """The equivalent frozen ``scipy.stats`` distribution."""
        # Imported here, not at module level: ``errbudget check`` reads distributions but
        # never draws from them, and SciPy's stats costs most of a second to import.
        from scipy import stats

        if self.kind == "normal":
            return stats.norm(loc=self.nominal, scale=self.sd)
        if self.kind == "lognormal":
            # nominal is the mean and sd the standard deviation of the variable:
            # sigma^2 = ln(1 + cv^2), mu = ln(mean) - sigma^2 / 2 (Johnson, Kotz &
            # Balakrishnan 1994, Continuous Univariate Distributions vol. 1, ch. 14).
            cv = self.sd / self.nominal
            sigma = math.sqrt(math.log1p(cv * cv))
            mu = math.log(self.nominal) - 0.5 * sigma * sigma
            return stats.lognorm(s=sigma, scale=math.exp(mu))
        if self.kind == "uniform":
            return stats.uniform(loc=self.low, scale=self.high - self.low)
        if self.kind == "triangular":
            width = self.high - self.low
            return stats.triang(c=(self.mode - self.low) / width, loc=self.low, scale=width)
        if self.kind == "truncated-normal":
            a = (self.low - self.nominal) / self.sd
            b = (self.high - self.nominal) / self.sd
            return stats.truncnorm(a, b, loc=self.nominal, scale=self.sd)
        raise ValueError(f"unknown distribution kind {self.kind!r}; expected one of {KINDS}")

    def ppf(self, u: np.ndarray) -> np.ndarray:
        """Values at cumulative probabilities ``u`` in (0, 1), shape preserved."""
        return self.frozen().ppf(np.asarray(u, dtype=float))

    def interval(self, level: float) -> tuple[float, float]:
        """Central interval holding ``level`` of the probability."""
        low, high = self.frozen().interval(level)
        return float(low), float(high)

    def spread(self) -> float:
        """Standard deviation of the input [its unit]."""
        return float(self.frozen().std())

    def describe(self, unit: str) -> str:
        """One line for ``errbudget check`` and the report."""
        if self.kind == "normal":
            return f"normal, mean {self.nominal:g} {unit}, sd {self.sd:g} {unit}"
        if self.kind == "lognormal":
            return f"lognormal, mean {self.nominal:g} {unit}, sd {self.sd:g} {unit}"
        if self.kind == "uniform":
            return f"uniform on [{self.low:g}, {self.high:g}] {unit}"
        if self.kind == "triangular":
            return f"triangular, low {self.low:g}, mode {self.mode:g}, high {self.high:g} {unit}"
        return (
            f"truncated normal, mean {self.nominal:g} {unit}, sd {self.sd:g} {unit}, "
            f"on [{self.low:g}, {self.high:g}] {unit}"
        )
