"""Per-transaction logs of the channel pool, held in a fixed amount of memory.

A long run moves tens of millions of transactions; a number per transaction
kept in memory would make the run's memory grow with its traffic. These logs
keep at most ``keep`` entries in memory and move older ones, a block at a time,
to an unnamed temporary file (removed when the log is). What the result reads
from them is computed from the blocks and is the same number the whole log in
memory would give: the latency percentile is numpy's own (linear) percentile of
the exact order statistics, and the occupancy curve sums the same terms in the
same order. A run that never reaches ``keep`` entries never touches a file.
"""

import tempfile
from array import array

import numpy as np

SPILL_AT = 1 << 20      # entries a log keeps in memory (8-9 MiB) before it moves them to a file
_PASS_BINS = 4096       # value bins per pass when an order statistic is sought in a file
_GATHER = 1 << 20       # values close enough to an order statistic to sort in memory


class _Blocks:
    """Arrays written one after another to an unnamed temporary file, read back in order."""

    def __init__(self):
        self.file = tempfile.TemporaryFile()
        self.parts = []          # (dtype, count) of each array written

    def write(self, arr):
        self.file.seek(0, 2)     # a reader left unfinished may have moved the position
        arr.tofile(self.file)
        self.parts.append((arr.dtype, len(arr)))

    def read(self):
        """The arrays, in the order written."""
        self.file.flush()
        self.file.seek(0)
        for dtype, count in self.parts:
            yield np.fromfile(self.file, dtype=dtype, count=count)


class LatencyLog:
    """Read latencies (cycles from submission to the last data), one per read transaction."""

    def __init__(self, keep=SPILL_AT):
        if keep < 1:
            raise ValueError(f"keep must be at least 1, got {keep!r}")
        self.keep = keep
        self.values = array("d")     # the newest entries
        self.count = 0               # entries in the file
        self._file = None

    def append(self, x):
        values = self.values
        values.append(x)
        if len(values) >= self.keep:
            if self._file is None:
                self._file = _Blocks()
            self._file.write(np.frombuffer(values, dtype=float).copy())
            self.count += len(values)
            self.values = array("d")

    def __len__(self):
        return self.count + len(self.values)

    def blocks(self):
        """Every entry, a block at a time, in the order logged."""
        if self._file is not None:
            yield from self._file.read()
        if self.values:
            yield np.frombuffer(self.values, dtype=float)

    def all(self):
        """Every entry as one array (memory grows with the log: for short runs and tests)."""
        parts = list(self.blocks())
        return np.concatenate(parts) if parts else np.zeros(0)

    def percentile(self, q):
        """``numpy.percentile`` of every entry (linear method); 0.0 for an empty log."""
        n = len(self)
        if n == 0:
            return 0.0
        if self._file is None:
            return float(np.percentile(np.frombuffer(self.values, dtype=float), q))
        # numpy's recipe: the order statistics either side of the virtual index (n - 1) q / 100,
        # and its own linear interpolation between them
        virtual = (n - 1) * np.true_divide(q, 100)
        below = int(np.floor(virtual))
        pair = np.array([self._order_stat(below), self._order_stat(min(below + 1, n - 1))])
        return float(np.quantile(pair, virtual - below))

    def _order_stat(self, k):
        """The ``k``-th smallest entry (from 0), in a few passes over the blocks: each pass
        narrows a value range that holds it until its values fit in memory."""
        lo, hi = np.inf, -np.inf
        for block in self.blocks():
            lo, hi = min(lo, float(block.min())), max(hi, float(block.max()))
        under = 0                                  # entries below lo
        while True:
            inside = sum(int(np.count_nonzero((b >= lo) & (b <= hi))) for b in self.blocks())
            if lo == hi:
                return lo
            if inside <= _GATHER:
                return self._gathered(lo, hi, k - under)
            edges = np.linspace(lo, hi, _PASS_BINS + 1)
            counts = np.zeros(_PASS_BINS, dtype=np.int64)
            for b in self.blocks():
                counts += np.histogram(b[(b >= lo) & (b <= hi)], bins=edges)[0]
            # np.histogram's bins are [e_i, e_i+1) but the last, which holds hi
            i = int(np.searchsorted(np.cumsum(counts), k - under, side="right"))
            under += int(counts[:i].sum())
            new_lo = float(edges[i])
            new_hi = hi if i == _PASS_BINS - 1 else float(np.nextafter(edges[i + 1], -np.inf))
            if (new_lo, new_hi) == (lo, hi):       # cannot narrow (float spacing): gather
                return self._gathered(lo, hi, k - under)
            lo, hi = new_lo, new_hi

    def _gathered(self, lo, hi, k):
        """The ``k``-th smallest of the entries in ``[lo, hi]``, gathered into memory."""
        vals = np.concatenate([b[(b >= lo) & (b <= hi)] for b in self.blocks()])
        return float(np.partition(vals, k)[k])


