"""Program: a trace turned into one ordered list of work per unit.

For every step the tiling rule (:mod:`sim.engine.tiling`) gives head groups,
query blocks and chunks; this module turns them into fetch transactions,
dot-array operations, softmax blocks and top-k selections, all in one
consistent order, with the times that connect them (:class:`sim.engine.due.Due`):

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

A step of more than one query block is made in parts as the units reach it
(``BLOCKS_PER_MAKE`` blocks, fewer once they pass ``TXNS_PER_MAKE`` fetch
transactions). A transaction's buffer room is freed by the
last operation that reads it; made in parts, that reader is settled once no
block still to be made can read the transaction (a resident chunk's last
reading block is known from the plan), so the program is the same either way.

A run sampling long prefill steps (``sample_prefill``) makes only the blocks
:func:`_sampled_blocks` picks, and keeps when each ends (``block_dues``) for
:mod:`sim.result` to estimate the whole run from.

Nothing here runs simpy processes: it only creates what they share.
"""

from collections import deque

import numpy as np

from . import dot as dotmod
from . import softmax as smmod
from . import topk as tkmod
from .due import Due
from .feed import Feed
from .plan import plan_step
from .tiling import pair_unit_rows, pair_units, selects_next
from .txn import Txn


class Program:
    """Per-unit operation feeds for one trace on one architecture, and its work counts
    (complete once every feed has been read to its end)."""

    def __init__(self, shared_array, n_steps, more, env=None):
        self.fetch = Feed(more)
        self.dot_qk = Feed(more)
        self.dot_pv = self.dot_qk if shared_array else Feed(more)
        self.softmax = Feed(more)
        self.topk = Feed(more, env)        # sparse: taken with Feed.take
        self.writes = Feed(more, env)      # (step's end, a Due, and its write transactions)
        self.step_times = [None] * n_steps
        self.counts = {"macs_qk": 0, "macs_lsb": 0, "macs_pv": 0, "softmax_elements": 0,
                       "topk_comparisons": 0.0, "topk_selections": 0, "value_selections": 0}
        self.macs_by_dim = {}
        self.macs_pv_by_dim = {}
        self.compulsory_bytes = 0
        # a run sampling query blocks (sample_prefill): per sampled step, each made block's
        # (weight, half-sample, copy, stratum size) and the Due of its last p.V, in the order made
        self.block_sample = {}
        self.block_dues = {}
        self.made_rows = {}   # per sampled step, the query rows made (each copy counted)

    def made(self, done):
        """A step was made (``done``: the last one): wake the units that wait for one."""
        self.topk.notify(done)
        self.writes.notify(done)


SHAPE_CACHE = 64   # step plans kept for reuse (the layers of a decode token share one)
# and at most this many chunks planned in them: a long prefill's plan holds millions
SHAPE_CACHE_CHUNKS = 1 << 21
# query blocks made at a time: a long prefill step (thousands of blocks) is made as the
# units reach it, not all at once, so memory follows the blocks in flight
BLOCKS_PER_MAKE = 64
# and fewer once their fetch transactions pass this many: on a small buffer one block of a
# long causal step re-streams thousands of chunks (about 1 KB each while in flight)
TXNS_PER_MAKE = 4096


def _next_of_request(steps):
    """Per step, the index of the next step of the same request (None for its last)."""
    out, seen = [None] * len(steps), {}
    for i in range(len(steps) - 1, -1, -1):
        r = steps[i].request
        out[i] = seen.get(r)
        seen[r] = i
    return out


def _array_key(a):
    a = np.asarray(a)
    return a.dtype.str, a.shape, a.tobytes()


def _shape_key(step, amap, layer):
    """What a step's plan depends on: its shape and kept rows, and its DRAM region
    only when where the region sits can change what its rows cost."""
    return (None if amap.costs_anywhere else layer, step.stage, step.head_dim, step.q_rows,
            step.kv_rows, _array_key(step.heads), _array_key(step.kept_k), _array_key(step.kept_v),
            _array_key(step.lsb_rows),
            None if step.kept_v_idx is None else tuple(_array_key(a) for a in step.kept_v_idx),
            _array_key(step.kv_heads), step.causal, step.window,
            None if step.kv_kept_k is None else tuple(_array_key(a) for a in step.kv_kept_k))


