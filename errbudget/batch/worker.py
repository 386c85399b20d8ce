"""What runs on the workers besides the tasks themselves (imported with Dask only)."""

from __future__ import annotations

from distributed.diagnostics.plugin import WorkerPlugin


def version() -> str:
    """The errbudget version of the process that runs this (a worker)."""
    from errbudget.version import package_version

    return package_version()


class KernelThreads(WorkerPlugin):
    """Sets the compiled kernels' thread count on each worker, now and when one joins later.

    A worker's own threads are its parallelism (one task each); kernels that also spread
    their members over every core would oversubscribe the machine.
    """

    name = "errbudget-kernel-threads"

    def __init__(self, threads: int = 1):
        self.threads = threads

    def setup(self, worker) -> None:
        from errbudget.solve import engine

        engine.THREADS = self.threads  # the default of every kernel call in this process