class OccupancyLog:
    """Transactions in the pool over time: +1 at each arrival, -1 when a transaction's data
    is all back. A departure is logged at or after the moment it is logged and an arrival
    at that moment, so entries before the present are final: when the log outgrows ``keep``
    those are sorted and written out, and the file holds them in time order."""

    def __init__(self, keep=SPILL_AT):
        if keep < 1:
            raise ValueError(f"keep must be at least 1, got {keep!r}")
        self.keep = keep
        self.t = array("d")          # when a transaction arrived or left, and
        self.d = array("b")          # +1 / -1: compact, a long run logs millions
        self._limit = keep           # entries at which arrive() writes out the past
        self._file = None

    def __len__(self):
        return len(self.t)

    def arrive(self, now):
        """A transaction arrives ``now``; past ``keep`` entries the past is written out."""
        self.t.append(now)
        self.d.append(1)
        if len(self.t) >= self._limit:
            self.spill(now)
            # what is still in flight stays; do not write out again before the log has grown
            self._limit = max(self.keep, 2 * len(self.t))

    def spill(self, now):
        """Write out, in time order, the entries logged before ``now``."""
        t = np.frombuffer(self.t, dtype=float)
        d = np.frombuffer(self.d, dtype=np.int8)
        early = t < now
        if not early.any():
            return
        et, ed = t[early], d[early]
        order = np.lexsort((ed, et))   # a departure before an arrival at one instant
        if self._file is None:
            self._file = _Blocks()
        self._file.write(et[order])
        self._file.write(ed[order])
        rt, rd = t[~early].copy(), d[~early].copy()
        del t, d, et, ed
        self.t, self.d = array("d", rt.tobytes()), array("b", rd.tobytes())

    def in_flight(self, now):
        """Transactions in the pool at ``now`` (entries up to ``now``)."""
        total = 0
        for t, d in self._chunks(sort=False):
            total += int(d[t <= now].sum())
        return total

    def _chunks(self, sort=True):
        """(times, steps) chunks in time order (each chunk sorted, chunks after one another)."""
        if self._file is not None:
            parts = self._file.read()
            for t in parts:
                yield t, next(parts)
        if self.t:
            t = np.frombuffer(self.t, dtype=float)
            d = np.frombuffer(self.d, dtype=np.int8)
            if sort:
                order = np.lexsort((d, t))
                t, d = t[order], d[order]
            yield t, d

    def curve(self, total_cycles, bins):
        """Time-average transactions in the pool per bin of ``[0, total_cycles)``, overall,
        and the peak. The step function's area is summed chunk by chunk, each chunk's sum
        starting from the last: the same additions, in the same order, as one sum."""
        edges = np.linspace(0.0, total_cycles, bins + 1)
        at = np.zeros(len(edges))            # area up to each edge (0 before the first entry)
        carry = (0.0, 0.0, None, 0.0)        # level, area and time of the last knot; the peak
        pending = None                       # the previous chunk, its last product still to add
        for t, d in self._chunks():
            if len(t):
                if pending is not None:
                    carry = self._close(pending, at, edges, *carry)
                pending = (t, d)
        if pending is None:
            return None
        t_end = max(total_cycles, float(pending[0][-1]))
        carry = self._close(pending, at, edges, *carry, t_end=t_end)
        return at, edges, carry[3]

    @staticmethod
    def _close(chunk, at, edges, level, area, t_prev, peak, t_end=None):
        """The area at this chunk's knots, and ``at`` for the edges among them. The knots are
        the previous chunk's last entry, this chunk's entries, and ``t_end`` after the last
        chunk; returns the carry for the next chunk."""
        t, d = chunk
        last = t_end is not None
        levels = level + np.cumsum(d.astype(float))
        if t_prev is None:
            knots = t
            knot_levels = levels
            start = np.array([0.0])
        else:
            knots = np.concatenate(([t_prev], t))
            knot_levels = np.concatenate(([level], levels))
            start = np.array([area])
        if last:
            knots = np.append(knots, t_end)
            areas = np.cumsum(np.concatenate((start, knot_levels * np.diff(knots))))
            sel = (edges >= knots[0]) & (edges <= knots[-1])
        else:
            # the last entry's width reaches into the next chunk, whose knots begin with this
            # entry: edges from it on are found there
            areas = np.cumsum(np.concatenate((start, knot_levels[:-1] * np.diff(knots))))
            sel = (edges >= knots[0]) & (edges < knots[-1])
        if sel.any():
            at[sel] = np.interp(edges[sel], knots, areas, left=0.0)
        return float(levels[-1]), float(areas[-1]), float(t[-1]), max(peak, float(levels.max()))
