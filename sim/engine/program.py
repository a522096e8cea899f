"""Program: a trace turned into one ordered list of work per unit.

For every step the tiling rule (:mod:`sim.engine.tiling`) gives head groups,
query blocks and chunks; this module turns them into fetch transactions,
dot-array operations, softmax blocks and top-k selections, all in one
consistent order, with the events that connect them:

* per step, the query blocks of all head groups in sequence; the array runs
  ``q.K(i)``, then the p.V of the block ``dot.lookahead`` blocks before it,
  then the LSB recompute of block ``i`` -- so softmax and top-k work on
  earlier blocks while the array computes later ones;
* the fetch unit's transactions are created in the order the array first
  reads them: reserving buffer room in that order, it can never wait for room
  that only a later read frees;
* a step's queries wait for the previous step (its output feeds this layer);
  its keys and values wait too in prefill (they are computed from that
  output) and whenever the previous step ran a top-k that picked this step's
  tokens or heads; in decode without such a selection, cached K/V may stream
  in early, as far as the fetch unit's issue window lets them pass the query.

Nothing here runs simpy processes: it only creates the events they share.
"""

from collections import deque

import numpy as np

from . import dot as dotmod
from . import softmax as smmod
from . import topk as tkmod
from .tiling import plan_step, pv_macs, selects_next
from .txn import Txn


class Program:
    """Per-unit operation lists for one trace on one architecture, and its work counts."""

    def __init__(self, shared_array):
        self.fetch = []
        self.dot_qk = []
        self.dot_pv = self.dot_qk if shared_array else []
        self.softmax = []
        self.topk = []
        self.step_done = []
        self.counts = {"macs_qk": 0, "macs_lsb": 0, "macs_pv": 0, "softmax_elements": 0,
                       "topk_comparisons": 0.0, "topk_selections": 0, "value_selections": 0}
        self.macs_by_dim = {}
        self.compulsory_bytes = 0


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


def _rows(segments):
    return len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)


class _BlockShape:
    """One query block of a planned step, with the work counts of its operations."""

    __slots__ = ("gi", "gp", "bp", "head", "score_rows", "q_segments", "q_rows", "qk_macs",
                 "lsb_src", "lsb_macs", "pv_chunks", "pv_macs", "pruned", "value_comps")

    def __init__(self, gi, gp, bp, d, n_kv):
        self.gi, self.gp, self.bp = gi, gp, bp
        self.head = gp.heads[0]
        self.score_rows = bp.rows * len(gp.heads)
        self.q_segments = [(h, bp.q_positions) for h in gp.heads]
        self.q_rows = _rows(self.q_segments)
        kplan = gp.k_chunks if gp.k_resident else bp.k_chunks
        self.qk_macs = [bp.rows * c.rows * d for c in kplan]
        self.lsb_src = gp.kl_chunks if gp.kl_resident else bp.lsb_chunks
        self.lsb_macs = [sum(bp.lsb.get(h, 0) * len(p) for h, p in c.segments) * d for c in self.lsb_src]
        self.pv_chunks = gp.v_chunks if gp.v_resident else bp.v_chunks
        self.pv_macs = pv_macs(gp, self.pv_chunks, bp.rows, d)
        self.pruned = gp.value_pruned_heads
        self.value_comps = (bp.rows * sum(tkmod.select_cost(n_kv, gp.n_v(h)) for h in self.pruned)
                            if self.pruned else 0.0)


