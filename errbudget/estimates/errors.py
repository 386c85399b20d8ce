"""The discretisation error of every ensemble member: a level's values against the reference."""

from __future__ import annotations

import numpy as np

from errbudget.solve.problem import Problem


def discretisation_errors(case: Problem, values: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """|value - reference| per quantity and member, shape (Q, S) [quantity units].

    A time-to level reached by one solution but not the other within the horizon gets the
    lower bound |horizon - t|; where neither reaches it the error is 0 (nothing to compare).
    Members whose run diverged keep an infinite error.
    """
    with np.errstate(invalid="ignore"):
        errors = np.abs(values - reference)
    for q, spec in enumerate(case.quantities):
        if spec.kind != "time-to":
            continue
        v, ref = values[q], reference[q]
        neither = np.isnan(v) & np.isnan(ref)
        one = np.isnan(v) ^ np.isnan(ref)
        found = np.where(np.isnan(v), ref, v)
        errors[q] = np.where(neither, 0.0, np.where(one, np.abs(case.horizon - found), errors[q]))
    errors[np.isnan(errors)] = np.inf
    return errors
