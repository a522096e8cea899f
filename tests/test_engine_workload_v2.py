"""Engine on version-2 traces: grouped-query heads, requests, causal prefill,
sliding windows and cache writes.

Internal consistency (common practice, no source) unless a check names its
source: the engine's work counts against the trace module's exact work, the
dependencies a batch may not have, and the write traffic against arithmetic
of the rows a step appends (address arithmetic of a row-major region: a run
of rows [a, b) of r bytes each covers bursts floor(a*r/B) .. floor((b*r-1)/B)).
The outside reference checks of these semantics are in
tests/test_workload_v2_reference.py.
"""

import os

import numpy as np
import pytest
import simpy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.engine import program
from sim.engine.addrmap import AddressMap
from sim.engine.buffers import Buffer
from sim.trace.format import Trace, make_step, new_header, validate
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CONFIGS = os.path.join(ROOT, "arch_configs")


def _arch(name="mid", **over):
    return sim.load_arch(os.path.join(CONFIGS, f"{name}.yaml")).with_overrides(over)


def _trace(steps, name="v2"):
    return validate(Trace(new_header("hand", name=name), steps, f"<{name}>"))


def _total_work(trace):
    w = None
    for s in trace.steps:
        x = s.work()
        w = x if w is None else w + x
    return w


shapes = st.fixed_dictionaries({
    "prompt_tokens": st.integers(8, 260),
    "decode_steps": st.integers(0, 4),
    "layers": st.integers(1, 2),
    "heads": st.sampled_from([2, 4, 8]),
    "group": st.sampled_from([1, 2, 4]),
    "batch": st.integers(1, 3),
    "causal": st.booleans(),
    "window": st.sampled_from([0, 7, 40]),
    "token_keep": st.sampled_from([1.0, 0.7]),
    "value_keep": st.sampled_from([1.0, 0.5]),
    "lsb_fraction": st.sampled_from([0.0, 0.3]),
    "seed": st.integers(0, 3),
})


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(shapes, st.sampled_from(["edge", "mid", "server"]), st.sampled_from([1024, 16]))
def test_engine_counts_equal_the_exact_work_of_every_step(w, cfg, grain):
    """Causal triangles, window bands, grouped heads, LSB rows and value pruning: the MACs and
    softmax elements the engine runs are the trace's exact work, at any grain."""
    w = dict(w)
    w["kv_heads"] = w["heads"] // min(w.pop("group"), w["heads"])
    tr = synth_trace(head_dim=64, **w)
    doc = sim.simulate(_arch(cfg, **{"engine.grain_rows": grain}), tr, keep_intervals=False).to_dict()
    want = _total_work(tr)
    c = doc["compute"]
    assert (c["macs_qk"], c["macs_lsb_recompute"], c["macs_pv"], c["softmax_elements"]) == (
        want.qk_macs, want.lsb_macs, want.pv_macs, want.softmax + want.lsb_softmax)


def test_requests_wait_only_for_their_own_earlier_steps():
    """Steps of different requests have no dependency on each other; a request's next layer
    waits for its own previous layer."""
    steps = [make_step(layer, "decode", 64, 4, 1, ctx, request=r)
             for layer in range(2) for r, ctx in ((0, 512), (1, 300))]
    tr = _trace(steps)
    arch = _arch()
    env = simpy.Environment()
    buffers = {n: Buffer(env, n, kib * 1024) for n, kib in (
        ("query", arch.buffers.query_kib), ("key", arch.buffers.key_kib), ("value", arch.buffers.value_kib))}
    amaps = {64: AddressMap(arch, 4, 4, 512, 64)}
    prog = program.ProgramBuilder(env, arch, tr, amaps, buffers, 1024, np.random.default_rng(0)).build()
    first_q = {}
    for t in prog.fetch.ops:
        if t.kind == "Q":
            first_q.setdefault(t.step, t)
    # steps 0 and 1 (layer 0 of each request) wait for nothing
    assert first_q[0].waits == [] and first_q[1].waits == []
    # step 2 (request 0, layer 1) and step 3 (request 1, layer 1) wait for their own layer 0
    causes = {s: [c for _e, c in first_q[s].waits] for s in (2, 3)}
    assert causes == {2: ["layer_dependency"], 3: ["layer_dependency"]}
    assert first_q[2].waits[0][0] is not first_q[3].waits[0][0]