class _StepShape:
    """A step's plan and the numbers the program derives from it, without simpy objects.

    Steps that plan alike share one (in decode every layer of a token usually
    does), so each step only makes its own transactions and operations.
    """

    def __init__(self, arch, amap, step, grain_rows, q_room):
        d, layer, n_kv = step.head_dim, step.layer, step.n_kept_k
        self.plan = plan = plan_step(arch, amap, step, grain_rows)
        compulsory = 0
        for gp in plan:  # every row once: what an infinite buffer would fetch
            compulsory += gp.k_bytes + gp.v_bytes + amap.burst * sum(
                amap.burst_count(layer, "Q", h, bp.q_positions) for bp in gp.blocks for h in gp.heads)
            compulsory += sum(gp.lsb_bytes[h] for h in {h for bp in gp.blocks for h in bp.lsb})
        self.compulsory_bytes = compulsory
        self.shared_q = self._shared_query(amap, step, q_room)
        self.blocks = [_BlockShape(gi, gp, bp, d, n_kv) for gi, gp in enumerate(plan) for bp in gp.blocks]
        self.macs = {"qk": sum(sum(b.qk_macs) for b in self.blocks),
                     "lsb": sum(sum(b.lsb_macs) for b in self.blocks),
                     "pv": sum(sum(b.pv_macs) for b in self.blocks)}
        self.mac_total = sum(self.macs.values())
        self.softmax_elements = sum(b.score_rows * n_kv + b.bp.lsb_rows * n_kv for b in self.blocks)
        self.value_selections = sum(b.bp.rows * len(b.pruned) for b in self.blocks)

    def _shared_query(self, amap, step, q_room):
        """One query block per group: the step's whole query vector is one transaction
        (when it fits half the query buffer); else None."""
        if not all(len(gp.blocks) == 1 for gp in self.plan):
            return None
        q_rows = self.plan[0].blocks[0].q_positions
        heads = step.heads.tolist()
        if amap.burst * sum(amap.burst_count(step.layer, "Q", h, q_rows) for h in heads) > q_room:
            return None
        segs = [(h, q_rows) for h in heads]
        return segs, _rows(segs)


class _StepBuild:
    """What the builder keeps while it emits one step."""

    def __init__(self, s, step, shape, dep_q, dep_kv):
        self.s, self.step, self.shape = s, step, shape
        self.dep_q, self.dep_kv = dep_q, dep_kv
        self.shared_q = None
        self.resident = {"K": {}, "V": {}, "KL": {}}   # group index -> its chunk transactions
        self.pending_pv = deque()      # (block, final softmax, value selection) awaiting p.V
        self.last_use = {}             # id(txn) -> (txn, the last op that reads it)
        self.last_pv_done = None

    def reads(self, op, *txns):
        """``op`` reads ``txns``: it is their last reader so far."""
        for t in txns:
            op.inputs.append(t)
            self.last_use[id(t)] = (t, op)


