"""One attention step: what one layer of one forward pass asks of the datapath.

A step is, for every active query head, ``q_rows`` query rows against the
kept key rows of the K/V head that query head reads. Version 2 of the trace
format adds to the fields of version 1:

* ``request`` -- the sequence the step belongs to (a trace may hold a batch);
* ``kv_heads`` -- per active query head, the K/V head it reads (grouped-query
  attention; multi-query when all share one); by default each query head has
  its own (``kv_heads == heads``);
* ``causal`` -- prefill only: query row i, at position ``kept_k[i]``, sees
  kept keys at positions <= its own;
* ``window`` -- sliding window: a query at position p sees keys at positions
  > p - window (0: no window). Decode query row i sits at position
  ``kv_rows - q_rows + i``;
* ``kv_kept_k`` -- optional: one sorted position array per distinct active KV
  head (ascending KV-head id), each a subset of ``kept_k``, which is then their
  union; ``None``: every KV head keeps ``kept_k``;
* ``new_kv_rows`` -- K/V rows the step appends to the cache, per distinct
  active KV head; ``out_rows`` -- query rows whose output is written back.

The helpers here (:meth:`Step.kv_groups`, :meth:`Step.visible_counts`,
:meth:`Step.work`) give the exact work the step asks for under those rules.
They never build a rows x keys matrix, so 128k-token contexts stay cheap.
"""

import dataclasses

import numpy as np

STAGES = ("prefill", "decode")

# One shared, read-only 0..n-1 array: the kept rows of a step that prunes
# nothing are a view of it, so a long trace of dense steps costs one array.
_DENSE = np.zeros(0, dtype=np.int64)
_DENSE.flags.writeable = False


def dense_rows(n):
    """Positions ``0..n-1`` as a read-only view of one shared array."""
    global _DENSE
    n = int(n)
    if n > len(_DENSE):
        grown = np.arange(max(n, 2 * len(_DENSE), 1024), dtype=np.int64)
        grown.flags.writeable = False
        _DENSE = grown
    return _DENSE[:n]


@dataclasses.dataclass(frozen=True)
class Work:
    """Exact work of a step: MACs of q.K (first pass), of the LSB recompute and
    of p.V, and softmax elements (score entries) of the first pass and the
    recompute."""

    qk_macs: int = 0
    lsb_macs: int = 0
    pv_macs: int = 0
    softmax: int = 0
    lsb_softmax: int = 0

    def __add__(self, other):
        return Work(self.qk_macs + other.qk_macs, self.lsb_macs + other.lsb_macs, self.pv_macs + other.pv_macs,
                    self.softmax + other.softmax, self.lsb_softmax + other.lsb_softmax)

    @property
    def macs(self):
        return self.qk_macs + self.lsb_macs + self.pv_macs


