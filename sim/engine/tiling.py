"""Tiling and reuse rule: how one attention step is cut into transactions.

Pure functions (no simpy), shared by the engine and the closed-form model.

Per step:

* heads are taken in **head groups**: the query heads that read the same K
  and V (one head each in multi-head attention). The array runs q.K of one
  group, then p.V of the group before it, so softmax and the selector work on
  one group while the array computes the next. The buffers and the engine
  grain play no part in forming groups;
* queries are processed in **query blocks** of at most half the query buffer
  (double buffering), so a long prefill has several blocks per head;
* K (most-significant plane) is **resident** when it is read more than once
  (several query blocks, or an LSB recompute) and the group's kept rows fit in
  half the key buffer: fetched once, reused. Otherwise it is **re-streamed**
  for each query block. V likewise with the value buffer. The LSB plane
  follows the same rule when more than one query block recomputes rows: it
  stays resident if it fits in what the resident K leaves of that half. Half,
  so the next group's rows can stream in while this group finishes;
* fetches move in **chunks** of at most ``engine.grain_rows`` rows (a chunk may
  carry the rows of several heads of a group), capped so one chunk takes at
  most an eighth of its buffer (:data:`CHUNK_SHARE`: a chunk holds its room
  while its data arrives, so the buffer must hold several for a coarse grain
  to behave as a fine one), or half of it where the memory pool lets each
  request in only once the buffer has room for it (:func:`room_by_request`).
  The grain is a simulation setting: chunks stream (see
  :mod:`sim.engine.fetch`), so cutting finer changes event counts, not the
  modelled hardware. A burst that two neighbouring chunks of one head share
  is fetched once, by the first (:attr:`Chunk.skip`);
* a query block with rows flagged for the least-significant key plane
  (progressive quantization) fetches that plane's chunks (plus the MSB chunks
  again when K was not resident) and recomputes those rows' scores. The two
  planes come in units of what fits half the key buffer, a unit's LSB rows
  before its MSB rows (:func:`pair_units`), whatever the grain. A head's
  flagged rows are spread over its query blocks in proportion to their size,
  never more than a block holds, and every flagged row is recomputed once;
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


from array import array

import numpy as np

from ..errors import ConfigError
from .addrmap import row_bytes
from .topk import select_cost


class Chunk:
    """Rows of one plane fetched together (one transaction): ``[(head, positions)]``.

    ``skip`` is 1 when the chunk's first burst was already fetched by the
    chunk before it in the same stream (two neighbouring rows share a burst):
    the fetch leaves it out, so a stream costs its bursts once however it is cut.
    """

    __slots__ = ("plane", "segments", "rows", "skip")

    def __init__(self, plane, segments, skip=0):
        self.plane = plane
        self.segments = segments
        self.rows = len(segments[0][1]) if len(segments) == 1 else sum(len(p) for _h, p in segments)
        self.skip = skip


class BlockPlan:
    """One query block of one head group, with the work of each of its operations.

    ``k_chunks`` / ``v_chunks`` are the chunks the block reads: its own when the
    plane streams, or ``k_idx`` / ``v_idx`` index the group's resident chunks.
    ``qk_macs``, ``lsb_macs`` and ``pv_macs`` run parallel to the chunks the
    block reads for that operation; ``elements`` and ``lsb_elements`` are the
    score entries of the first pass and the recompute (softmax work).
    """

    __slots__ = ("block", "q_positions", "rows", "k_chunks", "k_idx", "lsb", "lsb_chunks",
                 "lsb_msb_chunks", "v_chunks", "v_idx", "qk_macs", "lsb_macs", "pv_macs",
                 "elements", "lsb_elements", "pruned", "value_comps")

    def __init__(self, block, q_positions):
        self.block = block
        self.q_positions = q_positions   # same query positions for every head of the group
        self.rows = len(q_positions)
        self.k_chunks = []        # fetched for this block (empty when K is resident)
        self.k_idx = None         # indices of the resident K chunks it reads
        self.lsb = {}             # head -> query rows recomputed with the LSB plane
        self.lsb_chunks = []      # LSB plane chunks for the recompute
        self.lsb_msb_chunks = []  # MSB chunks fetched again when K was not resident
        self.v_chunks = []        # fetched for this block (empty when V is resident)
        self.v_idx = None
        self.qk_macs = []
        self.lsb_macs = []
        self.pv_macs = []
        self.elements = 0
        self.lsb_elements = 0
        self.pruned = []          # heads whose V rows a top-k selects (decode value pruning)
        self.value_comps = 0.0    # the selector's comparisons for them

    @property
    def lsb_rows(self):
        return sum(self.lsb.values())


class GroupPlan:
    """All query blocks of a head group -- the query heads that read one K/V head --
    with its resident chunks. K, KL and V rows are the K/V head's, fetched once
    for the group; q.K and p.V work is per query head."""

    __slots__ = ("heads", "kv", "n_kv", "v_positions", "v_work", "select", "k_resident", "v_resident",
                 "k_chunks", "v_chunks", "blocks", "k_bytes", "v_bytes", "lsb_bytes", "kl_resident",
                 "kl_chunks", "kl_msb_chunks", "band", "__weakref__")

    def __init__(self, heads, kv):
        self.heads = heads        # query head ids
        self.kv = kv              # the K/V head they read
        self.blocks = []
        self.k_chunks = []        # resident K chunks (fetched once for the group)
        self.v_chunks = []
        self.v_positions = None   # V positions fetched (the union over the group's heads)
        self.v_work = {}          # head -> V rows each query row multiplies (p.V work)
        self.select = False       # decode value pruning: a top-k picks the V rows
        self.k_bytes = self.v_bytes = self.lsb_bytes = 0   # every row once (compulsory)
        self.k_resident = self.v_resident = False
        self.kl_resident = False  # LSB plane fetched once and shared by the group's blocks
        self.kl_chunks = []       # resident LSB chunks
        self.kl_msb_chunks = []   # the MSB chunks they pair with (fetched per block unless K is resident)
        self.band = None          # a banded group planned block by block: blocks stays empty

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


def query_block_rows(arch, head_dim, q_rows, group=1):
    """Query rows per block: a block of every query head of a group fits half the query buffer."""
    cap = arch.buffers.query_kib * 1024
    per_block = int(cap / 2 // (row_bytes(arch, "Q", head_dim) * group))
    return max(1, min(q_rows, per_block))


def _half(arch, plane):
    """Half of the buffer a plane streams through, in bytes (double buffering)."""
    return (arch.buffers.value_kib if plane == "V" else arch.buffers.key_kib) * 1024 / 2


# A chunk takes at most this share of its buffer. A chunk that holds all its room from the
# moment it is taken until its rows are read makes the buffer work as a few slots: with chunks
# of half the buffer a coarse grain waited for room a fine one does not (measured: up to 4.6 %
# on grouped-query decode); an eighth keeps that within about 1 %. Where the memory pool lets
# each request of a chunk in only once the buffer has room for it (:func:`room_by_request`),
# a chunk holds no room early and may take half its buffer (the other half is the next
# group's, see above) -- unless every query block streams the plane again: a chunk is granted
# only when room for all of it is free or being freed by a reader under way, so a half-buffer
# chunk of such a stream waited while fine ones took the room already free (measured: 12 % on
# a memory-bound 16 KiB buffer case); those planes go through their buffer as through a ring,
# in eighths.
CHUNK_SHARE = 8
CHUNK_SHARE_BY_REQUEST = 2


def room_by_request(arch):
    """Whether the memory pool enters a transaction's requests one by one as its buffer frees
    room (the banked pool, first come first served), so buffers grant room ahead."""
    return arch.dram.model == "banked" and arch.dram.scheduler != "row_hits_first"


def chunk_cap(arch, plane, streamed=False):
    """Bytes a chunk of ``plane`` may take: :data:`CHUNK_SHARE` of its buffer, or
    :data:`CHUNK_SHARE_BY_REQUEST` where room comes request by request and the plane is not
    ``streamed`` again by every query block of its group."""
    share = CHUNK_SHARE_BY_REQUEST if room_by_request(arch) and not streamed else CHUNK_SHARE
    return 2 * _half(arch, plane) / share


def _room_rows(arch, plane, head_dim, streamed=False):
    """Contiguous rows of ``plane`` whose burst-rounded size fits a chunk's share of its buffer."""
    # a run of rows may straddle a burst at each end
    cap = chunk_cap(arch, plane, streamed)
    return max(1, int((cap - 2 * arch.dram.burst_bytes) // row_bytes(arch, plane, head_dim)))


def chunk_rows(arch, plane, head_dim, grain_rows, streamed=False):
    return max(1, min(grain_rows, _room_rows(arch, plane, head_dim, streamed)))


def pair_unit_rows(arch, head_dim):
    """Rows of an LSB recompute unit: as many as an LSB chunk and its MSB chunk hold when
    the grain does not cut them (half the key buffer for the pair)."""
    widest = max(row_bytes(arch, "K", head_dim), row_bytes(arch, "KL", head_dim))
    return max(1, int((_half(arch, "K") / 2 - 2 * arch.dram.burst_bytes) // widest))


def pair_units(chunks, unit_rows):
    """Consecutive ``chunks`` grouped into units of at most ``unit_rows`` rows (one chunk
    at least): the fetch unit takes a unit's LSB chunks, then its MSB chunks, so the
    order memory sees is the same at every grain."""
    units, cur, rows = [], [], 0
    for i, c in enumerate(chunks):
        if cur and rows + c.rows > unit_rows:
            units.append(cur)
            cur, rows = [], 0
        cur.append(i)
        rows += c.rows
    if cur:
        units.append(cur)
    return units


def value_positions(step, j):
    """Positions of the V rows kept for active head index ``j``."""
    if step.kept_v_idx is not None:
        return step.kept_v_idx[j]
    return even_pick(step.kept_k, int(step.kept_v[j]))


def even_pick(rows, keep):
    """``keep`` of the sorted ``rows`` spread evenly over them (all when ``keep`` covers them)."""
    if keep >= len(rows):
        return rows
    if keep <= 0:
        return rows[:0]
    return rows[np.unique(np.round(np.linspace(0, len(rows) - 1, keep)).astype(np.int64))]


def split(amap, layer, planes, segments, max_rows, max_bytes, memo=None, breaks=None):
    """Cut a stream of ``segments`` ``[(head, positions)]`` into chunks.

    Each chunk holds at most ``max_rows`` rows and ``max_bytes`` bytes and may
    span heads; a chunk ends at each row index in ``breaks`` (sorted; a stream
    read by blocks that reach different lengths of it is cut where each block's
    reach ends, so no chunk brings rows before the block that first needs
    them, at any grain). Bytes are counted in whole bursts of the widest of ``planes``
    (all planes get the same cut, so an LSB chunk pairs with its MSB chunk); a
    burst two neighbouring rows of one head share is counted, and fetched,
    once. Returns one list of Chunks (one per plane) per cut.

    ``memo`` (a dict, row span -> Chunks) shares the Chunks of streams that
    begin alike (the rows of each causal block start at the same key and only
    grow): a cut is decided by the rows before it, so a row span cut from one
    such stream is the same in the others.
    """
    plane = max(planes, key=lambda p: amap.row_bytes[p])
    total = sum(len(p) for _h, p in segments)
    if breaks is not None:
        breaks = breaks[(breaks > 0) & (breaks < total)]
    if (total <= max_rows and (breaks is None or not len(breaks))
            and sum(_bytes(amap, layer, plane, h, p) for h, p in segments) <= max_bytes):
        return [[Chunk(p, segments) for p in planes]]
    new, shared = [], []
    for h, p in segments:
        n_new, n_shared = _row_bursts(amap, layer, plane, h, p)
        new.append(n_new)
        shared.append(n_shared)
    new = np.concatenate(new)
    shared = np.concatenate(shared)
    owner = np.repeat(np.arange(len(segments)), [len(p) for _h, p in segments])
    starts = np.cumsum([0] + [len(p) for _h, p in segments])
    cum = np.cumsum(new)
    limit = max(1, int(max_bytes // amap.burst))
    out = []
    i = 0
    while i < total:
        # largest j with bursts(i..j) <= limit and at most max_rows rows; bursts of
        # rows i..j are new[i..j] (row i's shared burst came with the chunk before)
        j = int(np.searchsorted(cum, limit + cum[i] - new[i], side="right")) - 1
        j = max(i, min(j, i + max_rows - 1, total - 1))
        if breaks is not None:
            nb = int(np.searchsorted(breaks, i, side="right"))
            if nb < len(breaks) and breaks[nb] - 1 < j:
                j = int(breaks[nb]) - 1
        if memo is not None and (i, j) in memo:
            out.append(memo[i, j])
            i = j + 1
            continue
        segs = []
        for k in range(owner[i], owner[j] + 1):
            lo, hi = max(i, starts[k]) - starts[k], min(j + 1, starts[k + 1]) - starts[k]
            h, p = segments[k]
            segs.append((h, p if lo == 0 and hi == len(p) else p[lo:hi]))
        skip = int(shared[i])
        out.append([Chunk(pl, segs, skip) for pl in planes])
        if memo is not None:
            memo[i, j] = out[-1]
        i = j + 1
    return out


def split_rows(amap, layer, planes, kv, positions, max_rows, max_bytes, same_cut):
    """:func:`split` of one head's ``positions``, cut where an earlier call in ``same_cut``
    (a dict) cut the same positions object for another head: where rows cost the same
    bursts in every region (``amap.costs_anywhere``) the cut does not depend on the head,
    and the heads of a step mostly keep the same rows."""
    if not amap.costs_anywhere:
        return split(amap, layer, planes, [(kv, positions)], max_rows, max_bytes)
    key = (planes, id(positions), max_rows, max_bytes)
    known = same_cut.get(key)
    if known is None:
        out = split(amap, layer, planes, [(kv, positions)], max_rows, max_bytes)
        spans, lo = [], 0
        for c in out:
            spans.append((lo, lo + c[0].rows, c[0].skip))
            lo += c[0].rows
        same_cut[key] = (positions, spans)   # held, so the id stays this array's
        return out
    n, out = len(positions), []
    for lo, hi, skip in known[1]:
        segs = [(kv, positions if lo == 0 and hi == n else positions[lo:hi])]
        out.append([Chunk(pl, segs, skip) for pl in planes])
    return out


def _row_bursts(amap, layer, plane, head, positions):
    """Per row of a sorted run: bursts it adds to the rows before it, and whether it
    shares its first burst with the row before (0 or 1)."""
    row_bits = amap.row_bits[plane]
    bb = amap.burst * 8
    start = amap.base(layer, plane, head) * 8 + np.asarray(positions, dtype=np.int64) * row_bits
    if amap.layout == "heads_interleaved":
        # a row's bits relative to its granule, then the granule's place among the heads
        g = amap.granule[plane]
        pos = np.asarray(positions, dtype=np.int64)
        start = (amap.base(layer, plane, head) * 8 + ((pos // g) * amap.heads + head) * g * row_bits
                 + (pos % g) * row_bits)
    first = start // bb
    last = (start + row_bits - 1) // bb
    full = last - first + 1
    shared = np.zeros(len(full), dtype=np.int64)
    shared[1:] = first[1:] == last[:-1]
    return full - shared, shared


def _bytes(amap, layer, plane, head, positions):
    return amap.burst_count(layer, plane, head, positions) * amap.burst


def plan_plain_group(arch, amap, step, layer, gp, idx, blocks, cuts, same_cut):
    """A group of a step every query row of which sees every kept key: residency,
    chunks, LSB rows spread over the blocks, and the work of each operation.
    ``same_cut``: the step's cuts so far (see :func:`split_rows`)."""
    kc, vc, klc = cuts
    kept, kv, d = step.kept_k, gp.kv, step.head_dim
    half_k, half_v = _half(arch, "K"), _half(arch, "V")
    nqb = len(blocks)
    gp.n_kv = len(kept)
    select = gp.select
    vpos = [value_positions(step, j) if select else kept for j in idx]
    gp.v_positions = vpos[0] if len(vpos) == 1 else np.unique(np.concatenate(vpos))
    for h, j in zip(gp.heads, idx):
        gp.v_work[h] = int(step.kept_v[j])
    flagged = {h: int(step.lsb_rows[j]) for h, j in zip(gp.heads, idx)
               if arch.precision.k_lsb_bits > 0 and step.lsb_rows[j]}
    share = {h: spread(f, [len(q) for q in blocks]) for h, f in flagged.items()}
    gp.k_bytes = _bytes(amap, layer, "K", kv, kept)
    gp.v_bytes = _bytes(amap, layer, "V", kv, gp.v_positions)
    gp.lsb_bytes = _bytes(amap, layer, "KL", kv, kept) if share else 0
    gp.k_resident = (nqb > 1 or bool(share)) and gp.k_bytes <= half_k
    gp.v_resident = nqb > 1 and gp.v_bytes <= half_v
    # the LSB plane, like K: resident when several blocks recompute rows and it fits in
    # what resident K leaves of half the key buffer
    lsb_blocks = sum(1 for b in range(nqb) if any(rows[b] for rows in share.values()))
    gp.kl_resident = lsb_blocks > 1 and gp.lsb_bytes + (gp.k_bytes if gp.k_resident else 0) <= half_k
    # a plane every block streams again goes through its buffer as through a ring
    k_chunks = [c[0] for c in split_rows(amap, layer, ("K",), kv, kept, kc,
                                         chunk_cap(arch, "K", nqb > 1 and not gp.k_resident), same_cut)]
    v_chunks = [c[0] for c in split_rows(amap, layer, ("V",), kv, gp.v_positions, vc,
                                         chunk_cap(arch, "V", nqb > 1 and not gp.v_resident), same_cut)]
    if gp.kl_resident:
        pairs = split_rows(amap, layer, ("KL", "K"), kv, kept, klc, chunk_cap(arch, "K") / 2, same_cut)
        gp.kl_chunks = [c[0] for c in pairs]
        gp.kl_msb_chunks = [c[1] for c in pairs]
    nq = len(gp.heads)
    pruned = gp.value_pruned_heads
    k_idx, v_idx = list(range(len(k_chunks))), list(range(len(v_chunks)))
    # every block reads the same chunks: blocks of as many rows share their per-chunk MACs
    # (read only), so a long step's plan grows with its blocks and chunks, not their product
    shared = {}

    def per_chunk(key, make):
        if key not in shared:
            shared[key] = array("q", make())
        return shared[key]

    for b, q in enumerate(blocks):
        bp = BlockPlan(b, q)
        if gp.k_resident:
            bp.k_idx = k_idx
        else:
            bp.k_chunks = k_chunks
        if gp.v_resident:
            bp.v_idx = v_idx
        else:
            bp.v_chunks = v_chunks
        bp.lsb = {h: rows[b] for h, rows in share.items() if rows[b]}
        if bp.lsb:
            _plan_lsb(arch, amap, layer, gp, bp, kept, klc, shared, same_cut)
        bp.qk_macs = per_chunk(("qk", bp.rows), lambda: [bp.rows * c.rows * d * nq for c in k_chunks])
        if bp.lsb:
            lsb_src = gp.kl_chunks if gp.kl_resident else bp.lsb_chunks
            bp.lsb_macs = per_chunk(("lsb", bp.lsb_rows, len(lsb_src)),
                                    lambda: [bp.lsb_rows * c.rows * d for c in lsb_src])
        else:
            bp.lsb_macs = per_chunk(("lsb", 0, 0), list)
        bp.pv_macs = per_chunk(("pv", bp.rows), lambda: pv_macs(gp, v_chunks, bp.rows, d))
        bp.elements = bp.rows * nq * gp.n_kv
        bp.lsb_elements = bp.lsb_rows * gp.n_kv
        bp.pruned = pruned
        bp.value_comps = bp.rows * sum(select_cost(gp.n_kv, gp.n_v(h)) for h in pruned) if pruned else 0.0
        gp.blocks.append(bp)
    if gp.k_resident:
        gp.k_chunks = k_chunks
    if gp.v_resident:
        gp.v_chunks = v_chunks


def _plan_lsb(arch, amap, layer, gp, bp, kept, klc, shared, same_cut):
    """The LSB recompute fetches of one block: its KL chunks (unless resident) and the MSB
    chunks again when K is not resident (cut alike, so each KL chunk pairs with one).
    Every block cuts the same rows: the lists are made once, in ``shared``."""
    if gp.kl_resident:
        if not gp.k_resident:
            bp.lsb_msb_chunks = gp.kl_msb_chunks
        return
    if "lsb_cut" not in shared:
        pairs = split_rows(amap, layer, ("KL", "K"), gp.kv, kept, klc, chunk_cap(arch, "K") / 2, same_cut)
        shared["lsb_cut"] = [c[0] for c in pairs], [c[1] for c in pairs]
    bp.lsb_chunks, msb = shared["lsb_cut"]
    if not gp.k_resident:
        bp.lsb_msb_chunks = msb


def spread(flagged, block_rows):
    """Split ``flagged`` rows over query blocks in proportion to their rows, never more
    than a block holds, summing exactly to ``flagged`` (largest remainder)."""
    total = sum(block_rows)
    exact = [flagged * r / total for r in block_rows]
    out = [min(int(x), r) for x, r in zip(exact, block_rows)]
    left = flagged - sum(out)
    order = sorted(range(len(block_rows)), key=lambda i: (-(exact[i] - out[i]), i))
    for i in order:
        if left <= 0:
            break
        if out[i] < block_rows[i]:
            out[i] += 1
            left -= 1
    return out


def pv_macs(gp, chunks, rows, head_dim):
    """p.V MACs of each V chunk: each head's work spread over the fetched rows, exact in total."""
    n = len(gp.v_positions)
    work = [gp.v_work[h] for h in gp.heads]
    seen = 0
    out = []
    for c in chunks:
        a, b = seen, seen + c.rows
        m = sum(w * b // n - w * a // n for w in work) if n else 0
        seen = b
        out.append(m * rows * head_dim)
    return out


def selects_next(step, nxt):
    """True when ``nxt`` is the next layer of the same pass, whose live tokens and
    heads the top-k after ``step`` chooses (cascade pruning)."""
    return (nxt is not None and nxt.stage == step.stage and nxt.layer == step.layer + 1
            and nxt.kv_rows == step.kv_rows)


def chunk_bytes(amap, layer, chunk):
    """Bytes a chunk fetches (less the burst the chunk before it brought)."""
    return sum(_bytes(amap, layer, chunk.plane, h, p) for h, p in chunk.segments) - chunk.skip * amap.burst


def step_traffic(arch, amap, step, groups, layer=None):
    """(fetched, compulsory) bytes of a planned step, from the same rule the engine uses."""
    fetched = compulsory = 0
    layer = step.layer if layer is None else layer

    def nbytes(chunks):
        return sum(chunk_bytes(amap, layer, c) for c in chunks)

    for gp in groups:
        q_bytes = sum(_bytes(amap, layer, "Q", h, bp.q_positions) for bp in gp.blocks for h in gp.heads)
        compulsory += q_bytes + gp.k_bytes + gp.v_bytes + gp.lsb_bytes   # every row once
        fetched += q_bytes + nbytes(gp.k_chunks) + nbytes(gp.v_chunks) + nbytes(gp.kl_chunks)
        for bp in gp.blocks:
            fetched += (nbytes(bp.k_chunks) + nbytes(bp.lsb_chunks) + nbytes(bp.lsb_msb_chunks)
                        + nbytes(bp.v_chunks))
    return fetched, compulsory
