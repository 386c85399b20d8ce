"""Estimation scales: maps from a parameter's support onto the whole real line.

A fitted parameter is estimated, and its uncertainty handed on, on an unbounded scale z:
the normal approximation there, mapped back, keeps every value inside the support.

- ``linear``: z = x, for a parameter that may take any sign;
- ``log``: z = ln(x - low), for x > low (low = 0: the usual ln scale of a positive
  parameter);
- ``log-upper``: z = -ln(high - x), for x < high;
- ``logit``: z = ln((x - low) / (high - x)), for low < x < high (a uniform prior's range).

The log-density of z is that of x plus ln |dx/dz| (change of variables).

References
----------
MacKay, D. J. C. (1998). Choice of basis for Laplace approximation. Machine Learning
    33(1), 77-86 (a normal approximation is best made on a scale where the parameter is
    unbounded; recalled).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import expit

LOG_LIMIT = 700.0  # exp overflows binary64 just above 709
SCALE_KINDS = ("linear", "log", "log-upper", "logit")


@dataclass(frozen=True)
class Scale:
    """The map x <-> z of one parameter (see the module docstring).

    Attributes
    ----------
    kind : str
        One of :data:`SCALE_KINDS`.
    low, high : float
        The support's bounds [unit of the parameter]; infinite where open.
    """

    kind: str = "linear"
    low: float = -math.inf
    high: float = math.inf

    def __post_init__(self):
        if self.kind not in SCALE_KINDS:
            raise ValueError(f"unknown scale {self.kind!r}; expected one of {SCALE_KINDS}")
        finite = (math.isfinite(self.low), math.isfinite(self.high))
        needed = {
            "linear": (False, False),
            "log": (True, False),
            "log-upper": (False, True),
            "logit": (True, True),
        }[self.kind]
        if finite != needed or (self.kind == "logit" and not self.low < self.high):
            raise ValueError(f"scale {self.kind!r} does not fit bounds {self.low}, {self.high}")

    @property
    def is_ln(self) -> bool:
        """Whether z = ln(x), the ln scale of a positive parameter."""
        return self.kind == "log" and self.low == 0.0

    def contains(self, x: float) -> bool:
        """Whether ``x`` lies strictly inside the support."""
        return bool(self.low < x < self.high) if self.kind != "linear" else math.isfinite(x)

    def to_estimation(self, x):
        """z for values ``x`` inside the support."""
        x = np.asarray(x, dtype=float)
        with np.errstate(all="ignore"):
            if self.kind == "log":
                return np.log(x - self.low)
            if self.kind == "log-upper":
                return -np.log(self.high - x)
            if self.kind == "logit":
                return np.log(x - self.low) - np.log(self.high - x)
        return x

    def to_natural(self, z):
        """x for estimation-scale values ``z`` (any real)."""
        z = np.asarray(z, dtype=float)
        if self.kind == "log":
            return self.low + np.exp(np.clip(z, -LOG_LIMIT, LOG_LIMIT))
        if self.kind == "log-upper":
            return self.high - np.exp(-np.clip(z, -LOG_LIMIT, LOG_LIMIT))
        if self.kind == "logit":
            return self.low + (self.high - self.low) * expit(z)
        return z

    def derivative(self, z):
        """dx/dz at ``z`` [unit of the parameter]."""
        z = np.asarray(z, dtype=float)
        if self.kind == "log":
            return np.exp(np.clip(z, -LOG_LIMIT, LOG_LIMIT))
        if self.kind == "log-upper":
            return np.exp(-np.clip(z, -LOG_LIMIT, LOG_LIMIT))
        if self.kind == "logit":
            return (self.high - self.low) * expit(z) * expit(-z)
        return np.ones_like(z)

    def log_jacobian(self, z):
        """ln |dx/dz| at ``z``."""
        z = np.asarray(z, dtype=float)
        if self.kind == "log":
            return np.clip(z, -LOG_LIMIT, LOG_LIMIT)
        if self.kind == "log-upper":
            return -np.clip(z, -LOG_LIMIT, LOG_LIMIT)
        if self.kind == "logit":
            return math.log(self.high - self.low) - np.logaddexp(0.0, z) - np.logaddexp(0.0, -z)
        return np.zeros_like(z)

    def describe(self) -> str:
        if self.kind == "linear":
            return "linear"
        if self.is_ln:
            return "ln"
        if self.kind == "log":
            return f"ln(x - {self.low:g})"
        if self.kind == "log-upper":
            return f"-ln({self.high:g} - x)"
        return f"logit on ({self.low:g}, {self.high:g})"


LINEAR = Scale()
LN = Scale("log", 0.0)


def scale_for(low: float, high: float, positive: bool) -> Scale:
    """The scale of a parameter with support (low, high), strictly positive if ``positive``.

    A fitted parameter without a prior has support (-inf, inf): ln scale when positive,
    linear otherwise (the maximum-likelihood fit's scales).
    """
    if positive:
        low = max(low, 0.0)
    if math.isfinite(low) and math.isfinite(high):
        return Scale("logit", float(low), float(high))
    if math.isfinite(low):
        return Scale("log", float(low))
    if math.isfinite(high):
        return Scale("log-upper", high=float(high))
    return LINEAR
