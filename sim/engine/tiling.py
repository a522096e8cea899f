"""Tiling and reuse rule: how one attention step is cut into transactions.

Pure functions (no simpy), shared by the engine and the closed-form model.

Per head of a step:

* queries are processed in **query blocks** of at most half the query buffer
  (double buffering), so a long prefill has several blocks;
* K (most-significant plane) is **resident** when the head's kept rows fit in
  half the key buffer: fetched once, reused by every query block. Otherwise it
  is **re-streamed** for each query block. V likewise with the value buffer.
  Half, so the next head's rows can stream in while this head finishes;
* fetches move in **chunks** of ``engine.grain_rows`` rows, capped so one
  chunk takes at most half its buffer;
* a query block with rows flagged for the least-significant key plane
  (progressive quantization) fetches that plane's chunks (plus the MSB chunks
  again when K was not resident) and recomputes those rows' scores;
* V rows are the ones value pruning kept: ``kept_v_idx`` when the trace gives
  them, else ``kept_v`` positions spread evenly over the kept key rows.

Re-streaming is why buffer size changes DRAM traffic; the result reports the
bytes fetched against the compulsory bytes (every row once).
"""

import math

import numpy as np

from ..errors import ConfigError
from .addrmap import row_bytes


class Chunk:
    """Rows of one plane fetched together (one transaction); bytes follow at issue."""

    __slots__ = ("plane", "positions")

    def __init__(self, plane, positions):
        self.plane = plane
        self.positions = positions


class BlockPlan:
    """One query block of one head."""

    __slots__ = ("block", "q_positions", "rows", "k_chunks", "lsb_rows", "lsb_chunks",
                 "lsb_msb_chunks", "v_chunks")

    def __init__(self, block, q_positions):
        self.block = block
        self.q_positions = q_positions
        self.rows = len(q_positions)
        self.k_chunks = []     # fetched for this block (empty when K is resident)
        self.lsb_rows = 0
        self.lsb_chunks = []   # LSB plane chunks for the recompute
        self.lsb_msb_chunks = []  # MSB chunks fetched again when K was not resident
        self.v_chunks = []     # fetched for this block (empty when V is resident)


class HeadPlan:
    """All query blocks of one head, with its resident chunks."""

    __slots__ = ("head", "n_kv", "n_v", "v_positions", "k_resident", "v_resident",
                 "k_chunks", "v_chunks", "blocks", "value_pruned", "k_bytes", "v_bytes",
                 "lsb_bytes")

    def __init__(self, head):
        self.head = head
        self.blocks = []
        self.k_chunks = []     # resident K chunks (fetched once for the head)
        self.v_chunks = []


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


def chunk_rows(arch, plane, head_dim, grain_rows):
    cap = (arch.buffers.value_kib if plane == "V" else arch.buffers.key_kib) * 1024
    # a chunk may straddle bursts at both ends: keep its burst-rounded size in half the buffer
    limit = int((cap / 2 - 2 * arch.dram.burst_bytes) // row_bytes(arch, plane, head_dim))
    return max(1, min(grain_rows, limit))


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


def _chunks(plane, positions, rows_per_chunk):
    return [Chunk(plane, positions[i:i + rows_per_chunk])
            for i in range(0, len(positions), rows_per_chunk)]


def _bytes(amap, layer, plane, head, positions):
    return amap.burst_count(layer, plane, head, positions) * amap.burst


def plan_step(arch, amap, step, grain_rows):
    """Cut one step into per-head plans (see the module docstring)."""
    d = step.head_dim
    qb = query_block_rows(arch, d, step.q_rows)
    nqb = math.ceil(step.q_rows / qb)
    if step.stage == "prefill":
        q_pos = step.kept_k
    else:  # decode: the new token's query row(s) sit at the end of the context
        q_pos = np.arange(step.kv_rows - step.q_rows, step.kv_rows, dtype=np.int64)
    kc = chunk_rows(arch, "K", d, grain_rows)
    # LSB recompute chunks pair one KL chunk with one MSB chunk: same rows, both must fit
    klc = min(kc, chunk_rows(arch, "KL", d, grain_rows)) if arch.precision.k_lsb_bits else kc
    vc = chunk_rows(arch, "V", d, grain_rows)
    kcap = arch.buffers.key_kib * 1024
    vcap = arch.buffers.value_kib * 1024
    lsb_plane = arch.precision.k_lsb_bits > 0
    heads = []
    for j, h in enumerate(step.heads.tolist()):
        hp = HeadPlan(h)
        hp.n_kv = step.n_kept_k
        hp.v_positions = value_positions(step, j)
        hp.n_v = len(hp.v_positions)
        hp.value_pruned = hp.n_v < hp.n_kv
        hp.k_bytes = _bytes(amap, step.layer, "K", h, step.kept_k)
        hp.v_bytes = _bytes(amap, step.layer, "V", h, hp.v_positions)
        hp.lsb_bytes = _bytes(amap, step.layer, "KL", h, step.kept_k) if lsb_plane else 0
        flagged = int(step.lsb_rows[j])
        # keep K when it is read again: by several query blocks or by the LSB recompute
        hp.k_resident = (nqb > 1 or flagged > 0) and hp.k_bytes <= kcap / 2
        hp.v_resident = nqb > 1 and hp.v_bytes <= vcap / 2
        if hp.k_resident:
            hp.k_chunks = _chunks("K", step.kept_k, kc)
        if hp.v_resident:
            hp.v_chunks = _chunks("V", hp.v_positions, vc)
        edges = np.floor(np.linspace(0, flagged, nqb + 1)).astype(np.int64)
        for b in range(nqb):
            bp = BlockPlan(b, q_pos[b * qb:(b + 1) * qb])
            if not hp.k_resident:
                bp.k_chunks = _chunks("K", step.kept_k, kc)
            # with no LSB plane configured there is nothing to refetch
            bp.lsb_rows = min(int(edges[b + 1] - edges[b]), bp.rows) if lsb_plane else 0
            if bp.lsb_rows:
                bp.lsb_chunks = _chunks("KL", step.kept_k, klc)
                bp.lsb_msb_chunks = [] if hp.k_resident else _chunks("K", step.kept_k, klc)
            if not hp.v_resident:
                bp.v_chunks = _chunks("V", hp.v_positions, vc)
            hp.blocks.append(bp)
        heads.append(hp)
    return heads


def step_traffic(arch, amap, step, heads):
    """(fetched, compulsory) bytes of a planned step, from the same rule the engine uses."""
    fetched = compulsory = 0
    layer = step.layer

    def nbytes(chunks):
        return sum(_bytes(amap, layer, c.plane, hp.head, c.positions) for c in chunks)

    for hp in heads:
        q_bytes = sum(_bytes(amap, layer, "Q", hp.head, bp.q_positions) for bp in hp.blocks)
        compulsory += q_bytes + hp.k_bytes + hp.v_bytes
        if any(bp.lsb_rows for bp in hp.blocks):  # the LSB plane, once
            compulsory += hp.lsb_bytes
        fetched += q_bytes + nbytes(hp.k_chunks) + nbytes(hp.v_chunks)
        for bp in hp.blocks:
            fetched += (nbytes(bp.k_chunks) + nbytes(bp.lsb_chunks) + nbytes(bp.lsb_msb_chunks)
                        + nbytes(bp.v_chunks))
    return fetched, compulsory
