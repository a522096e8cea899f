"""K/V layout (``dram.layout``): where rows live changes locality, never bytes.

Structural checks of our own address map (common practice, no source: a
layout is a bijection of rows to bytes, so it must not overlap regions nor
change how many bursts a set of rows costs), plus a replay of the bundled
decode trace showing the layout moves the row-hit rate while bytes stay put.
"""

import os

import numpy as np
import pytest

import sim
from sim.engine.addrmap import LAYOUTS, PLANES, AddressMap
from sim.errors import ConfigError
from sim.trace.files import load_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
LAYERS, HEADS, ROWS = 2, 3, 200


def _amap(layout, head_dim=64, **over):
    arch = sim.load_arch(MID).with_overrides({"dram.layout": layout, **over})
    return AddressMap(arch, LAYERS, HEADS, ROWS, head_dim)


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("k_bits", [4, 3])
def test_every_row_has_its_own_bytes(layout, k_bits):
    """No two (layer, plane, head) share a burst, in any layout (3-bit rows straddle bursts)."""
    amap = _amap(layout, **{"precision.k_msb_bits": k_bits, "precision.k_lsb_bits": k_bits})
    everything = np.arange(ROWS)
    seen = []
    for layer in range(LAYERS):
        for plane in PLANES:
            for head in range(HEADS):
                b = amap.bursts(layer, plane, head, everything)
                assert np.all(np.diff(b) > 0)                  # sorted, distinct
                assert np.all(b % amap.burst == 0)
                seen.append(b)
    allb = np.concatenate(seen)
    assert len(np.unique(allb)) == len(allb)


@pytest.mark.parametrize("k_bits", [4, 3, 8])
def test_bursts_per_row_set_do_not_depend_on_layout(k_bits):
    """Dense runs and pruned (scattered) row sets cost the same bursts in every layout."""
    rng = np.random.default_rng(5)
    maps = {lay: _amap(lay, **{"precision.k_msb_bits": k_bits, "precision.k_lsb_bits": k_bits})
            for lay in LAYOUTS}
    sets = [np.arange(0, ROWS), np.arange(17, 133)]
    sets += [np.flatnonzero(rng.random(ROWS) < p) for p in (0.1, 0.5, 0.9)]
    for rows in sets:
        for plane in PLANES:
            counts = {lay: len(m.bursts(1, plane, 2, rows)) for lay, m in maps.items()}
            assert len(set(counts.values())) == 1, (plane, counts)
            for m in maps.values():
                assert m.burst_count(1, plane, 2, rows) == counts["head_regions"]


def test_interleaved_heads_make_one_stream_of_a_row_range():
    """Reading all heads' rows r0..r1 together is one contiguous burst range when heads
    are interleaved; with a region per head it is one range per head."""
    rows = np.arange(40, 104)
    inter = _amap("heads_interleaved")
    regions = _amap("head_regions")

    def together(amap):
        return np.unique(np.concatenate([amap.bursts(0, "K", h, rows) for h in range(HEADS)]))

    b = together(inter)
    assert np.all(np.diff(b) == inter.burst)
    r = together(regions)
    assert np.count_nonzero(np.diff(r) != regions.burst) == HEADS - 1


def test_planes_of_one_head_are_adjacent_in_head_planes():
    amap = _amap("head_planes")
    ends = [amap.base(0, pl, 1) for pl in PLANES]
    assert ends == sorted(ends)
    assert ends[-1] - ends[0] == 3 * amap.region
    assert amap.base(0, "Q", 2) - amap.base(0, "Q", 1) == 4 * amap.region


def test_layout_moves_row_hits_on_a_decode_trace_but_not_bytes():
    tr = load_trace(os.path.join(ROOT, "traces", "synth_decode.npz"))
    docs = {lay: sim.simulate(sim.load_arch(MID).with_overrides({"dram.layout": lay}), tr).to_dict()
            for lay in LAYOUTS}
    assert len({d["dram"]["bytes"] for d in docs.values()}) == 1
    hits = {lay: d["dram"]["row_hit_rate"] for lay, d in docs.items()}
    assert abs(hits["heads_interleaved"] - hits["head_regions"]) > 0.01, hits


def test_unknown_layout_names_the_field():
    with pytest.raises(ConfigError) as err:
        sim.load_arch(MID).with_overrides({"dram.layout": "heads_mixed"})
    assert "dram.layout" in str(err.value)


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("k_bits", [4, 3])
def test_many_heads_of_one_row_set_cost_each_heads_bursts(layout, k_bits):
    """A query vector or a cache write reads or writes the same rows of many heads: the
    bursts computed once and moved head by head are each head's own, in head order
    (sorted and distinct where heads share a region)."""
    amap = _amap(layout, **{"precision.k_msb_bits": k_bits, "precision.k_lsb_bits": k_bits})
    rng = np.random.default_rng(7)
    for _ in range(30):
        rows = np.sort(rng.choice(ROWS, size=int(rng.integers(1, ROWS)), replace=False))
        if rng.random() < 0.3:
            rows = np.arange(int(rows[0]), int(rows[0]) + int(rng.integers(1, ROWS - rows[0] + 1)))
        heads = sorted(rng.choice(HEADS, size=int(rng.integers(2, HEADS + 1)), replace=False).tolist())
        for layer in range(LAYERS):
            for plane in PLANES:
                each = np.concatenate([amap.bursts(layer, plane, h, rows) for h in heads])
                if layout == "heads_interleaved":
                    each = np.unique(each)
                got = amap.bursts_of_heads(layer, plane, heads, rows)
                assert got.dtype == each.dtype and got.tolist() == each.tolist()
