"""What a run will cost before it starts: address space and memory.

:func:`check_run` is called by :func:`sim.simulate` after the config and the
trace are loaded and before the engine builds anything. It refuses, with the
estimate, a pair whose DRAM address map would not fit 62 bits or whose run
would need more memory than the machine has. A run's logs do not grow with its
transactions (the per-transaction logs are summed or written out as the run
goes, see :mod:`sim.engine.spill`); what grows is the plan of a step, made
whole before the step's first transaction (about ``PLAN_BYTES_PER_TXN`` per
transaction of that step, measured) up to ``SHAPE_CACHE_CHUNKS`` chunks (a
banded step -- causal, windowed -- of more is planned block by block as the
run reaches it, and the blocks of any other step read one list of chunks),
and the plans kept for reuse (at most ``SHAPE_CACHE_CHUNKS`` chunks). The
transaction count is an upper estimate from the tiling rule's own formulas
(query blocks x chunks per K/V group, K, V and LSB planes; each block's reach
in a causal or windowed step; chunks filled by bursts where kept rows are
scattered), not a run. ``bench/engine_fuzz.py`` checks it against the count
issued on thousands of random workloads.
"""

from __future__ import annotations

import math
import os

import numpy as np

from .errors import InputError

ADDRESS_BITS = 62
# a step's plan in memory per transaction it will issue: 115-182 bytes measured (tracemalloc)
# on causal prefill steps of 2k-16k tokens on edge, mid and server; counted high
PLAN_BYTES_PER_TXN = 256
# what does not grow with the run: the logs' in-memory parts, the pool's tables, the result's
# temporaries (a 16k-token causal prefill on mid: about 60 MiB above the loaded baseline)
FIXED_BYTES = 256 * 2**20
# a run that keeps every unit's intervals for a timeline holds them all: 7.1 KB per transaction
# measured on a causal 8k-token prefill on mid (107,072 transactions), 16.8 KB once the
# interval lists a timeline export reads are made
TIMELINE_BYTES_PER_TXN = 16 * 1024


class RunTooLarge(InputError):
    """A config and trace pair that would not fit the address map or the machine."""


def physical_memory() -> int | None:
    try:
        return os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None


