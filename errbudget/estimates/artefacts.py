"""Numerical artefacts: behaviour of the case's step that the accurate solution does not show.

Each member of the ensemble is compared with its own solution on the finest level of the
ladder. Both levels are summarised while they are stepped (the
:class:`~errbudget.solve.trajectory.Features` of each, on its own grid up to the horizon),
and the summaries are compared here. An artefact counts only where the accurate solution
does not show the same feature (a population that truly goes extinct is not an artefact).
"""

from __future__ import annotations

import numpy as np

from errbudget.solve.trajectory import Features, features

CODES = ("negative", "overshoot", "oscillation", "divergence")  # the order they are listed in
DIVERGENCE_FACTOR = 1e3  # |N| this many times the accurate solution's largest |N| is runaway


def judge(coarse: Features, fine: Features, levels: np.ndarray) -> dict[str, np.ndarray]:
    """Per-member artefact masks of a level against the accurate (finest) level.

    Parameters
    ----------
    coarse, fine : Features
        What the judged level and the accurate level did (each on its own grid, up to the
        horizon; see :class:`errbudget.solve.trajectory.Features`).
    levels : ndarray, shape (E, S)
        The stable equilibria per member the features were taken against (NaN: absent).

    Returns
    -------
    dict of str to bool ndarray (S,)
        Keys ``divergence`` (non-finite, or |N| beyond DIVERGENCE_FACTOR times the accurate
        solution's largest), ``negative`` (the population reaches zero, where it is
        absorbed, while the accurate solution stays above it),
        ``overshoot`` (both sides of a stable level the accurate solution approaches from one
        side), ``oscillation`` (more turns of the increments than the accurate solution), and
        ``sustained`` (oscillation still present in the last quarter of the run: a cycle, not
        a transient). Nothing is flagged where the accurate solution itself failed.
    """
    fine_ok = fine.finite
    with np.errstate(invalid="ignore"):
        runaway = coarse.largest > DIVERGENCE_FACTOR * np.where(fine_ok, fine.largest, np.inf)
    divergence = fine_ok & (~coarse.finite | runaway)
    judged = fine_ok & ~divergence
    negative = judged & (coarse.smallest <= 0) & (fine.smallest > 0)
    valid = np.isfinite(np.asarray(levels, dtype=float).reshape(coarse.above.shape))
    crossed = coarse.above & coarse.below & ~(fine.above & fine.below)
    overshoot = judged & (valid & crossed).any(axis=0)
    oscillation = judged & (coarse.turns > fine.turns)
    sustained = oscillation & (coarse.late_turns > fine.late_turns + 1)
    return {
        "divergence": divergence,
        "negative": negative,
        "overshoot": overshoot,
        "oscillation": oscillation,
        "sustained": sustained,
    }


def detect(
    coarse: np.ndarray,
    fine: np.ndarray,
    stable_levels: list[np.ndarray],
    horizon_index: int,
) -> dict[str, np.ndarray]:
    """Artefact masks from stored states (T, S): a level and the accurate solution.

    Both are given on the same grid, whose last point at or before the horizon is
    ``horizon_index``; ``stable_levels`` lists per-member stable equilibria (S,) (NaN where
    absent). A convenience over :func:`judge` for stored trajectories.
    """
    size = coarse.shape[1]
    levels = np.array([np.broadcast_to(level, (size,)) for level in stable_levels]).reshape(
        -1, size
    )
    return judge(
        features(coarse, horizon_index, levels), features(fine, horizon_index, levels), levels
    )


MESSAGES = {
    "divergence": "the solution blows up or becomes undefined (overflow or not a number) at "
    "the case's step while the accurate solution stays bounded",
    "negative": "the population reaches zero (or would step below it) at the case's step while "
    "the accurate solution stays above zero",
    "overshoot": "the solution crosses a stable equilibrium that the accurate solution "
    "approaches from one side",
    "oscillation": "the increments change sign more often than in the accurate solution "
    "(spurious oscillation)",
}


def flags(masks: dict[str, np.ndarray], where: str) -> list[dict]:
    """Flags for the budget, one per artefact present, with the share of members affected."""
    result = []
    members = next(iter(masks.values())).size
    for code, message in MESSAGES.items():
        count = int(masks[code].sum())
        if count:
            text = f"{message}: {count} of {members} parameter sets ({count / members:.1%}) {where}"
            if code == "oscillation" and masks["sustained"].any():
                text += "; in some it does not die out (a period-2 cycle or worse)"
            result.append({"code": code, "message": text, "share": count / members, "count": count})
    return result
