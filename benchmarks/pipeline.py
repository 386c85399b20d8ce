"""A whole run, stage by stage, against the import floor of its own dependencies, in one run.

Measured on ``benchmarks/cases/harvest-year.toml`` (logistic with proportional harvest, 4
uncertain inputs, one year at a daily step, a value and a time-to quantity): the stage
breakdown of a run (load, design, passes, estimates, budget, figures, writing), wall time and
peak memory at 4096 and 65,536 base samples, the streaming passes against the bare engine
stepping the same member-steps, ``errbudget --version`` against the interpreter's start-up,
and the scaling with samples, horizon and number of quantities. Every comparison is a ratio
or a difference of timings taken in this same run (the machine is shared); each timing is
the median of REPEATS runs in fresh processes.

Used by ``python benchmarks/run.py``, which writes ``benchmarks/results.md``.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CASE = ROOT / "benchmarks" / "cases" / "harvest-year.toml"
REPEATS = 3
# The dependencies a run imports (the floor no run can go under).
FLOOR = (
    "import numpy, scipy.stats, scipy.optimize, SALib.sample.sobol, SALib.analyze.sobol, "
    "pandas, matplotlib, matplotlib.pyplot, pint, numba, jinja2, tqdm"
)

# Runs one case in a fresh process and prints a JSON line of timings [s] and peak RSS [MB].
DRIVER = r"""
import json, resource, sys, tempfile, time
from pathlib import Path
started = time.perf_counter()
import numpy, scipy.stats, scipy.optimize, SALib.sample.sobol, SALib.analyze.sobol, pandas
import matplotlib, matplotlib.pyplot, pint, numba, jinja2, tqdm
floor = time.perf_counter() - started
t = time.perf_counter()
from errbudget.budget.run import run_case
from errbudget.case.load import load_case
from errbudget.outputs.files import dumps, write_all_atomic
from errbudget.outputs.tables import ladder_csv, summary_csv
from errbudget.report import render_html
own_imports = time.perf_counter() - t
t = time.perf_counter()
case = load_case(sys.argv[1])
load = time.perf_counter() - t
samples = int(sys.argv[2]) if len(sys.argv) > 2 else None
t = time.perf_counter()
budget = run_case(case, samples=samples, patient=True)
run = time.perf_counter() - t
data = budget.to_dict()
t = time.perf_counter()
page = render_html(data, budget.series, case.text)
report = time.perf_counter() - t
t = time.perf_counter()
with tempfile.TemporaryDirectory() as folder:
    out = Path(folder)
    files = {out / "budget.json": dumps(data), out / "budget.html": page,
             out / "ladder.csv": ladder_csv(data), out / "summary.csv": summary_csv(data)}
    write_all_atomic(files)
writing = time.perf_counter() - t
print(json.dumps({
    "total": time.perf_counter() - started, "floor": floor, "own_imports": own_imports,
    "load": load, "run": run, "stages": data["run"]["stages"], "report": report,
    "writing": writing, "page_bytes": len(page.encode()),
    "member_steps": data["run"]["work"]["member_steps"],
    "predicted": data["run"]["work"]["predicted_member_steps"],
    "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
}))
"""

# The streaming passes of a run against the bare engine on the same levels and members.
PASSES = r"""
import json, sys, time
import numpy as np
from errbudget.budget import passes
from errbudget.budget.run import run_case
from errbudget.case.load import load_case
from errbudget.solve import engine, ensemble, stream
from errbudget.solve.tableaux import get_scheme
from errbudget.uncertainty.spread import sample_design
case = load_case(sys.argv[1])
data = run_case(case, patient=True).to_dict()
tried = data["recommendation"]["tried"]
steps = sorted({case.step, *(s["value"] for s in data["run"]["reference_steps"]),
                *(t["step"]["value"] for t in tried if t["worst_ratio"] is not None)})
design = sample_design(case.uncertain(), None, case.budget.samples, case.budget.seed)
params = ensemble.ensemble_params(case, design.values)
ens = passes.ensemble_for(case, params, design.independent_rows)
law = {k: v for k, v in params.items() if k != "N0"}
scheme = get_scheme(case.scheme)
module, spec = ensemble.compiled(case.model, scheme)
def streaming():
    stream.stream(case, params, steps, levels=ens.levels)
def bare():
    for h in steps:
        engine.integrate_compiled(module.kernel, spec, params["N0"], law, h,
                                  ensemble.n_steps_for(case.horizon, h), scheme)
def timed(f):
    f(); out = []
    for _ in range(5):
        t = time.perf_counter(); f(); out.append(time.perf_counter() - t)
    return sorted(out)[2]
member_steps = len(params["N0"]) * sum(ensemble.n_steps_for(case.horizon, h) for h in steps)
print(json.dumps({"steps": steps, "member_steps": member_steps,
                  "stream": timed(streaming), "bare": timed(bare)}))
