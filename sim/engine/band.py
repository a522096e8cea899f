"""Banded steps: causal prefill, sliding windows and per-K/V-head key sets.

In such a step query rows see different keys: the row at position p sees the
kept keys of its K/V head at positions <= p (causal) and > p - window
(sliding window). Per query block only the keys some row of the block sees
are fetched -- key tiles wholly above the causal diagonal, or older than the
window, are skipped -- and the work of every chunk is counted row by row, so
a step's totals equal :meth:`sim.trace.step.Step.work` exactly.

Rows flagged for the least-significant key plane are the step's last rows
(the trace gives a count per head, and :meth:`~sim.trace.step.Step.work`
takes the last rows too). Value pruning in decode keeps, per head, the
trace's ``kept_v_idx`` or ``kept_v`` positions spread evenly over the keys
the block sees; in prefill the block's visible keys are fetched and
``kept_v`` only bounds the products each row does.
"""

import weakref
from array import array

import numpy as np

from .tiling import BlockPlan, _bytes, _half, chunk_cap, even_pick, split
from .topk import select_cost


def row_ranges(keys, q_pos, causal, window):
    """Per query row, the half-open index range ``[lo, hi)`` of sorted ``keys`` it sees."""
    n = len(keys)
    hi = (np.searchsorted(keys, q_pos, side="right") if causal
          else np.full(len(q_pos), n, dtype=np.int64))
    lo = (np.searchsorted(keys, q_pos - window, side="right") if window
          else np.zeros(len(q_pos), dtype=np.int64))
    return lo, np.maximum(hi, lo)


def seen_below(lo, hi, bounds):
    """Per bound x: the keys with index < x that the rows ``[lo, hi)`` see, summed over rows."""
    x = np.asarray(bounds, dtype=np.int64)[:, None]
    return (np.clip(x, lo[None, :], hi[None, :]) - lo[None, :]).sum(axis=1)


def _span(lo, hi):
    """``(first, end)`` key indices any row sees (``(0, 0)`` when none sees any)."""
    seen = hi > lo
    if not seen.any():
        return 0, 0
    return int(lo[seen].min()), int(hi[seen].max())


def _cut(amap, layer, plane, kv, positions, start, max_rows, max_bytes, memo=None, ends=None):
    """Chunks of ``positions`` (key indices ``start`` on) and each chunk's index bounds
    (``memo``: see :func:`sim.engine.tiling.split`; ``ends``: key indices where the blocks
    reading a resident plane stop, each the end of a chunk)."""
    if len(positions) == 0:
        return [], np.zeros(1, dtype=np.int64) + start
    breaks = None if ends is None else np.unique(np.asarray(ends, dtype=np.int64) - start)
    chunks = [c[0] for c in split(amap, layer, (plane,), [(kv, positions)], max_rows, max_bytes, memo,
                                  breaks)]
    return chunks, start + np.concatenate([[0], np.cumsum([c.rows for c in chunks])])


def _overlapping(bounds, a, b):
    """Indices of the chunks with index bounds ``bounds`` that hold part of ``[a, b)``."""
    if b <= a:
        return []
    first = int(np.searchsorted(bounds, a, side="right")) - 1
    last = int(np.searchsorted(bounds, b, side="left"))
    return list(range(max(first, 0), min(last, len(bounds) - 1)))


