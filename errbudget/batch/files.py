"""The outputs of one case, rendered apart from where they are written.

:func:`render_outputs` turns a run into the texts of budget.json, budget.html, ladder.csv and
summary.csv and the history line, given the history's last entry; it reads and writes no
file, so it can run on a worker. :func:`commit` writes them into the case's folder as one set
and appends the history line (the caller holds the history lock); :func:`write_outputs` does
both steps of a rendering made elsewhere: under the lock it checks that the history has not
moved on since the rendering (another run of the same case in between) and, if it has,
compares with the new last entry and renders again, so the outputs are what a run made here
would have written.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from errbudget import report  # looked up at each call: tests replace render_html
from errbudget.outputs import history
from errbudget.outputs.files import dumps, write_all_atomic
from errbudget.outputs.tables import ladder_csv, summary_csv


@dataclass(frozen=True)
class Rendered:
    """A run's outputs as texts, with what is needed to render them again.

    Attributes
    ----------
    data : dict -- budget.json, with ``run.timestamp`` and ``since_last``
    series : dict -- the run's series (for the report's figures)
    case_text : str -- the case file's text (shown in the report)
    previous : dict or None -- the history entry ``since_last`` compares with
    line : dict -- this run's history entry
    line_text : str -- the line appended to history.jsonl
    files : dict of str to str -- file name -> text
    """

    data: dict
    series: dict
    case_text: str
    previous: dict | None
    line: dict
    line_text: str
    files: dict[str, str]


def render_outputs(budget, case_text: str, previous: dict | None, timestamp: str) -> Rendered:
    """The outputs of ``budget`` (a :class:`errbudget.budget.run.Budget`), compared with the
    history entry ``previous``; ``timestamp`` is the run's time (ISO 8601)."""
    data = budget.to_dict()
    data["run"]["timestamp"] = timestamp
    line = history.entry(data, timestamp, series=budget.series)
    return _rendered(data, budget.series, case_text, previous, line)


def _rendered(data, series, case_text, previous, line) -> Rendered:
    data["since_last"] = history.compare(previous, line)
    files = {
        "budget.json": dumps(data),
        "budget.html": report.render_html(data, series, case_text),
        "ladder.csv": ladder_csv(data),
        "summary.csv": summary_csv(data),
    }
    return Rendered(data, series, case_text, previous, line, history.line_text(line), files)


def commit(folder: Path, rendered: Rendered) -> None:
    """Write the outputs as one set, then append the history line (lock held by the caller).

    Everything is rendered before: a failure before the renames leaves the earlier outputs
    and the history byte for byte as they were.
    """
    write_all_atomic({folder / name: text for name, text in rendered.files.items()})
    history.append(folder, rendered.line, text=rendered.line_text)


def write_outputs(folder: Path, rendered: Rendered) -> Rendered:
    """Write a rendering made elsewhere under the history lock; returns what was written."""
    with history.locked(folder):
        last = history.last_entry(folder)
        if last != rendered.previous:  # the history moved on: compare with what is there now
            data = dict(rendered.data)
            rendered = _rendered(data, rendered.series, rendered.case_text, last, rendered.line)
        commit(folder, rendered)
    return rendered
