"""Address map: where each Q, K, V row of each head lives in DRAM.

Layout: one region per (layer, plane, head), plane in ``Q``, ``K`` (most
significant key bits), ``KL`` (least significant key bits), ``V``; inside a
region, row ``r`` starts at ``r * row_bytes``. Regions are aligned to 4 KiB.
:meth:`AddressMap.bursts` turns a set of row positions into the distinct
burst addresses that must be read: an isolated kept row still costs whole
bursts, and adjacent kept rows share them (coalescing).
"""

import numpy as np

PLANES = ("Q", "K", "KL", "V")
REGION_ALIGN = 4096


def row_bytes(arch, plane, head_dim):
    """Bytes of one row of ``plane`` at ``head_dim`` elements."""
    p = arch.precision
    bits = {"Q": p.q_bits, "K": p.k_msb_bits, "KL": p.k_lsb_bits, "V": p.v_bits}[plane]
    return head_dim * bits / 8


class AddressMap:
    """Byte addresses of trace rows for one run."""

    def __init__(self, arch, layers, heads, max_rows, head_dim):
        self.burst = arch.dram.burst_bytes
        self.heads = heads
        self.row_bytes = {pl: row_bytes(arch, pl, head_dim) for pl in PLANES}
        biggest = max(self.row_bytes.values()) * max_rows
        self.region = int(-(-biggest // REGION_ALIGN) * REGION_ALIGN) or REGION_ALIGN
        self.layers = layers

    def base(self, layer, plane, head):
        return ((layer * len(PLANES) + PLANES.index(plane)) * self.heads + head) * self.region

    def bursts(self, layer, plane, head, rows):
        """Sorted distinct burst addresses (bytes) covering ``rows`` of a plane."""
        rb = self.row_bytes[plane]
        if rb == 0 or len(rows) == 0:
            return np.zeros(0, dtype=np.int64)
        # work in bits: a row of 32 elements at 4 bits is 16 bytes, at 3 bits 12
        row_bits = int(round(rb * 8))
        burst_bits = self.burst * 8
        start = self.base(layer, plane, head) * 8 + np.asarray(rows, dtype=np.int64) * row_bits
        first = start // burst_bits
        last = (start + row_bits - 1) // burst_bits
        span = last - first + 1
        if np.all(span == 1):
            idx = first
        else:
            total = int(span.sum())
            offs = np.arange(total) - np.repeat(np.cumsum(span) - span, span)
            idx = np.repeat(first, span) + offs
        # rows are sorted, so bursts are non-decreasing: drop repeats
        keep = np.empty(len(idx), dtype=bool)
        keep[0] = True
        np.not_equal(idx[1:], idx[:-1], out=keep[1:])
        return idx[keep] * self.burst

    def burst_count(self, layer, plane, head, rows):
        """Number of distinct bursts covering ``rows`` (cheap for contiguous rows)."""
        n = len(rows)
        if n == 0 or self.row_bytes[plane] == 0:
            return 0
        r0, r1 = int(rows[0]), int(rows[-1])
        if r1 - r0 + 1 == n:
            row_bits = int(round(self.row_bytes[plane] * 8))
            burst_bits = self.burst * 8
            start = self.base(layer, plane, head) * 8 + r0 * row_bits
            return (start + n * row_bits - 1) // burst_bits - start // burst_bits + 1
        return len(self.bursts(layer, plane, head, rows))

