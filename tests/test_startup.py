"""Cheap start: ``--version``, ``--help`` and ``check`` import only what they use.

Each command runs in a fresh interpreter through a small driver that calls
``errbudget.cli.main`` and then lists the top-level packages in ``sys.modules``. Start-up
time itself is measured in benchmarks/, never asserted here.
"""

from __future__ import annotations

import functools
import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
# Heavy libraries no start-up command needs (each costs a large share of a second to import).
HEAVY = {"scipy", "SALib", "pandas", "matplotlib", "numba"}
# What the run and the report need, and --version and --help do not.
RUN_ONLY = HEAVY | {"numpy", "pint", "jinja2", "tqdm"}
DRIVER = """
import contextlib, io, json, sys
from errbudget.cli import main
with contextlib.redirect_stdout(io.StringIO()):
    try:
        code = main(sys.argv[1:])
    except SystemExit as stop:  # argparse ends --help this way
        code = stop.code
print(json.dumps({"code": code, "modules": sorted(sys.modules)}))
"""
PINT_ALONE = """
import json, sys, numpy, pint
print(json.dumps({"code": 0, "modules": sorted(sys.modules)}))
"""


def _modules_after(*args: str, driver: str = DRIVER) -> tuple[int, set[str]]:
    """Exit code of the command and every module loaded once it has returned."""
    done = subprocess.run(
        [sys.executable, "-c", driver, *args],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=True,
    )
    result = json.loads(done.stdout.splitlines()[-1])
    return result["code"], set(result["modules"])


@functools.cache
def _pint_alone() -> tuple[int, set[str]]:
    return _modules_after(driver=PINT_ALONE)


def _top_level(modules: set[str]) -> set[str]:
    return {name.split(".")[0] for name in modules}


@pytest.mark.parametrize("args", [["--version"], ["--help"]], ids=["version", "help"])
def test_version_and_help_import_no_library(args):
    code, modules = _modules_after(*args)
    assert code == 0
    assert not _top_level(modules) & RUN_ONLY, sorted(_top_level(modules) & RUN_ONLY)


@pytest.mark.parametrize("case", ["crayfish-pond", "perch-reservoir"])  # the second has counts
def test_check_imports_pint_and_numpy_only(case):
    code, modules = _modules_after("check", f"cases/{case}.toml")
    assert code == 0
    # pint itself imports the bare ``scipy`` package to learn whether it is installed; only
    # what goes beyond pint's own imports counts against ``check``.
    _, pint_alone = _pint_alone()
    extra = {m for m in modules - pint_alone if m.split(".")[0] in HEAVY}
    assert not extra, sorted(extra)
    assert {"numpy", "pint"} <= _top_level(modules)  # the driver really ran the check


def test_the_driver_sees_a_heavy_import():
    # The same driver with one more import does list it, so the checks above can fail (the
    # bare scipy package is the cheapest of the heavy names to import).
    driver = DRIVER.replace("from errbudget.cli", "import scipy\nfrom errbudget.cli")
    _, modules = _modules_after("--version", driver=driver)
    assert "scipy" in _top_level(modules) & RUN_ONLY