def _bursts(first_row, rows, row_bytes, burst):
    """Bursts a run of rows covers in a region that starts on a burst boundary."""
    a, b = first_row * row_bytes, (first_row + rows) * row_bytes
    return (b - 1) // burst - a // burst + 1


@pytest.mark.parametrize("cfg", ["edge", "mid", "server"])
def test_cache_writes_and_output_reach_memory_as_writes(cfg):
    """A decode step appends its K/V rows for each K/V head and writes its output rows; the
    pool receives exactly those bytes as writes (every plane of the key: MSB and LSB)."""
    arch = _arch(cfg)
    p, burst, d = arch.precision, arch.dram.burst_bytes, 64
    steps = [make_step(layer, "decode", d, 8, 1, 777, kv_heads=[0, 0, 1, 1, 2, 2, 3, 3],
                       new_kv_rows=1, out_rows=1) for layer in range(3)]
    doc = sim.simulate(arch, _trace(steps), keep_intervals=False).to_dict()
    per_kv = sum(_bursts(776, 1, d * bits / 8, burst) for bits in (p.k_msb_bits, p.k_lsb_bits, p.v_bits)
                 if bits)
    out = 8 * _bursts(776, 1, d * p.q_bits / 8, burst)
    assert doc["dram"]["write_bytes"] == 3 * (4 * per_kv + out) * burst
    assert doc["dram"]["read_bytes"] == doc["dram"]["bytes"] - doc["dram"]["write_bytes"]


def test_a_trace_without_writes_writes_nothing():
    tr = synth_trace(prompt_tokens=64, decode_steps=3, layers=2, heads=4, kv_heads=2, head_dim=64,
                     causal=True, writes=False)
    doc = sim.simulate(_arch(), tr, keep_intervals=False).to_dict()
    assert doc["dram"]["write_bytes"] == 0


def test_grouped_heads_read_their_kv_once_per_block():
    """Query heads sharing a K/V head fetch its rows once: K and V bytes of a decode step
    shrink by the group size, the Q bytes and the work stay."""
    def run(kv):
        steps = [make_step(0, "decode", 64, 8, 1, 2048, kv_heads=kv)]
        return sim.simulate(_arch(), _trace(steps), keep_intervals=False).to_dict()

    mha = run(list(range(8)))
    gqa = run([h // 4 for h in range(8)])
    for plane in ("K", "V"):
        assert gqa["dram"]["bytes_by_plane"][plane] * 4 == mha["dram"]["bytes_by_plane"][plane]
    assert gqa["dram"]["bytes_by_plane"]["Q"] == mha["dram"]["bytes_by_plane"]["Q"]
    assert gqa["compute"]["macs"] == mha["compute"]["macs"]


def test_causal_prefill_skips_key_tiles_above_the_diagonal():
    """A causal prefill whose keys stream per query block fetches fewer K bytes than the same
    prefill seeing every key, and never more than it."""
    arch = _arch("edge")
    full = _trace([make_step(0, "prefill", 64, 2, 2048, 2048)])
    tri = _trace([make_step(0, "prefill", 64, 2, 2048, 2048, causal=True)])
    a = sim.simulate(arch, full, keep_intervals=False).to_dict()
    b = sim.simulate(arch, tri, keep_intervals=False).to_dict()
    ka, kb = a["dram"]["bytes_by_plane"]["K"], b["dram"]["bytes_by_plane"]["K"]
    assert kb < 0.7 * ka
    assert b["cycles"] < a["cycles"]


@pytest.mark.parametrize("cfg", ["edge", "mid"])
def test_the_run_budget_never_underestimates_the_transactions(cfg):
    """sim.budget refuses runs from an upper estimate of their transactions: it must stay
    above what the engine issues for grouped, causal, windowed and LSB steps alike."""
    from sim.budget import transactions

    for kw in (dict(prompt_tokens=512, decode_steps=8, layers=2, heads=4, lsb_fraction=0.3, value_keep=0.5),
               dict(prompt_tokens=700, decode_steps=3, layers=2, heads=4, kv_heads=2, lsb_fraction=0.5,
                    causal=True, window=100)):
        tr = synth_trace(head_dim=64, **kw)
        arch = _arch(cfg, **{"engine.grain_rows": 16})
        issued = sim.simulate(arch, tr, keep_intervals=False).to_dict()["fetch"]["transactions"]
        assert transactions(arch, tr) >= issued