def _rows(segments):
    return len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)


class _BlockShape:
    """One query block of a planned step, with the work counts of its operations."""

    __slots__ = ("gi", "gp", "bp", "head", "score_rows", "q_segments", "q_rows", "qk_macs",
                 "lsb_src", "lsb_macs", "pv_macs", "pruned", "value_comps")

    def __init__(self, gi, gp, bp):
        self.gi, self.gp, self.bp = gi, gp, bp
        self.head = gp.heads[0]
        self.score_rows = bp.rows * len(gp.heads)
        self.q_segments = [(h, bp.q_positions) for h in gp.heads]
        self.q_rows = _rows(self.q_segments)
        self.qk_macs = bp.qk_macs
        self.lsb_src = gp.kl_chunks if gp.kl_resident else bp.lsb_chunks
        self.lsb_macs = bp.lsb_macs
        self.pv_macs = bp.pv_macs
        self.pruned = bp.pruned
        self.value_comps = bp.value_comps


class _Totals:
    """The work counts of a step's blocks, summed as they are planned."""

    __slots__ = ("macs", "softmax_elements", "value_selections")

    def __init__(self):
        self.macs = {"qk": 0, "lsb": 0, "pv": 0}
        self.softmax_elements = 0
        self.value_selections = 0

    def add(self, b):
        self.macs["qk"] += sum(b.qk_macs)
        self.macs["lsb"] += sum(b.lsb_macs)
        self.macs["pv"] += sum(b.pv_macs)
        self.softmax_elements += b.bp.elements + b.bp.lsb_elements
        self.value_selections += b.bp.rows * len(b.pruned)


class _LazyBlocks:
    """The blocks of a step planned block by block (groups with a ``band``), in order:
    each is planned when the builder first asks for it and not kept, so a long
    step holds the plans of the blocks in flight, not all of them."""

    def __init__(self, plan, totals, kept):
        self.plan, self.totals = plan, totals
        self.where = [(gi, b) for gi, gp in enumerate(plan) for b in kept]
        self.next = 0

    def __len__(self):
        return len(self.where)

    def __getitem__(self, j):
        if j != self.next:
            raise IndexError(f"blocks are planned in order: asked for {j}, next is {self.next}")
        self.next += 1
        gi, b = self.where[j]
        band = self.plan[gi].band
        if j and self.where[j - 1][0] != gi:   # the previous group is done (its first block
            self.plan[self.where[j - 1][0]].band.forget_before(float("inf"))   # may be unmade)
        band.forget_before(band.ranges[b][3][0])
        shape = _BlockShape(gi, self.plan[gi], band.plan(b))
        self.totals.add(shape)
        return shape

    def reads(self):
        """Per block: ``(group index, group, K indices, V indices, recomputes)``."""
        for gi, b in self.where:
            gp = self.plan[gi]
            yield (gi, gp, *gp.band.reads(b))


