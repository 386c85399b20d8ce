"""A programme of cases: every case run once, in this process or on a Dask cluster, each case's
outputs written as a run of that case alone would write them, and an overview of them all.

Two levels of work on a cluster. A case is one task (it runs, renders its report, and sends
the texts back); a large case -- a design of at least ``split_rows`` parameter sets -- is run
from here instead, with the chunks of members of each of its passes as tasks
(:class:`errbudget.batch.cluster.DaskMapper`). Either way the numbers are those of a local
run: the design, its seeds and the chunks are fixed before anything is sent, and the chunks
are joined in member order.

Failures stay per case: a case that cannot be read, run or written gets its one-line message
and its own exit code (2 bad input, 1 internal error) in the overview, and the others go on.
"""

from __future__ import annotations

import time
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path

from errbudget.batch.files import write_outputs
from errbudget.batch.progress import BatchBar, wanted
from errbudget.batch.task import (
    EXIT_INPUT,
    EXIT_INTERNAL,
    MEMORY_MESSAGE,
    PROGRESS_TOPIC,
    CaseResult,
    CaseTask,
    run_task,
)
from errbudget.errors import InputError
from errbudget.outputs import history
from errbudget.outputs.files import environment_error, write_all_atomic
from errbudget.outputs.overview import (
    CSV_NAME,
    FAILED,
    HTML_NAME,
    Row,
    check_overview_place,
    row_for_budget,
    row_for_failure,
    terminal_table,
)
from errbudget.solve.chunks import MAPPED_CHUNK

# A case with at least this many parameter sets has its member chunks spread as tasks (two
# chunks or more); smaller ones are a task each, which keeps every worker busy with less
# traffic.
SPLIT_ROWS = 2 * MAPPED_CHUNK


@dataclass(frozen=True)
class _Planned:
    """A case that loaded and passed the checks, ready to run."""

    index: int
    path: Path
    case: object
    folder: Path
    rows: int


@dataclass
class Programme:
    """The outcome of a batch.

    Attributes
    ----------
    rows : list of Row -- the overview, one row per case in the order given
    results : dict of int to CaseResult -- what each case that ran returned (by position)
    out : Path -- the folder of the outputs and of the overview
    where : str -- where the cases ran
    seconds : float -- wall time of the batch [s]
    overview : list of Path -- overview.csv and overview.html, once written
    overview_error : str -- why the overview could not be written ("" if it was)
    """

    rows: list[Row]
    results: dict[int, CaseResult]
    out: Path
    where: str
    seconds: float
    overview: list[Path] = field(default_factory=list)
    overview_error: str = ""

    @property
    def failed(self) -> list[Row]:
        return [row for row in self.rows if row.verdict == FAILED]

    @property
    def exit_code(self) -> int:
        """0 when every case ran; else 1 if any internal error, else 2 (bad input)."""
        codes = {row.exit_code for row in self.rows}
        if EXIT_INTERNAL in codes:
            return EXIT_INTERNAL
        if EXIT_INPUT in codes or self.overview_error:
            return EXIT_INPUT
        return 0

    def table(self) -> str:
        """The overview as a compact text table (failure messages below it)."""
        return terminal_table(self.rows)


