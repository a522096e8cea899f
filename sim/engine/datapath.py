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
from .stats import UnitState
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


def build_program(env, arch, trace, amaps, buffers, grain_rows, rng):
    """Turn the trace into per-unit programs with their dependency events."""
    prog = Program()
    shared = arch.dot.arrays == "shared"
    prog.dot_pv = prog.dot_qk if shared else []
    counts = prog.counts
    prev_done = None
    prev_selected = False
    steps = trace.steps
    for s, step in enumerate(steps):
        d = step.head_dim
        amap = amaps[d]
        plan = plan_step(arch, amap, step, grain_rows)
        layer = step.layer
        n_kv = step.n_kept_k
        dep_q = [(prev_done, "layer_dependency")] if prev_done is not None else []
        if prev_done is not None and (step.stage == "prefill" or prev_selected):
            dep_kv = [(prev_done, "topk" if prev_selected else "layer_dependency")]
        else:
            dep_kv = []
        last_use = {}

        def fetch_txn(kind, segments, buf, waits, head, block):
            rows = len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)
            t = Txn(kind, s, head, block, rows, 0, 0.0, "fetch")
            t.layer = layer
            t.positions = segments
            t.buffer = buf
            t.waits = waits
            t.done = env.event()
            prog.fetch.append(t)
            return t

        def chunk_txns(chunks, kind, buf, waits, head, block):
            return [fetch_txn(kind, c.segments, buf, waits, head, block) for c in chunks]

        def use(op, txn):
            op.inputs.append(txn)
            last_use[id(txn)] = (txn, op)

        blocks = [(gp, bp) for gp in plan for bp in gp.blocks]
        for gp in plan:  # every row once: what an infinite buffer would fetch
            prog.compulsory_bytes += gp.k_bytes + gp.v_bytes + amap.burst * sum(
                amap.burst_count(layer, "Q", h, bp.q_positions) for bp in gp.blocks for h in gp.heads)
            prog.compulsory_bytes += sum(gp.lsb_bytes[h] for h in {h for bp in gp.blocks for h in bp.lsb})
        # one query block per group: the step's whole query vector is one transaction
        shared_q = shared_q_rows = None
        if all(len(gp.blocks) == 1 for gp in plan):
            q_rows = plan[0].blocks[0].q_positions
            q_bytes = amap.burst * sum(amap.burst_count(layer, "Q", h, q_rows) for h in step.heads.tolist())
            if q_bytes <= buffers["query"].capacity / 2:
                shared_q_rows = q_rows
        resident_k = {}
        resident_v = {}
        pending_pv = None
        last_pv_done = None
        mac_total = 0

        def emit_pv(gi, gp, bp, final_sm, vsel):
            nonlocal last_pv_done, mac_total
            waits = dep_kv + ([(vsel.done, "topk")] if vsel is not None else [])
            head = gp.heads[0]
            if gp.v_resident:
                if gi not in resident_v:
                    resident_v[gi] = chunk_txns(gp.v_chunks, "V", buffers["value"], waits, head, bp.block)
                chunks = resident_v[gi]
            else:
                chunks = chunk_txns(bp.v_chunks, "V", buffers["value"], waits, head, bp.block)
            plan_chunks = gp.v_chunks if gp.v_resident else bp.v_chunks
            for i, (ch, macs) in enumerate(zip(chunks, pv_macs(gp, plan_chunks, bp.rows, d))):
                op = dotmod.DotOp("pv", s, head, bp.block, macs, d)
                if i == 0:
                    op.waits.append((final_sm.done, "softmax"))
                use(op, ch)
                counts["macs_pv"] += macs
                mac_total += macs
                prog.dot_pv.append(op)
            op.done = env.event()
            last_pv_done = op.done

        for gi, gp, bp in ((plan.index(g), g, b) for g, b in blocks):
            head = gp.heads[0]
            nh = len(gp.heads)
            # Transactions are created in the order the array first reads them, so the
            # in-order fetch unit can never wait for room that only a later read frees.
            # The first key chunk goes before the query: in decode, cached keys may
            # stream in before the previous layer is done, the query may not.
            if gp.k_resident:
                kch = resident_k.setdefault(gi, [None] * len(gp.k_chunks))
                kplan = gp.k_chunks
            else:
                kch = [None] * len(bp.k_chunks)
                kplan = bp.k_chunks
            q = None
            for i, c in enumerate(kplan):
                if kch[i] is None:
                    kch[i] = fetch_txn("K", c.segments, buffers["key"], dep_kv, head, bp.block)
                if q is None:
                    if shared_q_rows is not None:
                        if shared_q is None:
                            shared_q = fetch_txn("Q", [(h, shared_q_rows) for h in step.heads.tolist()],
                                                 buffers["query"], dep_q, -1, 0)
                        q = shared_q
                    else:
                        q = fetch_txn("Q", [(h, bp.q_positions) for h in gp.heads], buffers["query"],
                                      dep_q, head, bp.block)
                ch = kch[i]
                macs = bp.rows * ch.rows * d
                op = dotmod.DotOp("qk", s, head, bp.block, macs, d)
                use(op, q)
                use(op, ch)
                counts["macs_qk"] += macs
                mac_total += macs
                prog.dot_qk.append(op)
            op.out = Txn("S", s, head, bp.block, bp.rows * nh, 0, 0.0, "dot")
            sm1 = smmod.SoftmaxOp(s, head, bp.block, bp.rows * nh, n_kv)
            sm1.done = env.event()
            prog.softmax.append(sm1)
            counts["softmax_elements"] += bp.rows * nh * n_kv
            # p.V of the previous block: one block of lookahead
            if pending_pv is not None:
                emit_pv(*pending_pv)
            # LSB recompute of this block (progressive key quantization)
            final_sm = sm1
            if bp.lsb:
                kl_waits = dep_kv + [(sm1.done, "softmax")]
                for i, c in enumerate(bp.lsb_chunks):
                    ch = fetch_txn("KL", c.segments, buffers["key"], kl_waits, head, bp.block)
                    km = None
                    if bp.lsb_msb_chunks:
                        km = fetch_txn("K", bp.lsb_msb_chunks[i].segments, buffers["key"], kl_waits,
                                       head, bp.block)
                    rows_of = {h: len(p) for h, p in c.segments}
                    macs = sum(bp.lsb[h] * r for h, r in rows_of.items()) * d
                    op = dotmod.DotOp("lsb", s, head, bp.block, macs, d)
                    if i == 0:
                        op.waits.append((sm1.done, "softmax"))
                    use(op, q)
                    use(op, ch)
                    if km is not None:
                        use(op, km)
                    elif gp.k_resident:
                        use(op, kch[min(i, len(kch) - 1)])
                    counts["macs_lsb"] += macs
                    mac_total += macs
                    prog.dot_qk.append(op)
                op.out = Txn("S", s, head, bp.block, bp.lsb_rows, 0, 0.0, "dot")
                final_sm = smmod.SoftmaxOp(s, head, bp.block, bp.lsb_rows, n_kv, second=True)
                final_sm.done = env.event()
                prog.softmax.append(final_sm)
                counts["softmax_elements"] += bp.lsb_rows * n_kv
            vsel = None
            pruned = gp.value_pruned_heads
            if pruned:
                comps = bp.rows * sum(tkmod.select_cost(n_kv, gp.n_v(h)) for h in pruned)
                vsel = tkmod.TopkOp("value", s, head, n_kv, len(pruned), comps)
                vsel.waits.append((final_sm.done, "softmax"))
                vsel.done = env.event()
                prog.topk.append(vsel)
                counts["topk_comparisons"] += comps
                counts["value_selections"] += bp.rows * len(pruned)
            pending_pv = (gi, gp, bp, final_sm, vsel)
        emit_pv(*pending_pv)

        for txn, op in last_use.values():
            op.release.append(txn)
        prog.macs_by_dim[d] = prog.macs_by_dim.get(d, 0) + mac_total

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
                op.done = env.event()
                prog.topk.append(op)
                counts["topk_comparisons"] += op.comparisons
                counts["topk_selections"] += 1
                step_done = op.done
            selected = bool(sel_ops)
        prog.step_done.append(step_done)
        prev_done = step_done
        prev_selected = selected
    return prog


def run_datapath(arch, trace, grain_rows=None, seed=None, keep_intervals=True):
    """Replay ``trace`` on ``arch``; return a :class:`sim.result.Result`."""
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
    from ..result import build_result

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
    return build_result(arch, trace, prog, pool, states, buffers, fetch_stats, step_times, end,
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

