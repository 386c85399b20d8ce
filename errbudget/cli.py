"""The command line: ``errbudget run`` and ``errbudget check``. Thin: the work is elsewhere.

Every problem the user can fix -- a bad case, a bad option, an output folder that cannot be
written -- ends with exit code 2 and one line on stderr naming the file (or option) and the
cause; Python warnings are recorded, not shown (``--debug-traceback`` shows them).
"""

from __future__ import annotations

import argparse
import sys
import traceback
import warnings
from datetime import UTC, datetime
from pathlib import Path

from errbudget.errors import InputError

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT = 0, 1, 2
DEFAULT_OUT = "reports"
DEBUG_FLAG = "--debug-traceback"
MIN_DESIGN_BLOCK = 3  # rows per base sample with one uncertain input (groups + 2)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # bad options are bad input: exit code 2, one line
        raise InputError(message, "command line")


def _debug_option(parser: argparse.ArgumentParser, default) -> None:
    parser.add_argument(
        DEBUG_FLAG,
        dest="debug_traceback",
        action="store_true",
        default=default,
        help="on an internal error, print the Python traceback and the recorded warnings",
    )


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="errbudget",
        description=(
            "Is the time step of a population forecast small enough, given the data? "
            "Splits forecast uncertainty into discretisation, parameter and round-off parts."
        ),
    )
    parser.add_argument("--version", action="store_true", help="print the version and stop")
    _debug_option(parser, False)
    commands = parser.add_subparsers(dest="command", parser_class=_Parser)
    run = commands.add_parser("run", help="compute the error budget of each case")
    run.add_argument("cases", nargs="+", metavar="CASE", type=Path)
    run.add_argument(
        "--out",
        type=Path,
        default=Path(DEFAULT_OUT),
        help="folder for the outputs (default: reports/)",
    )
    run.add_argument(
        "--samples", type=_design_size, help="base sample size of the Sobol design (power of 2)"
    )
    run.add_argument("--seed", type=_non_negative_int, help="seed of the sampling design")
    run.add_argument(
        "--quiet",
        action="store_true",
        help="print only the verdict line of each case (and no progress on stderr)",
    )
    run.add_argument(
        "--json",
        action="store_true",
        help="print budget.json to stdout instead of the summary (a JSON array for several cases)",
    )
    run.add_argument(
        "--patient",
        action="store_true",
        help="run even when the predicted time exceeds [budget] time_limit (with a progress bar)",
    )
    run.add_argument(
        "--cluster",
        metavar="WHERE",
        type=_cluster,
        help="run the cases on Dask and write an overview: local, local:N (N worker "
        "processes), tcp://HOST:PORT or a scheduler file (needs errbudget[cluster])",
    )
    check = commands.add_parser("check", help="validate cases and print what they resolve to")
    check.add_argument("cases", nargs="+", metavar="CASE", type=Path)
    for sub in (run, check):  # SUPPRESS: a flag given before the command is kept
        _debug_option(sub, argparse.SUPPRESS)
    return parser


def _design_size(text: str) -> int:
    from errbudget.case.limits import MAX_DESIGN_ROWS, MIN_SAMPLES, is_design_size

    value = _non_negative_int(text)
    if not is_design_size(value):
        raise argparse.ArgumentTypeError(
            f"expected a power of two of at least {MIN_SAMPLES} such as 512 or 1024, got {text!r}"
        )
    if value * MIN_DESIGN_BLOCK > MAX_DESIGN_ROWS:
        raise argparse.ArgumentTypeError(
            f"{value} would make a design of at least {value * MIN_DESIGN_BLOCK} parameter sets, "
            f"above the limit of {MAX_DESIGN_ROWS}; use "
            f"{1 << ((MAX_DESIGN_ROWS // MIN_DESIGN_BLOCK).bit_length() - 1)} or fewer"
        )
    return value


def _cluster(text: str):
    from errbudget.batch.cluster import parse_cluster  # light: Dask is imported only to run

    try:
        return parse_cluster(text)
    except InputError as error:
        raise argparse.ArgumentTypeError(error.message) from None


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected an integer >= 0, got {text!r}")
    return value


def main(argv: list[str] | None = None) -> int:
    arguments = sys.argv[1:] if argv is None else list(argv)
    with warnings.catch_warnings(record=True) as recorded:
        # Warnings (numpy overflow in a figure, numba notes) are not for the user: the run
        # turns what matters into flags and nulls in budget.json.
        warnings.simplefilter("default")
        status = _main(arguments)
    if DEBUG_FLAG in arguments:
        for item in recorded:
            text = warnings.formatwarning(item.message, item.category, item.filename, item.lineno)
            print(f"errbudget: debug: {text}", end="", file=sys.stderr)
    return status


