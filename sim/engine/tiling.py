"""Tiling and reuse rule: how one attention step is cut into transactions.

Pure functions (no simpy), shared by the engine and the closed-form model.

Per step:

* heads are taken in **head groups**. When one query block covers all of a
  head's queries (decode, short prefill), several heads whose kept rows
  together fit in ``engine.grain_rows`` rows (and in half of each buffer) move
  as one group: one transaction carries all their K rows. Otherwise a group is
  one head;
* queries are processed in **query blocks** of at most half the query buffer
  (double buffering), so a long prefill has several blocks per head;
* K (most-significant plane) is **resident** when it is read more than once
  (several query blocks, or an LSB recompute) and the head's kept rows fit in
  half the key buffer: fetched once, reused. Otherwise it is **re-streamed**
  for each query block. V likewise with the value buffer. Half, so the next
  head's rows can stream in while this head finishes;
* fetches move in **chunks** of at most ``engine.grain_rows`` rows, capped so
  one chunk takes at most half its buffer;
* a query block with rows flagged for the least-significant key plane
  (progressive quantization) fetches that plane's chunks (plus the MSB chunks
  again when K was not resident) and recomputes those rows' scores;
* value pruning is a decode technique here: in a decode step the selector
  picks each head's kept V rows after softmax and only those are fetched
  (``kept_v_idx`` when the trace gives them, else ``kept_v`` positions spread
  evenly over the kept key rows). In a prefill step every query row keeps its
  own values, so the union is fetched (all kept key rows) and ``kept_v`` only
  sets the p.V work the array does -- it skips the pruned products, and no
  top-k runs per row.

Re-streaming is why buffer size changes DRAM traffic; the result reports the
bytes fetched against the compulsory bytes (every row once).
"""

import math

import numpy as np

from ..errors import ConfigError
from .addrmap import row_bytes


class Chunk:
    """Rows of one plane fetched together (one transaction): ``[(head, positions)]``."""

    __slots__ = ("plane", "segments", "rows")

    def __init__(self, plane, segments):
        self.plane = plane
        self.segments = segments
        self.rows = len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)


class BlockPlan:
    """One query block of one head group."""

    __slots__ = ("block", "q_positions", "rows", "k_chunks", "lsb", "lsb_chunks",
                 "lsb_msb_chunks", "v_chunks")

    def __init__(self, block, q_positions):
        self.block = block
        self.q_positions = q_positions   # same query positions for every head of the group
        self.rows = len(q_positions)
        self.k_chunks = []        # fetched for this block (empty when K is resident)
        self.lsb = {}             # head -> query rows recomputed with the LSB plane
        self.lsb_chunks = []      # LSB plane chunks for the recompute
        self.lsb_msb_chunks = []  # MSB chunks fetched again when K was not resident
        self.v_chunks = []        # fetched for this block (empty when V is resident)

    @property
    def lsb_rows(self):
        return sum(self.lsb.values())


class GroupPlan:
    """All query blocks of a group of heads, with its resident chunks."""

    __slots__ = ("heads", "n_kv", "v_positions", "v_work", "select", "k_resident", "v_resident", "k_chunks",
                 "v_chunks", "blocks", "k_bytes", "v_bytes", "lsb_bytes")

    def __init__(self, heads):
        self.heads = heads        # head ids
        self.blocks = []
        self.k_chunks = []        # resident K chunks (fetched once for the group)
        self.v_chunks = []
        self.v_positions = {}     # head -> V positions fetched
        self.v_work = {}          # head -> V rows each query row multiplies (p.V work)
        self.select = False       # decode value pruning: a top-k picks the V rows

    def n_v(self, head):
        """V rows one query row of ``head`` multiplies."""
        return self.v_work[head]

    @property
    def value_pruned_heads(self):
        """Heads whose kept V rows a top-k selects (decode value pruning)."""
        if not self.select:
            return []
        return [h for h in self.heads if self.v_work[h] < self.n_kv]


