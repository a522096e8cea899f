"""Datapath: builds the units from an architecture and replays a trace on them.

:class:`~sim.engine.program.ProgramBuilder` turns the trace into one program
per unit; here the units are created and wired (channel pool, fetch unit,
buffers, dot array(s), softmax, top-k) and run concurrently under simpy until
the last step is done. The result is the run's statistics
(:class:`~sim.engine.stats.RunStats`); :mod:`sim.result` makes the document.
"""

import gc

import numpy as np
import simpy

from ..errors import ConfigError, SimulationStalled
from . import dot as dotmod
from . import softmax as smmod
from . import topk as tkmod
from .addrmap import AddressMap
from .buffers import Buffer
from .dram import ChannelPool
from .fetch import FetchUnit, fetch_process
from .program import ProgramBuilder
from .stats import BusyFold, RunStats, UnitState
from .tiling import check_fits, room_by_request
from .writeback import writeback_process

PLANE_KEYS = ("bytes_Q", "bytes_K", "bytes_KL", "bytes_V")


def run_datapath(arch, trace, grain_rows=None, seed=None, keep_intervals=True, progress=None,
                 sample_prefill=None):
    """Replay ``trace`` on ``arch``; return the run's :class:`~sim.engine.stats.RunStats`.

    :func:`sim.result.build_result` turns them into the result document.
    ``progress``: a :class:`~sim.engine.progress.RunProgress` to read while it runs.
    ``sample_prefill``: make one query block in that many of a long prefill step (the
    program's ``block_sample``; :mod:`sim.result` estimates the whole run from it).
    """
    # A run allocates hundreds of thousands of small objects that live until it
    # ends; the cyclic collector would walk them over and over (a third of the
    # wall time on long decode traces). Reference counting frees the rest.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        return _run(arch, trace, (grain_rows, seed, sample_prefill), keep_intervals, progress)
    finally:
        if was_enabled:
            gc.enable()


MAX_SAMPLE_EVERY = 4096   # query blocks a sampled block may stand for


def _engine_options(arch, options):
    """The run's engine options checked: the config's grain and seed unless overridden."""
    grain_rows, seed, every = options
    g = arch.engine.grain_rows if grain_rows is None else grain_rows
    s = arch.engine.seed if seed is None else seed
    if isinstance(g, bool) or not isinstance(g, int) or g < 1:
        raise ConfigError("engine options", "engine.grain_rows", g, "expected a whole number >= 1")
    if isinstance(s, bool) or not isinstance(s, int) or s < 0:
        raise ConfigError("engine options", "engine.seed", s, "expected a whole number >= 0")
    if every is not None and (isinstance(every, bool) or not isinstance(every, int)
                              or not 2 <= every <= MAX_SAMPLE_EVERY):
        raise ConfigError("engine options", "sample_prefill", every,
                          f"expected a whole number from 2 to {MAX_SAMPLE_EVERY}, or None")
    engine = {"grain_rows": g, "seed": s}
    if every is not None:
        engine["sample_prefill"] = every
    return engine


def _address_maps(arch, trace):
    """One address map per head width in the trace (each checked to fit one tile)."""
    dims = sorted({s.head_dim for s in trace.steps})
    for d in dims:
        check_fits(arch, d, arch.source)
    # each request has its own regions: layer l of request r is region r * layers + l
    layers = (max(s.layer for s in trace.steps) + 1) * (max(s.request for s in trace.steps) + 1)
    heads = max(max(int(s.heads.max()), int(s.kv_heads.max())) for s in trace.steps) + 1
    max_rows = max(s.kv_rows for s in trace.steps)
    return {d: AddressMap(arch, layers, heads, max_rows, d) for d in dims}


