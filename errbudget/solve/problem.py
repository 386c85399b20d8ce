"""What the solvers need to know of a case: the law, the scheme, the horizon, the quantities.

The solvers do not read case files; any object with these attributes will do (the loaded
:class:`errbudget.case.load.Case` is one).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

from errbudget.laws.models import GrowthModel

QUANTITY_KINDS = ("value", "time-to", "peak", "minimum")


@dataclass(frozen=True)
class QuantitySpec:
    """A forecast quantity of interest; ``at`` [T] for values, ``level`` [P] for time-to."""

    name: str
    kind: str
    at: float | None = None
    level: float | None = None

    @property
    def unit_kind(self) -> str:
        return "time" if self.kind == "time-to" else "population"


class Problem(Protocol):
    """A growth law to solve with a scheme up to a horizon, and the quantities to read."""

    model: GrowthModel
    scheme: str
    horizon: float  # [T]
    quantities: tuple[QuantitySpec, ...]

    def nominal(self) -> dict[str, float]:
        """Nominal value of every parameter and of N0 [internal units]."""
        ...
