"""Resource checks of a case: made on the raw tables before anything is parsed, allocated
or loaded for it, and again by the command line for ``--samples``. The limits themselves
are in :mod:`errbudget.case.limits`.
"""

from __future__ import annotations

from pathlib import Path

from errbudget.case.counts import check_file as check_counts_file
from errbudget.case.limits import (
    MAX_DESIGN_CELLS,
    MAX_DESIGN_ROWS,
    MAX_QUANTITIES,
    MIN_SAMPLES,
)
from errbudget.errors import InputError


def counts_path(reader, table: dict) -> Path:
    """The counts file named by ``[counts] file``, checked to be a readable regular file
    within the size and row limits (nothing is parsed yet)."""
    file_text = reader.text(table, "file", "counts")
    given = Path(file_text)
    base = reader.path.resolve().parent
    resolved = given if given.is_absolute() else (base / given).resolve()
    if not given.is_absolute() and not resolved.is_relative_to(base):
        raise reader.fail(
            "a relative counts path must stay inside the case's folder; "
            "give an absolute path to use a file elsewhere",
            "counts.file",
        )
    try:
        check_counts_file(resolved)
    except InputError as error:
        raise reader.fail(f"{resolved}: {error.message}", "counts.file") from None
    return resolved


def check_resources(reader, data: dict, samples: int | None = None) -> None:
    """The resource limits, on the raw tables, before any value is parsed or converted.

    A case beyond a limit is refused here, before anything is allocated or loaded for it:
    the number of quantities, the counts file, and the design size from ``[budget] samples``
    and from ``samples`` (the command line's ``--samples``) when given.
    """
    entries = data.get("quantity")
    quantities = len(entries) if isinstance(entries, list) else 1
    if quantities > MAX_QUANTITIES:
        raise reader.fail(
            f"{quantities} quantities, above the limit of {MAX_QUANTITIES} per case; split "
            "the case into several files",
            "quantity",
        )
    counts = data.get("counts")
    if isinstance(counts, dict) and "file" in counts:
        counts_path(reader, counts)
    parameters = data.get("parameters")
    if not isinstance(parameters, dict):
        return  # refused later, with the reason
    fit = counts.get("fit") if isinstance(counts, dict) else None
    uncertain = {name for name, entry in parameters.items() if isinstance(entry, dict)}
    listed = isinstance(fit, list) and all(isinstance(name, str) for name in fit)
    groups = design_groups_of(uncertain, set(fit) if listed else None)
    budget = data.get("budget")
    own = budget.get("samples") if isinstance(budget, dict) else None
    if isinstance(own, int) and not isinstance(own, bool):
        check_design(own, groups, quantities, reader.source, "budget.samples")
    if samples is not None:
        check_design(samples, groups, quantities, "command line", f"--samples, for {reader.path}")


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
