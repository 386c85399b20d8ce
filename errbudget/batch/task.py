"""One case of a batch as a task: run, render, and hand everything back as data.

:func:`run_task` runs anywhere (this process, or a Dask worker: the task and its result are
pickled, the case with cloudpickle since its law holds closures). It reads no file but the
case's counts file (when the case fits counts) and writes none: the outputs come back as texts
and the driver writes them (:func:`errbudget.batch.files.write_outputs`). A failure is data
too: the case's one-line message and exit code, as the command line would have shown it for
a run of that case alone.
"""

from __future__ import annotations

import os
import time
import traceback
from dataclasses import dataclass
from datetime import UTC, datetime

from errbudget.batch.files import Rendered, render_outputs
from errbudget.errors import InputError

EXIT_INTERNAL, EXIT_INPUT = 1, 2
PROGRESS_TOPIC = "errbudget-progress"  # Dask event topic of the cases' progress
PROGRESS_EVERY = 0.5  # seconds between two progress events of one case
MEMORY_MESSAGE = (
    "not enough memory for this run; lower [budget] samples or --samples, or shorten the horizon"
)


@dataclass(frozen=True)
class CaseTask:
    """Everything a worker needs to run one case of the batch.

    Attributes
    ----------
    index : int -- position of the case in the batch
    case : Case -- the loaded case
    samples, seed : int or None -- overrides of ``[budget] samples`` and ``seed``
    patient : bool -- run even past ``[budget] time_limit``
    previous : dict or None -- the last history entry of the case's folder when submitted
    events : bool -- send progress events to the Dask client (on a worker only)
    """

    index: int
    case: object
    samples: int | None
    seed: int | None
    patient: bool
    previous: dict | None
    events: bool = False


@dataclass(frozen=True)
class CaseResult:
    """What came back from a case: its outputs, or its failure.

    Attributes
    ----------
    index : int
    rendered : Rendered or None -- the outputs, None when the case failed
    exit_code : int -- 0, or 2 (bad input) / 1 (internal error) for a failure
    message : str -- the failure in one line ("" for a success)
    details : str -- the traceback of an internal error ("" otherwise)
    seconds : float -- wall time of the task where it ran [s]
    where : str -- the process that ran it (host and process id)
    """

    index: int
    rendered: Rendered | None
    exit_code: int = 0
    message: str = ""
    details: str = ""
    seconds: float = 0.0
    where: str = ""

    @property
    def failed(self) -> bool:
        return self.exit_code != 0


def run_task(task: CaseTask, mapper=None, progress=None) -> CaseResult:
    """Run one case and render its outputs; any failure is returned, never raised.

    ``mapper`` runs the case's member chunks as tasks (a large case run from the driver);
    ``progress`` receives the run's progress (see :mod:`errbudget.budget.progress`).
    """
    from errbudget.budget.run import run_case

    started = time.perf_counter()
    where = f"{os.uname().nodename}:{os.getpid()}"
    receiver = _Events(task.index) if task.events and progress is None else progress
    case = task.case

    def failure(code: int, message: str, details: str = "") -> CaseResult:
        seconds = time.perf_counter() - started
        return CaseResult(task.index, None, code, message, details, seconds, where)

    try:
        budget = run_case(
            case, samples=task.samples, seed=task.seed, progress=receiver,
            patient=task.patient, mapper=mapper,
        )  # fmt: skip
        timestamp = datetime.now(UTC).isoformat(timespec="seconds")
        rendered = render_outputs(budget, case.text, task.previous, timestamp)
    except InputError as error:
        # As on the command line: a problem that names no file lies in the counts the run
        # read, or else in the case.
        source = str(case.counts.path) if case.counts is not None else str(case.path)
        return failure(EXIT_INPUT, error.located(source).format())
    except MemoryError:
        return failure(EXIT_INPUT, f"{case.path}: {MEMORY_MESSAGE}")
    except Exception as error:  # noqa: BLE001 - one case's fault stays that case's
        text = f"internal error: {type(error).__name__}: {error}"
        return failure(EXIT_INTERNAL, text, traceback.format_exc())
    finally:
        if isinstance(receiver, _Events):
            receiver.flush()
    seconds = time.perf_counter() - started
    return CaseResult(task.index, rendered, seconds=seconds, where=where)


class _Events:
    """A Progress that sends the case's work to the Dask client as events (on a worker).

    At most one event every PROGRESS_EVERY seconds: {"case", "planned", "done"} with the
    member-steps predicted and done since the last event.
    """

    def __init__(self, index: int):
        self.index = index
        self.planned_steps = 0
        self.done = 0
        self.last = time.monotonic()

    def stage(self, label: str) -> None:
        return None

    def planned(self, plan) -> None:
        self.planned_steps = int(plan.member_steps)
        self.flush()

    def advanced(self, member_steps: int) -> None:
        self.done += int(member_steps)
        if time.monotonic() - self.last >= PROGRESS_EVERY:
            self.flush()

    def flush(self) -> None:
        if not self.done and not self.planned_steps:
            return
        try:
            from distributed import get_worker

            message = {"case": self.index, "planned": self.planned_steps, "done": self.done}
            get_worker().log_event(PROGRESS_TOPIC, message)
        except (ImportError, ValueError):  # not on a worker: nobody to tell
            pass
        self.planned_steps = self.done = 0
        self.last = time.monotonic()