def _run(arch, trace, options, keep_intervals, progress):
    engine = _engine_options(arch, options)
    amaps = _address_maps(arch, trace)
    env = simpy.Environment()
    ahead = room_by_request(arch)
    buffers = {name: Buffer(env, name, kib * 1024, ahead) for name, kib in (
        ("query", arch.buffers.query_kib), ("key", arch.buffers.key_kib), ("value", arch.buffers.value_kib))}
    # steps are made as the units reach them (the program's feeds)
    prog = ProgramBuilder(env, arch, trace, amaps, buffers, engine["grain_rows"],
                          np.random.default_rng(engine["seed"]), engine.get("sample_prefill")).prog
    pool = ChannelPool(env, arch)
    # the fetch unit's intervals are always kept: the pool's stalls are read from them
    names = ("fetch", "dot", "softmax", "topk") + (() if arch.dot.arrays == "shared" else ("dot_pv",))
    states = {n: UnitState(env, n, keep_intervals or n == "fetch") for n in names}
    fetch_stats = dict.fromkeys(("bytes", "transactions", "requests") + PLANE_KEYS, 0)
    # without a timeline the pool hands over its final bus intervals instead of keeping them all
    readers = [states[n] for n in names if n.startswith("dot")]   # see through the fetch unit
    folded = None if keep_intervals else BusyFold(pool, states["fetch"], readers)
    pool.on_full = folded
    router = _amap_router(amaps, trace)
    fetch = FetchUnit(env, prog.fetch, pool, router, arch, states["fetch"], fetch_stats)
    procs = _start_units(env, arch, prog, fetch, states)
    writer = env.process(writeback_process(env, prog.writes, pool, router, arch.dram.burst_bytes))
    if progress is not None:
        progress.attach(env, prog.step_times, fetch_stats)
    try:
        env.run()
    except SimulationStalled as e:   # raised by a unit, which does not know the inputs
        raise SimulationStalled(f"{e} (arch {arch.source}, trace {trace.source})") from None
    step_times = prog.step_times
    if any(t is None for t in step_times) or any(p.is_alive for p in procs.values()) or writer.is_alive:
        raise _stalled(env, arch, trace, fetch, states, procs, step_times)
    # the run ends when the last step has ended and the last write has reached memory
    end = max(max(step_times), pool.write_end)
    return RunStats(arch, trace, prog, pool, states, buffers, fetch_stats, step_times, end,
                    engine, keep_intervals, folded)


def _start_units(env, arch, prog, fetch, states):
    """One simpy process per unit; returns them by name."""
    shared = arch.dot.arrays == "shared"
    sm_queue = smmod.ScoreQueue(env, capacity=2)
    mult = arch.dot.multipliers if shared else arch.dot.multipliers // 2

    def array(ops, name):
        return dotmod.dot_process(env, ops, mult, arch.dot.lanes, arch.dot.pipeline_cycles,
                                  states[name], sm_queue, states["fetch"])

    procs = {
        "fetch": fetch_process(fetch),
        "dot": array(prog.dot_qk, "dot"),
        "softmax": smmod.softmax_process(env, prog.softmax, arch.softmax.lanes,
                                         arch.softmax.latency_cycles, states["softmax"], sm_queue),
        "topk": tkmod.topk_process(env, prog.topk, arch.topk.comparators, arch.topk.latency_cycles,
                                   states["topk"]),
    }
    if not shared:
        procs["dot_pv"] = array(prog.dot_pv, "dot_pv")
    return {name: env.process(p) for name, p in procs.items()}


def _stalled(env, arch, trace, fetch, states, procs, step_times):
    """The error for a run whose event queue emptied before the last step: which units
    wait, on what, and what the oldest unissued fetch waits for."""
    stuck = [f"{n}: {st.state}" + (f" ({st.cause})" if st.cause else "")
             for n, st in states.items() if procs[n].is_alive]
    held = next(((t, c) for t in fetch.unissued() for due, c in t.waits if not due.processed), None)
    why = (f"; the oldest unissued fetch ({held[0].kind} of step {held[0].step}) waits for {held[1]}"
           if held else "")
    done = sum(t is not None for t in step_times)
    return SimulationStalled(
        f"no progress at cycle {env.now:.0f} after {done}/{len(step_times)} steps; "
        f"waiting units: {', '.join(stuck) or 'none'}{why} (arch {arch.source}, trace {trace.source})")


class _amap_router:
    """Address map lookup by the head width of the transaction's step."""

    def __init__(self, amaps, trace):
        self.amaps = amaps
        self.dim_of_step = [s.head_dim for s in trace.steps]
        self.single = next(iter(amaps.values())) if len(amaps) == 1 else None

    def bursts_for(self, txn):
        amap = self.single or self.amaps[self.dim_of_step[txn.step]]
        segs = txn.positions
        h, p = segs[0]
        if len(segs) > 1 and not txn.skip and all(q is p for _h, q in segs):
            # one row set for many heads (a step's query vector, its cache writes)
            return amap.bursts_of_heads(txn.layer, txn.kind, [g for g, _q in segs], p)
        first = amap.bursts(txn.layer, txn.kind, h, p)
        if txn.skip:   # the chunk before it in the stream brought that burst
            first = first[txn.skip:]
        if len(segs) == 1:
            return first
        # heads' regions are laid out in head order, so the concatenation stays sorted
        out = np.concatenate([first] + [amap.bursts(txn.layer, txn.kind, h, p) for h, p in segs[1:]])
        return out if amap.heads_in_order else np.unique(out)

