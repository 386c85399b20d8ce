"""Throughput of errbudget's ensemble engine against what practitioners write, in one run.

Used by ``python benchmarks/run.py``, which writes ``benchmarks/results.md``. Ensemble:
logistic law with proportional harvest (dN/dt = r N (1 - N/K) - E N), 4 uncertain inputs
(r, K, E, N0), a Saltelli design of 1024 base samples (6144 rows), a one-year horizon, a
ladder of steps 7, 4, 2, 1, 1/2, 1/4, 1/8, 1/16 day. Throughput is member-steps per second
over the whole ladder; every ratio is
between timings taken in this same run (the machine is shared, so absolute numbers vary).
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from errbudget.case.load import load_case  # noqa: E402
from errbudget.solve import engine, ensemble  # noqa: E402
from errbudget.solve.tableaux import SCHEMES  # noqa: E402
from errbudget.uncertainty.spread import sample_design  # noqa: E402

BASE_SAMPLES = 1024
HORIZON = 365.0  # [day]
LADDER = (7.0, 4.0, 2.0, 1.0, 0.5, 0.25, 0.125, 0.0625)  # [day]
REPEATS = 3  # best of, against the noise of a shared machine
IVP_SUBSET = 12  # members timed with solve_ivp, per ladder level; the rest extrapolated
PYTHON_SUBSET = 6  # members timed with the pure-Python loop, per ladder level
IVP_RTOL, IVP_ATOL = 1e-8, 1e-6  # [-], [crayfish]: error below the RK4 ladder's coarse levels

CUSTOM_RATE = "r*N*(1 - N/K) - E*N"  # the same law written as a custom expression

CASE_TEXT = """title = "benchmark: logistic with proportional harvest, 4 uncertain inputs"
[model]
form = "logistic-harvest"
unit = "crayfish"
[parameters]
r  = { value = "0.06 / day", sd = "0.01 / day" }
K  = { value = "9000 crayfish", low = "7500 crayfish", high = "10500 crayfish" }
E  = { value = "0.004 / day", low = "0.002 / day", high = "0.006 / day" }
N0 = { value = "400 crayfish", cv = 0.2, dist = "lognormal" }
[simulation]
scheme = "euler"
step = "7 day"
horizon = "365 day"
[[quantity]]
name = "stock after a year"
kind = "value"
at = "364 day"
"""


def machine() -> list[str]:
    cpu = "unknown"
    for line in Path("/proc/cpuinfo").read_text().splitlines():
        if line.startswith("model name"):
            cpu = line.split(":", 1)[1].strip()
            break
    mem = "unknown"
    for line in Path("/proc/meminfo").read_text().splitlines():
        if line.startswith("MemTotal"):
            mem = f"{int(line.split()[1]) / 2**20:.1f} GiB"
    numba = engine.numba_module()
    return [
        f"- CPU: {cpu}, {os.cpu_count()} logical cores ({engine.THREADS} usable by this run)",
        f"- memory: {mem}",
        f"- Python {platform.python_version()}, numpy {np.__version__}, "
        f"numba {numba.__version__ if numba else 'not installed'}",
        f"- load average at start: {' '.join(Path('/proc/loadavg').read_text().split()[:3])} "
        "(shared machine: other engineers' jobs run on the same cores)",
    ]


def best(fn, repeats=REPEATS) -> float:
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        fn()
        times.append(time.perf_counter() - started)
    return min(times)


# ------------------------------------------------------------------ baselines


def numpy_loop(scheme, n0, r, k, e, h, n_steps):
    """(d) What one writes with numpy: a loop over steps, vectorised across samples."""

    def f(n):
        return r * n * (1 - n / k) - e * n

    out = np.empty((n_steps + 1, n0.size))
    y = out[0] = n0
    for i in range(n_steps):
        if scheme == "euler":
            y = y + h * f(y)
        else:
            k1 = f(y)
            k2 = f(y + 0.5 * h * k1)
            k3 = f(y + 0.5 * h * k2)
            k4 = f(y + h * k3)
            y = y + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
        out[i + 1] = y
    return out


def python_loop(scheme, n0, r, k, e, h, n_steps):
    """(c) The spreadsheet's way: one member at a time, one step at a time, plain floats."""
    rows = []
    for m in range(len(n0)):
        rm, km, em, y = float(r[m]), float(k[m]), float(e[m]), float(n0[m])
        path = [y]
        for _ in range(n_steps):
            if scheme == "euler":
                y = y + h * (rm * y * (1 - y / km) - em * y)
            else:
                k1 = rm * y * (1 - y / km) - em * y
                s = y + 0.5 * h * k1
                k2 = rm * s * (1 - s / km) - em * s
                s = y + 0.5 * h * k2
                k3 = rm * s * (1 - s / km) - em * s
                s = y + h * k3
                k4 = rm * s * (1 - s / km) - em * s
                y = y + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
            path.append(y)
        rows.append(path)
    return rows