def check_fits(arch, head_dim, source):
    """Refuse buffers that cannot hold one tile; the message shows the numbers."""
    tile = arch.dot.tile_rows
    for knob, plane, kib in (("buffers.key_kib", "K", arch.buffers.key_kib),
                             ("buffers.value_kib", "V", arch.buffers.value_kib)):
        need = tile * row_bytes(arch, plane, head_dim)
        if kib * 1024 < need:
            raise ConfigError(source, knob, kib,
                              f"holds {int(kib * 1024 // row_bytes(arch, plane, head_dim))} rows of "
                              f"{plane} at head_dim {head_dim}; needs at least one tile of "
                              f"dot.tile_rows={tile} rows ({need / 1024:g} KiB)")
    need_q = 2 * row_bytes(arch, "Q", head_dim)
    if arch.buffers.query_kib * 1024 < need_q:
        raise ConfigError(source, "buffers.query_kib", arch.buffers.query_kib,
                          f"needs room for two query rows at head_dim {head_dim} ({need_q / 1024:g} KiB)")


def query_block_rows(arch, head_dim, q_rows):
    cap = arch.buffers.query_kib * 1024
    per_block = int(cap / 2 // row_bytes(arch, "Q", head_dim))
    return max(1, min(q_rows, per_block))


def _half(arch, plane):
    """Half of the buffer a plane streams through, in bytes (double buffering)."""
    return (arch.buffers.value_kib if plane == "V" else arch.buffers.key_kib) * 1024 / 2


def _room_rows(arch, plane, head_dim):
    """Contiguous rows of ``plane`` whose burst-rounded size fits half its buffer."""
    # a run of rows may straddle a burst at each end
    return int((_half(arch, plane) - 2 * arch.dram.burst_bytes) // row_bytes(arch, plane, head_dim))


def chunk_rows(arch, plane, head_dim, grain_rows):
    return max(1, min(grain_rows, _room_rows(arch, plane, head_dim)))


def value_positions(step, j):
    """Positions of the V rows kept for active head index ``j``."""
    k = step.kept_k
    kv = int(step.kept_v[j])
    if step.kept_v_idx is not None:
        return step.kept_v_idx[j]
    if kv >= len(k):
        return k
    pick = np.unique(np.round(np.linspace(0, len(k) - 1, kv)).astype(np.int64))
    return k[pick]


def group_size(arch, amap, step, grain_rows, nqb, v_positions):
    """Heads per group: several only when one query block covers a head.

    A group's K (and its LSB plane, and its V) moves as one transaction, so the
    group is as many heads as fit ``grain_rows`` rows and half of each buffer,
    counting whole bursts (scattered rows cost more than their bytes).
    """
    if nqb > 1:
        return 1
    d = step.head_dim
    n = step.n_kept_k
    layer, h0 = step.layer, int(step.heads[0])
    half_k, half_v = _half(arch, "K"), _half(arch, "V")
    per_k = _bytes(amap, layer, "K", h0, step.kept_k)
    if arch.precision.k_lsb_bits:
        per_k = max(per_k, _bytes(amap, layer, "KL", h0, step.kept_k))
    per_v = max(_bytes(amap, layer, "V", h0, p) for p in v_positions)
    q_room = int(arch.buffers.query_kib * 1024 / 2
                 // (row_bytes(arch, "Q", d) * step.q_rows + 2 * arch.dram.burst_bytes))
    return max(1, min(step.n_heads, grain_rows // n, int(half_k // per_k), int(half_v // per_v), q_room))


def _split(amap, layer, planes, head, positions, max_rows, max_bytes):
    """Cut ``positions`` into chunks of at most ``max_rows`` rows and ``max_bytes`` bytes.

    Bytes are counted in whole bursts of the widest of ``planes`` (all planes
    get the same cut, so an LSB chunk pairs with its MSB chunk). A chunk's
    first row pays its full span; each next row only the bursts it adds.
    """
    plane = max(planes, key=lambda p: amap.row_bytes[p])
    n = len(positions)
    burst = amap.burst
    if n <= max_rows and _bytes(amap, layer, plane, head, positions) <= max_bytes:
        return [[Chunk(p, [(head, positions)]) for p in planes]]
    if int(positions[-1]) - int(positions[0]) + 1 == n:
        # contiguous rows: a run of r rows spans at most r * row_bytes + 2 bursts
        rows = max(1, min(max_rows, int((max_bytes - 2 * burst) // amap.row_bytes[plane])))
        return [[Chunk(p, [(head, positions[i:i + rows])]) for p in planes] for i in range(0, n, rows)]
    row_bits = int(round(amap.row_bytes[plane] * 8))
    bb = burst * 8
    start = amap.base(layer, plane, head) * 8 + np.asarray(positions, dtype=np.int64) * row_bits
    first = start // bb
    last = (start + row_bits - 1) // bb
    full = last - first + 1
    new = full.copy()
    new[1:] = np.maximum(last[1:] - np.maximum(first[1:], last[:-1] + 1) + 1, 0)
    cum = np.cumsum(new)
    limit = max(1, int(max_bytes // burst))
    out = []
    i = 0
    while i < n:
        # largest j with full[i] + cum[j] - cum[i] <= limit, at most max_rows rows
        j = int(np.searchsorted(cum, limit - full[i] + cum[i], side="right")) - 1
        j = max(i, min(j, i + max_rows - 1, n - 1))
        part = positions[i:j + 1]
        out.append([Chunk(p, [(head, part)]) for p in planes])
        i = j + 1
    return out


def _bytes(amap, layer, plane, head, positions):
    return amap.burst_count(layer, plane, head, positions) * amap.burst


def plan_step(arch, amap, step, grain_rows):
    """Cut one step into head-group plans (see the module docstring)."""
    d = step.head_dim
    qb = query_block_rows(arch, d, step.q_rows)
    nqb = math.ceil(step.q_rows / qb)
    if step.stage == "prefill":
        q_pos = step.kept_k
    else:  # decode: the new token's query row(s) sit at the end of the context
        q_pos = np.arange(step.kv_rows - step.q_rows, step.kv_rows, dtype=np.int64)
    kc = chunk_rows(arch, "K", d, grain_rows)
    vc = chunk_rows(arch, "V", d, grain_rows)
    lsb_plane = arch.precision.k_lsb_bits > 0
    # LSB recompute chunks pair one KL chunk with one MSB chunk: same rows, both must fit
    klc = min(kc, chunk_rows(arch, "KL", d, grain_rows)) if lsb_plane else kc
    kcap = arch.buffers.key_kib * 1024
    vcap = arch.buffers.value_kib * 1024
    layer = step.layer
    heads = step.heads.tolist()
    kept = step.kept_k
    select = step.stage == "decode"
    v_all = [value_positions(step, j) if select else kept for j in range(len(heads))]
    g = group_size(arch, amap, step, grain_rows, nqb, v_all)
    half_k, half_v = _half(arch, "K"), _half(arch, "V")
    groups = []
    for start in range(0, len(heads), g):
        idx = list(range(start, min(start + g, len(heads))))
        gp = GroupPlan([heads[j] for j in idx])
        gp.n_kv = step.n_kept_k
        gp.select = select
        for j in idx:
            gp.v_positions[heads[j]] = v_all[j]
            gp.v_work[heads[j]] = int(step.kept_v[j])
        gp.k_bytes = sum(_bytes(amap, layer, "K", h, kept) for h in gp.heads)
        gp.v_bytes = sum(_bytes(amap, layer, "V", h, gp.v_positions[h]) for h in gp.heads)
        gp.lsb_bytes = {h: _bytes(amap, layer, "KL", h, kept) for h in gp.heads} if lsb_plane else {}
        flagged = {heads[j]: int(step.lsb_rows[j]) for j in idx} if lsb_plane else {}
        reread_k = nqb > 1 or any(flagged.values())
        gp.k_resident = reread_k and gp.k_bytes <= kcap / 2
        gp.v_resident = nqb > 1 and gp.v_bytes <= vcap / 2
        if len(idx) > 1:
            k_chunks = [Chunk("K", [(h, kept) for h in gp.heads])]
            v_chunks = [Chunk("V", [(h, gp.v_positions[h]) for h in gp.heads])]
        else:
            h = gp.heads[0]
            k_chunks = [c[0] for c in _split(amap, layer, ("K",), h, kept, kc, half_k)]
            v_chunks = [c[0] for c in _split(amap, layer, ("V",), h, gp.v_positions[h], vc, half_v)]
        if gp.k_resident:
            gp.k_chunks = k_chunks
        if gp.v_resident:
            gp.v_chunks = v_chunks
        edges = {h: np.floor(np.linspace(0, f, nqb + 1)).astype(np.int64)
                 for h, f in flagged.items() if f}
        for b in range(nqb):
            bp = BlockPlan(b, q_pos[b * qb:(b + 1) * qb])
            if not gp.k_resident:
                bp.k_chunks = k_chunks
            if not gp.v_resident:
                bp.v_chunks = v_chunks
            for h, e in edges.items():
                f = min(int(e[b + 1] - e[b]), bp.rows)
                if f:
                    bp.lsb[h] = f
            if bp.lsb:
                if len(idx) > 1:
                    bp.lsb_chunks = [Chunk("KL", [(h, kept) for h in bp.lsb])]
                    if not gp.k_resident:
                        bp.lsb_msb_chunks = [Chunk("K", [(h, kept) for h in bp.lsb])]
                else:
                    h = gp.heads[0]
                    pairs = _split(amap, layer, ("KL", "K"), h, kept, klc, half_k)
                    bp.lsb_chunks = [c[0] for c in pairs]
                    if not gp.k_resident:
                        bp.lsb_msb_chunks = [c[1] for c in pairs]
            gp.blocks.append(bp)
        groups.append(gp)
    return groups


def pv_macs(gp, chunks, rows, head_dim):
    """p.V MACs of each V chunk: the head's work spread over its fetched rows, exact in total."""
    fetched = {h: len(gp.v_positions[h]) for h in gp.heads}
    seen = dict.fromkeys(gp.heads, 0)
    out = []
    for c in chunks:
        m = 0
        for h, p in c.segments:
            a = seen[h]
            b = a + len(p)
            w, n = gp.v_work[h], fetched[h]
            m += (w * b // n - w * a // n) if n else 0
            seen[h] = b
        out.append(m * rows * head_dim)
    return out


def selects_next(step, nxt):
    """True when ``nxt`` is the next layer of the same pass, whose live tokens and
    heads the top-k after ``step`` chooses (cascade pruning)."""
    return (nxt is not None and nxt.stage == step.stage and nxt.layer == step.layer + 1
            and nxt.kv_rows == step.kv_rows)


def chunk_bytes(amap, layer, chunk):
    return sum(_bytes(amap, layer, chunk.plane, h, p) for h, p in chunk.segments)


def step_traffic(arch, amap, step, groups):
    """(fetched, compulsory) bytes of a planned step, from the same rule the engine uses."""
    fetched = compulsory = 0
    layer = step.layer

    def nbytes(chunks):
        return sum(chunk_bytes(amap, layer, c) for c in chunks)

    for gp in groups:
        q_bytes = sum(_bytes(amap, layer, "Q", h, bp.q_positions) for bp in gp.blocks for h in gp.heads)
        compulsory += q_bytes + gp.k_bytes + gp.v_bytes
        lsb_heads = {h for bp in gp.blocks for h in bp.lsb}
        compulsory += sum(gp.lsb_bytes[h] for h in lsb_heads)   # the LSB plane, once
        fetched += q_bytes + nbytes(gp.k_chunks) + nbytes(gp.v_chunks)
        for bp in gp.blocks:
            fetched += (nbytes(bp.k_chunks) + nbytes(bp.lsb_chunks) + nbytes(bp.lsb_msb_chunks)
                        + nbytes(bp.v_chunks))
    return fetched, compulsory
