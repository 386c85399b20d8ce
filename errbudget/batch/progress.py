"""Progress across a batch on stderr: cases done, member-steps done, and the time left.

Shown only when stderr is a terminal and the batch is not quiet (``--quiet``; CI sets ``CI``).
The cases report their work as they go: in this process through :meth:`BatchBar.receiver`,
from Dask workers as events (see :class:`errbudget.batch.task.CaseTask`).
"""

from __future__ import annotations

import os
import sys
import threading
import time

REFRESH = 0.25  # seconds between two redraws at most
SETTLED = 0.05  # share of the batch done before a time left is guessed without a finished case


def wanted(quiet: bool) -> bool:
    """Whether to show progress: a terminal on stderr, not quiet, not in CI."""
    return not quiet and not os.environ.get("CI") and sys.stderr.isatty()


class BatchBar:
    """The batch's progress line (tqdm on stderr). Thread-safe: events arrive from Dask's
    thread while the driver writes outputs."""

    def __init__(self, total: int, title: str = "errbudget"):
        from tqdm import tqdm

        self.bar = tqdm(
            total=total,
            desc=title,
            file=sys.stderr,
            leave=False,
            dynamic_ncols=True,
            unit="case",
            # tqdm puts ", " before the postfix: it follows the elapsed time
            bar_format="{desc}: {n_fmt}/{total_fmt} cases |{bar}| {elapsed} so far{postfix}",
        )
        self.total = max(total, 1)
        self.planned_steps: dict[int, int] = {}
        self.done_steps: dict[int, int] = {}
        self.finished: set[int] = set()
        self.started = time.monotonic()
        self.drawn = 0.0
        self.lock = threading.Lock()

    def planned(self, case: int, member_steps: int) -> None:
        with self.lock:
            self.planned_steps[case] = self.planned_steps.get(case, 0) + int(member_steps)
            self._draw()

    def advanced(self, case: int, member_steps: int) -> None:
        with self.lock:
            self.done_steps[case] = self.done_steps.get(case, 0) + int(member_steps)
            self._draw()

    def case_done(self, case: int) -> None:
        with self.lock:
            if case not in self.finished:
                self.finished.add(case)
                self.bar.update(1)
            self._draw(force=True)

    def event(self, event) -> None:
        """A Dask event ``(time, {"case", "planned", "done"})`` from a worker."""
        message = event[1] if isinstance(event, tuple | list) else event
        case = int(message["case"])
        if message.get("planned"):
            self.planned(case, message["planned"])
        if message.get("done"):
            self.advanced(case, message["done"])

    def receiver(self, case: int) -> _CaseReceiver:
        """A :class:`errbudget.budget.progress.Progress` for one case run in this process."""
        return _CaseReceiver(self, case)

    def close(self) -> None:
        with self.lock:
            self.bar.close()

    def _draw(self, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self.drawn < REFRESH:
            return
        self.drawn = now
        steps = sum(self.done_steps.values())
        left = self._left(now)
        text = f"{steps:.3g} member-steps" + (f", about {left} left" if left else "")
        self.bar.set_postfix_str(text, refresh=True)

    def _left(self, now: float) -> str | None:
        """Time left from the share done: finished cases, and running cases by their work."""
        share = len(self.finished)
        for case, planned in self.planned_steps.items():
            if case not in self.finished and planned > 0:
                share += min(self.done_steps.get(case, 0) / planned, 1.0)
        share /= self.total
        if not self.finished and share < SETTLED:  # too early to say
            return None
        seconds = (now - self.started) * (1 - share) / share
        return f"{seconds / 60:.0f} min" if seconds >= 120 else f"{seconds:.0f} s"


class _CaseReceiver:
    def __init__(self, bar: BatchBar, case: int):
        self.bar = bar
        self.case = case

    def stage(self, label: str) -> None:
        return None

    def planned(self, plan) -> None:
        self.bar.planned(self.case, plan.member_steps)

    def advanced(self, member_steps: int) -> None:
        self.bar.advanced(self.case, member_steps)
