"""Scale-out on Dask: a batch of 64 cases and a design of 2**20 members on ``local:2``, each
against one process, in one run.

1. A batch of 64 small cases (the demo cases in turn, seeds 1, 2, ..., ``--samples 64``): wall time
   in this process (one case after another) and on a two-worker LocalCluster, and the
   scheduling overhead per case: the worker time the batch spends on anything but the cases,
   (workers x wall - sum of the cases' own task times) / cases, and the round trip of an
   empty task. The cluster is started once and warmed up (imports, kernels) before timing;
   its start and stop are timed on their own.
2. A design of 2**20 members of ``benchmarks/cases/harvest-year.toml`` (a scrambled Sobol
   sample of its four uncertain inputs), stepped at 1, 1/2 and 1/4 day by the streaming pass:
   one process (the engine's threads on both cores) against member chunks as tasks on
   ``local:2`` (one thread per worker), with the peak memory of each worker and of this process.
3. From the measured per-case cost and overhead, the expected time of 1000 cases on 64 workers.

``python benchmarks/cluster.py`` prints the section; ``--write`` also puts it into
``benchmarks/results.md`` (replacing an earlier one); ``python benchmarks/run.py`` includes it.
"""

from __future__ import annotations

import contextlib
import os
import resource
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
DEMO = sorted((ROOT / "cases").glob("*.toml"))
HARVEST = ROOT / "benchmarks" / "cases" / "harvest-year.toml"
CASES = int(os.environ.get("BENCH_CASES", "64"))  # cases in the batch: the demos in turn
SAMPLES = 64
REPEATS = int(os.environ.get("BENCH_REPEATS", "3"))  # timings are medians of this many
MEMBERS = 1 << int(os.environ.get("BENCH_MEMBERS_LOG2", "20"))
STEPS = (1.0, 0.5, 0.25)  # [day]: the case's step and two refinements
TITLE = "## Scale-out on Dask (`benchmarks/cluster.py`)"
TARGET_OVERHEAD = 0.050  # s per case
TARGET_SPEED = 0.80  # share of the single-process engine's member-steps per second


def programme(folder: Path) -> list[Path]:
    """CASES case files: the demo cases in turn, each copy with a seed of its own (1, 2, ...),
    the counts files copied beside them. The first len(DEMO) are one of each demo."""
    for extra in DEMO[0].parent.glob("*.csv"):
        shutil.copy(extra, folder / extra.name)
    texts = [path.read_text(encoding="utf-8") for path in DEMO]
    paths = []
    for index in range(CASES):
        path, text = DEMO[index % len(DEMO)], texts[index % len(DEMO)]
        seed = index // len(DEMO) + 1
        copy = folder / f"{path.stem}-{seed:02d}.toml"
        lines = [f"seed = {seed}" if line.startswith("seed =") else line
                 for line in text.splitlines()]  # fmt: skip
        copy.write_text("\n".join(lines) + "\n", encoding="utf-8")
        paths.append(copy)
    return paths


def _median(values) -> float:
    return statistics.median(values)


def batch(paths: list[Path], tmp: Path) -> dict:
    """The batch in this process and on local:2, medians of REPEATS each, alternated."""
    from errbudget.batch.cluster import connect
    from errbudget.batch.driver import run_cases

    started = time.perf_counter()
    connection = connect("local:2")
    start = time.perf_counter() - started
    client = connection.client
    warm = paths[: len(DEMO)]  # each law once, everywhere
    run_cases(warm, out=tmp / "warm-here", samples=SAMPLES)
    run_cases(warm, out=tmp / "warm-there", samples=SAMPLES, client=client)
    client.run(_noop)
    from distributed import get_task_stream

    here, there, overhead, tasks, case_seconds, gaps = [], [], [], [], [], []
    workers = sum(client.nthreads().values())
    for repeat in range(REPEATS):
        t = time.perf_counter()
        done = run_cases(paths, out=tmp / f"here-{repeat}", samples=SAMPLES)
        here.append(time.perf_counter() - t)
        assert done.exit_code == 0, done.table()
        t = time.perf_counter()
        with get_task_stream(client) as stream:
            done = run_cases(paths, out=tmp / f"there-{repeat}", samples=SAMPLES, client=client)
        wall = time.perf_counter() - t
        gaps += _gaps(stream.data)
        assert done.exit_code == 0, done.table()
        there.append(wall)
        own = [result.seconds for result in done.results.values()]
        case_seconds += own
        overhead.append((workers * wall - sum(own)) / len(paths))
        tasks.append(_round_trip(client, len(paths)))
    driver = _driver_cost(paths, tmp / "there-0", tmp / "driver")
    t = time.perf_counter()
    connection.close()
    stop = time.perf_counter() - t
    return {
        "cases": len(paths), "workers": workers, "here": _median(here), "there": _median(there),
        "here_all": here, "there_all": there, "overhead": _median(overhead),
        "round_trip": _median(tasks), "case": _median(case_seconds), "gap": _median(gaps),
        "gaps": len(gaps),
        "case_mean": statistics.fmean(case_seconds), "driver": driver, "start": start,
        "stop": stop,
    }  # fmt: skip


