"""Regenerate ``benchmarks/results.md``: ``python benchmarks/run.py`` from the repository root.

Runs the engine benchmark (:mod:`engine`), the whole-run benchmark (:mod:`pipeline`) and the
scale-out benchmark on Dask (:mod:`cluster`) in one go, and writes their tables under a header
that records the machine and its load. Every ratio in the file is between timings taken in
this same run.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import cluster  # noqa: E402
import engine  # noqa: E402
import pipeline  # noqa: E402


def main() -> None:
    started = time.perf_counter()
    header = [
        "# Benchmarks",
        "",
        "Written by `python benchmarks/run.py` (about half an hour on two cores).",
        "",
        "## Machine",
        "",
        *engine.machine(),
        "",
    ]
    body = pipeline.section() + engine.section() + cluster.section()
    load = (Path("/proc/loadavg").read_text().split()[:3]) if Path("/proc/loadavg").exists() else []
    footer = [f"Load average at the end: {' '.join(load)}; {time.perf_counter() - started:.0f} s."]
    text = "\n".join(header + body + footer) + "\n"
    (HERE / "results.md").write_text(text, encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
