"""Steps that plan alike share one plan in the program builder.

Checks of our own engine (common practice, no source): the builder plans a
step once per distinct shape (``_shape_key``) and leaves the layer out of the
key when every region starts on a burst boundary, because then the bursts a
set of rows costs do not depend on where the rows sit. Sharing must give the
very same program as planning every step on its own.
"""

import os

import numpy as np
import pytest
import simpy

import sim
from sim.engine import program
from sim.engine.addrmap import LAYOUTS, PLANES, AddressMap
from sim.engine.buffers import Buffer
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("k_bits", [4, 3])
def test_burst_cost_is_the_same_anywhere_when_regions_are_burst_aligned(layout, k_bits):
    arch = sim.load_arch(MID).with_overrides({"dram.layout": layout, "precision.k_msb_bits": k_bits,
                                              "precision.k_lsb_bits": k_bits})
    amap = AddressMap(arch, 3, 4, 300, 64)
    assert amap.costs_anywhere
    rng = np.random.default_rng(3)
    for _ in range(20):
        rows = np.sort(rng.choice(300, size=int(rng.integers(1, 300)), replace=False))
        for plane in PLANES:
            counts = {amap.burst_count(layer, plane, head, rows) for layer in range(3) for head in range(4)}
            assert len(counts) == 1


def _program(monkeypatch, trace, share):
    arch = sim.load_arch(MID)
    if not share:  # a key of its own for every step: nothing shared
        keys = iter(range(10 ** 9))
        monkeypatch.setattr(program, "_shape_key", lambda step, amap, layer: next(keys))
    env = simpy.Environment()
    max_rows = max(s.kv_rows for s in trace.steps)
    amaps = {64: AddressMap(arch, 2, 4, max_rows, 64)}
    buffers = {n: Buffer(env, n, kib * 1024) for n, kib in (
        ("query", arch.buffers.query_kib), ("key", arch.buffers.key_kib), ("value", arch.buffers.value_kib))}
    prog = program.ProgramBuilder(env, arch, trace, amaps, buffers, arch.engine.grain_rows,
                                  np.random.default_rng(0)).build()
    monkeypatch.undo()
    return prog


def _fetch_view(prog):
    return [(t.kind, t.step, t.head, t.block, t.rows, t.layer,
             [(h, np.asarray(p).tolist()) for h, p in t.positions]) for t in prog.fetch.ops]


def _ops_view(ops):
    return [(op.kind, op.step, op.head, op.block, op.macs, [id(t) for t in op.inputs],
             [id(t) for t in op.release]) for op in ops]


@pytest.mark.parametrize("pruning", [{}, {"value_keep": 0.5, "lsb_fraction": 0.5, "token_keep": 0.8}])
def test_shared_plans_build_the_same_program(monkeypatch, pruning):
    trace = synth_trace(prompt_tokens=96, decode_steps=3, layers=2, heads=4, head_dim=64, seed=2,
                        **pruning)
    if not pruning:  # every layer of a decode token plans alike: shared
        amap = AddressMap(sim.load_arch(MID), 2, 4, 99, 64)
        keys = {program._shape_key(s, amap, s.layer) for s in trace.steps}
        assert len(keys) < len(trace.steps)
    shared = _program(monkeypatch, trace, share=True)
    alone = _program(monkeypatch, trace, share=False)
    assert _fetch_view(shared) == _fetch_view(alone)
    # ops name their transactions by position in the fetch list
    pos_s = {id(t): i for i, t in enumerate(shared.fetch.ops)}
    pos_a = {id(t): i for i, t in enumerate(alone.fetch.ops)}
    for a, b in ((shared.dot_qk.ops, alone.dot_qk.ops), (shared.softmax.ops, alone.softmax.ops)):
        assert len(a) == len(b)
    view_s = [(k, st, h, bl, m, [pos_s[i] for i in ins], [pos_s[i] for i in rel])
              for k, st, h, bl, m, ins, rel in _ops_view(shared.dot_qk.ops)]
    view_a = [(k, st, h, bl, m, [pos_a[i] for i in ins], [pos_a[i] for i in rel])
              for k, st, h, bl, m, ins, rel in _ops_view(alone.dot_qk.ops)]
    assert view_s == view_a
    assert [(o.rows, o.cols, o.second) for o in shared.softmax.ops] == [(o.rows, o.cols, o.second)
                                                                     for o in alone.softmax.ops]
    assert [(o.kind, o.n, o.keep, o.comparisons) for o in shared.topk.ops] == [
        (o.kind, o.n, o.keep, o.comparisons) for o in alone.topk.ops]
    assert shared.counts == alone.counts
    assert shared.compulsory_bytes == alone.compulsory_bytes
    assert shared.macs_by_dim == alone.macs_by_dim


@pytest.mark.parametrize("layout", LAYOUTS)
def test_heads_with_the_same_rows_share_one_cut(layout):
    # the planner cuts a step's heads once when they keep the same rows (split_rows): the
    # chunks it gives another head must be those split() cuts for that head on its own
    from sim.engine.tiling import split, split_rows

    arch = sim.load_arch(MID).with_overrides({"dram.layout": layout, "precision.k_msb_bits": 3,
                                              "precision.k_lsb_bits": 3})
    amap = AddressMap(arch, 3, 4, 3000, 64)
    rng = np.random.default_rng(5)

    def view(out):
        return [[(c.plane, c.skip, c.rows, [(h, np.asarray(p).tolist()) for h, p in c.segments]) for c in cut]
                for cut in out]

    for _ in range(10):
        rows = np.sort(rng.choice(3000, size=int(rng.integers(1, 3000)), replace=False))
        max_rows, max_bytes = int(rng.integers(8, 600)), float(rng.integers(256, 20000))
        same_cut = {}
        for planes in (("K",), ("KL", "K")):
            for head in range(4):
                got = split_rows(amap, 2, planes, head, rows, max_rows, max_bytes, same_cut)
                alone = split(amap, 2, planes, [(head, rows)], max_rows, max_bytes)
                assert view(got) == view(alone)
        assert len(same_cut) == 2    # one cut per plane set, shared by the four heads
