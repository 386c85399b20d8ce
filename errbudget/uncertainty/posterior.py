"""The posterior of a fit with priors: Laplace approximation, checked by importance sampling.

The posterior mode z* on the estimation scale (where every parameter is unbounded) comes from
the optimiser; the Laplace approximation is the normal N(z*, H^-1), H the Hessian of the
negative log posterior density at z* (Gelman et al. 2013, ch. 4 and 13). It is checked by
importance sampling: draws from a defensive mixture of a Student-t about the Laplace normal
(4 degrees of freedom) and the prior (a quarter of the draws; Hesterberg 1995), weighted by
posterior / proposal, give the posterior mean and covariance of z with effective sample size
ESS = (sum w)^2 / sum w^2 (Gelman et al. 2013, ch. 10; Kong 1992).

Which is handed on:
- ``Laplace`` when the importance-sampling moments agree with it (every mean within 0.1
  Laplace sd of the mode, every sd within a factor 0.9-1.1): the posterior is close to
  normal on the estimation scale; also when the ESS is too low (< 200) for the check, which
  the message then says;
- ``importance sampling`` (the weighted mean and covariance) when they disagree, or when the
  Hessian is not usable and the ESS is at least 200;
- no uncertainty (``none``) otherwise.
The draws use the fit's seed, so a fit is reproducible bit for bit. The thresholds are common
practice, no source.

References
----------
Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B., Vehtari, A., Rubin, D. B. (2013).
    Bayesian Data Analysis, 3rd ed., CRC Press.
Hesterberg, T. (1995). Weighted average importance sampling and defensive mixture
    distributions. Technometrics 37(2), 185-194 (recalled).
Kong, A. (1992). A note on importance sampling using standardized weights. Technical report
    348, Department of Statistics, University of Chicago (recalled).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from errbudget.uncertainty.design import UNIT_CLIP  # draws stay off the support's edges
from errbudget.uncertainty.scales import Scale

IS_DRAWS = 4000  # importance-sampling draws, solved in one batched call
T_DOF = 4.0  # degrees of freedom of the Student-t proposal (heavier tails than the normal)
PRIOR_SHARE = 0.25  # share of the proposal mixture drawn from the prior (defensive)
MIN_ESS = 200.0  # fewer effective draws: the sampling check is not trusted
# Agreement of the sampled moments with the Laplace approximation: means within 0.1 Laplace
# sd, sds within 10 %. At the smallest ESS accepted (200) these are about 1.4 and 2 standard
# errors of the sampled moments; a disagreement hands on the sampled moments, the safer side.
MEAN_TOLERANCE = 0.1
SD_RATIO = (0.9, 1.1)
FALLBACK_WIDTH = 1.0  # proposal sd of a coordinate without prior when there is no Laplace
GH_NODES = 60  # Gauss-Hermite nodes for moments of a transformed normal


@dataclass(frozen=True)
class Posterior:
    """The posterior handed on: a normal on the estimation scale of the model parameters.

    Attributes
    ----------
    method : str
        "Laplace", "importance sampling" or "none".
    center : numpy.ndarray or None
        Mean (k,) on the estimation scale.
    cov : numpy.ndarray or None
        Covariance (k, k) on the estimation scale.
    ess : float or None
        Effective sample size of the importance sampling (None if it was not run).
    n_draws : int
        Importance-sampling draws.
    message : str
        What was chosen and why.
    """

    method: str
    center: np.ndarray | None
    cov: np.ndarray | None
    ess: float | None
    n_draws: int
    message: str


def _prior_coordinate(prior, scale: Scale, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Draws z from the prior restricted to the scale's support, and their log density in z."""
    low_p, high_p = float(prior.cdf(scale.low)), float(prior.cdf(scale.high))
    mass = high_p - low_p
    x = prior.ppf(np.clip(low_p + mass * u, UNIT_CLIP, 1.0 - UNIT_CLIP))
    z = scale.to_estimation(x)
    return z, prior.logpdf(x) + scale.log_jacobian(z) - math.log(mass)


def _prior_component_density(problem, z, index, center, sd) -> np.ndarray:
    """Log density (n,) of the prior component at rows ``z`` (n, d) of the free coordinates."""
    total = np.zeros(z.shape[0])
    with np.errstate(all="ignore"):
        for c, coordinate in enumerate(index):
            prior = problem.priors[coordinate] if coordinate < problem.k else None
            if prior is None:
                total += stats.norm.logpdf(z[:, c], center[c], sd[c])
                continue
            scale = problem.scales[coordinate]
            mass = float(prior.cdf(scale.high)) - float(prior.cdf(scale.low))
            x = scale.to_natural(z[:, c])
            total += prior.logpdf(x) + scale.log_jacobian(z[:, c]) - math.log(mass)
    return np.where(np.isfinite(total), total, -np.inf)


