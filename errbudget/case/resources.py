"""Resource checks of a case: made on the raw tables before anything is parsed, allocated
or loaded for it, and again by the command line for ``--samples``. The limits themselves
are in :mod:`errbudget.case.limits`.

Light on purpose (no numpy, no pint): :func:`precheck_case` runs before the rest of the
package is loaded, so that a case beyond a limit is refused at once.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from errbudget.case.files import count_lines, read_regular_file
from errbudget.case.limits import (
    MAX_CASE_BYTES,
    MAX_COUNT_ROWS,
    MAX_COUNTS_BYTES,
    MAX_DESIGN_CELLS,
    MAX_DESIGN_ROWS,
    MAX_QUANTITIES,
    MIN_SAMPLES,
)
from errbudget.case.quantity_text import Grammar
from errbudget.errors import InputError


def precheck_case(path: Path, samples: int | None = None) -> None:
    """The resource limits of a case file and the grammar of its quantity strings, from
    its raw tables only.

    A file that cannot be decoded or parsed is left to :func:`errbudget.load_case`, which
    names the problem; this refuses only what is beyond a limit.
    """
    raw = read_regular_file(Path(path), MAX_CASE_BYTES, "case file")
    try:
        data = tomllib.loads(raw.decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError, RecursionError):
        return
    check_resources(Path(path), data, samples)
    for text, where in _quantity_strings(data):
        if isinstance(text, str) and text.strip():
            try:
                Grammar(text, where).check()
            except InputError as error:
                raise error.located(str(path), where) from None


def _quantity_strings(data: dict):
    """(text, key) of every quantity or unit string of a case, as the loader reads them."""
    model, sim = data.get("model"), data.get("simulation")
    if isinstance(model, dict):
        yield model.get("unit"), "model.unit"
    if isinstance(sim, dict):
        yield sim.get("step"), "simulation.step"
        yield sim.get("horizon"), "simulation.horizon"
    parameters = data.get("parameters")
    for name, entry in parameters.items() if isinstance(parameters, dict) else ():
        if not isinstance(entry, dict):
            yield entry, f"parameters.{name}"
            continue
        for key in ("value", "sd", "low", "high", "mode"):
            yield entry.get(key), f"parameters.{name}.{key}"
    quantities = data.get("quantity")
    for index, entry in enumerate(quantities if isinstance(quantities, list) else (), start=1):
        if isinstance(entry, dict):
            yield entry.get("at"), f"quantity[{index}].at"
            yield entry.get("level"), f"quantity[{index}].level"
    counts = data.get("counts")
    unit = counts.get("time_unit") if isinstance(counts, dict) else None
    if isinstance(unit, str):
        yield "1 " + unit, "counts.time_unit"  # as the loader reads it


def check_count_rows(line_feeds: int, source: str, where: str = "counts") -> None:
    """Refuse more than MAX_COUNT_ROWS lines after the header, before anything is parsed.

    ``line_feeds`` counts the header's own; a last line without one is not counted, which
    errs by one row on the lenient side.
    """
    if line_feeds - 1 > MAX_COUNT_ROWS:
        raise InputError(
            f"{where} file has more than {MAX_COUNT_ROWS} lines after the header, the limit of "
            "data rows (field counts are a small table; a fit to more would run for minutes)",
            source=source,
        )


def check_counts_file(path: Path, where: str = "counts") -> None:
    """A counts file is a regular file within the size and row limits; its lines are
    counted in chunks, only up to the limit, and nothing is parsed."""
    line_feeds = count_lines(path, MAX_COUNTS_BYTES, f"{where} file", MAX_COUNT_ROWS + 1)
    check_count_rows(line_feeds, str(path), where)


def counts_path(case_path: Path, file_text: str) -> Path:
    """The counts file named by ``[counts] file`` (relative to the case's folder), checked
    to be a readable regular file within the size and row limits."""
    given = Path(file_text)
    base = case_path.resolve().parent
    resolved = given if given.is_absolute() else (base / given).resolve()
    if not given.is_absolute() and not resolved.is_relative_to(base):
        raise InputError(
            "a relative counts path must stay inside the case's folder; "
            "give an absolute path to use a file elsewhere",
            str(case_path),
            "counts.file",
        )
    try:
        check_counts_file(resolved)
    except InputError as error:
        raise InputError(f"{resolved}: {error.message}", str(case_path), "counts.file") from None
    return resolved


def check_resources(path: Path, data: dict, samples: int | None = None) -> None:
    """The resource limits, on the raw tables of the case file ``path``.

    A case beyond a limit is refused here, before anything is allocated or loaded for it:
    the number of quantities, the counts file, and the design size from ``[budget] samples``
    and from ``samples`` (the command line's ``--samples``) when given. Anything else that
    is wrong is left to the loader.
    """
    source = str(path)
    entries = data.get("quantity")
    quantities = len(entries) if isinstance(entries, list) else 1
    if quantities > MAX_QUANTITIES:
        raise InputError(
            f"{quantities} quantities, above the limit of {MAX_QUANTITIES} per case; split "
            "the case into several files",
            source,
            "quantity",
        )
    counts = data.get("counts")
    file_text = counts.get("file") if isinstance(counts, dict) else None
    if isinstance(file_text, str) and file_text.strip():
        counts_path(path, file_text)
    parameters = data.get("parameters")
    if not isinstance(parameters, dict):
        return  # refused by the loader, with the reason
    fit = counts.get("fit") if isinstance(counts, dict) else None
    uncertain = {name for name, entry in parameters.items() if isinstance(entry, dict)}
    listed = isinstance(fit, list) and all(isinstance(name, str) for name in fit)
    groups = design_groups_of(uncertain, set(fit) if listed else None)
    budget = data.get("budget")
    own = budget.get("samples") if isinstance(budget, dict) else None
    if isinstance(own, int) and not isinstance(own, bool):
        check_design(own, groups, quantities, source, "budget.samples")
    if samples is not None:
        check_design(samples, groups, quantities, "command line", f"--samples, for {path}")


def design_groups_of(uncertain: set[str], fitted: set[str] | None) -> int:
    """Most groups of the Sobol design: each uncertain input is its own group; parameters
    fitted to counts become one joint group when the fit succeeds, and keep their own
    distributions when it fails."""
    if fitted is None:
        return len(uncertain)
    return max(len(uncertain), len(uncertain - fitted) + 1)


def design_groups(case) -> int:
    """Most groups the Sobol design of ``case`` can have (the run may merge fitted ones)."""
    return design_groups_of(
        set(case.uncertain()), None if case.counts is None else set(case.counts.fit)
    )


def design_rows(case, samples: int) -> int:
    """Most parameter sets of the design: ``samples x (groups + 2)``, 1 with nothing uncertain."""
    groups = design_groups(case)
    return samples * (groups + 2) if groups else 1


def check_design_size(case, samples: int, source: str, where: str) -> None:
    """Refuse a design beyond MAX_DESIGN_ROWS rows or MAX_DESIGN_CELLS rows x quantities.

    Called at load for ``[budget] samples`` and by the command line for ``--samples``, so
    that nothing is allocated for a design the run could not hold.
    """
    check_design(samples, design_groups(case), len(case.quantities), source, where)


def check_design(samples: int, groups: int, quantities: int, source: str, where: str) -> None:
    rows = samples * (groups + 2) if groups else 1
    if rows <= MAX_DESIGN_ROWS and rows * quantities <= MAX_DESIGN_CELLS:
        return
    block = groups + 2
    fits = min(MAX_DESIGN_ROWS // block, MAX_DESIGN_CELLS // (block * max(quantities, 1)))
    most = max(MIN_SAMPLES, _largest_power_of_two(fits))
    raise InputError(
        f"samples = {samples} makes a design of {rows} parameter sets ({samples} x "
        f"{block}) for {quantities} quantities, above the limits of {MAX_DESIGN_ROWS} "
        f"parameter sets and {MAX_DESIGN_CELLS} parameter sets x quantities; use samples = "
        f"{most} or fewer",
        source,
        where,
    )


def _largest_power_of_two(n: int) -> int:
    return 1 << (n.bit_length() - 1) if n >= 1 else 0