@dataclasses.dataclass
class Step:
    """One attention step (one layer of one forward pass of one request).

    ``heads``: ids of the active query heads. ``kept_k``: sorted positions of
    the kept key rows (cascade token pruning; the union over KV heads when
    ``kv_kept_k`` is given). ``kept_v``: per active head, how many V rows value
    pruning kept (per query row); ``kept_v_idx`` optionally gives those
    positions per head. ``lsb_rows``: per active head, how many query rows
    needed the least-significant key plane (progressive quantization).
    ``token_scores`` / ``head_scores``: importance scores the top-k selector
    ranks after this layer, when the trace carries them. The version-2 fields
    are described in the module docstring; their defaults read a version-1
    step unchanged.
    """

    layer: int
    stage: str
    head_dim: int
    heads: np.ndarray
    q_rows: int
    kv_rows: int
    kept_k: np.ndarray
    kept_v: np.ndarray
    lsb_rows: np.ndarray
    kept_v_idx: list = None
    token_scores: np.ndarray = None
    head_scores: np.ndarray = None
    request: int = 0
    kv_heads: np.ndarray = None
    causal: bool = False
    window: int = 0
    kv_kept_k: list = None
    new_kv_rows: int = 0
    out_rows: int = 0

    def __post_init__(self):
        if self.kv_heads is None and isinstance(self.heads, np.ndarray):
            self.kv_heads = self.heads.copy()

    @property
    def n_heads(self):
        return int(len(self.heads))

    @property
    def n_kept_k(self):
        return int(len(self.kept_k))

    @property
    def plain(self):
        """True when the step reads as version 1 would (no version-2 rule changes its work)."""
        return not self.causal and not self.window and self.kv_kept_k is None

    # ------------------------------------------------------------------
    # K/V heads

    def kv_ids(self):
        """Distinct active KV heads, ascending."""
        return np.unique(self.kv_heads)

    def kv_groups(self):
        """``{kv head: indices into heads of the query heads reading it}``, KV heads ascending."""
        ids, inv = np.unique(self.kv_heads, return_inverse=True)
        order = np.argsort(inv, kind="stable")
        parts = np.split(order, np.cumsum(np.bincount(inv, minlength=len(ids)))[:-1])
        return dict(zip(ids.tolist(), parts))

    def kv_keys(self):
        """``{kv head: sorted kept key positions of that KV head}``, KV heads ascending."""
        ids = self.kv_ids().tolist()
        if self.kv_kept_k is None:
            return {k: self.kept_k for k in ids}
        return dict(zip(ids, self.kv_kept_k))

    # ------------------------------------------------------------------
    # Positions and visibility

    def query_positions(self):
        """Position of each query row: ``kept_k`` in prefill; the last ``q_rows``
        positions of the context in decode."""
        if self.stage == "prefill":
            return self.kept_k
        return np.arange(self.kv_rows - self.q_rows, self.kv_rows, dtype=np.int64)

    def visible_counts(self, keys=None):
        """Per query row, how many of ``keys`` (default ``kept_k``) it sees under
        ``causal`` and ``window``. Binary searches only: O((rows + keys) log keys)."""
        keys = self.kept_k if keys is None else keys
        if not self.causal and not self.window:
            return np.full(self.q_rows, len(keys), dtype=np.int64)
        return _visible(keys, self.query_positions(), self.causal, self.window)

    # ------------------------------------------------------------------
    # Work

    def work(self):
        """Exact :class:`Work` of this step.

        Per active query head j reading KV head g: q.K is ``head_dim`` MACs per
        visible key of each query row (causal triangle, window band), softmax one
        element per visible key. p.V per row is ``head_dim`` MACs per V row used:
        the visible ones among ``kept_v_idx[j]`` when given, else
        ``min(kept_v[j], visible)``. The LSB recompute repeats q.K and softmax for
        ``lsb_rows[j]`` rows; in a causal or windowed step those are taken to be
        the last rows (the ones seeing the most keys), since the trace gives a
        count, not which rows.
        """
        d = self.head_dim
        if self.plain:
            n = self.n_kept_k
            scores = self.n_heads * self.q_rows * n
            lsb = int(np.sum(self.lsb_rows)) * n
            return Work(scores * d, lsb * d, self.q_rows * int(np.sum(self.kept_v)) * d, scores, lsb)
        q_pos = self.query_positions() if (self.causal or self.window) else None
        if self.kv_kept_k is None:  # one key set for every head
            sets = [(self.kept_k, np.arange(self.n_heads))]
        else:
            keys_of = self.kv_keys()
            sets = [(keys_of[g], idx) for g, idx in self.kv_groups().items()]
        scores = lsb = pv = 0
        for keys, idx in sets:
            vis = (np.full(self.q_rows, len(keys), dtype=np.int64) if q_pos is None
                   else _visible(keys, q_pos, self.causal, self.window))
            total = int(vis.sum())
            scores += len(idx) * total
            tail = np.concatenate([[0], np.cumsum(vis[::-1])])  # tail[m]: the last m rows
            lsb += int(tail[self.lsb_rows[idx]].sum())
            pv += self._pv_rows(idx, vis, total, q_pos)
        return Work(scores * d, lsb * d, pv * d, scores, lsb)

    def _pv_rows(self, idx, vis, total, q_pos):
        """V rows used, summed over the query rows of the heads ``idx``."""
        if self.kept_v_idx is not None:
            if q_pos is None:
                return self.q_rows * int(np.sum(self.kept_v[idx]))
            return sum(int(_visible(self.kept_v_idx[j], q_pos, self.causal, self.window).sum())
                       for j in idx.tolist())
        out = 0
        top = int(vis.max()) if len(vis) else 0
        for kv, count in zip(*np.unique(self.kept_v[idx], return_counts=True)):
            out += int(count) * (total if kv >= top else int(np.minimum(vis, kv).sum()))
        return out

    def macs(self):
        """q.K and p.V MACs of this step (1 MAC = one multiply-accumulate); see :meth:`work`."""
        w = self.work()
        return w.qk_macs, w.pv_macs