def _spread_total(total, weights):
    """``total`` split over ``weights`` in whole numbers, exact in sum."""
    n = sum(weights)
    if not n:
        return [0] * len(weights)
    out, seen = [], 0
    for w in weights:
        out.append(total * (seen + w) // n - total * seen // n)
        seen += w
    return out


class BandPlanner:
    """One head group of a banded step, its query blocks planned one at a time.

    Made, it has set the group's residency, resident chunks and compulsory
    bytes; :meth:`plan` gives block ``b``'s :class:`BlockPlan`, the same
    whichever blocks were planned before. A long causal step on a small
    buffer re-streams its keys for thousands of blocks: planned as the
    engine reaches them, its plan in memory is a few blocks, not the step.
    """

    def __init__(self, arch, amap, step, layer, gp, idx, keys, blocks, cuts):
        # the group holds its planner (``gp.band``); a strong link back would make a cycle,
        # and the engine runs with the cyclic collector off, so every long step's plan would
        # stay in memory until the run ends
        self.arch, self.amap, self.step, self.layer, self.gp = arch, amap, step, layer, weakref.proxy(gp)
        self.keys, self.blocks = keys, blocks
        self.kc, vc, self.klc = cuts
        self.ranges = []
        r0 = 0
        for q in blocks:
            lo, hi = row_ranges(keys, q, step.causal, step.window)
            self.ranges.append((r0, lo, hi, _span(lo, hi)))
            r0 += len(q)
        spans = [r[3] for r in self.ranges if r[3][1] > r[3][0]]
        hull = (min(a for a, _b in spans), max(b for _a, b in spans)) if spans else (0, 0)
        gp.n_kv = hull[1] - hull[0]
        gp.k_bytes = _bytes(amap, layer, "K", gp.kv, keys[hull[0]:hull[1]])
        lsb_on = arch.precision.k_lsb_bits > 0
        self.flagged = {h: int(step.lsb_rows[j]) for h, j in zip(gp.heads, idx)
                        if lsb_on and step.lsb_rows[j]}
        gp.k_resident = (len(blocks) > 1 or bool(self.flagged)) and gp.k_bytes <= _half(arch, "K")
        self.res_k = None
        if gp.k_resident:
            # blocks fetch the resident keys they are first to see: chunks end where a block's keys do
            self.res_k = _cut(amap, layer, "K", gp.kv, keys[hull[0]:hull[1]], hull[0], self.kc,
                              chunk_cap(arch, "K"), ends=[sp[1] for sp in spans])
            gp.k_chunks = self.res_k[0]
        self.vplan = _ValuePlan(arch, amap, step, layer, gp, idx, keys, self.ranges, vc)
        self.k_memo = {}     # first key -> the K chunks of streams from it, shared by blocks
        # streamed keys, when several blocks stream them, go through the buffer as through a ring
        self.k_stream_cap = chunk_cap(arch, "K", len(blocks) > 1)
        lsb_hull = [ab for ab in (self._lsb_span(b)[1] for b in range(len(blocks))) if ab]
        if lsb_hull:
            a, b = min(x for x, _y in lsb_hull), max(y for _x, y in lsb_hull)
            gp.lsb_bytes = _bytes(amap, layer, "KL", gp.kv, keys[a:b])

    def __len__(self):
        return len(self.blocks)

    def chunks_estimate(self):
        """About how many chunks the group's blocks stream (their resident chunks aside)."""
        n = 0
        vc = self.vplan.vc
        for b, (_r0, _lo, _hi, (a, e)) in enumerate(self.ranges):
            if not self.gp.k_resident:
                n += -(-(e - a) // self.kc)
            if not self.gp.v_resident:
                n += -(-len(self.vplan.sets[b]) // vc)
        return n

    def plan(self, b):
        """Block ``b``'s chunks and the work of each of its operations."""
        gp, step = self.gp, self.step
        r0, lo, hi, span = self.ranges[b]
        bp = BlockPlan(b, self.blocks[b])
        bp.k_idx, bounds = self._block_keys(bp, span)
        scale = len(gp.heads) * step.head_dim
        # per chunk, in typed arrays (8 bytes an entry, Python ints when read): a long causal
        # step plans one entry per block and chunk, tens of millions on a small-buffer part
        per = [int(x) * scale for x in np.diff(seen_below(lo, hi, bounds))]
        bp.qk_macs = array("q", per if bp.k_idx is None else [per[i] for i in bp.k_idx])
        bp.elements = len(gp.heads) * int((hi - lo).sum())
        self._plan_lsb_rows(bp)
        self.vplan.plan_block(bp, lo, hi, span)
        return bp

    def reads(self, b):
        """``(K chunk indices, V chunk indices, recomputes)`` of block ``b`` among the group's
        resident chunks (None for a plane that streams), without planning the block."""
        span = self.ranges[b][3]
        k_idx = _overlapping(self.res_k[1], *span) if self.gp.k_resident else None
        v_idx = self.vplan.resident_idx(b) if self.gp.v_resident else None
        return k_idx, v_idx, self._lsb_span(b)[1] is not None

    def forget_before(self, first_key):
        """Drop the shared cuts of streams that begin before ``first_key`` (no block still
        to plan begins there when blocks go in order of their query positions)."""
        for memo in (self.k_memo, self.vplan.memo):
            for a in [a for a in memo if a < first_key]:
                del memo[a]

    def _block_keys(self, bp, span):
        """The block's K chunks: the resident ones its span overlaps (returns their indices),
        or its own cut of the keys its rows see. Returns ``(indices or None, bounds)``."""
        a, b = span
        if self.gp.k_resident:
            bounds = self.res_k[1]
            return _overlapping(bounds, a, b), bounds
        bp.k_chunks, bounds = _cut(self.amap, self.layer, "K", self.gp.kv, self.keys[a:b], a, self.kc,
                                   self.k_stream_cap, self.k_memo.setdefault(a, {}))
        return None, bounds

    def _lsb_span(self, b):
        """Block ``b``'s flagged rows: ``({head: first local row}, (first, end) key indices
        they see)``; the span is None when the block recomputes nothing."""
        r0, lo, hi, _span_ = self.ranges[b]
        rows = len(self.blocks[b])
        starts = {}
        for h, m in self.flagged.items():
            first = max(0, self.step.q_rows - m - r0)   # local index of the head's first flagged row
            if first < rows:
                starts[h] = first
        if not starts:
            return starts, None
        s0 = min(starts.values())
        a, e = _span(lo[s0:], hi[s0:])
        return starts, ((a, e) if e > a else None)

    def _plan_lsb_rows(self, bp):
        """The recompute of the block's rows among the step's last flagged rows of each head."""
        starts, ab = self._lsb_span(bp.block)
        if ab is None:
            return
        _r0, lo, hi, _span_ = self.ranges[bp.block]
        bp.lsb = {h: bp.rows - first for h, first in starts.items()}
        a, b = ab
        gp, amap, arch = self.gp, self.amap, self.arch
        pairs = split(amap, self.layer, ("KL", "K"), [(gp.kv, self.keys[a:b])], self.klc,
                      chunk_cap(arch, "K") / 2)
        bp.lsb_chunks = [c[0] for c in pairs]
        if not gp.k_resident:
            bp.lsb_msb_chunks = [c[1] for c in pairs]
        bounds = a + np.concatenate([[0], np.cumsum([c.rows for c in bp.lsb_chunks])])
        macs = np.zeros(len(bp.lsb_chunks), dtype=np.int64)
        for first in starts.values():
            macs += np.diff(seen_below(lo[first:], hi[first:], bounds))
            bp.lsb_elements += int((hi[first:] - lo[first:]).sum())
        bp.lsb_macs = array("q", [int(x) * self.step.head_dim for x in macs])


class _ValuePlan:
    """The V side of a banded group: which rows each block fetches, and the p.V work."""

    def __init__(self, arch, amap, step, layer, gp, idx, keys, ranges, vc):
        self.arch, self.amap, self.step, self.layer, self.gp = arch, amap, step, layer, weakref.proxy(gp)
        self.idx, self.keys, self.vc = idx, keys, vc
        self.half = _half(arch, "V")
        self.cap = chunk_cap(arch, "V")
        self.sets = [self._positions(span) for _r0, _lo, _hi, span in ranges]
        # streamed rows, when several blocks stream them, go through the buffer as through a ring
        self.stream_cap = chunk_cap(arch, "V", len(ranges) > 1)
        self.memo = {}          # first key -> V chunks of streams from it (see plan_block)
        if gp.select:
            union = [s for s in self.sets if len(s)]
            gp.v_positions = np.unique(np.concatenate(union)) if union else keys[:0]
        else:   # each block's values are a slice of the (sorted) keys: mark the slices, copy none
            seen = np.zeros(len(keys), dtype=bool)
            for _r0, _lo, _hi, (a, b) in ranges:
                seen[a:b] = True
            gp.v_positions = keys[seen]
        gp.v_bytes = _bytes(amap, layer, "V", gp.kv, gp.v_positions)
        gp.v_resident = len(ranges) > 1 and gp.v_bytes <= self.half
        if gp.v_resident:
            ends = [self._resident_range(b)[1] for b in range(len(ranges))]
            gp.v_chunks, self.bounds = _cut(amap, layer, "V", gp.kv, gp.v_positions, 0, vc, self.cap,
                                            ends=ends)

    def _positions(self, span):
        """V positions the block fetches: the union over the group's heads."""
        a, b = span
        seen = self.keys[a:b]
        if not self.gp.select:      # prefill: every row keeps its own values
            return seen
        step = self.step
        parts = []
        for j in self.idx:
            if step.kept_v_idx is not None:
                vi = step.kept_v_idx[j]
                parts.append(vi[(vi >= seen[0]) & (vi <= seen[-1])] if len(seen) else vi[:0])
            else:
                parts.append(even_pick(seen, int(step.kept_v[j])))
        return parts[0] if len(parts) == 1 else np.unique(np.concatenate(parts))

    def _use(self, j, q, lo, hi):
        """V rows each query row of head ``j`` multiplies (the rule of Step.work)."""
        step = self.step
        if step.kept_v_idx is not None:
            v_lo, v_hi = row_ranges(step.kept_v_idx[j], q, step.causal, step.window)
            return v_hi - v_lo
        return np.minimum(int(step.kept_v[j]), hi - lo)

    def _resident_range(self, block):
        """The index range of the resident V positions block ``block`` reads."""
        mine = self.sets[block]
        if not len(mine):
            return 0, 0
        return (int(np.searchsorted(self.gp.v_positions, mine[0])),
                int(np.searchsorted(self.gp.v_positions, mine[-1], side="right")))

    def resident_idx(self, block):
        """Indices of the resident V chunks block ``block`` reads."""
        return _overlapping(self.bounds, *self._resident_range(block))

    def plan_block(self, bp, lo, hi, span):
        gp, step = self.gp, self.step
        mine = self.sets[bp.block]
        if gp.v_resident:
            a, b = self._resident_range(bp.block)
            bp.v_idx = _overlapping(self.bounds, a, b)
            weights = [min(b, self.bounds[i + 1]) - max(a, self.bounds[i]) for i in bp.v_idx]
        else:
            # in prefill a block's V rows are the keys it sees: streams from one key share chunks
            memo = None if gp.select else self.memo.setdefault(span[0], {})
            bp.v_chunks, _b = _cut(self.amap, self.layer, "V", gp.kv, mine, 0, self.vc, self.stream_cap, memo)
            weights = [c.rows for c in bp.v_chunks]
        n_vis = span[1] - span[0]
        total = 0
        for h, j in zip(gp.heads, self.idx):
            use = self._use(j, bp.q_positions, lo, hi)
            total += int(use.sum())
            if gp.select and int(use.max(initial=0)) < n_vis:
                bp.pruned.append(h)
                bp.value_comps += bp.rows * select_cost(n_vis, int(round(use.mean())) if len(use) else 0)
        bp.pv_macs = array("q", [m * step.head_dim for m in _spread_total(total, weights)])