def run_cases(
    paths: Iterable[str | Path],
    *,
    out: str | Path = "reports",
    samples: int | None = None,
    seed: int | None = None,
    patient: bool = False,
    client=None,
    cluster: str | None = None,
    quiet: bool = True,
    split_rows: int = SPLIT_ROWS,
) -> Programme:
    """Run a programme of cases and write their outputs and the overview.

    Parameters
    ----------
    paths : iterable of str or Path
        The case files; each writes into ``out/<file stem>/`` as ``errbudget run`` does.
    out : str or Path
        Folder of the outputs; the overview goes to ``out/overview.csv`` and
        ``out/overview.html``.
    samples, seed : int, optional
        Overrides of ``[budget] samples`` and ``seed`` for every case.
    patient : bool
        Run cases predicted to exceed their ``[budget] time_limit``.
    client : distributed.Client, optional
        Run on the workers of this Dask client (left open).
    cluster : str, optional
        Or start / reach one: ``"local"``, ``"local:N"``, ``"tcp://HOST:PORT"`` or a scheduler
        file (closed, and a local cluster shut down, at the end). Neither: in this process.
    quiet : bool
        No progress on stderr (progress needs a terminal anyway).
    split_rows : int
        On a cluster, cases with at least this many parameter sets have their member chunks
        run as tasks rather than being one task.

    Returns
    -------
    Programme
        Raises InputError only for what concerns the whole batch (``--out``, the cluster).
    """
    if client is not None and cluster is not None:
        raise ValueError("give a client or a cluster, not both")
    started = time.perf_counter()
    paths, out = [Path(p) for p in paths], Path(out)
    check_overview_place(out)
    connection = None
    if cluster is not None:
        from errbudget.batch.cluster import connect

        connection = connect(cluster)
        client = connection.client
    try:
        where = _where(client, connection)
        bar = BatchBar(len(paths)) if wanted(quiet) else None
        options = {"samples": samples, "seed": seed, "patient": patient}
        try:
            # Each case is loaded, checked and sent on its way in turn: the first ones run
            # while the later ones load.
            results, rows = _run_all(_plans(paths, out, samples), options, client, bar,
                                     split_rows)  # fmt: skip
        finally:
            if bar is not None:
                bar.close()
    finally:
        if connection is not None:
            connection.close()
    ordered_rows = [rows[i] for i in range(len(paths))]
    programme = Programme(ordered_rows, results, out, where, time.perf_counter() - started)
    _write_overview(programme)
    return programme


def _where(client, connection) -> str:
    if connection is not None:
        return connection.where
    if client is None:
        return "in this process"
    return f"on the cluster at {client.scheduler.address}"


def _plans(paths: list[Path], out: Path, samples: int | None) -> Iterator[_Planned | Row]:
    """Each case loaded and checked, in turn: ready to run, or its failure as a row."""
    from errbudget.case.load import load_case
    from errbudget.case.resources import check_design_size, design_rows, precheck_case
    from errbudget.outputs.files import claim_output_folder

    folders = {}
    for index, path in enumerate(paths):
        try:
            precheck_case(path, samples)
            case = load_case(path, samples=samples)
            if samples is not None:
                check_design_size(case, samples, "command line", f"--samples, for {case.path}")
            folder = claim_output_folder(folders, case.path, out)
            rows = design_rows(case, samples if samples is not None else case.budget.samples)
        except Exception as error:  # noqa: BLE001 - one case's fault stays that case's
            code, message = _failure(error, path)
            yield row_for_failure(index, path, message, code)
            continue
        yield _Planned(index, path, case, folder, rows)


def _failure(error: BaseException, place: Path) -> tuple[int, str]:
    """Exit code and one-line message of a case's failure, as the command line words them."""
    if isinstance(error, InputError):
        return EXIT_INPUT, error.format()
    if isinstance(error, OSError):
        where = error.filename or place
        return EXIT_INPUT, environment_error(error, where, "use this file or folder").format()
    if isinstance(error, MemoryError):
        return EXIT_INPUT, f"{place}: {MEMORY_MESSAGE}"
    return EXIT_INTERNAL, f"internal error: {type(error).__name__}: {error}"