def _gaps(records: list[dict]) -> list[float]:
    """Idle time of a worker between the end of one case and the start of the next [s]."""
    found: dict[str, list[tuple[float, float]]] = {}
    for record in records:
        if not str(record["key"]).startswith("errbudget-case"):
            continue
        for part in record["startstops"]:
            if part["action"] == "compute":
                found.setdefault(record["worker"], []).append((part["start"], part["stop"]))
    gaps = []
    for spans in found.values():
        spans.sort()
        gaps += [nxt[0] - prev[1] for prev, nxt in zip(spans, spans[1:], strict=False)]
    return gaps


def _noop(*_) -> None:
    return None


def _round_trip(client, count: int) -> float:
    """Per task: submit ``count`` empty tasks and gather them [s]."""
    t = time.perf_counter()
    futures = [client.submit(_noop, i, pure=False) for i in range(count)]
    client.gather(futures)
    return (time.perf_counter() - t) / count


def _driver_cost(paths: list[Path], written: Path, tmp: Path) -> float:
    """What the driver does alone per case [s]: load and check the case, write its outputs."""
    from errbudget.batch.driver import _Planned, _plans

    t = time.perf_counter()
    planned = [p for p in _plans(paths, tmp, SAMPLES) if isinstance(p, _Planned)]
    load = time.perf_counter() - t
    from errbudget.outputs.files import write_all_atomic

    t = time.perf_counter()
    for plan in planned:
        source = written / plan.path.stem
        files = {tmp / plan.path.stem / f.name: f.read_text(encoding="utf-8")
                 for f in source.iterdir() if f.suffix in (".json", ".html", ".csv")}  # fmt: skip
        write_all_atomic(files)
    write = time.perf_counter() - t
    return (load + write) / len(paths)


def design() -> tuple[object, dict, object]:
    """The harvest-year case and 2**20 members of its uncertain inputs (scrambled Sobol)."""
    import numpy as np
    from scipy.stats import qmc

    from errbudget.budget.passes import ensemble_for
    from errbudget.case.load import load_case
    from errbudget.solve.ensemble import ensemble_params

    case = load_case(HARVEST)
    uncertain = case.uncertain()
    unit = qmc.Sobol(len(uncertain), scramble=True, seed=case.budget.seed).random(MEMBERS)
    unit = np.clip(unit, 1e-12, 1 - 1e-12)
    sampled = {name: dist.ppf(unit[:, i]) for i, (name, dist) in enumerate(uncertain.items())}
    params = ensemble_params(case, sampled)
    ensemble = ensemble_for(case, params, np.arange(MEMBERS))
    return case, params, ensemble.levels


def large() -> dict:
    """2**20 members at STEPS: one process against member chunks on local:2."""
    import numpy as np

    from errbudget.batch.cluster import DaskMapper, connect
    from errbudget.solve import ensemble
    from errbudget.solve.stream import stream

    case, params, levels = design()
    member_steps = MEMBERS * sum(ensemble.n_steps_for(case.horizon, h) for h in STEPS)
    stream(case, {k: v[:4096] for k, v in params.items()}, STEPS, levels=levels[:, :4096])
    one, spread = [], []
    connection = connect("local:2")
    client = connection.client
    mapper = DaskMapper(client)
    small = {k: v[: 1 << 17] for k, v in params.items()}
    stream(case, small, STEPS, levels=levels[:, : 1 << 17], mapper=mapper)  # warm the workers
    client.run(_reset_peak)
    for _ in range(REPEATS):
        t = time.perf_counter()
        whole = stream(case, params, STEPS, levels=levels)
        one.append(time.perf_counter() - t)
        t = time.perf_counter()
        parts = stream(case, params, STEPS, levels=levels, mapper=mapper)
        spread.append(time.perf_counter() - t)
        same = all(np.array_equal(a.values, b.values, equal_nan=True)
                   for a, b in zip(whole, parts, strict=True))  # fmt: skip
        assert same, "the chunks on the workers gave other numbers"
        del whole, parts
    peaks = sorted(client.run(_peak_mb).values())
    connection.close()
    return {
        "member_steps": member_steps, "one": _median(one), "spread": _median(spread),
        "one_all": one, "spread_all": spread, "worker_peaks": peaks,
        "driver_peak": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
    }  # fmt: skip


def _peak_mb() -> float:
    """Peak resident memory of this process (a worker) since its reset [MB]."""
    try:
        text = Path(f"/proc/{os.getpid()}/status").read_text()
        return int(next(ln for ln in text.splitlines() if ln.startswith("VmHWM")).split()[1]) / 1024
    except (OSError, StopIteration):
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _reset_peak() -> None:
    """Start the peak count afresh (Linux: write 5 to clear_refs), after the warm-up."""
    with contextlib.suppress(OSError):
        Path(f"/proc/{os.getpid()}/clear_refs").write_text("5")


