"""How much each flag of budget.json weighs, for the terminal summary and page 1 of the report.

Three weights: a flag that makes the step inadequate or the verdict impossible (an artefact,
a quantity with no value, a failed fit); one that questions what the verdict is measured
against (the model's form, the fitted spread, a collapsed stock, a ladder or reference that
could not be refined far enough); and notes that do not change the decision.
"""

from __future__ import annotations

VERDICT, DOUBT, NOTE = 3, 2, 1
WEIGHTS = {
    "divergence": VERDICT,
    "negative": VERDICT,
    "overshoot": VERDICT,
    "oscillation": VERDICT,
    "undefined-quantity": VERDICT,
    "fit-failed": VERDICT,
    "model-form": DOUBT,
    "prior-conflict": DOUBT,
    "weakly-informed": DOUBT,
    "collapsed": DOUBT,
    "ladder-capped": DOUBT,
    "reference-capped": DOUBT,
    "truncated-at-zero": NOTE,
    "indices-unsettled": NOTE,
    "off-grid": NOTE,
}
WORDS = {VERDICT: "changes the verdict", DOUBT: "weighs on the decision", NOTE: "note"}


def weight(flag: dict) -> int:
    """The weight of one flag (an unknown code counts as weighing on the decision)."""
    return WEIGHTS.get(str(flag.get("code", "")), DOUBT)


def ordered(flags: list[dict] | None) -> list[dict]:
    """The flags, heaviest first (their order in budget.json kept within a weight)."""
    return sorted(flags or [], key=lambda f: -weight(f))


def decisive(flags: list[dict] | None) -> list[dict]:
    """The flags that change or weigh on the decision, heaviest first."""
    return [f for f in ordered(flags) if weight(f) >= DOUBT]


def new_counts_outside(since_last: dict | None) -> dict | None:
    """The check of the last forecast against the counts that came in since, when any of them
    lies outside what the budget explains (|E| > 2 u_val); else None."""
    new = (since_last or {}).get("new_counts") or {}
    if not new.get("n_exceed"):
        return None
    return new