def _proposal(problem, z_mode, free, cov_free, rng, n):
    """Draws (n, d_free) from the proposal mixture and their log proposal density (n,)."""
    index = np.flatnonzero(free)
    center = z_mode[index]
    sd = np.full(index.size, FALLBACK_WIDTH) if cov_free is None else np.sqrt(np.diag(cov_free))
    n_prior = n if cov_free is None else int(round(PRIOR_SHARE * n))
    u = rng.random((n_prior, index.size))
    from_prior = np.empty((n_prior, index.size))
    for c, coordinate in enumerate(index):
        prior = problem.priors[coordinate] if coordinate < problem.k else None
        if prior is None:
            normal = stats.norm.ppf(np.clip(u[:, c], UNIT_CLIP, 1.0 - UNIT_CLIP))
            from_prior[:, c] = center[c] + sd[c] * normal
        else:
            from_prior[:, c] = _prior_coordinate(prior, problem.scales[coordinate], u[:, c])[0]
    if cov_free is None:
        draws = from_prior
        return draws, _prior_component_density(problem, draws, index, center, sd)
    t = stats.multivariate_t(loc=center, shape=cov_free, df=T_DOF)
    from_t = np.asarray(t.rvs(size=n - n_prior, random_state=rng)).reshape(-1, index.size)
    draws = np.vstack([from_prior, from_t])
    log_t = np.asarray(t.logpdf(draws)).reshape(-1)
    log_p = _prior_component_density(problem, draws, index, center, sd)
    return draws, np.logaddexp(math.log(PRIOR_SHARE) + log_p, math.log1p(-PRIOR_SHARE) + log_t)


def importance_sampling(problem, z_mode, free, cov_free, rng, n=IS_DRAWS):
    """Weighted posterior mean (k,), covariance (k, k) and ESS on the estimation scale.

    ``cov_free`` is the Laplace covariance of the free coordinates, or None (the proposal is
    then the prior, with a normal of sd FALLBACK_WIDTH for coordinates without a prior).
    Returns (mean, cov, ess); mean and cov are None when no draw has a finite weight.
    """
    draws, log_q = _proposal(problem, z_mode, free, cov_free, rng, n)
    full = np.repeat(z_mode[None, :], draws.shape[0], axis=0)
    full[:, free] = draws
    loglik, log_prior = problem.parts(full)
    log_w = loglik + log_prior - log_q
    log_w = np.where(np.isfinite(log_w), log_w, -np.inf)
    if not np.isfinite(log_w).any():
        return None, None, 0.0
    w = np.exp(log_w - np.max(log_w))
    ess = float(w.sum() ** 2 / np.sum(w**2))
    w = w / w.sum()
    model = full[:, : problem.k]
    mean = w @ model
    centred = model - mean
    cov = (centred * w[:, None]).T @ centred
    return mean, 0.5 * (cov + cov.T), ess


def choose(z_mode, laplace_cov, laplace_detail, sampled, k: int, n: int) -> Posterior:
    """Laplace or importance sampling by the rule of the module docstring."""
    mean, cov, ess = sampled
    usable = mean is not None and ess >= MIN_ESS
    sample_note = f"importance sampling with {n} draws, effective sample size {ess:.0f}"
    if laplace_cov is not None:
        sd = np.sqrt(np.diag(laplace_cov))
        if not usable:
            return Posterior(
                "Laplace",
                z_mode[:k],
                laplace_cov,
                ess,
                n,
                f"Laplace approximation ({laplace_detail}); {sample_note}, too few to check it",
            )
        shift = np.abs(mean - z_mode[:k]) / sd
        ratio = np.sqrt(np.diag(cov)) / sd
        agree = np.all(shift <= MEAN_TOLERANCE) & np.all(
            (ratio >= SD_RATIO[0]) & (ratio <= SD_RATIO[1])
        )
        detail = (
            f"largest mean shift {shift.max():.2f} sd, sd ratios "
            f"{ratio.min():.2f}-{ratio.max():.2f}"
        )
        if agree:
            return Posterior(
                "Laplace",
                z_mode[:k],
                laplace_cov,
                ess,
                n,
                f"Laplace approximation ({laplace_detail}), confirmed by {sample_note} ({detail})",
            )
        return Posterior(
            "importance sampling",
            mean,
            cov,
            ess,
            n,
            f"the posterior is not close to normal ({detail} against the Laplace "
            f"approximation): {sample_note}",
        )
    if usable:
        return Posterior(
            "importance sampling",
            mean,
            cov,
            ess,
            n,
            f"no Laplace approximation ({laplace_detail}): {sample_note} from the prior",
        )
    return Posterior(
        "none",
        None,
        None,
        ess,
        n,
        f"no Laplace approximation ({laplace_detail}) and {sample_note}, too few",
    )


def transformed_moments(scale: Scale, mean: float, sd: float) -> tuple[float, float]:
    """Mean and sd of x = scale.to_natural(z), z ~ N(mean, sd^2) (Gauss-Hermite quadrature)."""
    nodes, weights = np.polynomial.hermite_e.hermegauss(GH_NODES)
    weights = weights / weights.sum()
    x = scale.to_natural(mean + sd * nodes)
    first = float(weights @ x)
    return first, float(math.sqrt(max(float(weights @ (x - first) ** 2), 0.0)))


def prior_moments(prior, scale: Scale) -> tuple[float, float]:
    """Mean and sd of the prior restricted to the scale's support [unit of the parameter]."""
    low, high = scale.low, scale.high
    mean = float(prior.expect(lambda x: x, lb=low, ub=high, conditional=True))
    second = float(prior.expect(lambda x: (x - mean) ** 2, lb=low, ub=high, conditional=True))
    return mean, math.sqrt(max(second, 0.0))