def _visible(keys, q_pos, causal, window):
    """Per query position, the number of sorted ``keys`` it sees."""
    n = len(keys)
    hi = np.searchsorted(keys, q_pos, side="right") if causal else np.full(len(q_pos), n, dtype=np.int64)
    if window:
        lo = np.searchsorted(keys, q_pos - window, side="right")
        return np.maximum(hi - lo, 0).astype(np.int64)
    return hi.astype(np.int64)


def make_step(layer, stage, head_dim, heads, q_rows, kv_rows, kept_k=None, kept_v=None,
              lsb_rows=None, kept_v_idx=None, token_scores=None, head_scores=None, request=0,
              kv_heads=None, causal=False, window=0, kv_kept_k=None, new_kv_rows=0, out_rows=0):
    """Build a Step from plain values, filling the defaults (no pruning).

    ``heads`` may be a count (heads 0..n-1) or ids; ``kept_k`` a count (rows
    0..n-1), a list of positions, or None (all ``kv_rows``); each entry of
    ``kv_kept_k`` likewise a count or positions. ``kv_heads`` None: each query
    head reads its own KV head. Not validated: pass the result through
    :func:`sim.trace.format.validate` (``Trace`` writers do).
    """
    heads = np.arange(heads, dtype=np.int64) if np.isscalar(heads) else np.asarray(heads, dtype=np.int64)
    kept_k = _rows(kv_rows if kept_k is None else kept_k)
    n = len(heads)
    kv_heads = heads.copy() if kv_heads is None else _per_head(kv_heads, n)
    if kv_kept_k is not None:
        kv_kept_k = [_rows(a) for a in kv_kept_k]
    # a single number applies to every head; a list is kept as given, so a
    # wrong length reaches validate() and is reported against its field
    if kept_v is None:
        kept_v = np.full(n, len(kept_k), dtype=np.int64)
        if kv_kept_k is not None and len(kv_heads) == n:
            ids = np.unique(kv_heads)
            if len(ids) == len(kv_kept_k):  # else validate() reports the mismatch
                sizes = np.array([len(a) for a in kv_kept_k], dtype=np.int64)
                kept_v = sizes[np.searchsorted(ids, kv_heads)]
    else:
        kept_v = _per_head(kept_v, n)
    lsb_rows = np.zeros(n, dtype=np.int64) if lsb_rows is None else _per_head(lsb_rows, n)
    if kept_v_idx is not None:
        kept_v_idx = [np.asarray(a, dtype=np.int64) for a in kept_v_idx]
    if token_scores is not None:
        token_scores = np.asarray(token_scores, dtype=np.float64)
    if head_scores is not None:
        head_scores = np.asarray(head_scores, dtype=np.float64)
    return Step(int(layer), str(stage), int(head_dim), heads, int(q_rows), int(kv_rows), kept_k,
                kept_v, lsb_rows, kept_v_idx, token_scores, head_scores, int(request), kv_heads,
                causal, window, kv_kept_k, int(new_kv_rows), int(out_rows))


def _rows(value):
    if np.isscalar(value):
        return dense_rows(int(value))
    arr = np.asarray(value, dtype=np.int64)
    n = len(arr) if arr.ndim == 1 else 0
    if n and arr[0] == 0 and arr[-1] == n - 1 and np.all(np.diff(arr) == 1):
        return dense_rows(n)  # share storage with every other dense row set
    return arr


def _per_head(value, n):
    if np.isscalar(value):
        return np.full(n, value, dtype=np.int64)
    return np.asarray(value, dtype=np.int64)