def ivp_loop(n0, r, k, e, h, n_steps):
    """(b) A per-sample loop over scipy's solve_ivp (RK45, adaptive), output on the grid."""
    from scipy.integrate import solve_ivp

    grid = np.arange(n_steps + 1) * h
    out = []
    for m in range(len(n0)):
        rm, km, em = r[m], k[m], e[m]
        sol = solve_ivp(
            lambda t, y, rm=rm, km=km, em=em: rm * y * (1 - y / km) - em * y,
            (0.0, grid[-1]),
            [n0[m]],
            method="RK45",
            t_eval=grid,
            rtol=IVP_RTOL,
            atol=IVP_ATOL,
        )
        out.append(sol.y[0])
    return out


def exact(n0, r, k, e, t):
    """Closed form of the harvested logistic: logistic with r - E and K (1 - E/r)."""
    rate, cap = r - e, k * (1 - e / r)
    return cap / (1 + (cap / n0 - 1) * np.exp(-rate * t))


# ------------------------------------------------------------------ the measurements


def ensemble_rows(case):
    design = sample_design(case.uncertain(), None, BASE_SAMPLES, seed=1)
    return ensemble.ensemble_params(case, design.values)


def compile_cost(case_path: Path) -> tuple[float, float]:
    """First streaming pass in a new process with empty caches (kernels and numba), then warm.

    Cold includes importing numba, generating the law's module, and compiling the law's step
    and the streaming loop; warm loads both from the caches.
    """
    code = (
        f"import time, sys; sys.path.insert(0, {str(ROOT)!r})\n"
        "from errbudget.case.load import load_case; from errbudget.solve import ensemble, stream\n"
        f"c = load_case({str(case_path)!r}); p = ensemble.nominal_params(c)\n"
        "t = time.perf_counter(); stream.stream(c, p, [7.0]); print(time.perf_counter() - t)\n"
    )
    with tempfile.TemporaryDirectory() as cache, tempfile.TemporaryDirectory() as numba_cache:
        env = dict(os.environ, ERRBUDGET_CACHE_DIR=cache, NUMBA_CACHE_DIR=numba_cache)
        cold, warm = (
            float(
                subprocess.run(
                    [sys.executable, "-c", code],
                    env=env,
                    check=True,
                    capture_output=True,
                    text=True,
                ).stdout
            )
            for _ in range(2)
        )
    return cold, warm