def _run_all(plans, options, client, bar, split_rows):
    """Run every case and write its outputs: the results and the overview rows by position."""
    results: dict[int, CaseResult] = {}
    rows: dict[int, Row] = {}

    def done(plan: _Planned, result: CaseResult) -> None:
        result = results[plan.index] = _finish(plan, result, bar)
        rows[plan.index] = (
            row_for_failure(plan.index, plan.path, result.message, result.exit_code)
            if result.failed
            else row_for_budget(plan.index, plan.path, result.rendered.data)
        )

    if client is None:
        for plan in plans:
            if _failed(plan, rows, bar):
                continue
            done(plan, _run_here(plan, options, bar))
        return results, rows
    from distributed import as_completed

    from errbudget.batch.cluster import DaskMapper

    if bar is not None:
        client.subscribe_topic(PROGRESS_TOPIC, bar.event)
    try:
        futures, large = {}, []
        for plan in plans:
            if _failed(plan, rows, bar):
                continue
            if plan.rows >= split_rows:
                large.append(plan)
                continue
            task = _task(plan, options, events=bar is not None)
            if isinstance(task, CaseResult):  # its history could not be read
                done(plan, task)
                continue
            key = f"errbudget-case-{plan.index}-{time.time_ns()}"
            futures[client.submit(run_task, task, key=key, pure=False)] = plan
        mapper = DaskMapper(client)
        for plan in large:  # from here, its member chunks as tasks
            done(plan, _run_here(plan, options, bar, mapper))
        for future in as_completed(futures):
            plan = futures[future]
            try:
                result = future.result()
            except Exception as error:  # noqa: BLE001 - the worker died or the task was lost
                text = f"internal error: the task of this case failed on the cluster: {error}"
                result = CaseResult(plan.index, None, EXIT_INTERNAL, f"{plan.path}: {text}")
            done(plan, result)
    finally:
        if bar is not None:
            client.unsubscribe_topic(PROGRESS_TOPIC)
    return results, rows


def _failed(plan, rows: dict[int, Row], bar) -> bool:
    """Record a case that failed to load or check (a row already); True if it did."""
    if not isinstance(plan, Row):
        return False
    rows[plan.order] = plan
    if bar is not None:
        bar.case_done(plan.order)
    return True


def _finish(plan: _Planned, result: CaseResult, bar) -> CaseResult:
    written = _write(plan, result)
    if bar is not None:
        bar.case_done(plan.index)
    return written


def _task(plan: _Planned, options: dict, events: bool = False) -> CaseTask | CaseResult:
    """The case's task, with the history's last entry read now (or the failure to read it)."""
    try:
        previous = history.last_entry(plan.folder)
    except Exception as error:  # noqa: BLE001
        code, message = _failure(error, plan.folder)
        return CaseResult(plan.index, None, code, message)
    return CaseTask(plan.index, plan.case, previous=previous, events=events, **options)


def _run_here(plan: _Planned, options: dict, bar, mapper=None) -> CaseResult:
    """Run a case from this process (its chunks on the cluster when ``mapper`` is given)."""
    task = _task(plan, options)
    if isinstance(task, CaseResult):
        return task
    receiver = bar.receiver(plan.index) if bar is not None else None
    return run_task(task, mapper=mapper, progress=receiver)


def _write(plan: _Planned, result: CaseResult) -> CaseResult:
    """Write a case's outputs into its folder; a failure to write becomes the case's failure."""
    if result.failed or result.rendered is None:
        return result
    try:
        written = write_outputs(plan.folder, result.rendered)
    except Exception as error:  # noqa: BLE001
        code, message = _failure(error, plan.folder)
        return replace(result, rendered=None, exit_code=code, message=message)
    return replace(result, rendered=written)


def _write_overview(programme: Programme) -> None:
    """overview.csv and overview.html into the output folder, as one set."""
    from errbudget.outputs.overview import overview_csv
    from errbudget.report.overview import render_overview

    when = datetime.now(UTC).isoformat(timespec="seconds")
    page = render_overview(programme.rows, when=when, where=programme.where)
    out = programme.out
    files = {out / CSV_NAME: overview_csv(programme.rows), out / HTML_NAME: page}
    try:
        write_all_atomic(files)
    except InputError as error:
        programme.overview_error = error.format()
        return
    programme.overview = list(files)
