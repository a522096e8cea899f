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

__version__ = "0.1.0"

import os  # noqa: E402
from typing import TYPE_CHECKING, Any, Mapping, Union  # noqa: E402

from .arch import Arch, load_arch  # noqa: E402
from .errors import ConfigError, InputError, SimulationStalled, TraceError  # noqa: E402
from .trace.files import load_trace  # noqa: E402
from .trace.format import Trace  # noqa: E402

if TYPE_CHECKING:
    from .result import Result

ArchLike = Union[Arch, str, "os.PathLike[str]", Mapping[str, Any]]
TraceLike = Union[Trace, str, "os.PathLike[str]"]


def simulate(arch: ArchLike, trace: TraceLike, keep_intervals: bool = True, progress: Any = None,
             **engine_options: Any) -> Result:
    """Replay ``trace`` on ``arch`` and return a :class:`sim.result.Result`.

    ``arch`` may be an Arch, a YAML path or a mapping; ``trace`` a Trace or a
    path. ``engine_options`` override the config's ``engine`` section
    (``grain_rows``, ``seed``). ``keep_intervals=False`` skips the per-unit
    intervals a timeline needs (the document is the same). A run that would
    not fit the address map or the machine's memory is refused first
    (:mod:`sim.budget`). ``progress``: a :class:`sim.engine.progress.RunProgress`
    another thread may read while the run goes on (the CLI's progress line).
    """
    from .budget import check_run
    from .engine.datapath import run_datapath
    from .result import build_result

    if progress is not None and not callable(getattr(progress, "attach", None)):
        raise TypeError(f"progress: expected a sim.engine.progress.RunProgress or None, got {progress!r}")
    arch = load_arch(arch)
    if not isinstance(trace, Trace):
        trace = load_trace(trace)
    check_run(arch, trace, engine_options.get("grain_rows"), timeline=keep_intervals)
    return build_result(run_datapath(arch, trace, keep_intervals=keep_intervals, progress=progress,
                                     **engine_options))


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


__all__ = ["Arch", "ConfigError", "InputError", "SimulationStalled", "Trace", "TraceError",
           "load_arch", "load_sweep", "load_trace", "open_sweep", "simulate", "__version__"]
