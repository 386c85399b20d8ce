"""``errbudget run CASES... --cluster WHERE``: the batch on the command line.

Runs the cases with :func:`errbudget.batch.driver.run_cases` and prints the programme's
summary on stdout: one line of totals, the overview as a compact table (failure messages
below it) and where the overview was written. The exit code says whether any case failed.
"""

from __future__ import annotations

import sys

from errbudget.batch.cluster import ClusterChoice, require_dask
from errbudget.batch.driver import run_cases
from errbudget.outputs.overview import ADEQUATE, NOT_ADEQUATE


def run_batch(args, choice: ClusterChoice, debug: bool = False) -> int:
    """Run the cases of ``args`` (the parsed ``run`` options) on the cluster of ``choice``."""
    require_dask()  # before anything runs: exit 2 with the install command
    programme = run_cases(
        args.cases,
        out=args.out,
        samples=args.samples,
        seed=args.seed,
        patient=args.patient,
        cluster=choice,
        quiet=args.quiet,
    )
    if getattr(args, "json", False):
        return _print_json(programme)
    rows = programme.rows
    adequate = sum(row.verdict == ADEQUATE for row in rows)
    not_adequate = sum(row.verdict == NOT_ADEQUATE for row in rows)
    failed = programme.failed
    print(
        f"errbudget: {len(rows)} case{'s' if len(rows) != 1 else ''} {programme.where} in "
        f"{programme.seconds:.1f} s: {adequate} adequate, {not_adequate} not adequate, "
        f"{len(failed)} failed"
    )
    print(programme.table())
    if programme.overview:
        print(f"wrote {programme.overview[0]} and {programme.overview[1]}")
    if programme.overview_error:
        print(f"errbudget: error: {programme.overview_error}", file=sys.stderr)
    if debug:
        for result in programme.results.values():
            if result.details:
                where = args.cases[result.index]
                print(f"errbudget: debug: {where}:\n{result.details}", file=sys.stderr)
    if failed:
        print(
            f"errbudget: {len(failed)} of {len(rows)} cases failed (listed above); exit code "
            f"{programme.exit_code}",
            file=sys.stderr,
        )
    return programme.exit_code


def _print_json(programme) -> int:
    """``--json``: the budget.json of each case that ran, as one array in the cases' order;
    failures go to stderr, one line each, and set the exit code as in the table."""
    from errbudget.outputs.files import dumps
    from errbudget.outputs.terminal import Printer

    results = [programme.results[index] for index in sorted(programme.results)]
    Printer()(dumps([r.rendered.data for r in results if r.rendered is not None]).rstrip("\n"))
    for result in results:
        if result.failed:
            print(f"errbudget: error: {result.message}", file=sys.stderr)
    return programme.exit_code
