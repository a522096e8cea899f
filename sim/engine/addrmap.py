"""Address map: where each Q, K, V row of each head lives in DRAM.

Planes are ``Q``, ``K`` (most significant key bits), ``KL`` (least
significant key bits) and ``V``. ``dram.layout`` picks how they are laid out:

``head_regions`` (default): one region per (layer, plane, head), in that
order (all heads of one plane of a layer together); inside a region, row
``r`` starts at ``r * row_bytes``.

``head_planes``: one region per (layer, head, plane): the Q, K, KL and V
regions of one head are adjacent.

``heads_interleaved``: one region per (layer, plane) shared by all heads,
which take turns every *granule*: the fewest rows that fill whole bursts
(``lcm(row bits, burst bits)``), so no burst holds two heads' rows. Reading
all heads' row ``r`` together is one sequential stream; reading one head
alone skips the other heads' granules.

Regions are aligned to 4 KiB. Every layout starts each head's rows on a burst
boundary and keeps a granule's rows in order, so a set of rows costs the same
bursts in every layout: the layout moves bytes, it never adds any.
:meth:`AddressMap.bursts` turns a set of row positions into the distinct
burst addresses that must be read: an isolated kept row still costs whole
bursts, and adjacent kept rows share them (coalescing).

:class:`BurstDecoder` is the other half: it cuts a burst address into the
channel, bank, bank group and DRAM row the memory pool serves it from, by the
bit slices of ``dram.address_bits`` (see :func:`sim.arch.address_slices`).
"""

import math

import numpy as np

from ..arch import address_slices

