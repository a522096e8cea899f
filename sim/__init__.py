"""attnsim: a cycle-approximate, discrete-event simulator of attention datapaths.

Data flows one way: config + trace -> engine -> stats -> result -> sweep
store -> report.

    >>> import sim
    >>> arch = sim.load_arch("arch_configs/mid.yaml")
    >>> trace = sim.load_trace("traces/demo_decode.yaml")
    >>> result = sim.simulate(arch, trace)
    >>> result.to_dict()["cycles"]
"""

from __future__ import annotations

import os
from typing import Any

from .arch import Arch, load_arch
from .errors import ConfigError, InputError, SimulationStalled, TraceError
from .run import ArchLike, TraceLike, simulate
from .trace.files import load_trace
from .trace.format import Trace
from .version import __version__


def load_sweep(folder: str | os.PathLike, columns: list[str] | None = None,
               filters: list[tuple] | None = None) -> Any:
    """A pandas DataFrame with one row per point of sweep folder ``folder`` (see :mod:`sim.sweep.frame`).

    ``filters``: ``[(column, op, value)]``, all must hold; ``columns``: the columns to keep.
    """
    from .sweep.frame import load_sweep as _load

    return _load(folder, columns=columns, filters=filters)


def open_sweep(folder: str | os.PathLike) -> Any:
    """A sweep folder opened for reading: frames, Pareto fronts and whole records on demand."""
    from .sweep.frame import open_sweep as _open

    return _open(folder)


__all__ = ["Arch", "ArchLike", "ConfigError", "InputError", "SimulationStalled", "Trace", "TraceError",
           "TraceLike", "load_arch", "load_sweep", "load_trace", "open_sweep", "simulate", "__version__"]