class ProgramBuilder:
    """Builds the :class:`Program` of a trace on an architecture (see the module docstring)."""

    def __init__(self, env, arch, trace, amaps, buffers, grain_rows, rng):
        self.env, self.arch, self.trace = env, arch, trace
        self.amaps, self.buffers = amaps, buffers
        self.grain_rows, self.rng = grain_rows, rng
        self.prog = Program(arch.dot.arrays == "shared")
        self.shapes = {}
        self.desc = 0   # fetch descriptor: one plane of one head group for one query block

    def build(self):
        prev_done, prev_selected = None, False
        steps = self.trace.steps
        for s, step in enumerate(steps):
            dep_q = [(prev_done, "layer_dependency")] if prev_done is not None else []
            dep_kv = []
            if prev_done is not None and (step.stage == "prefill" or prev_selected):
                dep_kv = [(prev_done, "topk" if prev_selected else "layer_dependency")]
            st = _StepBuild(s, step, self._shape(step), dep_q, dep_kv)
            self._emit_step(st)
            nxt = steps[s + 1] if s + 1 < len(steps) else None
            prev_done, prev_selected = self._select_next(st, nxt)
            self.prog.step_done.append(prev_done)
        return self.prog

    def _shape(self, step):
        amap = self.amaps[step.head_dim]
        key = _shape_key(step, amap)
        shape = self.shapes.get(key)
        if shape is None:
            q_room = self.buffers["query"].capacity / 2
            shape = self.shapes[key] = _StepShape(self.arch, amap, step, self.grain_rows, q_room)
        return shape

    # ------------------------------------------------------------------ a step
    def _emit_step(self, st):
        lookahead = self.arch.dot.lookahead
        for b in st.shape.blocks:
            q = self._query(st, b)
            kch = self._keys(st, b)
            sm1 = self._qk(st, b, q, kch)
            if len(st.pending_pv) >= lookahead:
                self._pv(st, *st.pending_pv.popleft())
            final_sm = self._lsb(st, b, q, kch, sm1) if b.bp.lsb else sm1
            st.pending_pv.append((b, final_sm, self._value_select(st, b, final_sm)))
        while st.pending_pv:
            self._pv(st, *st.pending_pv.popleft())
        for txn, op in st.last_use.values():
            if op.release:
                op.release.append(txn)
            else:
                op.release = [txn]
        self._count(st)

    def _count(self, st):
        prog, shape, d = self.prog, st.shape, st.step.head_dim
        c = prog.counts
        c["macs_qk"] += shape.macs["qk"]
        c["macs_lsb"] += shape.macs["lsb"]
        c["macs_pv"] += shape.macs["pv"]
        c["softmax_elements"] += shape.softmax_elements
        c["value_selections"] += shape.value_selections
        prog.compulsory_bytes += shape.compulsory_bytes
        prog.macs_by_dim[d] = prog.macs_by_dim.get(d, 0) + shape.mac_total

    # ------------------------------------------------------------- fetches
    def _fetch(self, st, kind, segments, rows, waits, head, block, skip=0):
        t = Txn(kind, st.s, head, block, rows, 0, 0.0, "fetch")
        t.desc = self.desc
        t.layer = st.step.layer
        t.positions = segments
        t.buffer = self.buffers[{"Q": "query", "V": "value"}.get(kind, "key")]
        t.waits = waits
        t.done = self.env.event()
        t.skip = skip
        if kind != "Q":   # the array starts on a chunk's first rows (streaming)
            t.pieces = rows
        self.prog.fetch.append(t)
        return t

    def _chunks(self, st, kind, chunks, waits, b, cache=None):
        """One descriptor's chunk transactions; with ``cache`` (resident rows) made once
        per group and shared by its blocks, in which case missing entries are filled."""
        self.desc += 1
        out = cache if cache is not None else [None] * len(chunks)
        for i, c in enumerate(chunks):
            if out[i] is None:
                out[i] = self._fetch(st, kind, c.segments, c.rows, waits, b.head, b.bp.block, c.skip)
        return out

    def _resident(self, st, plane, b, n):
        """The cache list of a group's resident chunks of ``plane`` (created empty on first use)."""
        res = st.resident[plane]
        if b.gi not in res:
            res[b.gi] = [None] * n
        return res[b.gi]

    def _query(self, st, b):
        shape = st.shape
        if shape.shared_q is None:
            self.desc += 1
            return self._fetch(st, "Q", b.q_segments, b.q_rows, st.dep_q, b.head, b.bp.block)
        if st.shared_q is None:
            self.desc += 1
            st.shared_q = self._fetch(st, "Q", *shape.shared_q, st.dep_q, -1, 0)
            # each head group reads its own part, in order: the first can start on the first part
            st.shared_q.readers = st.shared_q.pieces = len(shape.plan)
        return st.shared_q

    def _keys(self, st, b):
        gp = b.gp
        if gp.k_resident:
            cache = self._resident(st, "K", b, len(gp.k_chunks))
            if all(t is not None for t in cache):
                return cache
            return self._chunks(st, "K", gp.k_chunks, st.dep_kv, b, cache)
        return self._chunks(st, "K", b.bp.k_chunks, st.dep_kv, b)

    # ------------------------------------------------------------ compute
    def _qk(self, st, b, q, kch):
        """q.K of a block over its key chunks; returns the softmax op it feeds."""
        s, d, bp = st.s, st.step.head_dim, b.bp
        for ch, macs in zip(kch, b.qk_macs):
            op = dotmod.DotOp("qk", s, b.head, bp.block, macs, d)
            op.part = b.gi if q.readers > 1 else None
            st.reads(op, q, ch)
            self.prog.dot_qk.append(op)
        op.out = Txn("S", s, b.head, bp.block, b.score_rows, 0, 0.0, "dot")
        sm = smmod.SoftmaxOp(s, b.head, bp.block, b.score_rows, st.step.n_kept_k)
        sm.done = self.env.event()
        self.prog.softmax.append(sm)
        return sm

    def _lsb(self, st, b, q, kch, sm1):
        """LSB recompute of a block (progressive key quantization): fetch the
        least-significant plane once softmax has decided, recompute, softmax again."""
        s, d, gp, bp = st.s, st.step.head_dim, b.gp, b.bp
        waits = st.dep_kv + [(sm1.done, "softmax")]
        kls = self._resident(st, "KL", b, len(b.lsb_src)) if gp.kl_resident else [None] * len(b.lsb_src)
        self.desc += 1
        for i, (c, macs) in enumerate(zip(b.lsb_src, b.lsb_macs)):
            # each LSB chunk, then the MSB chunk it pairs with: the order the array reads them
            if kls[i] is None:
                kls[i] = self._fetch(st, "KL", c.segments, c.rows, waits, b.head, bp.block, c.skip)
            op = dotmod.DotOp("lsb", s, b.head, bp.block, macs, d)
            op.part = b.gi if q.readers > 1 else None
            if i == 0:
                op.waits = [(sm1.done, "softmax")]
            st.reads(op, q, kls[i])
            if bp.lsb_msb_chunks:   # K was not resident: its MSB rows come again
                m = bp.lsb_msb_chunks[i]
                st.reads(op, self._fetch(st, "K", m.segments, m.rows, waits, b.head, bp.block, m.skip))
            elif gp.k_resident:
                st.reads(op, kch[min(i, len(kch) - 1)])
            self.prog.dot_qk.append(op)
        op.out = Txn("S", s, b.head, bp.block, bp.lsb_rows, 0, 0.0, "dot")
        sm = smmod.SoftmaxOp(s, b.head, bp.block, bp.lsb_rows, st.step.n_kept_k, second=True)
        sm.done = self.env.event()
        self.prog.softmax.append(sm)
        return sm

    def _value_select(self, st, b, final_sm):
        """Decode value pruning: the selector picks each head's kept V rows."""
        if not b.pruned:
            return None
        op = tkmod.TopkOp("value", st.s, b.head, st.step.n_kept_k, len(b.pruned), b.value_comps)
        op.waits.append((final_sm.done, "softmax"))
        op.done = self.env.event()
        self.prog.topk.append(op)
        self.prog.counts["topk_comparisons"] += b.value_comps
        return op

    def _pv(self, st, b, final_sm, vsel):
        """p.V of a block over its V chunks (fetched once selected, when pruned)."""
        s, d, gp, bp = st.s, st.step.head_dim, b.gp, b.bp
        waits = st.dep_kv + ([(vsel.done, "topk")] if vsel is not None else [])
        if gp.v_resident:
            cache = self._resident(st, "V", b, len(b.pv_chunks))
            chunks = cache if all(t is not None for t in cache) else self._chunks(
                st, "V", b.pv_chunks, waits, b, cache)
        else:
            chunks = self._chunks(st, "V", b.pv_chunks, waits, b)
        for i, (ch, macs) in enumerate(zip(chunks, b.pv_macs)):
            op = dotmod.DotOp("pv", s, b.head, bp.block, macs, d)
            if i == 0:
                op.waits = [(final_sm.done, "softmax")]
            st.reads(op, ch)
            self.prog.dot_pv.append(op)
        op.done = self.env.event()
        st.last_pv_done = op.done

    # ---------------------------------------------------- between layers
    def _select_next(self, st, nxt):
        """After the layer, the selector picks the next layer's tokens and heads (cascade
        pruning). Returns (the event that ends the step, whether a selection ran)."""
        step, s = st.step, st.s
        if not selects_next(step, nxt):
            return st.last_pv_done, False
        done = st.last_pv_done
        ran = False
        for kind, scores, n, keep in (("tokens", step.token_scores, step.n_kept_k, nxt.n_kept_k),
                                      ("heads", step.head_scores, step.n_heads, nxt.n_heads)):
            if keep >= n:
                continue
            op = tkmod.TopkOp(kind, s, -1, n, keep, tkmod.selection_comparisons(scores, n, keep, self.rng))
            op.waits.append((st.last_pv_done, "dot"))
            op.done = self.env.event()
            self.prog.topk.append(op)
            self.prog.counts["topk_comparisons"] += op.comparisons
            self.prog.counts["topk_selections"] += 1
            done, ran = op.done, True
        return done, ran