class _StepShape:
    """A step's plan and the numbers the program derives from it, without simpy objects.

    Steps that plan alike share one (in decode every layer of a token usually
    does), so each step only makes its own transactions and operations. A step
    whose blocks stream more than ``SHAPE_CACHE_CHUNKS`` chunks is planned block
    by block as it is made (:class:`_LazyBlocks`) and not kept for reuse; its
    work counts are complete once its last block is made.

    ``every`` (a run sampling query blocks) makes only the middle block of each stratum of
    about ``every`` blocks of each group, twice (:func:`_sampled_blocks`); ``sample`` is then each made block's
    weight, half-sample, copy and stratum size (:func:`_row_weights`), and ``kept_rows`` marks
    the query rows of the blocks sampled.
    """

    def __init__(self, arch, amap, step, layer, grain_rows, q_room, every=None):
        self.plan = plan = plan_step(arch, amap, step, grain_rows, layer, lazy_over=SHAPE_CACHE_CHUNKS)
        q_blocks = [gp.band.blocks if gp.band is not None else [bp.q_positions for bp in gp.blocks]
                    for gp in plan]
        picks = _sampled_blocks(plan, step, every, len(q_blocks[0]))
        kept = range(len(q_blocks[0])) if picks is None else [pick[0] for pick in picks]
        self.sample = self.kept_rows = None
        if picks is not None:
            rows = [len(q) for q in q_blocks[0]]
            self.sample = _row_weights(picks, rows) * len(plan)
            starts = np.cumsum([0] + rows)
            self.kept_rows = np.zeros(step.q_rows, dtype=bool)
            for i in kept:
                self.kept_rows[starts[i]:starts[i + 1]] = True
            q_blocks = [[qs[i] for i in sorted(set(kept))] for qs in q_blocks]
        compulsory = 0
        for gp, qs in zip(plan, q_blocks):  # every row once: what an infinite buffer would fetch
            compulsory += gp.k_bytes + gp.v_bytes + gp.lsb_bytes + amap.burst * sum(
                amap.burst_count(layer, "Q", h, q) for q in qs for h in gp.heads)
        self.compulsory_bytes = compulsory
        self.shared_q = self._shared_query(amap, step, layer, q_room, q_blocks)
        self.totals = _Totals()
        if any(gp.band is not None for gp in plan):
            self.blocks = _LazyBlocks(plan, self.totals, kept)
            reads = self.blocks.reads()
            self.chunks = None      # not counted, never cached
        else:
            self.blocks = [_BlockShape(gi, gp, gp.blocks[i]) for gi, gp in enumerate(plan) for i in kept]
            for b in self.blocks:
                self.totals.add(b)
            reads = ((b.gi, b.gp, b.bp.k_idx, b.bp.v_idx, bool(b.bp.lsb)) for b in self.blocks)
            self.chunks = sum(len(b.bp.k_chunks) + len(b.bp.v_chunks) + len(b.bp.lsb_chunks)
                              + len(b.bp.lsb_msb_chunks) for b in self.blocks) + sum(
                len(gp.k_chunks) + len(gp.v_chunks) + len(gp.kl_chunks) + len(gp.kl_msb_chunks) for gp in plan)
        self.last_read = self._last_reads(reads) if len(self.blocks) > 1 else None

    @staticmethod
    def _last_reads(reads):
        """(plane, group, chunk) -> the last block (index in ``blocks``) that reads that
        resident chunk; ("KL", group) for the LSB plane, which every LSB block reads whole."""
        last = {}
        for j, (gi, gp, k_idx, v_idx, recomputes) in enumerate(reads):
            if gp.k_resident:
                for i in k_idx:
                    last["K", gi, i] = j
            if gp.kl_resident and recomputes:
                last["KL", gi] = j
            if gp.v_resident:
                for i in v_idx:
                    last["V", gi, i] = j
        return last

    @staticmethod
    def _shared_query(amap, step, layer, q_room, q_blocks):
        """One query block per group: the step's whole query vector is one transaction
        (when it fits half the query buffer); else None."""
        if not all(len(qs) == 1 for qs in q_blocks):
            return None
        q_rows = q_blocks[0][0]
        heads = step.heads.tolist()
        if amap.burst * sum(amap.burst_count(layer, "Q", h, q_rows) for h in heads) > q_room:
            return None
        segs = [(h, q_rows) for h in heads]
        return segs, _rows(segs)


# strata of a sampled group: a multiple of four (half-samples alternate A B B A, so four make
# them balanced along a linear trend), at least this many
MIN_STRATA = 4
COPIES = 2   # each sampled block is made this many times in a row (see _sampled_blocks)


