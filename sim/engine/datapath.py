"""Datapath: builds the units from an architecture and replays a trace on them.

The trace is turned into one program per unit (fetch transactions, dot-array
operations, softmax blocks, top-k selections), all in one consistent order:

* per step, query blocks of all active heads in sequence; the array runs
  ``q.K(i)``, then ``p.V(i-1)``, then the LSB recompute of block ``i`` --
  one block of lookahead so softmax and top-k overlap with the array;
* the fetch unit issues operands in the order the array first needs them;
* a step's queries wait for the previous step (its output feeds this layer);
  its keys and values wait too in prefill (they are computed from that
  output) and whenever the previous step ran a top-k that picked this step's
  tokens or heads; in decode without such a selection, cached K/V stream in
  early -- that is the overlap across layers.

Units then run concurrently under simpy; the run ends when the last step is
done. Statistics come from each unit's :class:`~sim.engine.stats.UnitState`.
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
from .fetch import fetch_process
from .stats import RunStats, UnitState
from .tiling import check_fits, plan_step, pv_macs, selects_next
from .txn import Txn


class Program:
    """Per-unit operation lists for one trace on one architecture."""

    def __init__(self):
        self.fetch = []
        self.dot_qk = []
        self.dot_pv = []      # same list object as dot_qk when the array is shared
        self.softmax = []
        self.topk = []
        self.step_done = []
        self.counts = {"macs_qk": 0, "macs_lsb": 0, "macs_pv": 0, "softmax_elements": 0,
                       "topk_comparisons": 0.0, "topk_selections": 0, "value_selections": 0}
        self.macs_by_dim = {}
        self.compulsory_bytes = 0


def _engine_options(arch, grain_rows, seed):
    g = arch.engine.grain_rows if grain_rows is None else grain_rows
    s = arch.engine.seed if seed is None else seed
    if isinstance(g, bool) or not isinstance(g, int) or g < 1:
        raise ConfigError("engine options", "engine.grain_rows", g, "expected a whole number >= 1")
    if isinstance(s, bool) or not isinstance(s, int) or s < 0:
        raise ConfigError("engine options", "engine.seed", s, "expected a whole number >= 0")
    return g, s


def _array_key(a):
    a = np.asarray(a)
    return a.dtype.str, a.shape, a.tobytes()


def _shape_key(step, amap):
    """What a step's plan depends on: its shape and kept rows, and its layer only
    when where the layer sits in DRAM can change what its rows cost."""
    return (None if amap.costs_anywhere else step.layer, step.stage, step.head_dim, step.q_rows,
            step.kv_rows, _array_key(step.heads), _array_key(step.kept_k), _array_key(step.kept_v),
            _array_key(step.lsb_rows),
            None if step.kept_v_idx is None else tuple(_array_key(a) for a in step.kept_v_idx))


class _BlockShape:
    """One query block of a planned step, with the work counts of its operations."""

    __slots__ = ("gi", "gp", "bp", "head", "score_rows", "q_segments", "q_rows", "qk_macs",
                 "lsb_macs", "pv_chunks", "pv_macs", "pruned", "value_comps")


class _StepShape:
    """A step's plan and the numbers the program derives from it, without simpy objects.

    Steps that plan alike share one (in decode every layer of a token usually
    does), so each step only makes its own transactions and operations.
    """

    def __init__(self, arch, amap, step, grain_rows, q_room):
        d = step.head_dim
        layer = step.layer
        n_kv = step.n_kept_k
        plan = plan_step(arch, amap, step, grain_rows)
        self.plan = plan
        compulsory = 0
        for gp in plan:  # every row once: what an infinite buffer would fetch
            compulsory += gp.k_bytes + gp.v_bytes + amap.burst * sum(
                amap.burst_count(layer, "Q", h, bp.q_positions) for bp in gp.blocks for h in gp.heads)
            compulsory += sum(gp.lsb_bytes[h] for h in {h for bp in gp.blocks for h in bp.lsb})
        self.compulsory_bytes = compulsory
        # one query block per group: the step's whole query vector is one transaction
        self.shared_q = None
        heads = step.heads.tolist()
        if all(len(gp.blocks) == 1 for gp in plan):
            q_rows = plan[0].blocks[0].q_positions
            q_bytes = amap.burst * sum(amap.burst_count(layer, "Q", h, q_rows) for h in heads)
            if q_bytes <= q_room:
                segs = [(h, q_rows) for h in heads]
                self.shared_q = (segs, _rows(segs))
        self.blocks = []
        macs = {"qk": 0, "lsb": 0, "pv": 0}
        elements = value_selections = 0
        for gi, gp in enumerate(plan):
            for bp in gp.blocks:
                b = _BlockShape()
                b.gi, b.gp, b.bp = gi, gp, bp
                b.head = gp.heads[0]
                b.score_rows = bp.rows * len(gp.heads)
                b.q_segments = [(h, bp.q_positions) for h in gp.heads]
                b.q_rows = _rows(b.q_segments)
                kplan = gp.k_chunks if gp.k_resident else bp.k_chunks
                b.qk_macs = [bp.rows * c.rows * d for c in kplan]
                b.lsb_macs = [sum(bp.lsb[h] * len(p) for h, p in c.segments) * d for c in bp.lsb_chunks]
                b.pv_chunks = gp.v_chunks if gp.v_resident else bp.v_chunks
                b.pv_macs = pv_macs(gp, b.pv_chunks, bp.rows, d)
                b.pruned = gp.value_pruned_heads
                b.value_comps = (bp.rows * sum(tkmod.select_cost(n_kv, gp.n_v(h)) for h in b.pruned)
                                 if b.pruned else 0.0)
                macs["qk"] += sum(b.qk_macs)
                macs["lsb"] += sum(b.lsb_macs)
                macs["pv"] += sum(b.pv_macs)
                elements += b.score_rows * n_kv + (bp.lsb_rows * n_kv if bp.lsb else 0)
                value_selections += bp.rows * len(b.pruned)
                self.blocks.append(b)
        self.macs = macs
        self.mac_total = macs["qk"] + macs["lsb"] + macs["pv"]
        self.softmax_elements = elements
        self.value_selections = value_selections


def _rows(segments):
    return len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)


def build_program(env, arch, trace, amaps, buffers, grain_rows, rng):
    """Turn the trace into per-unit programs with their dependency events."""
    prog = Program()
    shared = arch.dot.arrays == "shared"
    prog.dot_pv = prog.dot_qk if shared else []
    counts = prog.counts
    fetch, dot_qk, dot_pv, softmax, topk = prog.fetch, prog.dot_qk, prog.dot_pv, prog.softmax, prog.topk
    q_buf, k_buf, v_buf = buffers["query"], buffers["key"], buffers["value"]
    event = env.event
    shapes = {}
    prev_done = None
    prev_selected = False
    steps = trace.steps
    for s, step in enumerate(steps):
        d = step.head_dim
        amap = amaps[d]
        key = _shape_key(step, amap)
        shape = shapes.get(key)
        if shape is None:
            shape = shapes[key] = _StepShape(arch, amap, step, grain_rows, q_buf.capacity / 2)
        layer = step.layer
        n_kv = step.n_kept_k
        dep_q = [(prev_done, "layer_dependency")] if prev_done is not None else []
        if prev_done is not None and (step.stage == "prefill" or prev_selected):
            dep_kv = [(prev_done, "topk" if prev_selected else "layer_dependency")]
        else:
            dep_kv = []
        last_use = {}   # id(txn) -> (txn, the last op that reads it)

        def fetch_txn(kind, segments, rows, buf, waits, head, block):
            t = Txn(kind, s, head, block, rows, 0, 0.0, "fetch")
            t.layer = layer
            t.positions = segments
            t.buffer = buf
            t.waits = waits
            t.done = event()
            fetch.append(t)
            return t

        shared_q = None
        resident_k = {}
        resident_v = {}
        pending_pv = None
        last_pv_done = None

        def emit_pv(b, final_sm, vsel):
            nonlocal last_pv_done
            waits = dep_kv + ([(vsel.done, "topk")] if vsel is not None else [])
            gp, bp = b.gp, b.bp
            chunks = resident_v.get(b.gi) if gp.v_resident else None
            if chunks is None:
                chunks = [fetch_txn("V", c.segments, c.rows, v_buf, waits, b.head, bp.block)
                          for c in b.pv_chunks]
                if gp.v_resident:
                    resident_v[b.gi] = chunks
            for i, (ch, macs) in enumerate(zip(chunks, b.pv_macs)):
                op = dotmod.DotOp("pv", s, b.head, bp.block, macs, d)
                if i == 0:
                    op.waits = [(final_sm.done, "softmax")]
                op.inputs.append(ch)
                last_use[id(ch)] = (ch, op)
                dot_pv.append(op)
            op.done = event()
            last_pv_done = op.done

        for b in shape.blocks:
            gp, bp = b.gp, b.bp
            head = b.head
            # Transactions are created in the order the array first reads them, so the
            # in-order fetch unit can never wait for room that only a later read frees.
            # The first key chunk goes before the query: in decode, cached keys may
            # stream in before the previous layer is done, the query may not.
            if gp.k_resident:
                kplan = gp.k_chunks
                kch = resident_k.get(b.gi)
                if kch is None:
                    kch = resident_k[b.gi] = [None] * len(kplan)
            else:
                kplan = bp.k_chunks
                kch = [None] * len(kplan)
            q = None
            for i, c in enumerate(kplan):
                ch = kch[i]
                if ch is None:
                    ch = kch[i] = fetch_txn("K", c.segments, c.rows, k_buf, dep_kv, head, bp.block)
                if q is None:
                    if shape.shared_q is not None:
                        if shared_q is None:
                            shared_q = fetch_txn("Q", *shape.shared_q, q_buf, dep_q, -1, 0)
                        q = shared_q
                    else:
                        q = fetch_txn("Q", b.q_segments, b.q_rows, q_buf, dep_q, head, bp.block)
                op = dotmod.DotOp("qk", s, head, bp.block, b.qk_macs[i], d)
                op.inputs += (q, ch)
                last_use[id(q)] = (q, op)
                last_use[id(ch)] = (ch, op)
                dot_qk.append(op)
            op.out = Txn("S", s, head, bp.block, b.score_rows, 0, 0.0, "dot")
            sm1 = smmod.SoftmaxOp(s, head, bp.block, b.score_rows, n_kv)
            sm1.done = event()
            softmax.append(sm1)
            # p.V of the previous block: one block of lookahead
            if pending_pv is not None:
                emit_pv(*pending_pv)
            # LSB recompute of this block (progressive key quantization)
            final_sm = sm1
            if bp.lsb:
                kl_waits = dep_kv + [(sm1.done, "softmax")]
                for i, c in enumerate(bp.lsb_chunks):
                    ch = fetch_txn("KL", c.segments, c.rows, k_buf, kl_waits, head, bp.block)
                    km = None
                    if bp.lsb_msb_chunks:
                        m = bp.lsb_msb_chunks[i]
                        km = fetch_txn("K", m.segments, m.rows, k_buf, kl_waits, head, bp.block)
                    elif gp.k_resident:
                        km = kch[min(i, len(kch) - 1)]
                    op = dotmod.DotOp("lsb", s, head, bp.block, b.lsb_macs[i], d)
                    if i == 0:
                        op.waits = [(sm1.done, "softmax")]
                    op.inputs += (q, ch)
                    last_use[id(q)] = (q, op)
                    last_use[id(ch)] = (ch, op)
                    if km is not None:
                        op.inputs.append(km)
                        last_use[id(km)] = (km, op)
                    dot_qk.append(op)
                op.out = Txn("S", s, head, bp.block, bp.lsb_rows, 0, 0.0, "dot")
                final_sm = smmod.SoftmaxOp(s, head, bp.block, bp.lsb_rows, n_kv, second=True)
                final_sm.done = event()
                softmax.append(final_sm)
            vsel = None
            if b.pruned:
                vsel = tkmod.TopkOp("value", s, head, n_kv, len(b.pruned), b.value_comps)
                vsel.waits.append((final_sm.done, "softmax"))
                vsel.done = event()
                topk.append(vsel)
                counts["topk_comparisons"] += b.value_comps
            pending_pv = (b, final_sm, vsel)
        emit_pv(*pending_pv)

        for txn, op in last_use.values():
            if op.release:
                op.release.append(txn)
            else:
                op.release = [txn]
        macs = shape.macs
        counts["macs_qk"] += macs["qk"]
        counts["macs_lsb"] += macs["lsb"]
        counts["macs_pv"] += macs["pv"]
        counts["softmax_elements"] += shape.softmax_elements
        counts["value_selections"] += shape.value_selections
        prog.compulsory_bytes += shape.compulsory_bytes
        prog.macs_by_dim[d] = prog.macs_by_dim.get(d, 0) + shape.mac_total

        # after the layer: the selector picks the next layer's tokens and heads
        step_done = last_pv_done
        selected = False
        nxt = steps[s + 1] if s + 1 < len(steps) else None
        if selects_next(step, nxt):
            sel_ops = [tkmod.TopkOp(kind, s, -1, n, keep, tkmod.selection_comparisons(scores, n, keep, rng))
                       for kind, scores, n, keep in (
                           ("tokens", step.token_scores, step.n_kept_k, nxt.n_kept_k),
                           ("heads", step.head_scores, step.n_heads, nxt.n_heads))
                       if keep < n]
            for op in sel_ops:
                op.waits.append((last_pv_done, "dot"))
                op.done = event()
                topk.append(op)
                counts["topk_comparisons"] += op.comparisons
                counts["topk_selections"] += 1
                step_done = op.done
            selected = bool(sel_ops)
        prog.step_done.append(step_done)
        prev_done = step_done
        prev_selected = selected
    return prog


def run_datapath(arch, trace, grain_rows=None, seed=None, keep_intervals=True):
    """Replay ``trace`` on ``arch``; return the run's :class:`~sim.engine.stats.RunStats`.

    :func:`sim.result.build_result` turns them into the result document.
    """
    # A run allocates hundreds of thousands of small objects that live until it
    # ends; the cyclic collector would walk them over and over (a third of the
    # wall time on long decode traces). Reference counting frees the rest.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        return _run(arch, trace, grain_rows, seed, keep_intervals)
    finally:
        if was_enabled:
            gc.enable()


def _run(arch, trace, grain_rows, seed, keep_intervals):
    grain_rows, seed = _engine_options(arch, grain_rows, seed)
    dims = sorted({s.head_dim for s in trace.steps})
    for d in dims:
        check_fits(arch, d, arch.source)
    env = simpy.Environment()
    layers = max(s.layer for s in trace.steps) + 1
    heads = max(int(s.heads.max()) for s in trace.steps) + 1
    max_rows = max(s.kv_rows for s in trace.steps)
    amaps = {d: AddressMap(arch, layers, heads, max_rows, d) for d in dims}
    buffers = {
        "query": Buffer(env, "query", arch.buffers.query_kib * 1024),
        "key": Buffer(env, "key", arch.buffers.key_kib * 1024),
        "value": Buffer(env, "value", arch.buffers.value_kib * 1024),
    }
    rng = np.random.default_rng(seed)
    prog = build_program(env, arch, trace, amaps, buffers, grain_rows, rng)

    pool = ChannelPool(env, arch)
    # the fetch unit's intervals are always kept: the pool's stalls are read from them
    states = {name: UnitState(env, name, keep_intervals or name == "fetch")
              for name in ("fetch", "dot", "softmax", "topk")}
    shared = arch.dot.arrays == "shared"
    if not shared:
        states["dot_pv"] = UnitState(env, "dot_pv", keep_intervals)
    fetch_stats = {"bytes": 0, "transactions": 0, "requests": 0,
                   "bytes_Q": 0, "bytes_K": 0, "bytes_KL": 0, "bytes_V": 0}
    sm_queue = smmod.ScoreQueue(env, capacity=2)
    lanes = arch.dot.lanes
    mult = arch.dot.multipliers if shared else arch.dot.multipliers // 2
    procs = {
        "fetch": env.process(fetch_process(env, prog.fetch, pool, _amap_router(amaps, trace),
                                           arch, states["fetch"], fetch_stats)),
        "dot": env.process(dotmod.dot_process(env, prog.dot_qk, mult, lanes, arch.dot.pipeline_cycles,
                                              states["dot"], sm_queue, states["fetch"])),
        "softmax": env.process(smmod.softmax_process(env, prog.softmax, arch.softmax.lanes,
                                                     arch.softmax.latency_cycles, states["softmax"],
                                                     sm_queue)),
        "topk": env.process(tkmod.topk_process(env, prog.topk, arch.topk.comparators,
                                               arch.topk.latency_cycles, states["topk"])),
    }
    if not shared:
        procs["dot_pv"] = env.process(dotmod.dot_process(env, prog.dot_pv, mult, lanes,
                                                         arch.dot.pipeline_cycles, states["dot_pv"],
                                                         sm_queue, states["fetch"]))
    step_times = [None] * len(prog.step_done)
    for i, ev in enumerate(prog.step_done):
        ev.callbacks.append(lambda _e, i=i: step_times.__setitem__(i, env.now))
    env.run()
    if any(t is None for t in step_times) or any(p.is_alive for p in procs.values()):
        stuck = [f"{n}: {st.state}" + (f" ({st.cause})" if st.cause else "")
                 for n, st in states.items() if procs[n].is_alive]
        done = sum(t is not None for t in step_times)
        raise SimulationStalled(
            f"no progress at cycle {env.now:.0f} after {done}/{len(step_times)} steps; "
            f"waiting units: {', '.join(stuck) or 'none'} (arch {arch.source}, trace {trace.source})")
    end = max(step_times)
    return RunStats(arch, trace, prog, pool, states, buffers, fetch_stats, step_times, end,
                    {"grain_rows": grain_rows, "seed": seed})


class _amap_router:
    """Address map lookup by the head width of the transaction's step."""

    def __init__(self, amaps, trace):
        self.amaps = amaps
        self.dim_of_step = [s.head_dim for s in trace.steps]
        self.single = next(iter(amaps.values())) if len(amaps) == 1 else None

    def bursts_for(self, txn):
        amap = self.single or self.amaps[self.dim_of_step[txn.step]]
        segs = txn.positions
        if len(segs) == 1:
            h, p = segs[0]
            return amap.bursts(txn.layer, txn.kind, h, p)
        # heads' regions are laid out in head order, so the concatenation stays sorted
        out = np.concatenate([amap.bursts(txn.layer, txn.kind, h, p) for h, p in segs])
        return out if amap.heads_in_order else np.unique(out)

