"""The Pareto front: the points no other point beats on every objective.

Every objective is minimized. A point is *dominated* when another point is no
worse in every objective and strictly better in at least one. Equal points do
not dominate each other, so duplicates of a front point are all on the front.

The scan takes points in lexicographic order. A point that dominates another
is lexicographically smaller, so no point can be dominated by one taken after
it: a point is on the front exactly when nothing taken before it dominates it,
and the front seen so far only ever grows. The same scan therefore serves a
whole array in memory (:func:`pareto_mask`) and a stream of sorted blocks read
from the store (:class:`FrontScan`), with memory bounded by the front:

* one objective: the points equal to the first (smallest) value;
* two objectives: a point is on the front when it has the smallest second
  objective among the points sharing its first objective, and that value is
  strictly below every second objective of a smaller first objective -- a
  running minimum, O(n) after the O(n log n) sort;
* three or more: each block is compared with the front so far, and the
  points that survive that with each other, O(n * front size).

:class:`Front` keeps a front that points join in any order (the screening of a
running sweep); :func:`dominated` is the test both use.
"""

import numpy as np

BLOCK = 1024            # points compared at once when there are three or more objectives
PAIRS = 1 << 22         # most point pairs compared in one numpy call (memory bound)


def _matrix(points, k=None):
    m = np.asarray(points, dtype=np.float64)
    if m.ndim == 1 and k is not None:
        m = m.reshape(-1, k)
    if m.ndim != 2:
        raise ValueError(f"expected a 2-D array of objective values, got shape {m.shape}")
    if not np.isfinite(m).all():
        raise ValueError("objective values must be finite numbers (no NaN or infinity)")
    return m


def dominated_by(cand, ref):
    """Mask over the rows of ``cand``: True where some row of ``ref`` dominates it."""
    cand, ref = np.asarray(cand, np.float64), np.asarray(ref, np.float64)
    out = np.zeros(len(cand), dtype=bool)
    if not len(cand) or not len(ref):
        return out
    step = max(1, PAIRS // len(ref))
    for i in range(0, len(cand), step):
        c = cand[i:i + step]
        le = np.ones((len(c), len(ref)), dtype=bool)
        lt = np.zeros((len(c), len(ref)), dtype=bool)
        for j in range(ref.shape[1]):     # column by column: a short reduction axis is slow in numpy
            a, r = c[:, j, None], ref[None, :, j]
            le &= r <= a
            lt |= r < a
        out[i:i + step] = np.any(le & lt, axis=1)
    return out


def dominated(vec, front):
    """True when some vector of ``front`` dominates ``vec``."""
    if front is None or not len(front):
        return False
    return bool(dominated_by(np.asarray(vec, np.float64)[None, :], front)[0])


class FrontScan:
    """The front of a stream of points given in lexicographic order, block by block.

    ``take(block)`` returns the mask of the block's points that are on the
    front of everything taken so far -- and, since later points can never
    dominate earlier ones, of the whole stream.
    """

    def __init__(self, k):
        if k < 1:
            raise ValueError(f"expected at least one objective, got {k}")
        self.k = k
        self._first = None          # one objective: the smallest value
        self._x = None              # two: first objective of the current group
        self._group_min = np.inf    # two: smallest second objective in that group
        self._best = np.inf         # two: smallest second objective of smaller first objectives
        self._front = np.empty((0, k))   # three or more: the front so far
        self._last = None

    def take(self, block):
        b = _matrix(block, self.k)
        if b.shape[1] != self.k:
            raise ValueError(f"expected {self.k} objectives per point, got {b.shape[1]}")
        if not len(b):
            return np.zeros(0, dtype=bool)
        self._check_order(b)
        if self.k == 1:
            if self._first is None:
                self._first = b[0, 0]
            return b[:, 0] == self._first
        if self.k == 2:
            return self._take2(b[:, 0], b[:, 1])
        return self._take_many(b)

    def _check_order(self, b):
        """Refuse a block that breaks lexicographic order (the scan would be wrong)."""
        prev = b[:-1] if self._last is None else np.vstack([self._last, b[:-1]])
        nxt = b if self._last is not None else b[1:]
        if len(prev):
            diff = nxt - prev
            nz = diff != 0
            first = np.where(nz.any(axis=1), nz.argmax(axis=1), 0)
            if (diff[np.arange(len(diff)), first] < 0).any():
                raise ValueError("points must come in lexicographic order")
        self._last = b[-1:].copy()

    def _take2(self, x, y):
        starts = np.flatnonzero(np.r_[True, x[1:] != x[:-1]])
        gmin = y[starts].copy()              # sorted: a group's first point has its smallest y
        if self._x is not None and x[0] == self._x:
            gmin[0] = self._group_min        # the block continues the last group
            before0 = self._best
        else:
            before0 = min(self._best, self._group_min)
        best = np.minimum.accumulate(np.r_[before0, gmin[:-1]])   # strictly smaller x
        gid = np.repeat(np.arange(len(starts)), np.diff(np.r_[starts, len(x)]))
        on = (y == gmin[gid]) & (y < best[gid])
        self._x, self._group_min, self._best = x[-1], gmin[-1], best[-1]
        return on

    def _take_many(self, b):
        on = np.empty(len(b), dtype=bool)
        for i in range(0, len(b), BLOCK):
            blk = b[i:i + BLOCK]
            keep = ~dominated_by(blk, self._front)
            # a point of the block dominated by one the front beats is beaten by that
            # front point too: only the survivors need comparing with each other
            alive = np.flatnonzero(keep)
            keep[alive[dominated_by(blk[alive], blk[alive])]] = False
            on[i:i + BLOCK] = keep
            self._front = np.vstack([self._front, blk[keep]])
        return on

    @property
    def front_size(self):
        return len(self._front)


def lex_order(matrix):
    """Indices that sort the rows of ``matrix`` lexicographically (first column first), stably."""
    m = _matrix(matrix)
    if not m.shape[1]:
        return np.arange(len(m))
    return np.lexsort(m.T[::-1])


def pareto_mask(matrix):
    """Boolean mask of the non-dominated rows of ``matrix`` (every column minimized)."""
    m = _matrix(matrix)
    mask = np.zeros(len(m), dtype=bool)
    if not len(m):
        return mask
    order = lex_order(m)
    mask[order] = FrontScan(m.shape[1]).take(m[order])
    return mask


def front_indices(matrix):
    """Indices of the non-dominated rows, in lexicographic order of their values."""
    m = _matrix(matrix)
    if not len(m):
        return []
    order = lex_order(m)
    return [int(i) for i in order[FrontScan(m.shape[1]).take(m[order])]]


class Front:
    """A Pareto front that points join one at a time, in any order."""

    def __init__(self, k):
        self.k = k
        self.points = np.empty((0, k))

    def __len__(self):
        return len(self.points)

    def dominates(self, vec):
        """True when a member dominates ``vec``."""
        return dominated(vec, self.points)

    def add(self, vec):
        """Add ``vec`` unless a member dominates it; drop the members it dominates."""
        v = np.asarray(vec, np.float64).reshape(1, self.k)
        if self.dominates(v[0]):
            return False
        gone = dominated_by(self.points, v)
        self.points = np.vstack([self.points[~gone], v])
        return True
