"""The objective of a fit to counts: -ln L, or -ln(posterior density) when priors are given.

Counts y_i at times t_i are independent draws about mu_i = N(t_i; theta) under one
observation model with nuisance phi: ln L = sum_i ln p(y_i | mu_i, phi). Each model
parameter is estimated on its scale z (see :mod:`errbudget.uncertainty.scales`); the nuisance
parameter on ln(phi), held inside its documented support.

With priors p_j, the objective is the negative log posterior density of z,

    -ln L(theta(z), phi) - sum_j [ln p_j(x_j(z_j)) + ln |dx_j / dz_j|],

the last term from the change of variables; parameters without a prior have a flat prior
on their estimation scale. Without any prior it is -ln L, the maximum-likelihood objective.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from errbudget.uncertainty.observation import ObservationModel
from errbudget.uncertainty.scales import LOG_LIMIT, Scale


def as_prior(prior):
    """A frozen scipy.stats distribution from a case Distribution or a frozen one; None stays."""
    if prior is None:
        return None
    if hasattr(prior, "frozen") and callable(prior.frozen):
        return prior.frozen()
    if hasattr(prior, "logpdf") and hasattr(prior, "support"):
        return prior
    raise TypeError(f"a prior must be a frozen scipy.stats distribution, got {prior!r}")


@dataclass(frozen=True, eq=False)
class Problem:
    """One fit: data, observation model, estimation scales, priors and nuisance bounds."""

    simulate: Callable[[np.ndarray], np.ndarray]
    y: np.ndarray
    observation: ObservationModel
    scales: tuple[Scale, ...]
    priors: tuple  # frozen scipy.stats distributions or None, one per model parameter
    nuisance_bounds: np.ndarray  # (m, 2) bounds of ln(phi)
    # Parameter sets solved so far, shared by copies made with dataclasses.replace.
    solved: list = field(default_factory=lambda: [0])

    @property
    def k(self) -> int:
        """Number of model parameters."""
        return len(self.scales)

    @property
    def m(self) -> int:
        """Number of nuisance parameters (0 or 1)."""
        return self.nuisance_bounds.shape[0]

    @property
    def has_prior(self) -> bool:
        return any(p is not None for p in self.priors)

    @property
    def relative_step(self) -> np.ndarray:
        """(k + m,) bool: coordinates whose finite-difference steps scale with |z|."""
        linear = [s.kind == "linear" for s in self.scales]
        return np.array(linear + [False] * self.m)

    def clip_nuisance(self, z: np.ndarray) -> np.ndarray:
        """``z`` with ln(phi) held inside its bounds."""
        z = np.array(z, dtype=float)
        if self.m:
            z[..., self.k :] = np.clip(
                z[..., self.k :], self.nuisance_bounds[:, 0], self.nuisance_bounds[:, 1]
            )
        return z

    def split(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Model parameters (S, k) and nuisance (S, m) from estimation-scale rows (S, k+m)."""
        z = np.atleast_2d(z)
        theta = np.empty((z.shape[0], self.k))
        for j, scale in enumerate(self.scales):
            theta[:, j] = scale.to_natural(z[:, j])
        log_phi = self.clip_nuisance(z)[:, self.k :]
        return theta, np.exp(np.clip(log_phi, -LOG_LIMIT, LOG_LIMIT))

    def model(self, theta: np.ndarray) -> np.ndarray:
        """Model values (S, T); an arithmetic failure of the solver gives NaN rows."""
        self.solved[0] += theta.shape[0]
        with np.errstate(all="ignore"):
            try:
                mu = np.asarray(self.simulate(theta), dtype=float)
            except ArithmeticError:
                return np.full((theta.shape[0], self.y.size), np.nan)
        if mu.shape != (theta.shape[0], self.y.size):
            raise ValueError(
                f"simulate returned shape {mu.shape}, expected {(theta.shape[0], self.y.size)}"
            )
        return mu

    def loglik_from(self, mu: np.ndarray, phi: np.ndarray) -> np.ndarray:
        """ln L for each row (S,); -inf where the likelihood is zero or undefined."""
        with np.errstate(all="ignore"):
            total = self.observation.log_terms(self.y, mu, phi).sum(axis=1)
        return np.where(np.isfinite(total), total, -np.inf)

    def log_prior(self, z: np.ndarray) -> np.ndarray:
        """sum_j ln p_j(x_j) + ln |dx_j/dz_j| over parameters with a prior (S,); 0 if none."""
        z = np.atleast_2d(z)
        total = np.zeros(z.shape[0])
        with np.errstate(all="ignore"):
            for j, (scale, prior) in enumerate(zip(self.scales, self.priors, strict=True)):
                if prior is not None:
                    x = scale.to_natural(z[:, j])
                    total += prior.logpdf(x) + scale.log_jacobian(z[:, j])
        return np.where(np.isfinite(total), total, -np.inf)

    def parts(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """ln L and the log prior term of each row of ``z``."""
        theta, phi = self.split(z)
        return self.loglik_from(self.model(theta), phi), self.log_prior(z)

    def objective_from(self, z: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """The objective of rows ``z`` whose model values ``mu`` are already known."""
        _, phi = self.split(z)
        value = -(self.loglik_from(mu, phi) + self.log_prior(z))
        return np.where(np.isfinite(value), value, np.inf)

    def nll(self, z: np.ndarray) -> np.ndarray:
        """The objective for each row of ``z`` (S,); +inf where it is undefined."""
        z = np.atleast_2d(z)
        theta, _ = self.split(z)
        return self.objective_from(z, self.model(theta))

    def at_bound(self, z: np.ndarray, tolerance: float = 1e-6) -> np.ndarray:
        """(k + m,) bool: nuisance coordinates at (or beyond) a bound of their support."""
        flags = np.zeros(self.k + self.m, dtype=bool)
        if self.m:
            low, high = self.nuisance_bounds[:, 0], self.nuisance_bounds[:, 1]
            nuisance = z[self.k :]
            flags[self.k :] = (nuisance <= low + tolerance) | (nuisance >= high - tolerance)
        return flags