def address_span(arch, trace) -> int:
    """Bytes the address map spans: regions per layer of each request, plane and head, each
    the largest context."""
    from .engine.addrmap import PLANES, REGION_ALIGN, row_bytes

    steps = trace.steps
    layers = (max(s.layer for s in steps) + 1) * (max(s.request for s in steps) + 1)
    heads = max(max(int(s.heads.max()), int(s.kv_heads.max())) for s in steps) + 1
    rows = max(s.kv_rows for s in steps)
    d = max(s.head_dim for s in steps)
    row = max(row_bytes(arch, p, d) for p in PLANES)
    region = -(-math.ceil(rows * row) // REGION_ALIGN) * REGION_ALIGN
    return layers * len(PLANES) * heads * region


def transactions(arch, trace, grain_rows=None) -> int:
    """Upper estimate of the transactions the engine issues for the trace."""
    return sum(step_transactions(arch, trace, grain_rows))


def _new_bursts(positions, row_bits, burst_bits, memo):
    """(bursts, most bursts one row adds) of the sorted rows ``positions`` laid out one after
    another from a burst boundary: a burst two neighbouring rows share counts once."""
    key = (id(positions), row_bits)
    if key not in memo:
        start = np.asarray(positions, dtype=np.int64) * row_bits
        first, last = start // burst_bits, (start + row_bits - 1) // burst_bits
        new = last - first + 1
        new[1:] -= first[1:] == last[:-1]
        memo[key] = (positions, int(new.sum()), int(new.max()))   # positions held: the id stays theirs
    return memo[key][1:]


def _rows_per_chunk(arch, plane, d, grain, streamed, positions, spread, memo):
    """Rows a chunk of ``plane`` holds at the least, on average, over the sorted kept rows
    ``positions`` (``spread``: a subset of them, as value pruning keeps). A chunk ends at its
    row limit or when the next row's bursts would pass its byte limit (tiling.split), so
    where kept rows are scattered, and a burst carries rows not kept, the bursts bind."""
    from .engine.addrmap import row_bytes
    from .engine.tiling import chunk_cap, chunk_rows

    rows = chunk_rows(arch, plane, d, grain, streamed)
    n = len(positions)
    if not n or (not spread and positions[-1] - positions[0] + 1 == n):
        return rows
    burst_bits = arch.dram.burst_bytes * 8
    row_bits = int(round(row_bytes(arch, plane, d) * 8))
    limit = max(1, int(chunk_cap(arch, plane, streamed) // arch.dram.burst_bytes))
    if spread:   # each row may stand alone, at the worst offset a row can start at
        most = (burst_bits - math.gcd(row_bits, burst_bits) + row_bits - 1) // burst_bits + 1
        bursts = n * most
    else:
        bursts, most = _new_bursts(positions, row_bits, burst_bits, memo)
    # a chunk the byte limit ended holds more than limit - most bursts
    return max(1.0, min(rows, n * max(1, limit - most + 1) / bursts))


def step_transactions(arch, trace, grain_rows=None) -> list[int]:
    """Upper estimate of the transactions the engine issues for each step of the trace."""
    from .engine.tiling import query_block_rows

    grain = grain_rows or arch.engine.grain_rows
    out = []
    lsb = arch.precision.k_lsb_bits > 0
    memo: dict = {}
    for s in trace.steps:
        d = s.head_dim
        groups = len(np.unique(s.kv_heads))        # a K/V head's rows are fetched once for its group
        group = -(-s.n_heads // groups)
        qbr = query_block_rows(arch, d, s.q_rows, group)
        nqb = math.ceil(s.q_rows / qbr)
        # several blocks may stream K and V again, in smaller chunks (tiling.chunk_cap)
        own = s.kv_kept_k is not None              # a K/V head's own kept keys: a subset of kept_k
        kc = _rows_per_chunk(arch, "K", d, grain, nqb > 1, s.kept_k, own, memo)
        vc = _rows_per_chunk(arch, "V", d, grain, nqb > 1, s.kept_k,
                             own or int(s.kept_v.max(initial=0)) < s.n_kept_k, memo)
        keys = s.n_kept_k
        # value pruning keeps rows per query head: a group fetches the union of its heads' rows
        v_rows = min(group * int(s.kept_v.max()), keys)
        if s.causal or s.window:
            # keys each block sees: in causal prefill those up to its last row (the blocks are not
            # all alike: the last may be short); where no row sees a later key (causal, or the
            # last rows of a decode step) a window bounds them by itself and the block's rows;
            # of their values, any may be kept by some row; a partly seen chunk per plane
            reach = np.full(nqb, keys, dtype=np.int64)
            if s.causal and s.stage == "prefill":
                reach = np.minimum(np.arange(1, nqb + 1, dtype=np.int64) * qbr, keys)
            if s.window and (s.causal or s.stage != "prefill"):
                reach = np.minimum(reach, s.window + qbr)
            k_total = int(np.ceil(reach / kc).sum()) + nqb
            v_total = int(np.ceil(reach / vc).sum()) + nqb
        else:
            k_total = nqb * math.ceil(keys / kc)
            v_total = nqb * math.ceil(v_rows / vc)
        # the LSB recompute: a KL chunk and its MSB chunk again, per block, each cut at half
        # a K chunk's bytes (tiling.pair_unit_rows)
        lsb_pairs = 4 * math.ceil(keys / kc) * nqb if lsb and int(s.lsb_rows.max()) else 0
        per_group = k_total + v_total + nqb + lsb_pairs
        out.append(groups * per_group)
    return out


def check_run(arch, trace, grain_rows=None, timeline=False) -> None:
    """Refuse (one line, with the estimate) a run that cannot fit; return quietly otherwise.
    ``timeline``: the run keeps every unit's intervals (memory grows with its transactions)."""
    span = address_span(arch, trace)
    if span >= 1 << ADDRESS_BITS:
        raise RunTooLarge(trace.source, "kv_rows", max(s.kv_rows for s in trace.steps),
                          f"the trace's K/V regions at head_dim {max(s.head_dim for s in trace.steps)} would span "
                          f"about 2**{span.bit_length() - 1} bytes of DRAM addresses; the address map holds "
                          f"2**{ADDRESS_BITS}")
    from .engine.program import SHAPE_CACHE_CHUNKS

    per_step = step_transactions(arch, trace, grain_rows)
    total = sum(per_step)
    # a banded step (causal, windowed) of more chunks than that is planned block by block, and
    # the blocks of any other step share its chunk lists: no plan holds one entry per re-stream
    planned = min(max(per_step), SHAPE_CACHE_CHUNKS)
    need = FIXED_BYTES + PLAN_BYTES_PER_TXN * (planned + min(total, SHAPE_CACHE_CHUNKS))
    mem = physical_memory()
    if mem and timeline and need + TIMELINE_BYTES_PER_TXN * total > mem // 2:
        need += TIMELINE_BYTES_PER_TXN * total
        raise RunTooLarge(trace.source, "steps", len(trace.steps),
                          f"a timeline of this run would hold about {total:,} transactions' intervals, "
                          f"about {need / 2**30:,.1f} GiB of memory, more than half of this machine's "
                          f"{mem / 2**30:,.0f} GiB: run it without a timeline (no --timeline output; "
                          f"keep_intervals=False), or cut the trace (attnsim trace cut)")
    if mem and need > mem // 2:
        raise RunTooLarge(trace.source, "steps", len(trace.steps),
                          f"its largest step would issue about {max(per_step):,} transactions, and its plan "
                          f"with the plans kept for reuse would take about {need / 2**30:,.1f} GiB of memory, "
                          f"more than half of this machine's {mem / 2**30:,.0f} GiB: raise engine.grain_rows "
                          f"or buffers.query_kib, or cut the trace (attnsim trace cut)")
