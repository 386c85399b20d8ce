"""The result of a fit to counts: estimates, uncertainty, diagnostics, and its JSON form."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from errbudget.uncertainty.scales import Scale


@dataclass(frozen=True, eq=False)
class FitResult:
    """Estimates, their uncertainty and diagnostics of one fit.

    Attributes
    ----------
    names : tuple of str
        Estimated model parameters.
    values : numpy.ndarray
        Estimates (k,) [internal units of each parameter]: maximum likelihood, or with
        priors the posterior mode on the estimation scale mapped back.
    cov : numpy.ndarray or None
        Covariance of the estimates (k, k) [unit_i * unit_j]; without priors by the delta
        method from ``cov_log``, with priors the sds of the handed-on posterior's marginals
        (Gauss-Hermite quadrature) with the correlations of the estimation scale.
    sd : numpy.ndarray or None
        Square roots of the diagonal of ``cov`` [units of each parameter].
    log_scale : tuple of bool
        Which parameters were estimated as ln(value).
    cov_log : numpy.ndarray or None
        Covariance on the estimation scale (k, k) (``scales``).
    error : str
        Observation model, one of :data:`ERROR_MODELS`.
    nuisance : dict
        Fitted nuisance parameter: ``{"dispersion": k}`` [population unit] or
        ``{"sigma": s}`` (normal [population unit]; lognormal [1]); empty for Poisson.
    loglik : float
        Log-likelihood at the estimates [1] (-inf if none was found).
    aic : float
        Akaike information criterion, 2 (k + n_nuisance) - 2 loglik [1].
    n_counts : int
        Number of counts fitted.
    fitted : numpy.ndarray
        Model values mu at the count times (T,) [population unit].
    residuals : numpy.ndarray
        Pearson residuals (y - E y) / sd(y) under the fitted observation model (T,) [1].
    converged : bool
        Whether the optimiser found an interior optimum.
    uncertainty_method : str
        "observed information", "parametric bootstrap", "Laplace", "importance sampling" or
        "none".
    message : str
        What happened, in a sentence or two.
    scales : tuple of Scale
        Estimation scale of each parameter.
    center : numpy.ndarray or None
        Mean (k,) of the handed-on normal on the estimation scale.
    interval : numpy.ndarray or None
        Central 90 % interval (k, 2) of the handed-on distribution [units of each parameter].
    posterior : dict or None
        With priors: method, importance-sampling draws and ESS, prior and posterior mean and
        sd per parameter.
    weak : tuple of str
        Parameters the counts barely inform (posterior close to the prior, or a flat profile:
        sd of ln(value) above LOG_SD_LIMIT).
    held : tuple of str
        Nuisance parameters held at a bound of their support.
    """

    names: tuple[str, ...]
    values: np.ndarray
    cov: np.ndarray | None
    sd: np.ndarray | None
    log_scale: tuple[bool, ...]
    cov_log: np.ndarray | None
    error: str
    nuisance: dict
    loglik: float
    aic: float
    n_counts: int
    fitted: np.ndarray
    residuals: np.ndarray
    converged: bool
    uncertainty_method: str
    message: str
    scales: tuple[Scale, ...] = ()
    center: np.ndarray | None = None
    interval: np.ndarray | None = None
    posterior: dict | None = None
    weak: tuple[str, ...] = ()
    held: tuple[str, ...] = ()

    def to_dict(self, units: Mapping[str, str]) -> dict:
        """JSON-ready summary; ``units`` maps parameter (and nuisance) names to unit labels.

        Every non-finite number becomes None.
        """
        sd = self.sd if self.sd is not None else [None] * len(self.names)
        parameters = {}
        for j, name in enumerate(self.names):
            entry = {
                "value": _plain(self.values[j]),
                "sd": _plain(sd[j]),
                "unit": units.get(name),
                "log_scale": bool(self.log_scale[j]),
            }
            if self.scales:
                entry["scale"] = self.scales[j].describe()
            if self.interval is not None:
                entry["low"], entry["high"] = _plain(self.interval[j])
            parameters[name] = entry
        return {
            "parameters": parameters,
            "error": self.error,
            "n_counts": int(self.n_counts),
            "nuisance": {
                name: {"value": _plain(value), "unit": units.get(name)}
                for name, value in self.nuisance.items()
            },
            "covariance": _plain(self.cov),
            "covariance_estimation_scale": _plain(self.cov_log),
            "loglik": _plain(self.loglik),
            "aic": _plain(self.aic),
            "fitted": _plain(self.fitted),
            "residuals": _plain(self.residuals),
            "converged": bool(self.converged),
            "uncertainty_method": self.uncertainty_method,
            "message": self.message,
            "posterior": _plain_tree(self.posterior),
            "weakly_informed": list(self.weak),
            "held_at_bound": list(self.held),
        }


def _plain(value):
    """Floats, nested lists and None (for anything missing or non-finite)."""
    if value is None:
        return None
    array = np.asarray(value, dtype=float)
    if array.ndim == 0:
        number = float(array)
        return number if math.isfinite(number) else None
    return [_plain(item) for item in array]


def _plain_tree(value):
    if isinstance(value, dict):
        return {key: _plain_tree(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [_plain_tree(item) for item in value]
    if isinstance(value, str | bool) or value is None:
        return value
    return _plain(value)