def _sampled_blocks(plan, step, every, n):
    """The query blocks a run sampling about one in ``every`` makes of a step of ``n``
    blocks a group, as ``(block, stratum size, half-sample, copy)``, the same in every group;
    None to make them all. The blocks fall into ``m`` strata of consecutive blocks, ``m``
    the multiple of four nearest ``n / every`` (at least ``MIN_STRATA``), as equal as whole
    numbers allow; each stratum's middle block (of two middles, the lower and the upper in
    turn over the strata of even size, so their offsets cancel) is made twice in a row and
    stands for its stratum: systematic sampling with a centrally located start, exact for a
    time that grows linearly along the blocks, as a causal step's do (Cochran, *Sampling
    Techniques*, 3rd ed., 1977, ch. 8, from memory). Strata go to two half-samples in the
    order A B B A.

    Only prefill steps with at least ``MIN_STRATA`` strata of ``every`` blocks, whose groups
    stream their K/V (nothing resident), are sampled: a resident chunk is fetched by the
    first block that reads it, so a made block would not stand for its stratum's share of
    those fetches.

    Why twice: in a whole run each block follows one nearly like it, and the units overlap
    neighbours' work (q.K ahead of p.V by ``dot.lookahead`` blocks); a sampled block follows
    one a stratum smaller, and on a datapath whose units are balanced that alone moved
    blocks' times by up to a third (two arrays on ``server``). A second copy follows its like;
    how far the two copies' estimates are apart says how much the order mattered."""
    if every is None or step.stage != "prefill" or n < MIN_STRATA * every:
        return None
    if any(gp.k_resident or gp.v_resident or gp.kl_resident for gp in plan):
        return None
    m = max(MIN_STRATA, 4 * round(n / every / 4))
    out, even = [], 0
    for k in range(m):
        start, size = k * n // m, (k + 1) * n // m - k * n // m
        i = start + ((size - 1) // 2 if even % 2 == 0 else size // 2)
        even += size % 2 == 0
        half = (k + k // 2) % 2
        out += [(i, size, half, copy) for copy in range(COPIES)]
    return out


def _row_weights(picks, rows):
    """Per pick of :func:`_sampled_blocks`, ``(weight, half-sample, copy, stratum size)``: the
    made block stands for its stratum's query rows, so its weight is their count over its own
    (the stratum size where blocks are alike; a step's last block is short when its rows are
    not a whole number of blocks, and counted as a whole one it made estimates up to 2.3 % high)."""
    out, start = [], 0
    for i, size, half, copy in picks:
        out.append((sum(rows[start:start + size]) / rows[i], half, copy, size))
        if copy == COPIES - 1:
            start += size
    return out


class _StepBuild:
    """What the builder keeps while it emits one step."""

    def __init__(self, s, step, layer, shape, dep_q, dep_kv):
        self.s, self.step, self.layer, self.shape = s, step, layer, shape
        self.dep_q, self.dep_kv = dep_q, dep_kv
        self.shared_q = None
        self.resident = {"K": {}, "V": {}, "KL": {}}   # group index -> its chunk transactions
        self.pending_pv = deque()      # (block, final softmax, value selection) awaiting p.V
        self.last_use = {}             # id(txn) -> (txn, the last op that reads it)
        self.last_pv_done = None
        self.next_block = 0            # blocks made so far
        self.open = {}                 # id(txn) -> (V plane, last block reading it): a later
                                       # block may read it (only when made in parts)

    def later_reader(self, key):
        """Whether a block not made yet (or a p.V still pending) reads the transaction."""
        v, last = self.open.get(key, (False, -1))
        return last >= self.next_block - (len(self.pending_pv) if v else 0)

    def reads(self, op, *txns):
        """``op`` reads ``txns``: it is their last reader so far."""
        for t in txns:
            op.inputs.append(t)
            self.last_use[id(t)] = (t, op)


class ProgramBuilder:
    """Builds the :class:`Program` of a trace on an architecture (see the module docstring)."""

    def __init__(self, env, arch, trace, amaps, buffers, grain_rows, rng, sample_prefill=None):
        self.env, self.arch, self.trace = env, arch, trace
        self.amaps, self.buffers = amaps, buffers
        self.grain_rows, self.rng = grain_rows, rng
        self.sample_prefill = sample_prefill
        self.prog = Program(arch.dot.arrays == "shared", len(trace.steps), self._more, env)
        self.shapes = {}
        self.cached_chunks = 0    # chunks planned in the cached shapes
        self.desc = 0   # fetch descriptor: one plane of one head group for one query block
        self.fetches = 0   # fetch transactions made so far
        self.layers = max(s.layer for s in trace.steps) + 1
        self.next_of = _next_of_request(trace.steps)
        self.prev = {}  # request -> (its last step's end, whether a selection ended it)
        self.made = 0   # steps begun so far
        self.current = None   # the step being made, while it has blocks left

    def build(self):
        """Make every step now (the engine makes them as units reach them instead)."""
        while self._more():
            pass
        return self.prog

    def _more(self):
        """Make the next part of the trace (a step, or the next blocks of a long one);
        False when nothing is left."""
        st = self.current
        if st is None:
            if self.made >= len(self.trace.steps):
                return False
            st = self.current = self._start_step()
        self._emit_blocks(st)
        if st.next_block < len(st.shape.blocks):
            self.prog.made(False)
            return True
        self.current = None
        self._end_step(st)
        return True

    def _start_step(self):
        s = self.made
        self.made += 1
        step = self.trace.steps[s]
        prev_done, prev_selected = self.prev.get(step.request, (None, False))
        dep_q = [(prev_done, "layer_dependency")] if prev_done is not None else []
        dep_kv = []
        if prev_done is not None and (step.stage == "prefill" or prev_selected):
            dep_kv = [(prev_done, "topk" if prev_selected else "layer_dependency")]
        layer = step.request * self.layers + step.layer   # each request its own KV-cache region
        shape = self._shape(step, layer)
        if shape.sample is not None:
            self.prog.block_sample[s] = shape.sample
            self.prog.block_dues[s] = []
            self.prog.made_rows[s] = COPIES * int(shape.kept_rows.sum())
        return _StepBuild(s, step, layer, shape, dep_q, dep_kv)

    def _end_step(self, st):
        steps, s = self.trace.steps, st.s
        nxt = self.next_of[s]
        done, selected = self._select_next(st, None if nxt is None else steps[nxt])
        self.prev[st.step.request] = (done, selected)
        times, env = self.prog.step_times, self.env
        done.event().callbacks.append(lambda _e, i=s: times.__setitem__(i, env.now))
        self._writes(st, done)
        self.prog.made(self.made == len(steps))

    def _shape(self, step, layer):
        amap = self.amaps[step.head_dim]
        key = _shape_key(step, amap, layer)
        shape = self.shapes.get(key)
        if shape is None:
            q_room = self.buffers["query"].capacity / 2
            shape = _StepShape(self.arch, amap, step, layer, self.grain_rows, q_room, self.sample_prefill)
            if shape.chunks is not None and shape.chunks <= SHAPE_CACHE_CHUNKS:
                # a long decode plans a new shape per token; oldest out first
                while self.shapes and (len(self.shapes) >= SHAPE_CACHE
                                       or self.cached_chunks + shape.chunks > SHAPE_CACHE_CHUNKS):
                    self.cached_chunks -= self.shapes.pop(next(iter(self.shapes))).chunks
                self.shapes[key] = shape
                self.cached_chunks += shape.chunks
        return shape

    # ------------------------------------------------------------------ a step
    def _emit_blocks(self, st):
        """Make the step's next blocks: all of them, or up to BLOCKS_PER_MAKE and
        TXNS_PER_MAKE fetch transactions when it has more than one (a transaction's last
        reader is then settled once no later block reads it)."""
        lookahead = self.arch.dot.lookahead
        blocks = st.shape.blocks
        first = end = st.next_block
        parts = st.shape.last_read is not None
        made = self.fetches
        while end < len(blocks):
            if parts and end > first and (end - first >= BLOCKS_PER_MAKE
                                          or self.fetches - made >= TXNS_PER_MAKE):
                break
            b = blocks[end]
            end += 1
            q = self._query(st, b)
            kch = self._keys(st, b)
            sm1 = self._qk(st, b, q, kch)
            if len(st.pending_pv) >= lookahead:
                self._pv(st, *st.pending_pv.popleft())
            final_sm = self._lsb(st, b, q, kch, sm1) if b.bp.lsb else sm1
            st.pending_pv.append((b, final_sm, self._value_select(st, b, final_sm)))
        st.next_block = end
        if end == len(blocks):
            while st.pending_pv:
                self._pv(st, *st.pending_pv.popleft())
            self._settle(st, st.last_use)
            self._count(st)
            return
        settled = {k: u for k, u in st.last_use.items() if not st.later_reader(k)}
        for k in settled:
            del st.last_use[k]
            st.open.pop(k, None)
        self._settle(st, settled)

    @staticmethod
    def _settle(st, uses):
        """Each transaction's last reader releases its buffer room."""
        for txn, op in uses.values():
            if op.release:
                op.release.append(txn)
            else:
                op.release = [txn]

    def _count(self, st):
        prog, shape, d = self.prog, st.shape, st.step.head_dim
        c, tot = prog.counts, shape.totals
        c["macs_qk"] += tot.macs["qk"]
        c["macs_lsb"] += tot.macs["lsb"]
        c["macs_pv"] += tot.macs["pv"]
        c["softmax_elements"] += tot.softmax_elements
        c["value_selections"] += tot.value_selections
        prog.compulsory_bytes += shape.compulsory_bytes
        prog.macs_by_dim[d] = prog.macs_by_dim.get(d, 0) + sum(tot.macs.values())
        prog.macs_pv_by_dim[d] = prog.macs_pv_by_dim.get(d, 0) + tot.macs["pv"]

    # ------------------------------------------------------------- fetches
    def _fetch(self, st, kind, segments, rows, waits, head, block, skip=0):
        t = Txn(kind, st.s, head, block, rows, 0, 0.0, "fetch")
        t.desc = self.desc
        t.layer = st.layer
        t.positions = segments
        t.buffer = self.buffers[{"Q": "query", "V": "value"}.get(kind, "key")]
        t.waits = waits
        t.skip = skip
        if kind != "Q":   # the array starts on a chunk's first rows (streaming)
            t.pieces = rows
        self.prog.fetch.append(t)
        self.fetches += 1
        return t

    def _chunks(self, st, kind, chunks, waits, b):
        """One descriptor's chunk transactions."""
        self.desc += 1
        return [self._fetch(st, kind, c.segments, c.rows, waits, b.head, b.bp.block, c.skip)
                for c in chunks]

    def _resident(self, st, plane, b, n):
        """The cache list of a group's resident chunks of ``plane`` (created empty on first use)."""
        res = st.resident[plane]
        if b.gi not in res:
            res[b.gi] = [None] * n
        return res[b.gi]

    def _resident_chunks(self, st, kind, chunks, idx, waits, b):
        """The resident chunks ``idx`` a block reads, made on first use: each once per group,
        in the order blocks first read them."""
        cache = self._resident(st, kind, b, len(chunks))
        if any(cache[i] is None for i in idx):
            self.desc += 1
            last = st.shape.last_read
            for i in idx:
                if cache[i] is None:
                    c = chunks[i]
                    cache[i] = self._fetch(st, kind, c.segments, c.rows, waits, b.head, b.bp.block, c.skip)
                    if last is not None:
                        st.open[id(cache[i])] = (kind == "V", last[kind, b.gi, i])
        return [cache[i] for i in idx]

    def _query(self, st, b):
        shape = st.shape
        if shape.shared_q is None:
            self.desc += 1
            return self._fetch(st, "Q", b.q_segments, b.q_rows, st.dep_q, b.head, b.bp.block)
        if st.shared_q is None:
            self.desc += 1
            st.shared_q = self._fetch(st, "Q", *shape.shared_q, st.dep_q, -1, 0)
            st.open[id(st.shared_q)] = (False, len(shape.blocks) - 1)   # every block reads it
            # each head group reads its own part, in order: the first can start on the first part
            st.shared_q.readers = st.shared_q.pieces = len(shape.plan)
        return st.shared_q

    def _keys(self, st, b):
        gp = b.gp
        if gp.k_resident:
            return self._resident_chunks(st, "K", gp.k_chunks, b.bp.k_idx, st.dep_kv, b)
        return self._chunks(st, "K", b.bp.k_chunks, st.dep_kv, b)

    # ------------------------------------------------------------ compute
    def _qk(self, st, b, q, kch):
        """q.K of a block over its key chunks; returns the softmax op it feeds."""
        s, d, bp = st.s, st.step.head_dim, b.bp
        # a block whose rows see no key (a window of pruned keys) still passes its rows on
        for i, (ch, macs) in enumerate(list(zip(kch, b.qk_macs)) or [(None, 0)]):
            op = dotmod.DotOp("qk", s, b.head, bp.block, macs, d)
            op.part = b.gi if q.readers > 1 else None
            if i:
                op.held = q
            st.reads(op, q, *(() if ch is None else (ch,)))
            self.prog.dot_qk.append(op)
        op.out = Txn("S", s, b.head, bp.block, b.score_rows, 0, 0.0, "dot")
        sm = smmod.SoftmaxOp(s, b.head, bp.block, b.score_rows, _cols(bp.elements, b.score_rows))
        sm.done = Due(self.env)
        self.prog.softmax.append(sm)
        return sm

    def _lsb(self, st, b, q, kch, sm1):
        """LSB recompute of a block (progressive key quantization): fetch the
        least-significant plane once softmax has decided, recompute, softmax again."""
        s, d, gp, bp = st.s, st.step.head_dim, b.gp, b.bp
        waits = st.dep_kv + [(sm1.done, "softmax")]
        kls = self._resident(st, "KL", b, len(b.lsb_src)) if gp.kl_resident else [None] * len(b.lsb_src)
        self.desc += 1
        msb = bp.lsb_msb_chunks       # K was not resident: its MSB rows come again
        first = True
        for unit in pair_units(b.lsb_src, pair_unit_rows(self.arch, d)):
            # a unit's LSB rows, then its MSB rows: the order does not depend on the grain
            for i in unit:
                if kls[i] is None:
                    c = b.lsb_src[i]
                    kls[i] = self._fetch(st, "KL", c.segments, c.rows, waits, b.head, bp.block, c.skip)
                    if gp.kl_resident and st.shape.last_read is not None:
                        st.open[id(kls[i])] = (False, st.shape.last_read["KL", b.gi])
            again = {i: self._fetch(st, "K", msb[i].segments, msb[i].rows, waits, b.head, bp.block,
                                    msb[i].skip) for i in unit} if msb else {}
            for i in unit:
                op = dotmod.DotOp("lsb", s, b.head, bp.block, b.lsb_macs[i], d)
                op.part = b.gi if q.readers > 1 else None
                if first:
                    op.waits = [(sm1.done, "softmax")]
                    first = False
                else:
                    op.held = q
                st.reads(op, q, kls[i])
                if msb:
                    st.reads(op, again[i])
                elif gp.k_resident:
                    st.reads(op, kch[min(i, len(kch) - 1)])
                self.prog.dot_qk.append(op)
        op.out = Txn("S", s, b.head, bp.block, bp.lsb_rows, 0, 0.0, "dot")
        sm = smmod.SoftmaxOp(s, b.head, bp.block, bp.lsb_rows, _cols(bp.lsb_elements, bp.lsb_rows),
                             second=True)
        sm.done = Due(self.env)
        self.prog.softmax.append(sm)
        return sm

    def _value_select(self, st, b, final_sm):
        """Decode value pruning: the selector picks each head's kept V rows."""
        if not b.pruned:
            return None
        op = tkmod.TopkOp("value", st.s, b.head, st.step.n_kept_k, len(b.pruned), b.value_comps)
        op.waits.append((final_sm.done, "softmax"))
        op.done = Due(self.env)
        self.prog.topk.append(op)
        self.prog.counts["topk_comparisons"] += b.value_comps
        return op

    def _pv(self, st, b, final_sm, vsel):
        """p.V of a block over its V chunks (fetched once selected, when pruned)."""
        s, d, gp, bp = st.s, st.step.head_dim, b.gp, b.bp
        waits = st.dep_kv + ([(vsel.done, "topk")] if vsel is not None else [])
        if gp.v_resident:
            chunks = self._resident_chunks(st, "V", gp.v_chunks, bp.v_idx, waits, b)
        else:
            chunks = self._chunks(st, "V", bp.v_chunks, waits, b)
        for i, (ch, macs) in enumerate(list(zip(chunks, b.pv_macs)) or [(None, 0)]):
            op = dotmod.DotOp("pv", s, b.head, bp.block, macs, d)
            if i == 0:
                op.waits = [(final_sm.done, "softmax")]
            if ch is not None:
                st.reads(op, ch)
            self.prog.dot_pv.append(op)
        op.done = Due(self.env)
        st.last_pv_done = op.done
        if st.shape.sample is not None:
            self.prog.block_dues[st.s].append(op.done)

    # ---------------------------------------------------- between layers
    def _select_next(self, st, nxt):
        """After the layer, the selector picks the next layer's tokens and heads (cascade
        pruning). Returns (the Due that ends the step, whether a selection ran)."""
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
            op.done = Due(self.env)
            self.prog.topk.append(op)
            self.prog.counts["topk_comparisons"] += op.comparisons
            self.prog.counts["topk_selections"] += 1
            done, ran = op.done, True
        return done, ran

    # ------------------------------------------------------------- writes
    def _writes(self, st, done):
        """The step's writes, posted once it ends: the K/V rows it appends to the cache
        (every plane, per K/V head it read) and its output rows (per query head, over the
        query rows' place in the layer's region)."""
        step = st.step
        txns = []
        # sampled: the made blocks' rows (aligned with the last rows), when the request's next
        # step is a prefill step too, in whose sampled blocks they drain; before a decode step
        # or at the end they are written whole, as they drain into time counted once
        nxt = self.next_of[st.s]
        into_prefill = nxt is not None and self.trace.steps[nxt].stage == "prefill"
        kept = st.shape.kept_rows if into_prefill else None
        if step.new_kv_rows:
            rows = np.arange(step.kv_rows - step.new_kv_rows, step.kv_rows, dtype=np.int64)
            if kept is not None:
                rows = rows[kept[step.q_rows - step.new_kv_rows:]]
            kvs = np.unique(step.kv_heads).tolist()
            planes = ("K", "KL", "V") if self.arch.precision.k_lsb_bits > 0 else ("K", "V")
            if len(rows):
                txns += [self._write(st, pl, [(g, rows) for g in kvs]) for pl in planes]
        rows = step.query_positions()[-step.out_rows:] if step.out_rows else ()
        if kept is not None and len(rows):
            rows = rows[kept[step.q_rows - step.out_rows:]]
        if len(rows):
            txns.append(self._write(st, "Q", [(h, rows) for h in step.heads.tolist()]))
        if txns:
            self.prog.writes.append((done, txns))

    def _write(self, st, plane, segments):
        t = Txn(plane, st.s, -1, 0, sum(len(p) for _h, p in segments), 0, 0.0, "dot")
        t.layer = st.layer
        t.positions = segments
        t.is_write = True
        return t


def _cols(elements, rows):
    """Score columns per row: whole when every row sees as many keys (as in version 1)."""
    if not rows:
        return 0
    return elements // rows if elements % rows == 0 else elements / rows
