"""The cluster, when one is asked for: which one (``--cluster``), connecting, and member chunks
as its tasks.

Dask is an optional extra (``pip install "errbudget[cluster]"``) and is imported here only
inside the functions that need it, so parsing the option and running without a cluster never
import it. A local cluster listens on the loopback interface only, runs one process per worker
with one thread each, and is shut down with its workers when the batch ends.
"""

from __future__ import annotations

import logging
import os
import re
import uuid
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from errbudget.errors import InputError

INSTALL_COMMAND = 'pip install "errbudget[cluster]"'
LOOPBACK = "127.0.0.1"  # a local cluster is reachable from this machine only
MAX_LOCAL_WORKERS = 256  # worker processes of a local cluster at most
CONNECT_TIMEOUT = 10  # seconds to reach a scheduler or see its first worker
CORES = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1
_ADDRESS = re.compile(r"^tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})$")
SPEC_HELP = "local, local:N (N worker processes), tcp://HOST:PORT or a scheduler file"


@dataclass(frozen=True)
class ClusterChoice:
    """What ``--cluster`` asked for: a local cluster of ``workers`` processes, a scheduler's
    ``address``, or a ``scheduler_file`` written by a running scheduler."""

    text: str
    workers: int | None = None
    address: str | None = None
    scheduler_file: Path | None = None

    @property
    def local(self) -> bool:
        return self.workers is not None


def parse_cluster(text: str) -> ClusterChoice:
    """The cluster named by ``text`` (see :data:`SPEC_HELP`); an InputError names the problem."""
    text = text.strip()
    if text == "local":
        return ClusterChoice(text, workers=CORES)
    if text.startswith("local:"):
        count = text.partition(":")[2]
        if not count.isdigit() or not 1 <= int(count) <= MAX_LOCAL_WORKERS:
            raise InputError(
                f"local:N takes a number of worker processes from 1 to {MAX_LOCAL_WORKERS}, "
                f"got {text!r}",
                "--cluster",
            )
        return ClusterChoice(text, workers=int(count))
    if "://" in text:
        found = _ADDRESS.match(text)
        if not found or not 1 <= int(found.group(2)) <= 65535:
            raise InputError(
                f"expected a scheduler address like tcp://10.1.2.3:8786, got {text!r}",
                "--cluster",
            )
        return ClusterChoice(text, address=text)
    path = Path(text)
    if not path.is_file():
        raise InputError(
            f"expected {SPEC_HELP}; {text!r} is none of these (no such file)", "--cluster"
        )
    return ClusterChoice(text, scheduler_file=path)


def require_dask():
    """The ``distributed`` module, or an InputError (exit 2) with the install command."""
    try:
        import dask  # noqa: F401
        import distributed
    except ImportError:
        raise InputError(
            f"--cluster needs Dask, which is not installed; install it with: {INSTALL_COMMAND}",
            "--cluster",
        ) from None
    return distributed


class Connection:
    """A Dask client and, for a local cluster, the cluster it started (closed together)."""

    def __init__(self, client, cluster=None, where: str = ""):
        self.client = client
        self.cluster = cluster
        self.where = where

    def __enter__(self) -> Connection:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close the client; a local cluster is shut down with its worker processes."""
        try:
            self.client.close()
        finally:
            if self.cluster is not None:
                self.cluster.close()


def connect(choice: ClusterChoice | str) -> Connection:
    """Start or reach the cluster of ``choice`` and prepare its workers."""
    choice = parse_cluster(choice) if isinstance(choice, str) else choice
    distributed = require_dask()
    cluster = None
    try:
        if choice.local:
            cluster = distributed.LocalCluster(
                n_workers=choice.workers,
                threads_per_worker=1,
                processes=True,
                host=LOOPBACK,
                dashboard_address=None,  # no web page: nothing listens but the cluster itself
                silence_logs=logging.ERROR,
            )
            client = distributed.Client(cluster)
            where = f"on a local cluster of {choice.workers} worker processes"
        elif choice.address is not None:
            client = distributed.Client(choice.address, timeout=CONNECT_TIMEOUT)
            where = f"on the cluster at {choice.address}"
        else:
            client = distributed.Client(
                scheduler_file=str(choice.scheduler_file), timeout=CONNECT_TIMEOUT
            )
            where = f"on the cluster of {choice.scheduler_file}"
    except (OSError, ValueError, TimeoutError, RuntimeError) as error:
        if cluster is not None:
            cluster.close()
        raise InputError(
            f"cannot {'start' if choice.local else 'reach'} the cluster: {error}; "
            + ("" if choice.local else "check the address and that the scheduler is running"),
            "--cluster",
        ) from None
    connection = Connection(client, cluster, where)
    try:
        threads = max(1, CORES // choice.workers) if choice.local else 1
        prepare_workers(client, threads)
    except BaseException:
        connection.close()
        raise
    return connection


def prepare_workers(client, kernel_threads: int = 1) -> None:
    """Check that the workers run this errbudget, and set their kernels' thread count.

    On a worker the parallelism is the worker's own threads (one task each), so each task
    steps its members with ``kernel_threads`` threads (1 unless a local cluster has fewer
    workers than cores).
    """
    from errbudget.batch import worker
    from errbudget.version import package_version

    try:
        client.wait_for_workers(1, timeout=CONNECT_TIMEOUT)
    except TimeoutError:
        raise InputError(
            f"the cluster has no worker after {CONNECT_TIMEOUT} s; start workers for it",
            "--cluster",
        ) from None
    try:
        found = client.run(worker.version)
    except ImportError as error:
        raise InputError(
            f"the workers cannot import errbudget ({error}); install it on them", "--cluster"
        ) from None
    here = package_version()
    wrong = sorted(f"{address} runs {v}" for address, v in found.items() if v != here)
    if wrong:
        raise InputError(
            f"the workers must run errbudget {here}, as here: {'; '.join(wrong)}", "--cluster"
        )
    client.register_plugin(worker.KernelThreads(kernel_threads))


class DaskMapper:
    """Runs the chunks of a pass as tasks on a client's workers; yields results in order.

    At most ``window`` chunks are in flight (default: twice the workers' threads), so the
    memory a pass holds on the workers is bounded by the chunk size, not by the ensemble;
    each result is taken off its worker as soon as it is done.
    """

    def __init__(self, client, window: int | None = None):
        self.client = client
        self.window = window

    def __call__(self, function: Callable, items: Sequence) -> Iterator:
        from distributed import as_completed

        items = list(items)
        window = self.window or max(2, 2 * sum(self.client.nthreads().values()))
        prefix = f"errbudget-chunk-{uuid.uuid4().hex[:12]}"
        running = as_completed()
        in_flight: dict[str, tuple[int, object]] = {}
        done: dict[int, object] = {}
        submitted = wanted = 0
        try:
            while wanted < len(items):
                while submitted < len(items) and submitted - wanted < window:
                    future = self.client.submit(
                        function, items[submitted], key=f"{prefix}-{submitted}", pure=False
                    )
                    in_flight[future.key] = (submitted, future)
                    running.add(future)
                    submitted += 1
                while wanted not in done:
                    future = next(running)
                    index, _ = in_flight.pop(future.key)
                    done[index] = future.result()  # a failed chunk raises its error here
                yield done.pop(wanted)
                wanted += 1
        finally:
            for _, future in in_flight.values():
                future.cancel()