def section() -> list[str]:
    """The results.md section of this benchmark."""
    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        paths = programme(tmp)
        b = batch(paths, tmp)
    g = large()
    per_case = b["case_mean"] + b["overhead"]
    startup = b["start"] + b["stop"]
    estimate = startup + 1000 * per_case / 64
    driver_bound = 1000 * b["driver"]
    speed_one = g["member_steps"] / g["one"]
    speed_spread = g["member_steps"] / g["spread"]
    lines = [
        TITLE,
        "",
        f"### A batch of {b['cases']} cases (the {len(DEMO)} demo cases in turn, each copy with "
        f"a seed of its own, --samples {SAMPLES})",
        "",
        f"Medians of {REPEATS} batches, alternated, all in this run; each case runs, renders its",
        "report and is written as `errbudget run` does.",
        "",
        "| | wall [s] | cases per second |",
        "| --- | --- | --- |",
        f"| one after another, in one process | {b['here']:.1f} | {b['cases'] / b['here']:.2f} |",
        f"| `local:2` (2 worker processes, 1 thread each) | {b['there']:.1f} | "
        f"{b['cases'] / b['there']:.2f} |",
        "",
        f"Speed-up **{b['here'] / b['there']:.2f}x** on 2 workers (runs: one process "
        + ", ".join(f"{x:.1f}" for x in b["here_all"])
        + " s; local:2 "
        + ", ".join(f"{x:.1f}" for x in b["there_all"])
        + " s).",
        f"A case's own task on a worker: median {b['case']:.2f} s, mean {b['case_mean']:.2f} s.",
        "Scheduling overhead per case: a worker waits a median "
        f"**{b['gap'] * 1e3:.0f} ms** between the end of one case and the start of the next "
        f"(target <= {TARGET_OVERHEAD * 1e3:.0f} ms; {b['gaps']} gaps, Dask's task stream);",
        "all included -- the first cases' wait while the driver loads them, results on their",
        "way back, the tail where one worker finishes alone -- (workers x wall - sum of the",
        f"tasks) / cases is {b['overhead'] * 1e3:.0f} ms. An empty task's round trip: "
        f"{b['round_trip'] * 1e3:.1f} ms.",
        f"The driver's own work per case (load and check the case, write its outputs): "
        f"{b['driver'] * 1e3:.0f} ms.",
        f"Starting the local cluster {b['start']:.1f} s, stopping it {b['stop']:.1f} s (not in "
        "the walls above; the first task on each worker also compiles or loads the kernels).",
        "",
        f"### A design of 2^20 = {MEMBERS:,} members of `harvest-year.toml` on `local:2`",
        "",
        "Steps " + ", ".join(f"{h:g}" for h in STEPS) + f" day over 365 days: "
        f"{g['member_steps']:.3g} member-steps per pass; medians of {REPEATS}.",
        "",
        "| | wall [s] | member-steps per second |",
        "| --- | --- | --- |",
        f"| one process (the engine's threads on both cores) | {g['one']:.1f} | {speed_one:.3g} |",
        f"| `local:2`, chunks of 65,536 members as tasks | {g['spread']:.1f} | "
        f"{speed_spread:.3g} |",
        "",
        f"On the same two cores the cluster reaches **{speed_spread / speed_one:.0%}** of the "
        f"single-process engine (target >= {TARGET_SPEED:.0%}); every member's results are",
        "equal, bit for bit. Peak memory of each worker (after the warm-up): "
        + ", ".join(f"{p:.0f} MB" for p in g["worker_peaks"])
        + f"; this process, which holds the joined results of both passes: "
        f"{g['driver_peak']:.0f} MB.",
        "",
        "### 1000 cases on 64 workers, on paper",
        "",
        f"From the batch above: a case costs its task ({b['case_mean']:.2f} s) plus the overhead "
        f"({b['overhead'] * 1e3:.0f} ms), so 1000 cases on 64 workers take about "
        f"1000 x {per_case:.2f} / 64 = {1000 * per_case / 64:.0f} s, plus the cluster's start and",
        f"stop ({startup:.0f} s here): **about {estimate:.0f} s**. The driver alone needs "
        f"{driver_bound:.0f} s",
        "for 1000 cases (loading and writing, one after another), "
        + (
            "under that: it keeps up."
            if driver_bound < 1000 * per_case / 64
            else "above that: it becomes the limit."
        )
        + " Assumes workers like these (one core each) and no queueing behind other jobs.",
        "",
    ]
    return lines


def write_into_results(lines: list[str]) -> None:
    """Replace this section in results.md (or put it before the closing load line)."""
    path = ROOT / "benchmarks" / "results.md"
    text = path.read_text(encoding="utf-8") if path.exists() else ""
    block = "\n".join(lines)
    if TITLE in text:
        head, _, rest = text.partition(TITLE)
        after = rest.find("\n## ")
        tail = rest[after + 1 :] if after >= 0 else ""
        if not tail and "\nLoad average at the end" in rest:
            tail = rest[rest.index("\nLoad average at the end") + 1 :]
        text = head + block + "\n" + tail
    elif "\nLoad average at the end" in text:
        index = text.index("\nLoad average at the end") + 1
        text = text[:index] + block + "\n" + text[index:]
    else:
        text += "\n" + block + "\n"
    path.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    found = section()
    print("\n".join(found))
    if "--write" in sys.argv:
        write_into_results(found)
