"""One run: a config and a trace through the engine into a result document.

The first step of the data flow (config + trace -> engine -> stats -> result),
kept below the sweep, report and CLI code that call it, so none of them needs
the package's face (``sim/__init__.py``) to run a point.
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING, Any, Mapping, Union

from .arch import Arch, load_arch
from .trace.files import load_trace
from .trace.format import Trace

if TYPE_CHECKING:
    from .result import Result

ArchLike = Union[Arch, str, "os.PathLike[str]", Mapping[str, Any]]
TraceLike = Union[Trace, str, "os.PathLike[str]"]


def simulate(arch: ArchLike, trace: TraceLike, keep_intervals: bool = True, progress: Any = None,
             **engine_options: Any) -> Result:
    """Replay ``trace`` on ``arch`` and return a :class:`sim.result.Result`.

    ``arch`` may be an Arch, a YAML path or a mapping; ``trace`` a Trace or a
    path. ``engine_options`` override the config's ``engine`` section
    (``grain_rows``, ``seed``); ``sample_prefill=K`` makes about one query block in
    K of long prefill steps and adds the whole run's estimate (``prefill_sample``).
    ``keep_intervals=False`` skips the per-unit intervals a timeline needs (the
    document is the same). A run that would
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


AUTO_PHASES = 4   # refresh phases for a run short for refresh (a sweep's refresh_phases: auto)


def refresh_phase_runs(arch: Arch, trace: Trace, phases: int, doc: dict, **engine_options: Any) -> dict:
    """``doc`` (the run of ``arch`` on ``trace`` as configured) again with its refresh schedule
    moved later by 1/phases, 2/phases ... of tREFI (wrapping round): the ``refresh_phases``
    section of a result document -- each run's cycles, seconds and energy, and their means.
    Where a run starts in the refresh schedule is not part of the design; on a short run one
    window more or less can move it by more than a design change does."""
    from .result import _round

    own = arch.dram.refresh_phase
    offsets = [k / phases for k in range(phases)]
    docs = [doc] + [simulate(arch.with_overrides({"dram.refresh_phase": (own + off) % 1.0}, "refresh phases"),
                             trace, keep_intervals=False, **engine_options).to_dict() for off in offsets[1:]]
    cycles = [d["cycles"] for d in docs]
    out = {"runs": phases, "offsets": offsets, "cycles": cycles,
           "mean_cycles": round(sum(cycles) / phases),
           "mean_seconds": _round(sum(d["seconds"] for d in docs) / phases),
           "spread": _round((max(cycles) - min(cycles)) / min(cycles)) if min(cycles) else 0.0}
    energy = [e for e in ((d.get("energy") or {}).get("total_pj") for d in docs) if e is not None]
    if len(energy) == phases:
        out["energy_pj"] = energy
        out["mean_energy_pj"] = _round(sum(energy) / phases)
    return out


def estimate_whole(doc: dict, sample: Any) -> dict:
    """The whole trace's cycles and seconds estimated from ``doc``, the run of a sampled part
    (``sample``: a :class:`sim.trace.sample.DecodeSample`): the ``decode_sample`` section of
    its result document. Each step's share of the run (``per_step_cycles``, which sums to the
    run's cycles) counts as many times as the steps it stands for. The two half-samples of
    strata give two estimates of their own; half their distance over the estimate is the
    ``half_sample_spread``. A part run sampling its prefill too (``sample_prefill``) brings
    its steps' estimated cycles (``prefill_sample.per_step_cycles``): those are weighed. The
    section names the whole trace (``whole_trace_name``, ``whole_trace_digest``), which a
    report compares the estimate with."""
    from .result import _round

    ps = doc.get("prefill_sample")
    per_step = ps["per_step_cycles"] if ps else doc["per_step_cycles"]
    if len(per_step) != len(sample.weights):
        raise ValueError(f"estimate_whole: the document has {len(per_step)} steps, the sample "
                         f"{len(sample.weights)}: expected the run of this sample's part")
    full = sum(x for x, h in zip(per_step, sample.halves) if h < 0)
    part = [0.0, 0.0]
    stands = [0, 0]
    for x, w, h in zip(per_step, sample.weights, sample.halves):
        if h >= 0:
            part[h] += w * x
            stands[h] += w
    cycles = full + part[0] + part[1]
    per_cycle = doc["seconds"] / doc["cycles"] if doc["cycles"] else 0.0
    whole = sample.part.header["provenance"]["decode_sample"]
    out = {"whole_trace_name": whole["from"], "whole_trace_digest": whole["digest"],
           "every": sample.every, "warmup_tokens": sample.warmup, "decode_steps": sample.decode_tokens,
           "simulated_decode_steps": sample.simulated_tokens, "simulated_cycles": doc["cycles"],
           "cycles": round(cycles), "seconds": _round(round(cycles) * per_cycle)}
    if stands[0] and stands[1]:
        halves = [full + part[h] * (stands[0] + stands[1]) / stands[h] for h in (0, 1)]
        out["half_cycles"] = [round(c) for c in halves]
        out["half_sample_spread"] = _round(abs(halves[0] - halves[1]) / 2 / cycles) if cycles else 0.0
    return out