"""


def _python(code: str, *args: str) -> str:
    done = subprocess.run(
        [sys.executable, "-c", code, *args], capture_output=True, text=True, cwd=ROOT, check=True
    )
    return done.stdout.strip().splitlines()[-1]


def _timed_command(command: list[str]) -> float:
    code = (
        "import subprocess, sys, time\nt = time.perf_counter()\n"
        "subprocess.run(sys.argv[1:], check=True, capture_output=True)\n"
        "print(time.perf_counter() - t)"
    )
    return float(_python(code, *command))


def _median(values) -> float:
    return statistics.median(values)


def whole_run(case: Path, samples: int | None = None) -> dict:
    """Median of REPEATS fresh-process runs: every timing, and the largest peak memory."""
    runs = [
        json.loads(_python(DRIVER, str(case), *([str(samples)] if samples else [])))
        for _ in range(REPEATS)
    ]
    out = {key: _median([r[key] for r in runs]) for key in runs[0] if key != "stages"}
    out["peak_mb"] = max(r["peak_mb"] for r in runs)
    stages = {name for r in runs for name in r["stages"]}
    out["stages"] = {s: _median([r["stages"].get(s, 0.0) for r in runs]) for s in sorted(stages)}
    return out


def start_up() -> dict:
    """``errbudget --version`` against ``python -c pass``: medians of ten each."""
    bare = [_timed_command([sys.executable, "-c", "pass"]) for _ in range(10)]
    version = [_timed_command([sys.executable, "-m", "errbudget", "--version"]) for _ in range(10)]
    return {"python": _median(bare), "version": _median(version)}


def _variant(text: str, tmp: Path, name: str) -> Path:
    path = tmp / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def scaling(tmp: Path) -> list[tuple[str, dict]]:
    """Whole runs with twice and four times the samples, horizon and quantities."""
    base = CASE.read_text(encoding="utf-8")
    extra = (
        '\n[[quantity]]\nname = "largest stock"\nkind = "peak"\n'
        '\n[[quantity]]\nname = "stock at day 200"\nkind = "value"\nat = "200 day"\n'
    )
    variants = [
        ("samples 1024", base.replace("samples = 4096", "samples = 1024")),
        ("samples 4096 (the case)", base),
        ("samples 16384", base.replace("samples = 4096", "samples = 16384")),
        ("horizon 730 day", base.replace('horizon = "365 day"', 'horizon = "730 day"')),
        ("horizon 1460 day", base.replace('horizon = "365 day"', 'horizon = "1460 day"')),
        ("4 quantities", base.replace("[budget]", extra + "\n[budget]")),
    ]
    return [
        (name, whole_run(_variant(text, tmp, f"v{i}"))) for i, (name, text) in enumerate(variants)
    ]


def section() -> list[str]:
    """The results.md section of this benchmark."""
    small = whole_run(CASE)
    large = whole_run(CASE, 65536)
    passes = json.loads(_python(PASSES, str(CASE)))
    start = start_up()
    with tempfile.TemporaryDirectory() as tmp:
        scaled = scaling(Path(tmp))
    lines = [
        "## A whole run against the import floor: `benchmarks/cases/harvest-year.toml`",
        "",
        "4 uncertain inputs, one year at 1 day, a value and a time-to quantity. Each row is the",
        f"median of {REPEATS} runs in fresh processes, all taken in this run.",
        "",
        "| stage | 4096 samples [s] | 65,536 samples [s] |",
        "| --- | --- | --- |",
        f"| import floor of the dependencies | {small['floor']:.2f} | {large['floor']:.2f} |",
        f"| errbudget's own modules | {small['own_imports']:.2f} | {large['own_imports']:.2f} |",
        f"| load the case | {small['load']:.3f} | {large['load']:.3f} |",
    ]
    for name in small["stages"]:
        lines.append(
            f"| run: {name} | {small['stages'][name]:.2f} | {large['stages'].get(name, 0.0):.2f} |"
        )
    lines += [
        f"| figures and HTML | {small['report']:.2f} | {large['report']:.2f} |",
        f"| writing the outputs | {small['writing']:.3f} | {large['writing']:.3f} |",
        f"| **whole process** | **{small['total']:.2f}** | **{large['total']:.2f}** |",
        f"| whole process beyond the import floor | {small['total'] - small['floor']:.2f} | "
        f"{large['total'] - large['floor']:.2f} |",
        f"| peak memory [MB] | {small['peak_mb']:.0f} | {large['peak_mb']:.0f} |",
        f"| member-steps stepped (predicted before the passes) | {small['member_steps']:.3g} "
        f"({small['predicted']:.3g}) | {large['member_steps']:.3g} ({large['predicted']:.3g}) |",
        f"| report page [kB] | {small['page_bytes'] / 1e3:.0f} | {large['page_bytes'] / 1e3:.0f} |",
        "",
        "Targets: 4096 samples <= 2 s beyond the floor and <= 400 MB; 65,536 samples <= 10 s",
        "beyond the floor and <= 700 MB; figures and HTML <= 0.7 s.",
        "",
        "## The streaming passes against the bare engine",
        "",
        "The levels a run of the case steps "
        + ", ".join(f"{s:g}" for s in passes["steps"])
        + " day,",
        f"{passes['member_steps']:.3g} member-steps: streaming (quantities, features, read-offs)",
        f"{passes['stream']:.3f} s, the bare engine storing whole trajectories "
        f"{passes['bare']:.3f} s",
        f"(medians of 5): ratio **{passes['stream'] / passes['bare']:.2f}** (target <= 3).",
        "",
        "## Start-up",
        "",
        f"`python -c pass` {start['python']:.3f} s, `python -m errbudget --version` "
        f"{start['version']:.3f} s: **{start['version'] - start['python']:.3f} s** beyond the",
        "interpreter's own start-up (target <= 0.3 s); medians of 10.",
        "",
        "## Scaling (whole process, medians)",
        "",
        "| variant | whole [s] | beyond the floor [s] | passes [s] | member-steps | peak [MB] |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for name, res in scaled:
        passes_s = sum(res["stages"].get(s, 0.0) for s in ("case step", "reference pass", "search"))
        lines.append(
            f"| {name} | {res['total']:.2f} | {res['total'] - res['floor']:.2f} | {passes_s:.2f} | "
            f"{res['member_steps']:.3g} | {res['peak_mb']:.0f} |"
        )
    return lines + [""]


if __name__ == "__main__":
    print("\n".join(section()))