def _main(arguments: list[str]) -> int:
    debug = DEBUG_FLAG in arguments
    try:
        args = build_parser().parse_args(arguments)
        if args.version:
            from errbudget.version import package_version

            print(f"errbudget {package_version()}")
            return EXIT_OK
        if args.command is None:
            raise InputError(
                "choose a command: run or check (see errbudget --help)", "command line"
            )
        if getattr(args, "cluster", None) is not None:  # a batch: failures kept per case
            from errbudget.batch.command import run_batch

            return run_batch(args, args.cluster, debug)
        from errbudget.case.resources import precheck_case

        samples = getattr(args, "samples", None)
        for path in args.cases:  # the limits first, before the rest of the package loads
            precheck_case(path, samples)
        from errbudget.case.load import load_case

        # All valid before anything runs; --samples checked against each design as it loads.
        cases = [load_case(path, samples=samples) for path in args.cases]
        from errbudget.outputs.terminal import Printer

        emit = Printer()
        if args.command == "check":
            from errbudget.case.counts import read_case_counts
            from errbudget.case.load import describe

            for case in cases:  # the counts files too, so that a misspelt column shows here
                counted = read_case_counts(case)
                emit(describe(case, counted))
            return EXIT_OK
        folders = _check_run(cases, args)  # before anything runs
        budgets = [
            _run_one(case, folder, args, emit) for case, folder in zip(cases, folders, strict=True)
        ]
        if args.json:
            from errbudget.outputs.files import dumps

            emit(dumps(budgets[0] if len(budgets) == 1 else budgets).rstrip("\n"))
        return EXIT_OK
    except InputError as error:
        print(f"errbudget: error: {error.format()}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("errbudget: interrupted; earlier outputs are untouched", file=sys.stderr)
        return EXIT_INTERNAL
    except MemoryError:
        print(
            "errbudget: error: not enough memory for this run; lower [budget] samples or "
            "--samples, or shorten the horizon",
            file=sys.stderr,
        )
        return EXIT_INPUT
    except OSError as error:  # the environment (a file, a folder, the disk), not the code
        from errbudget.outputs.files import environment_error

        place = error.filename or "a file or folder of this run"
        message = environment_error(error, place, "use this file or folder").format()
        print(f"errbudget: error: {message}", file=sys.stderr)
        if debug:
            traceback.print_exc()
        return EXIT_INPUT
    except Exception as error:  # report, never a bare traceback for the user
        print(f"errbudget: internal error: {type(error).__name__}: {error}", file=sys.stderr)
        if debug:
            traceback.print_exc()
        return EXIT_INTERNAL


def _check_run(cases, args) -> list[Path]:
    """Everything ``run`` can check before running: the design size of ``--samples``, the
    output folder of each case (its name, links, files in the way, write access), and
    that no two cases would write into the same folder."""
    from errbudget.case.resources import check_design_size
    from errbudget.outputs.files import claim_output_folder

    folders: dict[Path, Path] = {}
    for case in cases:
        if args.samples is not None:
            check_design_size(case, args.samples, "command line", f"--samples, for {case.path}")
        claim_output_folder(folders, case.path, args.out)
    return list(folders)


def _progress(quiet: bool, title: str):
    """The progress receiver: a bar on a terminal, a one-line notice of long runs otherwise."""
    if quiet:
        return None
    if sys.stderr.isatty():
        from errbudget.outputs.bar import Bar

        return Bar(title)
    return _Notice(title)


class _Notice:
    """Off a terminal (logs, CI): one line on stderr when a run will take a while."""

    LONG = 10.0  # seconds of predicted work worth announcing

    def __init__(self, title: str):
        self.title = title

    def stage(self, label: str) -> None:
        return None

    def planned(self, plan) -> None:
        if plan.seconds > self.LONG:
            print(
                f"errbudget: {self.title}: about {plan.seconds:.0f} s of work "
                f"({plan.member_steps:.3g} member-steps)",
                file=sys.stderr,
            )

    def advanced(self, member_steps: int) -> None:
        return None

    def close(self) -> None:
        return None


def _run_one(case, folder: Path, args, emit) -> dict:
    from errbudget.batch.files import commit, render_outputs
    from errbudget.budget.run import run_case
    from errbudget.outputs import history

    progress = _progress(args.quiet, case.path.stem)
    try:
        budget = run_case(
            case,
            samples=args.samples,
            seed=args.seed,
            progress=progress,
            patient=args.patient,
        )
    except InputError as error:
        # A problem found while running (counts the observation model cannot describe) that
        # names no file lies in the counts the run read, or else in the case.
        source = str(case.counts.path) if case.counts is not None else str(case.path)
        raise error.located(source) from None
    finally:
        if progress is not None:
            progress.close()
    timestamp = datetime.now(UTC).isoformat(timespec="seconds")
    with history.locked(folder):
        # Everything is rendered in memory first, then written as one set (all temporaries,
        # then the renames), and the history line is appended last: a failure before the
        # renames leaves the earlier outputs and history byte for byte as they were.
        rendered = render_outputs(budget, case.text, history.last_entry(folder), timestamp)
        commit(folder, rendered)
    from errbudget.outputs import terminal

    data = rendered.data
    if args.json:
        return data
    if args.quiet:
        emit(terminal.verdict_line(data, str(case.path)))
    else:
        written = list(rendered.files) + [f"{history.HISTORY_NAME} (appended)"]
        emit(terminal.summary(data, str(case.path), folder, written))
    return data
