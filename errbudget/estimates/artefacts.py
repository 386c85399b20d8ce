"""Numerical artefacts: behaviour of the case's step that the accurate solution does not show.

Each member of the ensemble is compared with its own solution on the finest level of the
ladder, read at the case's grid times. An artefact counts only where the accurate solution
does not show the same feature (a population that truly goes extinct is not an artefact).
"""

from __future__ import annotations

import numpy as np

DIVERGENCE_FACTOR = 1e3  # |N| this many times the accurate solution's largest |N| is runaway
FLAT_INCREMENT = 1e-9  # increments below this share of the largest |N| count as flat


def _sign_changes(states: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Sign changes of the increments, ignoring flat ones, per member; states (T, S)."""
    increments = np.diff(states, axis=0)
    threshold = FLAT_INCREMENT * scale
    signs = (increments > threshold).astype(np.int8) - (increments < -threshold).astype(np.int8)
    if signs.shape[0] < 2:
        return np.zeros(states.shape[1], dtype=int)
    # Carry the last non-flat sign forward over flat increments, then count the flips.
    if signs.all():  # no flat increment at all (the usual case): no carrying needed
        carried = signs
    else:
        rows = np.arange(signs.shape[0], dtype=np.int32)[:, None]
        last = np.maximum.accumulate(np.where(signs != 0, rows, np.int32(0)), axis=0)
        carried = np.take_along_axis(signs, last, axis=0)
    flips = (carried[1:] != carried[:-1]) & (carried[1:] != 0) & (carried[:-1] != 0)
    return flips.sum(axis=0).astype(int)


def _crosses(states: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Whether a member's states lie on both sides of ``level`` (strictly) at some point."""
    with np.errstate(invalid="ignore"):
        above = (states > level * (1 + 1e-12) + 1e-300).any(axis=0)
        below = (states < level * (1 - 1e-12) - 1e-300).any(axis=0)
    return above & below


def detect(
    coarse: np.ndarray,
    fine: np.ndarray,
    stable_levels: list[np.ndarray],
    horizon_index: int,
    *,
    sustained: bool = True,
) -> dict[str, np.ndarray]:
    """Per-member artefact masks.

    Parameters
    ----------
    coarse : ndarray, shape (T, S)
        States on the case's grid [population].
    fine : ndarray, shape (T, S)
        The finest ladder level read at the same times [population].
    stable_levels : list of ndarray (S,)
        Values of stable equilibria per member (NaN where absent) [population].
    horizon_index : int
        Last grid index at or before the horizon.
    sustained : bool
        Also test whether oscillation persists (skipped when only presence matters).

    Returns
    -------
    dict of str to bool ndarray (S,)
        Keys ``divergence``, ``negative``, ``overshoot``, ``oscillation``, and ``sustained``
        (oscillation still present in the last quarter of the run: a cycle, not a transient).
    """
    coarse = coarse[: horizon_index + 1].astype(float)
    fine = fine[: horizon_index + 1].astype(float)
    with np.errstate(all="ignore"):
        fine_ok = np.isfinite(fine).all(axis=0)
        scale = np.where(fine_ok, np.abs(fine).max(axis=0), np.inf)
        finite = np.isfinite(coarse).all(axis=0)
        runaway = np.abs(np.where(np.isfinite(coarse), coarse, 0)).max(axis=0) > (
            DIVERGENCE_FACTOR * scale
        )
        divergence = fine_ok & (~finite | runaway)
        safe = np.where(np.isfinite(coarse), coarse, 0.0)
        negative = fine_ok & ~divergence & (safe.min(axis=0) < 0) & (fine.min(axis=0) >= 0)
        overshoot = np.zeros(coarse.shape[1], dtype=bool)
        for level in stable_levels:
            level = np.broadcast_to(level, overshoot.shape)
            valid = np.isfinite(level)
            crossed = _crosses(safe, level) & ~_crosses(fine, level)
            overshoot |= valid & crossed
        overshoot &= fine_ok & ~divergence
        extra = _sign_changes(safe, scale) > _sign_changes(fine, scale)
        oscillation = fine_ok & ~divergence & extra
        tail = max(3, coarse.shape[0] // 4)
        lasting = (
            oscillation
            & (_sign_changes(safe[-tail:], scale) > _sign_changes(fine[-tail:], scale) + 1)
            if sustained and oscillation.any()
            else np.zeros_like(oscillation)
        )
    return {
        "divergence": divergence,
        "negative": negative,
        "overshoot": overshoot,
        "oscillation": oscillation,
        "sustained": lasting,
    }


MESSAGES = {
    "divergence": "the solution blows up or becomes undefined (overflow or not a number) at "
    "the case's step while the accurate solution stays bounded",
    "negative": "the population goes below zero at the case's step; the accurate solution does not",
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
