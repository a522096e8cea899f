"""How far a run has got, for a display while it runs.

A long trace (a 32k-token prompt re-streamed through small buffers) can take
hours; whoever waits wants to see it move and how much is left. The engine
only exposes counts it keeps anyway -- the steps that have ended, the fetch
transactions issued, the simulated time -- and a display in another thread
reads them now and then (:meth:`RunProgress.snapshot`). Plain reads of these
values are safe across threads in CPython, so the engine takes no lock and
does no extra work per transaction.
"""

from typing import NamedTuple


class Snapshot(NamedTuple):
    steps_done: int      # trace steps whose last result is out
    steps: int           # steps in the trace
    transactions: int    # fetch transactions issued so far
    cycles: float        # simulated time reached


class RunProgress:
    """The progress of one run: made by the caller, handed to :func:`sim.simulate`
    (``progress=``), read with :meth:`snapshot` while the run goes on or after it."""

    def __init__(self):
        self._env = None
        self._step_times = ()
        self._fetch_stats = None

    def attach(self, env, step_times, fetch_stats):
        """Called by the engine once the run is set up: ``step_times`` (one entry per step,
        None until the step ends) and ``fetch_stats`` (the fetch unit's counts) are read
        in place."""
        self._env = env
        self._step_times = step_times
        self._fetch_stats = fetch_stats

    def snapshot(self) -> Snapshot:
        """Where the run is now (all zero before the engine has attached)."""
        stats = self._fetch_stats
        if stats is None:
            return Snapshot(0, 0, 0, 0.0)
        times = self._step_times
        return Snapshot(sum(1 for t in times if t is not None), len(times), int(stats["transactions"]),
                        float(self._env.now))
