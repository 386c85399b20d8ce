"""First-order and total Sobol indices with bootstrap intervals, the work shared between groups.

The estimators and the bootstrap are those of ``SALib.analyze.sobol.analyze`` (SALib 1.6,
``calc_second_order=False``), operation for operation: the output is standardised, split into
its A, B and AB_j rows, and for each group j

    S_j = mean(B (AB_j - A)) / var([A; B]),   ST_j = mean((A - AB_j)^2) / 2 / var([A; B])

(Saltelli et al. 2010, Comput. Phys. Commun. 181:259, Table 2, recalled), with the half-width
Z sd over bootstrap resamples of the base samples. SALib recomputes the resampled A and B
rows and their variance for every group; here they are computed once, which gives the same
numbers (``tests/test_saltelli.py`` holds the two equal) in a fraction of the time, and no
warnings (a constant output is handled by the caller).
"""

from __future__ import annotations

import numpy as np

EPS = np.finfo(float).eps  # SALib's threshold for a constant output and a zero variance
RESAMPLE_BLOCK = 8  # bootstrap resamples evaluated together (bounds the memory)


def _ratio(numerator: np.ndarray, variance: np.ndarray) -> np.ndarray:
    """numerator / variance, 0 where the variance is not above EPS (SALib's rule)."""
    return np.divide(
        numerator, variance, out=np.zeros_like(variance, dtype=np.float64), where=variance > EPS
    )


def indices(y: np.ndarray, groups: int, conf_level: float, n_resamples: int, seed: int) -> dict:
    """``{"S1", "S1_conf", "ST", "ST_conf"}``, arrays of one value per group.

    Parameters
    ----------
    y : ndarray, shape (N (groups + 2),)
        The output on the design's rows, in SALib's row order.
    groups : int
        D, the number of groups (or inputs).
    conf_level : float
        Level of the bootstrap intervals.
    n_resamples : int
        Bootstrap resamples.
    seed : int
        Seed of the resampling (positive: numpy's default_rng, as SALib).
    """
    from scipy.stats import norm

    step = groups + 2
    n = y.size // step
    y = (y - y.mean()) / y.std()
    a, b = y[0 : y.size : step], y[step - 1 : y.size : step]
    ab = np.zeros((n, groups))
    for j in range(groups):
        ab[:, j] = y[j + 1 : y.size : step]
    r = np.random.default_rng(seed).integers(n, size=(n, n_resamples))
    z = norm.ppf(0.5 + conf_level / 2)
    whole = np.r_[a, b]
    constant = np.ptp(whole) <= EPS
    variance = np.var(whole, axis=0)
    out = {key: np.zeros(groups) for key in ("S1", "S1_conf", "ST", "ST_conf")}
    for j in range(groups):
        if not constant:
            out["S1"][j] = _ratio(np.mean(b * (ab[:, j] - a), axis=0), variance)
            out["ST"][j] = _ratio(0.5 * np.mean((a - ab[:, j]) ** 2, axis=0), variance)
    first_r, total_r = np.zeros((groups, n_resamples)), np.zeros((groups, n_resamples))
    low, high = np.inf, -np.inf
    # The resamples a few columns at a time: every column is reduced over the rows as in
    # one piece (the same numbers), with memory of n x RESAMPLE_BLOCK, not n x n_resamples.
    for start in range(0, n_resamples, RESAMPLE_BLOCK):
        columns = slice(start, min(start + RESAMPLE_BLOCK, n_resamples))
        rows = r[:, columns]
        a_r, b_r = a[rows], b[rows]
        resampled = np.r_[a_r, b_r]
        low, high = min(low, resampled.min()), max(high, resampled.max())
        variance_r = np.var(resampled, axis=0)
        for j in range(groups):
            ab_r = ab[rows, j]
            first_r[j, columns] = _ratio(np.mean(b_r * (ab_r - a_r), axis=0), variance_r)
            total_r[j, columns] = _ratio(0.5 * np.mean((a_r - ab_r) ** 2, axis=0), variance_r)
    if high - low <= EPS:  # SALib: a constant resampled output gives zero indices
        first_r[:], total_r[:] = 0.0, 0.0
    if high - low != 0.0:
        out["S1_conf"] = z * first_r.std(axis=1, ddof=1)
        out["ST_conf"] = z * total_r.std(axis=1, ddof=1)
    return out
