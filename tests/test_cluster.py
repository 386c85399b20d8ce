"""Cases and member chunks on a Dask cluster (errbudget.batch), against runs in one process.

One two-worker LocalCluster (worker processes, one thread each, loopback only) is shared by
the module; the command-line test starts and stops its own to check that no worker process
is left behind. Sample sizes are small: what is checked is that the numbers are the same,
not what they are.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import psutil
import pytest
from test_chunks import assert_same_levels
from test_stream import LAWS, _case, _ensemble, _readout

from errbudget.batch import cluster as clusters
from errbudget.batch.cluster import DaskMapper, connect, parse_cluster
from errbudget.batch.driver import run_cases
from errbudget.cli import main
from errbudget.errors import InputError
from errbudget.solve import chunks
from errbudget.solve.stream import stream

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests" / "golden"))
from pin import stable_part  # noqa: E402

DEMO = sorted((REPO / "cases").glob("*.toml"))
SMALL = REPO / "tests" / "golden" / "cases" / "negative-euler.toml"
SAMPLES = "32"
OUTPUTS = ("budget.json", "budget.html", "ladder.csv", "summary.csv")


def _children() -> set[int]:
    return {child.pid for child in psutil.Process().children(recursive=True)}


def _all_gone(pids, within: float = 10.0) -> list[int]:
    """The processes of ``pids`` still running after ``within`` seconds."""
    deadline = time.monotonic() + within
    alive = [p for p in pids if psutil.pid_exists(p)]
    while alive and time.monotonic() < deadline:
        time.sleep(0.1)
        alive = [p for p in alive if _running(p)]
    return alive


def _running(pid: int) -> bool:
    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


@pytest.fixture(scope="module")
def connection():
    found = connect("local:2")
    workers = list(found.client.run(os.getpid).values())
    yield found
    found.close()
    assert _all_gone(workers) == [], "worker processes left running"


def _normalised_html(text: str) -> str:
    """budget.html without what a clock decides: the cost section, run time and its moment."""
    text = re.sub(r'<section[^>]*id="cost".*?</section>', "", text, flags=re.S)
    for label in ("Run at", "Computing time"):
        text = re.sub(rf"<dt>{label}</dt><dd>.*?</dd>", "", text)
    return text


def _history_line(folder: Path) -> dict:
    line = json.loads((folder / "history.jsonl").read_text(encoding="utf-8"))
    line.pop("time")
    return line


def test_the_local_cluster_listens_on_loopback_only(connection):
    cluster = connection.cluster
    addresses = [cluster.scheduler_address, *connection.client.nthreads()]
    addresses += [nanny.address for nanny in cluster.workers.values()]
    assert len(addresses) == 5
    assert all(a.startswith("tcp://127.0.0.1:") for a in addresses), addresses
    assert list(connection.client.nthreads().values()) == [1, 1]
    # The kernels of a worker step with one thread: the worker's thread is the parallelism.
    threads = connection.client.run(_kernel_threads)
    assert set(threads.values()) == {max(1, clusters.CORES // 2)}


def _kernel_threads() -> int:
    from errbudget.solve import engine

    return engine.THREADS


def test_a_batch_on_two_workers_equals_the_sequential_run(connection, tmp_path, capsys):
    alone, batch = tmp_path / "alone", tmp_path / "batch"
    paths = [str(p) for p in DEMO]
    assert main(["run", *paths, "--out", str(alone), "--samples", SAMPLES, "--quiet"]) == 0
    capsys.readouterr()
    programme = run_cases(paths, out=batch, samples=int(SAMPLES), client=connection.client)
    assert programme.exit_code == 0 and not programme.failed
    workers = {pid for pid in connection.client.run(os.getpid).values()}
    assert {int(r.where.rsplit(":", 1)[1]) for r in programme.results.values()} <= workers
    for path in DEMO:
        a, b = alone / path.stem, batch / path.stem
        data_a = json.loads((a / "budget.json").read_text(encoding="utf-8"))
        data_b = json.loads((b / "budget.json").read_text(encoding="utf-8"))
        assert stable_part(data_a) == stable_part(data_b), path.stem
        for name in ("ladder.csv", "summary.csv"):
            assert (a / name).read_bytes() == (b / name).read_bytes(), f"{path.stem} {name}"
        html_a = _normalised_html((a / "budget.html").read_text(encoding="utf-8"))
        html_b = _normalised_html((b / "budget.html").read_text(encoding="utf-8"))
        assert html_a == html_b, path.stem
        assert _history_line(a) == _history_line(b), path.stem
    assert (batch / "overview.csv").is_file() and (batch / "overview.html").is_file()
    assert not (alone / "overview.csv").exists()  # without --cluster nothing changes


def test_a_large_design_split_over_workers_equals_one_process(connection, tmp_path, monkeypatch):
    from distributed import get_task_stream

    case = _case(tmp_path, "logistic-harvest", "heun", LAWS[4][2])
    params, levels = _ensemble(case, members=20_000)
    steps = [4.0, 0.5]
    whole = stream(case, params, steps, levels=levels, readout=_readout(steps))
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", 4096)  # five chunks, at most four in flight
    mapper = DaskMapper(connection.client, window=4)
    with get_task_stream(connection.client) as tasks:
        parts = stream(case, params, steps, levels=levels, readout=_readout(steps), mapper=mapper)
    assert_same_levels(whole, parts)
    ran = [t for t in tasks.data if str(t["key"]).startswith("errbudget-chunk")]
    assert len(ran) == 5 and len({t["worker"] for t in ran}) == 2


def test_a_case_run_in_member_chunks_gives_the_budget_of_a_local_run(connection, tmp_path,
                                                                     monkeypatch):  # fmt: skip
    from errbudget import load_case, run_case

    path = DEMO[0]  # crayfish pond: 320 parameter sets at 32 samples
    local = run_case(load_case(path), samples=int(SAMPLES)).to_dict()
    monkeypatch.setattr(chunks, "MAPPED_CHUNK", 64)
    programme = run_cases(
        [path], out=tmp_path, samples=int(SAMPLES), client=connection.client, split_rows=1
    )
    assert programme.exit_code == 0
    data = json.loads((tmp_path / path.stem / "budget.json").read_text(encoding="utf-8"))
    assert stable_part(data) == stable_part({**local, "since_last": None})
    assert programme.results[0].where == f"{os.uname().nodename}:{os.getpid()}"  # from here


def test_an_existing_cluster_by_scheduler_file_is_used_and_left_running(connection, tmp_path):
    scheduler_file = tmp_path / "scheduler.json"
    # Written here, not by Client.write_scheduler_file: that dumps the scheduler's info, whose
    # worker metrics can hold tuple keys once tasks have run, and json refuses them. The
    # client reads only the address from the file.
    address = connection.cluster.scheduler_address
    scheduler_file.write_text(json.dumps({"address": address}), encoding="utf-8")
    workers = list(connection.client.run(os.getpid).values())
    programme = run_cases([SMALL], out=tmp_path / "out", samples=16, cluster=str(scheduler_file))
    assert programme.exit_code == 0 and programme.where.startswith("on the cluster of")
    assert {int(r.where.rsplit(":", 1)[1]) for r in programme.results.values()} <= set(workers)
    assert list(connection.client.run(os.getpid).values()) == workers  # still there


def test_the_command_line_batch_reports_bad_cases_and_leaves_no_process(tmp_path, capsys):
    good = tmp_path / "pond.toml"
    good.write_text(SMALL.read_text(encoding="utf-8"), encoding="utf-8")
    unreadable = tmp_path / "misspelt.toml"  # refused when it loads
    unreadable.write_text(good.read_text().replace('form = "logistic"', 'form = "logistik"'))
    too_slow = tmp_path / "too-slow.toml"  # refused on its worker, by the time limit
    too_slow.write_text(good.read_text().replace("seed = 3", 'seed = 3\ntime_limit = "1 us"'))
    out = tmp_path / "out"
    before = _children()
    args = [str(good), str(unreadable), str(too_slow), "--cluster", "local:2"]
    status = main(["run", *args, "--out", str(out), "--samples", SAMPLES])
    captured = capsys.readouterr()
    assert status == 2, captured.err
    lines = captured.out.splitlines()
    assert lines[0].startswith("errbudget: 3 cases on a local cluster of 2 worker processes")
    assert lines[0].endswith("0 adequate, 1 not adequate, 2 failed")
    assert sum("FAILED (bad input)" in line for line in lines) == 2
    assert f"misspelt: {unreadable}, model.form: unknown" in captured.out
    assert "too-slow: " in captured.out and "budget.time_limit" in captured.out
    assert lines[-1] == f"wrote {out / 'overview.csv'} and {out / 'overview.html'}"
    assert captured.err == "errbudget: 2 of 3 cases failed (listed above); exit code 2\n"
    assert all((out / "pond" / name).is_file() for name in OUTPUTS)
    assert not (out / "misspelt").exists() and not (out / "too-slow").exists()
    assert _all_gone(_children() - before) == [], "the batch left processes running"


def test_an_existing_cluster_by_address_from_the_command_line(connection, tmp_path, capsys):
    address = connection.cluster.scheduler_address
    unreadable = tmp_path / "misspelt.toml"  # quick: refused as it loads, nothing to run
    unreadable.write_text(SMALL.read_text().replace('form = "logistic"', 'form = "logistik"'))
    args = [str(unreadable), "--cluster", address, "--out", str(tmp_path / "out")]
    assert main(["run", *args]) == 2
    captured = capsys.readouterr()
    assert captured.out.startswith(f"errbudget: 1 case on the cluster at {address} in ")
    assert "FAILED (bad input)" in captured.out
    assert len(connection.client.nthreads()) == 2  # its workers are left running


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("local:0", "local:N takes a number of worker processes from 1 to 256, got 'local:0'"),
        ("local:two", "local:N takes a number of worker processes from 1 to 256"),
        ("tcp://", "expected a scheduler address like tcp://10.1.2.3:8786, got 'tcp://'"),
        ("tcp://host:99999", "expected a scheduler address like tcp://10.1.2.3:8786"),
        ("no-such-scheduler.json", "'no-such-scheduler.json' is none of these (no such file)"),
    ],
)
def test_a_bad_cluster_is_refused_with_exit_2(tmp_path, capsys, text, message):
    with pytest.raises(InputError, match=re.escape(message)):
        parse_cluster(text)
    assert main(["run", str(SMALL), "--cluster", text, "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("errbudget: error: command line: argument --cluster: ") and message in err
    assert list(tmp_path.iterdir()) == []


def test_the_cluster_choices():
    assert parse_cluster("local").workers == clusters.CORES
    assert parse_cluster("local:3").workers == 3
    assert parse_cluster("tcp://127.0.0.1:8786").address == "tcp://127.0.0.1:8786"
    assert parse_cluster("tcp://[::1]:8786").address == "tcp://[::1]:8786"


def test_an_unreachable_scheduler_is_bad_input(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(clusters, "CONNECT_TIMEOUT", 1)
    with socket_on_loopback() as port:  # a port that nothing answers on as a scheduler
        status = main(["run", str(SMALL), "--cluster", f"tcp://127.0.0.1:{port}",
                       "--out", str(tmp_path)])  # fmt: skip
    err = capsys.readouterr().err
    assert status == 2 and err.startswith("errbudget: error: --cluster: cannot reach the cluster")
    assert "check the address and that the scheduler is running" in err
    assert list(tmp_path.iterdir()) == []


class socket_on_loopback:  # noqa: N801 - used as a context manager
    """A free loopback port, closed again: connecting to it is refused at once."""

    def __enter__(self) -> int:
        import socket

        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        port = self.sock.getsockname()[1]
        self.sock.close()
        return port

    def __exit__(self, *exc) -> None:
        return None


def _python(code: str, tmp_path: Path) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "CI"}
    return subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
        cwd=tmp_path, env=env, stdin=subprocess.DEVNULL,
    )  # fmt: skip


def test_without_the_flag_dask_is_not_imported(tmp_path):
    # pint imports dask.base by itself whenever dask is installed (pint/compat.py: HAS_DASK);
    # the cluster machinery -- distributed, and errbudget's modules that use it -- stays out.
    code = (
        "import sys, errbudget; from errbudget.cli import main\n"
        f"status = main(['run', {str(SMALL)!r}, '--out', 'out', '--samples', '16', '--quiet'])\n"
        "errbudget.run_cases\n"
        "names = ('distributed', 'errbudget.batch.cluster', 'errbudget.batch.worker')\n"
        "print(status, sorted(m for m in names if m in sys.modules))\n"
        "import pint, importlib.util\n"
        "print(importlib.util.find_spec('dask') is None or 'dask' in sys.modules)\n"
    )
    done = _python(code, tmp_path)
    assert done.stdout.splitlines()[-2:] == ["0 []", "True"], done.stdout + done.stderr
    version = "import sys; from errbudget.cli import main; main(['--version'])\n"
    version += "print('dask' in sys.modules)"
    assert _python(version, tmp_path).stdout.splitlines()[-1] == "False"


def test_the_flag_without_dask_installed_is_exit_2_with_the_install_command(tmp_path):
    code = (
        "import sys; sys.modules['dask'] = None; sys.modules['distributed'] = None\n"
        "from errbudget.cli import main\n"
        f"print(main(['run', {str(SMALL)!r}, '--cluster', 'local:2', '--out', 'out']))\n"
    )
    done = _python(code, tmp_path)
    assert done.stdout == "2\n", done.stderr
    assert done.stderr == (
        "errbudget: error: --cluster: --cluster needs Dask, which is not installed; install it "
        'with: pip install "errbudget[cluster]"\n'
    )
    assert not (tmp_path / "out").exists()


def test_the_api_is_exported_lazily():
    import errbudget
    from errbudget.batch.driver import run_cases as direct

    assert errbudget.run_cases is direct
    assert np.array_equal(chunks.bounds(5, 2), [(0, 2), (2, 4), (4, 5)])


def test_progress_reaches_the_driver_from_the_workers(connection, tmp_path, monkeypatch):
    import io

    from errbudget.batch import driver
    from errbudget.batch.progress import BatchBar

    seen: dict[str, list] = {"planned": [], "done": [], "cases": []}

    class Recording(BatchBar):
        def planned(self, case, member_steps):
            seen["planned"].append((case, member_steps))
            super().planned(case, member_steps)

        def case_done(self, case):
            seen["cases"].append(case)
            super().case_done(case)

    monkeypatch.setattr(driver, "wanted", lambda quiet: True)  # as on a terminal
    monkeypatch.setattr(driver, "BatchBar", Recording)
    monkeypatch.setattr(sys, "stderr", io.StringIO())
    bad = tmp_path / "misspelt.toml"
    bad.write_text(SMALL.read_text().replace('form = "logistic"', 'form = "logistik"'))
    programme = run_cases([SMALL, bad], out=tmp_path, samples=16, client=connection.client)
    assert programme.exit_code == 2
    assert sorted(seen["cases"]) == [0, 1]
    # The prediction is sent while the case still has its passes and report ahead of it.
    assert [case for case, _ in seen["planned"]] == [0]
    assert seen["planned"][0][1] > 0
    assert "2/2 cases" in sys.stderr.getvalue()
