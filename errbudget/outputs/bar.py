"""The progress bar on stderr: the stage, the member-steps done and the time left."""

from __future__ import annotations

import sys


class Bar:
    """A :class:`errbudget.budget.progress.Progress` drawn with tqdm on stderr.

    Until the run has predicted its work the bar shows only the stage; then it counts
    member-steps against the prediction, and tqdm's rate gives the time left. A prediction
    that falls short simply lets the count run past it.
    """

    def __init__(self, title: str):
        from tqdm import tqdm

        self.bar = tqdm(
            total=None,
            desc=title[:30],
            file=sys.stderr,
            leave=False,
            unit="step",
            unit_scale=True,
            dynamic_ncols=True,
            bar_format="{desc}: {postfix}",
        )
        self.label = ""

    def stage(self, label: str) -> None:
        self.label = label
        self.bar.set_postfix_str(label)

    def planned(self, plan) -> None:
        self.bar.total = max(int(plan.member_steps), 1)
        self.bar.bar_format = (
            "{desc}: {percentage:3.0f}%|{bar}| {postfix} [{elapsed} so far, {remaining} left]"
        )
        self.bar.refresh()

    def advanced(self, member_steps: int) -> None:
        if self.bar.total is not None:
            self.bar.update(min(member_steps, max(self.bar.total - self.bar.n, 0)))

    def close(self) -> None:
        self.bar.close()
