"""Observation models: how a count scatters about the model value mu at its time.

One small class per model. Each gives the log-likelihood terms ln p(y | mu, phi), a moment
starting value of its nuisance parameter phi, the mean and variance of a count (for Pearson
residuals and the validation's u_D), synthetic counts for the parametric bootstrap, and
the data it can describe. The nuisance parameter has a bounded, documented support: the
fit keeps phi inside it, so a count series that is not over-dispersed gives a dispersion at
its upper bound (Poisson in all but name) instead of a runaway such as 7.6e59.

References
----------
Hilbe, J. M. (2011). Negative Binomial Regression, 2nd ed., Cambridge University Press
    (the NB2 form, var = mu + mu^2 / k).
Johnson, N. L., Kotz, S., Balakrishnan, N. (1994). Continuous Univariate Distributions,
    vol. 1, 2nd ed., Wiley, ch. 14 (moments of the lognormal; recalled).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import betaln, gammaln, xlogy

from errbudget.errors import InputError, did_you_mean

INTEGER_TOLERANCE = 1e-6  # Poisson / negative binomial counts must be whole numbers to this
NB_DRAW_LIMIT = 1e12  # numpy's negative binomial sampler fails for huge k; this is Poisson
_HALF_LN_2PI = 0.5 * math.log(2.0 * math.pi)

# Supports of the nuisance parameters (common practice, no source; see each class).
DISPERSION_MIN = 1e-3  # k below this: sd of a count over 30 times its mean
DISPERSION_MAX_PER_COUNT = 1e4  # k above 1e4 x the largest count: extra variance < 1e-4 mu
LOG_SIGMA_MIN = 1e-4  # sd of ln(count): 0.01 % scatter
LOG_SIGMA_MAX = 5.0  # sd of ln(count): a factor e^5 = 148 at one sd
SIGMA_MIN_SHARE = 1e-6  # normal sigma, relative to the largest |count|
SIGMA_MAX_SHARE = 1e3


@dataclass(frozen=True)
class Nuisance:
    """The nuisance parameter of an observation model.

    Attributes
    ----------
    name : str
        Its name in the fit ("dispersion" or "sigma").
    population_unit : bool
        True when it carries the population unit, False when it is a pure number.
    meaning : str
        One line for messages and the documentation.
    """

    name: str
    population_unit: bool
    meaning: str


class ObservationModel:
    """Base of the observation models; subclasses set :attr:`name` and the methods.

    Arrays: ``y`` (T,) counts [population unit], ``mu`` (S, T) or (T,) model values
    [population unit], ``phi`` (S, m) nuisance values (m = 0 or 1) [see :attr:`nuisance`].
    """

    name = ""
    nuisance: Nuisance | None = None

    @property
    def nuisance_names(self) -> tuple[str, ...]:
        return () if self.nuisance is None else (self.nuisance.name,)

    def log_terms(self, y: np.ndarray, mu: np.ndarray, phi: np.ndarray) -> np.ndarray:
        """ln p(y_i | mu_i, phi), shape (S, T); -inf where the model value is impossible."""
        raise NotImplementedError

    def support(self, y: np.ndarray) -> tuple[float, float]:
        """Bounds (low, high) of the nuisance parameter for counts ``y`` [its unit]."""
        return (math.nan, math.nan)

    def initial_nuisance(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        """Moment estimate of ln(phi) for each row of ``mu`` (S, T), shape (S, m)."""
        return np.zeros((mu.shape[0], 0))

    def mean_variance(self, mu: np.ndarray, phi: float) -> tuple[np.ndarray, np.ndarray]:
        """Mean and variance of a count whose model value is ``mu``."""
        raise NotImplementedError

    def sd(self, mu: np.ndarray, phi: float) -> np.ndarray:
        """Standard deviation of a count about ``mu`` (the validation's u_D) [population unit]."""
        with np.errstate(all="ignore"):
            return np.sqrt(self.mean_variance(np.asarray(mu, dtype=float), phi)[1])

    def pearson(self, y: np.ndarray, mu: np.ndarray, phi: float) -> np.ndarray:
        """Pearson residuals (y - E y) / sd(y) [1]."""
        with np.errstate(all="ignore"):
            mean, variance = self.mean_variance(mu, phi)
            return (y - mean) / np.sqrt(variance)

    def draw(self, mu: np.ndarray, phi: float, rng: np.random.Generator, n: int) -> np.ndarray:
        """``n`` synthetic count series (n, T) about ``mu`` (T,)."""
        raise NotImplementedError

    def check_counts(self, times: np.ndarray, counts: np.ndarray) -> None:
        """Refuse counts this model cannot describe (InputError naming the count)."""
        if np.any(counts < 0):
            i = int(np.argmax(counts < 0))
            raise InputError(
                f"count {counts[i]:g} at time {times[i]:g} is negative; the {self.name} "
                "observation model needs counts of zero or more"
            )

    def _moment_start(self, y: np.ndarray, phi: np.ndarray) -> np.ndarray:
        """ln(phi) clipped into the support, finite (0 where the moments failed)."""
        low, high = self.support(y)
        with np.errstate(all="ignore"):
            log_phi = np.log(np.clip(phi, low, high))
        return np.where(np.isfinite(log_phi), log_phi, 0.5 * (math.log(low) + math.log(high)))[
            :, None
        ]


class _WholeCounts(ObservationModel):
    def check_counts(self, times: np.ndarray, counts: np.ndarray) -> None:
        super().check_counts(times, counts)
        off = np.abs(counts - np.round(counts)) > INTEGER_TOLERANCE * np.maximum(1.0, counts)
        if np.any(off):
            i = int(np.argmax(off))
            raise InputError(
                f"count {counts[i]:g} at time {times[i]:g} is not a whole number; the "
                f"{self.name} observation model needs whole counts (use lognormal or normal "
                "for densities)"
            )


class Poisson(_WholeCounts):
    """y ~ Poisson(mu): ln p = y ln mu - mu - ln y!; no nuisance parameter."""

    name = "poisson"

    def log_terms(self, y, mu, phi):
        with np.errstate(all="ignore"):
            terms = xlogy(y, mu) - mu - gammaln(y + 1.0)
        return np.where((mu < 0) | np.isnan(terms), -np.inf, terms)

    def mean_variance(self, mu, phi):
        return mu, mu

    def sd(self, mu, phi):
        return np.sqrt(np.maximum(np.asarray(mu, dtype=float), 0.0))

    def draw(self, mu, phi, rng, n):
        return rng.poisson(mu, size=(n, mu.size)).astype(float)


class NegativeBinomial(_WholeCounts):
    """NB2 with mean mu and dispersion k: var = mu + mu^2 / k (Hilbe 2011).

    ln p = ln G(y + k) - ln G(k) - ln y! + k ln(k / (k + mu)) + y ln(mu / (k + mu)).
    Support of k: [1e-3, 1e4 x max(largest count, 1)] [population unit]. At the lower bound
    a count's sd is over 30 times its mean; at the upper bound the extra variance mu^2 / k
    is below 1e-4 of the Poisson variance mu at every count, so the counts are Poisson in all
    but name (common practice, no source).
    """

    name = "negative-binomial"
    nuisance = Nuisance("dispersion", True, "k of var = mu + mu^2 / k")

    def support(self, y):
        return DISPERSION_MIN, DISPERSION_MAX_PER_COUNT * max(float(np.max(y, initial=0.0)), 1.0)

    def log_terms(self, y, mu, phi):
        k = phi[:, :1]
        with np.errstate(all="ignore"):
            # ln G(y + k) - ln G(k) = ln G(y) - ln B(k, y) stays accurate for very large k.
            whole = np.maximum(y, 1.0)
            rising = np.where(y > 0, gammaln(whole) - betaln(k, whole), 0.0)
            terms = (
                rising - gammaln(y + 1.0) - k * np.log1p(mu / k) + xlogy(y, mu) - xlogy(y, k + mu)
            )
        return np.where((mu < 0) | np.isnan(terms), -np.inf, terms)

    def initial_nuisance(self, y, mu):
        with np.errstate(all="ignore"):
            excess = np.mean((y - mu) ** 2 - mu, axis=1)  # the mu^2 / k part of the variance
            k = np.where(excess > 0, np.mean(mu**2, axis=1) / excess, np.inf)
        return self._moment_start(y, k)

    def mean_variance(self, mu, phi):
        return mu, mu + mu**2 / phi

    def sd(self, mu, phi):
        mu = np.asarray(mu, dtype=float)
        with np.errstate(all="ignore"):
            return np.sqrt(np.maximum(mu, 0.0) + mu**2 / phi)

    def draw(self, mu, phi, rng, n):
        k = min(phi, NB_DRAW_LIMIT)
        return rng.negative_binomial(k, k / (k + mu), size=(n, mu.size)).astype(float)


class LogNormal(ObservationModel):
    """ln y ~ N(ln mu, s^2): mu is the median of a count, s the sd of ln(count) [1].

    Support of s: [1e-4, 5] (0.01 % scatter to a factor 148 at one sd; common practice,
    no source).
    """

    name = "lognormal"
    nuisance = Nuisance("sigma", False, "sd of ln(count)")

    def support(self, y):
        return LOG_SIGMA_MIN, LOG_SIGMA_MAX

    def log_terms(self, y, mu, phi):
        s = phi[:, :1]
        with np.errstate(all="ignore"):
            log_y = np.log(y)
            terms = -log_y - np.log(s) - _HALF_LN_2PI - 0.5 * ((log_y - np.log(mu)) / s) ** 2
        return np.where((mu <= 0) | np.isnan(terms), -np.inf, terms)

    def initial_nuisance(self, y, mu):
        with np.errstate(all="ignore"):
            s = np.sqrt(np.mean((np.log(y) - np.log(mu)) ** 2, axis=1))
        return self._moment_start(y, s)

    def mean_variance(self, mu, phi):
        s2 = phi**2  # median mu: mean mu e^(s^2/2), variance (e^(s^2) - 1) e^(s^2) mu^2
        return mu * np.exp(0.5 * s2), np.expm1(s2) * np.exp(s2) * mu**2

    def sd(self, mu, phi):
        s2 = phi**2
        return np.abs(np.asarray(mu, dtype=float)) * np.exp(0.5 * s2) * np.sqrt(np.expm1(s2))

    def draw(self, mu, phi, rng, n):
        return mu * np.exp(phi * rng.standard_normal((n, mu.size)))

    def check_counts(self, times, counts):
        super().check_counts(times, counts)
        if np.any(counts <= 0):
            i = int(np.argmax(counts <= 0))
            raise InputError(
                f"count {counts[i]:g} at time {times[i]:g} is zero; the lognormal observation "
                "model needs positive counts (use negative-binomial or poisson)"
            )


class Normal(ObservationModel):
    """y ~ N(mu, sigma^2), sigma [population unit].

    Support of sigma: [1e-6, 1e3] x max(largest |count|, 1e-300) (common practice, no
    source).
    """

    name = "normal"
    nuisance = Nuisance("sigma", True, "sd of a count")

    def support(self, y):
        scale = max(float(np.max(np.abs(y), initial=0.0)), 1e-300)
        return SIGMA_MIN_SHARE * scale, SIGMA_MAX_SHARE * scale

    def log_terms(self, y, mu, phi):
        s = phi[:, :1]
        with np.errstate(all="ignore"):
            terms = -np.log(s) - _HALF_LN_2PI - 0.5 * ((y - mu) / s) ** 2
        return np.where(np.isnan(terms), -np.inf, terms)

    def initial_nuisance(self, y, mu):
        with np.errstate(all="ignore"):
            s = np.sqrt(np.mean((y - mu) ** 2, axis=1))
        return self._moment_start(y, s)

    def mean_variance(self, mu, phi):
        return mu, np.full_like(mu, phi**2)

    def sd(self, mu, phi):
        return np.full(np.shape(mu), float(phi))

    def draw(self, mu, phi, rng, n):
        return mu + phi * rng.standard_normal((n, mu.size))

    def check_counts(self, times, counts):
        return None  # any finite value


OBSERVATION_MODELS: dict[str, ObservationModel] = {
    model.name: model for model in (Poisson(), NegativeBinomial(), LogNormal(), Normal())
}
ERROR_MODELS = tuple(OBSERVATION_MODELS)


def observation_model(name: str, where: str = "[counts] error") -> ObservationModel:
    """The observation model called ``name``; an InputError listing the accepted names."""
    if name not in OBSERVATION_MODELS:
        raise InputError(
            f'unknown observation model "{name}"{did_you_mean(name, ERROR_MODELS)}; '
            f"expected one of {', '.join(ERROR_MODELS)}",
            where=where,
        )
    return OBSERVATION_MODELS[name]
