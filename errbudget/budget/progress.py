"""What a run tells its caller while it works: the stage, the predicted work, the work done."""

from __future__ import annotations

from collections.abc import Callable
from typing import Protocol


class Progress(Protocol):
    """Receives a run's progress; the CLI shows it as a bar on stderr."""

    def stage(self, label: str) -> None:
        """A new stage begins (a short label in the case's words)."""

    def planned(self, plan) -> None:
        """The predicted work (a :class:`errbudget.budget.work.WorkPlan`) is known."""

    def advanced(self, member_steps: int) -> None:
        """This many more member-steps are done."""


class Labels:
    """A Progress that only passes stage labels on to a callable (or nowhere)."""

    def __init__(self, say: Callable[[str], None] | None = None):
        self.say = say

    def stage(self, label: str) -> None:
        if self.say is not None:
            self.say(label)

    def planned(self, plan) -> None:
        return None

    def advanced(self, member_steps: int) -> None:
        return None


def as_progress(progress) -> Progress:
    """A Progress from None, a callable taking a label, or a Progress."""
    if progress is None or callable(progress) and not hasattr(progress, "stage"):
        return Labels(progress)
    return progress
