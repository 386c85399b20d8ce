"""Which uncertain input drives a per-member result: the largest Spearman rank correlation."""

from __future__ import annotations

import math

import numpy as np

MIN_MEMBERS = 10  # fewer finite members say nothing about a rank correlation


def most_correlated(target: np.ndarray, sampled: dict) -> dict | None:
    """The input whose Spearman rank correlation with ``target`` is largest in size.

    Non-finite entries of ``target`` are left out; returns {"name", "rho"} or None.
    """
    from scipy import stats

    finite = np.isfinite(target)
    best = None
    for name, values in sampled.items():
        if np.ptp(values[finite]) == 0:
            continue
        rho = float(stats.spearmanr(values[finite], target[finite]).statistic)
        if math.isfinite(rho) and (best is None or abs(rho) > abs(best["rho"])):
            best = {"name": name, "rho": rho}
    return best


def drivers(errors: np.ndarray, sampled: dict) -> list[dict | None]:
    """Per quantity: the input whose rank correlation with the discretisation error is largest.

    ``errors`` (Q, S) per member; ``sampled`` maps each uncertain input to its values (S,).
    """
    result = []
    for q in range(errors.shape[0]):
        finite = np.isfinite(errors[q])
        usable = bool(sampled) and finite.sum() > MIN_MEMBERS and np.ptp(errors[q][finite]) > 0
        result.append(most_correlated(errors[q], sampled) if usable else None)
    return result