def section() -> list[str]:
    """The results.md section of this benchmark (engine throughput, compile cost)."""
    with tempfile.TemporaryDirectory() as tmp:
        case_path = Path(tmp) / "bench.toml"
        case_path.write_text(CASE_TEXT)
        case = load_case(case_path)
        custom_path = Path(tmp) / "bench-custom.toml"
        custom_path.write_text(
            CASE_TEXT.replace(
                'form = "logistic-harvest"', f'form = "custom"\nrate = "{CUSTOM_RATE}"'
            )
        )
        custom = load_case(custom_path)
        params = ensemble_rows(case)
        rows = params["N0"].size
        n0, r, k, e = (params[x] for x in ("N0", "r", "K", "E"))
        cold, warm = compile_cost(case_path)
        lines = [
            f"Ensemble: {rows} rows (Saltelli, {BASE_SAMPLES} base samples, "
            f"4 inputs), horizon {HORIZON:g} day, ladder {', '.join(f'{h:g}' for h in LADDER)}"
            " day.",
            "",
        ]
        table = [
            "| scheme | method | seconds (ladder) | member-steps/s | engine is x faster |",
            "| --- | --- | --- | --- | --- |",
        ]
        checks = []
        law = {x: v for x, v in params.items() if x != "N0"}
        for name in ("euler", "rk4"):
            scheme = SCHEMES[name]
            steps = [ensemble.n_steps_for(HORIZON, h) for h in LADDER]
            work = rows * sum(steps)

            module, spec = ensemble.compiled(case.model, scheme)
            kernel = module.kernel

            def engine_run(threads=None, kernel=kernel, spec=spec, scheme=scheme, steps=steps):
                for h, n in zip(LADDER, steps, strict=True):
                    engine.integrate_compiled(kernel, spec, n0, law, h, n, scheme, threads)

            def over_ladder(loop, members, *first, steps=steps):
                sub = slice(0, members)
                for h, n in zip(LADDER, steps, strict=True):
                    loop(*first, n0[sub], r[sub], k[sub], e[sub], h, n)

            engine_run()  # compile or load from cache before timing
            t_engine = best(engine_run)
            custom_module, custom_spec = ensemble.compiled(custom.model, scheme)
            custom_kernel = custom_module.kernel

            def custom_run(kernel=custom_kernel, spec=custom_spec, scheme=scheme, steps=steps):
                for h, n in zip(LADDER, steps, strict=True):
                    engine.integrate_compiled(kernel, spec, n0, law, h, n, scheme)

            custom_run()
            t_custom = best(custom_run)
            t_engine1 = best(lambda run=engine_run: run(1))
            t_numpy = best(lambda name=name: over_ladder(numpy_loop, rows, name))
            t_py = best(lambda name=name: over_ladder(python_loop, PYTHON_SUBSET, name), 1)
            t_py *= rows / PYTHON_SUBSET
            t_ivp = best(lambda: over_ladder(ivp_loop, IVP_SUBSET), 1)
            t_ivp *= rows / IVP_SUBSET
            for label, seconds in (
                (f"a) errbudget engine ({engine.THREADS} threads)", t_engine),
                ("a) errbudget engine (1 thread)", t_engine1),
                (f"a') engine, same law as custom rate `{CUSTOM_RATE}`", t_custom),
                ("b) per-sample solve_ivp RK45 (extrapolated)", t_ivp),
                ("c) per-sample pure Python (extrapolated)", t_py),
                ("d) numpy loop over steps, vectorised", t_numpy),
            ):
                ratio = seconds / t_engine
                table.append(
                    f"| {name} | {label} | {seconds:.3g} | {work / seconds:.3g} | {ratio:.3g} |"
                )
            # accuracy: the finest level of the engine and solve_ivp against the closed form
            fine = ensemble.solve(case, params, LADDER[-1], scheme=scheme).states
            t_end = steps[-1] * LADDER[-1]
            truth = exact(n0, r, k, e, t_end)
            err_engine = float(np.max(np.abs(fine[-1] - truth) / truth))
            ivp = np.array(
                [
                    path[-1]
                    for path in ivp_loop(
                        n0[:IVP_SUBSET],
                        r[:IVP_SUBSET],
                        k[:IVP_SUBSET],
                        e[:IVP_SUBSET],
                        LADDER[-1],
                        steps[-1],
                    )
                ]
            )
            err_ivp = float(np.max(np.abs(ivp - truth[:IVP_SUBSET]) / truth[:IVP_SUBSET]))
            checks.append(
                f"- {name}: largest relative error at {t_end:g} day, engine at "
                f"{LADDER[-1]:g} day {err_engine:.2g}; solve_ivp (rtol {IVP_RTOL:g}, "
                f"atol {IVP_ATOL:g}) {err_ivp:.2g}"
            )
            checks.append(
                f"- {name} targets: engine / numpy = {t_numpy / t_engine:.2f} "
                f"(target >= 4), engine / solve_ivp = {t_ivp / t_engine:.0f} "
                "(target >= 200)"
            )
    return [
        "## Ensemble engine throughput (best of "
        f"{REPEATS}; b) and c) timed on {IVP_SUBSET} and {PYTHON_SUBSET} members per level "
        f"and scaled to {rows} rows)",
        "",
        *lines,
        *table,
        "",
        *checks,
        "",
        "solve_ivp cannot step with a fixed step: each member is solved adaptively once per "
        "ladder level with output on that level's grid (t_eval), at a tolerance tighter "
        "than all but the finest RK4 levels.",
        "",
        "## First-run compile cost",
        "",
        "- first streaming pass in a new process, empty kernel and numba caches (numba import,"
        f" code generation, compiling the law's step and the streaming loop): {cold:.2f} s",
        f"- same, caches warm: {warm:.2f} s",
        "",
    ]
