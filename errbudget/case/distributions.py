"""Probability distributions of uncertain inputs, in the case's internal units.

Each distribution maps uniform numbers in (0, 1) to parameter values through its inverse
cumulative distribution function, so that one uniform design (plain Monte Carlo or the
Saltelli design of SALib) serves every kind of input.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist, StatisticsError

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
    truncated_share : float
        For a normal truncated at zero by the loader (a parameter that must be positive):
        the share of the normal as written that lay at or below zero [1]; 0 otherwise.
    """

    kind: str
    nominal: float
    sd: float = 0.0
    low: float = -math.inf
    high: float = math.inf
    mode: float = math.nan
    truncated_share: float = 0.0

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
            mu, sigma = self._log_parameters()
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

    # Checks at load time, in closed form with the standard library (no SciPy: ``errbudget
    # check`` stays cheap); the design itself draws through :meth:`frozen`.

    def _normal(self) -> NormalDist:
        return NormalDist(self.nominal, self.sd)

    def extremes(self, p: float) -> tuple[float, float]:
        """The p and 1 - p quantiles, or bounds that contain them [its unit]."""
        try:
            if self.kind in ("uniform", "triangular"):
                return self.low, self.high
            if self.kind == "lognormal":
                mu, sigma = self._log_parameters()
                z = NormalDist().inv_cdf(1 - p)
                return math.exp(mu - sigma * z), math.exp(mu + sigma * z)
            normal = self._normal()
            if self.kind == "normal":
                return normal.inv_cdf(p), normal.inv_cdf(1 - p)
            # Truncated to [low, high]: the quantile of the parent normal at the same share of
            # the kept mass, inside the bounds.
            below, kept = normal.cdf(self.low), normal.cdf(self.high) - normal.cdf(self.low)
            return tuple(
                min(max(normal.inv_cdf(min(max(below + q * kept, 1e-300), 1 - 1e-16)), self.low),
                    self.high)
                for q in (p, 1 - p)
            )  # fmt: skip
        except (OverflowError, ValueError, ZeroDivisionError, StatisticsError):
            return -math.inf, math.inf

    def spread_bound(self) -> float:
        """The standard deviation, or a bound on it (the truncated normal's parent sd)."""
        if self.kind == "uniform":
            return (self.high - self.low) / math.sqrt(12)
        if self.kind == "triangular":
            a, b, c = self.low, self.high, self.mode
            return math.sqrt(max(a * a + b * b + c * c - a * b - a * c - b * c, 0.0) / 18)
        return self.sd

    def share_at_or_below_zero(self) -> float:
        """The probability of a draw at or below zero [1]."""
        if self.kind not in ("normal", "truncated-normal"):
            return float(self.extremes(0.5)[0] <= 0) if self.kind != "lognormal" else 0.0
        try:
            normal = self._normal()
            below = normal.cdf(min(0.0, self.high)) - normal.cdf(self.low)
            mass = normal.cdf(self.high) - normal.cdf(self.low)
        except (OverflowError, ValueError, ZeroDivisionError, StatisticsError):
            return math.nan
        return max(below, 0.0) / mass if mass > 0 else math.nan

    def _log_parameters(self) -> tuple[float, float]:
        """mu and sigma of ln X for a lognormal given by its mean and sd (see :meth:`frozen`)."""
        cv = self.sd / self.nominal
        sigma = math.sqrt(math.log1p(cv * cv))
        return math.log(self.nominal) - 0.5 * sigma * sigma, sigma

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
        text = (
            f"truncated normal, mean {self.nominal:g} {unit}, sd {self.sd:g} {unit}, "
            f"on [{self.low:g}, {self.high:g}] {unit}"
        )
        if self.truncated_share > 0:
            text += (
                f" (truncated at zero: the normal as written put "
                f"{100 * self.truncated_share:.3g} % of its draws at or below zero)"
            )
        return text