PLANES = ("Q", "K", "KL", "V")
REGION_ALIGN = 4096
LAYOUTS = ("head_regions", "head_planes", "heads_interleaved")


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
        self.layout = arch.dram.layout
        self.row_bytes = {pl: row_bytes(arch, pl, head_dim) for pl in PLANES}
        burst_bits = self.burst * 8
        # granule: rows per turn of one head in heads_interleaved (whole bursts)
        self.granule = {}
        for pl, rb in self.row_bytes.items():
            bits = int(round(rb * 8))
            self.granule[pl] = math.lcm(bits, burst_bits) // bits if bits else 1
        biggest = max(self.row_bytes.values()) * max_rows
        if self.layout == "heads_interleaved":
            g = max(self.granule.values())
            biggest = max(rb * (-(-max_rows // g) * g) for rb in self.row_bytes.values()) * heads
        self.region = int(-(-biggest // REGION_ALIGN) * REGION_ALIGN) or REGION_ALIGN
        self.layers = layers
        # heads' bursts come out in head order when regions are (datapath concatenates them)
        self.heads_in_order = self.layout != "heads_interleaved"
        # every region starting on a burst boundary, the bursts a set of rows costs do
        # not depend on the layer or head the rows belong to (only where they land)
        self.costs_anywhere = self.region % self.burst == 0
        self.row_bits = {pl: int(round(rb * 8)) for pl, rb in self.row_bytes.items()}
        self.plane_index = {pl: i for i, pl in enumerate(PLANES)}

    def base(self, layer, plane, head):
        """Burst-aligned byte address where ``head``'s rows of ``plane`` start counting from.

        For ``heads_interleaved`` that is the shared region's start: a head's
        rows there cost the same bursts as in a region of its own at that address.
        """
        p = self.plane_index[plane]
        if self.layout == "head_regions":
            return ((layer * len(PLANES) + p) * self.heads + head) * self.region
        if self.layout == "head_planes":
            return ((layer * self.heads + head) * len(PLANES) + p) * self.region
        return (layer * len(PLANES) + p) * self.region

    def bursts(self, layer, plane, head, rows):
        """Sorted distinct burst addresses (bytes) covering ``rows`` of a plane."""
        # work in bits: a row of 32 elements at 4 bits is 16 bytes, at 3 bits 12
        row_bits = self.row_bits[plane]
        n = len(rows)
        if row_bits == 0 or n == 0:
            return np.zeros(0, dtype=np.int64)
        burst = self.burst
        burst_bits = burst * 8
        if self.layout == "heads_interleaved":
            return self._interleaved(layer, plane, head, np.asarray(rows, dtype=np.int64),
                                     row_bits, burst_bits)
        r0 = int(rows[0])
        if int(rows[-1]) - r0 + 1 == n:  # contiguous rows: one run of bursts
            s0 = self.base(layer, plane, head) * 8 + r0 * row_bits
            b0, b1 = s0 // burst_bits, (s0 + n * row_bits - 1) // burst_bits
            return np.arange(b0 * burst, (b1 + 1) * burst, burst, dtype=np.int64)
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

    def _interleaved(self, layer, plane, head, rows, row_bits, burst_bits):
        g = self.granule[plane]
        g_bits = g * row_bits                  # whole bursts
        g_bursts = g_bits // burst_bits
        # a row's bursts relative to its granule, then the granule's place among the heads'
        rel = (rows % g) * row_bits
        first = rel // burst_bits
        last = (rel + row_bits - 1) // burst_bits
        span = last - first + 1
        gran = (rows // g) * self.heads + head
        if np.all(span == 1):
            idx = gran * g_bursts + first
        else:
            total = int(span.sum())
            offs = np.arange(total) - np.repeat(np.cumsum(span) - span, span)
            idx = np.repeat(gran * g_bursts + first, span) + offs
        keep = np.empty(len(idx), dtype=bool)
        keep[0] = True
        np.not_equal(idx[1:], idx[:-1], out=keep[1:])
        return self.base(layer, plane, head) + idx[keep] * self.burst

    def bursts_of_heads(self, layer, plane, heads, rows):
        """Sorted bursts of the same ``rows`` of each of ``heads`` (given in head order).
        Where regions start on burst boundaries and each head has its own, a head's bursts
        are another's moved by the distance between their regions: computed once."""
        if not self.heads_in_order:    # heads share a region: their bursts interleave
            return np.unique(np.concatenate([self.bursts(layer, plane, h, rows) for h in heads]))
        if not self.costs_anywhere:
            return np.concatenate([self.bursts(layer, plane, h, rows) for h in heads])
        rel = self.bursts(layer, plane, heads[0], rows) - self.base(layer, plane, heads[0])
        bases = np.array([self.base(layer, plane, h) for h in heads], dtype=np.int64)
        return (bases[:, None] + rel).ravel()

    def burst_count(self, layer, plane, head, rows):
        """Number of distinct bursts covering ``rows`` (cheap for contiguous rows)."""
        n = len(rows)
        if n == 0 or self.row_bytes[plane] == 0:
            return 0
        r0, r1 = int(rows[0]), int(rows[-1])
        if r1 - r0 + 1 == n:
            row_bits = self.row_bits[plane]
            burst_bits = self.burst * 8
            start = self.base(layer, plane, head) * 8 + r0 * row_bits
            return (start + n * row_bits - 1) // burst_bits - start // burst_bits + 1
        return len(self.bursts(layer, plane, head, rows))



class BurstDecoder:
    """Cuts burst byte-addresses into channel, bank, group and DRAM row.

    The slices of the config's address map are applied to the burst index
    (address // burst_bytes), lowest slice first. Bits above the map extend
    the row number, so an address past the nominal capacity lands on a row of
    its own rather than aliasing another one.
    """

    def __init__(self, arch):
        d = arch.dram
        self.burst = d.burst_bytes
        self.groups = d.bank_groups
        self.slices = address_slices(arch.to_dict()["dram"], arch.source)
        self.total_bits = sum(b for _, b in self.slices)
        self.row_bits = sum(b for f, b in self.slices if f == "row")
        plan, shift, have = [], 0, dict.fromkeys(("row", "bank", "group", "column", "channel"), 0)
        for field, bits in reversed(self.slices):
            plan.append((field, shift, (1 << bits) - 1, have[field]))
            shift += bits
            have[field] += bits
        self.plan = plan
        self.banks = arch.dram.banks
        # when the row is the top slice, the rest of the map fits a lookup table
        low = self.total_bits - self.row_bits
        self.lut = None
        if self.slices and self.slices[0][0] == "row" and self.row_bits == self.slices[0][1] and low <= 20:
            ch, bank, _ = self._decode_bits(np.arange(1 << low, dtype=np.int64))
            self.low_bits, self.low_mask = low, (1 << low) - 1
            self.lut = (ch, bank, ch * self.banks + bank)

    def decode(self, addresses):
        """``(channel, bank, row)`` int64 arrays; ``bank`` counts all groups, group = bank % groups."""
        x = np.asarray(addresses, dtype=np.int64) // self.burst
        if self.lut is not None:
            low = x & self.low_mask
            return self.lut[0][low], self.lut[1][low], x >> self.low_bits
        return self._decode_bits(x)

    def decode_global(self, addresses):
        """``(channel, bank over all channels, row)``: bank + channel * banks."""
        x = np.asarray(addresses, dtype=np.int64) // self.burst
        if self.lut is not None:
            low = x & self.low_mask
            return self.lut[0][low], self.lut[2][low], x >> self.low_bits
        ch, bank, row = self._decode_bits(x)
        return ch, bank + ch * self.banks, row

    def _decode_bits(self, x):
        out = {"row": None, "bank": None, "group": None, "channel": None}
        for field, shift, mask, low in self.plan:
            if field == "column":
                continue
            part = (x >> shift) & mask
            if low:
                part <<= low
            cur = out[field]
            out[field] = part if cur is None else (cur | part)
        zero = np.zeros(len(x), dtype=np.int64)
        row = out["row"] if out["row"] is not None else zero
        top = x >> self.total_bits
        if self.row_bits:
            top <<= self.row_bits
        row = row | top
        bank = out["bank"] if out["bank"] is not None else zero
        group = out["group"] if out["group"] is not None else zero
        channel = out["channel"] if out["channel"] is not None else zero
        return channel, bank * self.groups + group, row
