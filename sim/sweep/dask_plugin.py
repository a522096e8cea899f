"""The Dask worker plugin that readies each worker before its first sweep point.

Kept apart from :mod:`sim.sweep.backends` because it imports ``distributed``
at import time (a plugin must subclass Dask's ``WorkerPlugin``), which only a
Dask run should pay for.
"""

import asyncio

from distributed.diagnostics.plugin import WorkerPlugin

from .worker import prepare


class ReadyWorker(WorkerPlugin):
    """Runs :func:`sim.sweep.worker.prepare` on every worker, those that join later included.

    The work runs off the worker's event loop (a first compile takes tens of
    seconds, and the worker must keep answering the scheduler meanwhile).
    """

    name = "attnsim-ready"

    def __init__(self, traces):
        self.traces = tuple(traces)
        self.report = None

    async def setup(self, worker):
        loop = asyncio.get_running_loop()
        self.report = await loop.run_in_executor(None, prepare, self.traces, True)


def worker_report(dask_worker=None):
    """What :class:`ReadyWorker` did on this worker, and the worker's resident memory (bytes);
    for ``Client.run``."""
    import psutil

    plugin = dask_worker.plugins.get(ReadyWorker.name) if dask_worker is not None else None
    return {"prepared": getattr(plugin, "report", None), "rss": psutil.Process().memory_info().rss}
