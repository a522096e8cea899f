"""The engine against outside bounds: JEDEC peak bandwidth, compute throughput, roofline.

Sources named beside each check:
* HBM2: 8 channels x 32 GB/s = 256 GB/s per stack (JEDEC JESD235A).
* Roofline: Williams, Waterman and Patterson, "Roofline: an insightful visual
  performance model for multicore architectures", CACM 52(4), 2009 -- a run
  can never beat min(peak compute, peak bandwidth x operational intensity).
* Attention work per head: q.K is n_q * n_kv * d MACs, p.V is n_q * n_kv_kept_v * d
  MACs (common practice, no source).
"""

import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.model.bounds import closed_form
from sim.trace.format import Trace, make_step, new_header, validate
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CONFIGS = os.path.join(ROOT, "arch_configs")


def _trace(steps, name="test"):
    return validate(Trace(new_header("hand", name=name), steps, f"<{name}>"))


def test_hbm2_stack_streams_within_90_percent_of_jedec_peak():
    """A long sequential memory-bound replay on one HBM2 stack: <= 256 GB/s, >= 90 % of it.

    JEDEC JESD235A: 8 channels x 128 bits x 2.0 Gb/s per pin = 256 GB/s per stack.
    Decode (one query row against a long cached context) is a vector-matrix
    product and memory-bound (common practice, no source).
    """
    arch = sim.load_arch(os.path.join(CONFIGS, "hbm2_stack.yaml"))
    assert arch.peak_gbps == pytest.approx(8 * 128 * 2.0 / 8)
    steps = [make_step(layer, "decode", 64, 32, 1, 16384) for layer in range(2)]
    doc = sim.simulate(arch, _trace(steps, "long-decode")).to_dict()
    assert doc["dram"]["peak_gbps"] == pytest.approx(256.0)
    achieved = doc["dram"]["achieved_gbps"]
    assert achieved <= 256.0 * (1 + 1e-9)
    assert achieved >= 0.90 * 256.0, achieved
    assert doc["bounds"]["bound"] == "memory"


def test_compute_bound_prefill_within_5_percent_of_macs_over_multipliers():
    """Ample buffers and bandwidth: cycles >= MACs / multipliers and within 5 % of it."""
    arch = sim.load_arch(os.path.join(CONFIGS, "hbm2_stack.yaml")).with_overrides({
        "dot.multipliers": 1024, "dot.lanes": 64, "dot.arrays": "shared", "softmax.lanes": 512,
        "buffers.query_kib": 64, "buffers.key_kib": 1024, "buffers.value_kib": 1024})
    steps = [make_step(0, "prefill", 64, 4, 1024, 1024)]
    doc = sim.simulate(arch, _trace(steps, "big-prefill")).to_dict()
    macs = 2 * 4 * 1024 * 1024 * 64  # q.K + p.V, n_q * n_kv * d each (common practice)
    assert doc["compute"]["macs"] == macs
    floor = macs / arch.dot.multipliers
    assert doc["cycles"] >= floor
    assert doc["cycles"] <= 1.05 * floor, doc["cycles"] / floor
    assert doc["bounds"]["bound"] == "compute"


def test_mac_counts_equal_closed_forms():
    """q.K = heads * n_q * n_kv * d, p.V = n_q * sum(kept V rows) * d, LSB recompute = rows * n_kv * d."""
    trace = synth_trace(prompt_tokens=96, decode_steps=3, layers=3, heads=4, head_dim=32,
                        token_keep=0.7, head_keep=0.75, value_keep=0.5, lsb_fraction=0.5, seed=3)
    arch = sim.load_arch(os.path.join(CONFIGS, "mid.yaml"))
    doc = sim.simulate(arch, trace).to_dict()
    qk = sum(s.n_heads * s.q_rows * s.n_kept_k * s.head_dim for s in trace.steps)
    pv = sum(s.q_rows * int(np.sum(s.kept_v)) * s.head_dim for s in trace.steps)
    lsb = sum(int(np.sum(s.lsb_rows)) * s.n_kept_k * s.head_dim for s in trace.steps)
    assert doc["compute"]["macs_qk"] == qk
    assert doc["compute"]["macs_pv"] == pv
    assert doc["compute"]["macs_lsb_recompute"] == lsb
    assert doc["compute"]["macs"] == qk + pv + lsb


@st.composite
def _configs_and_traces(draw):
    lanes = draw(st.sampled_from([16, 32, 64]))
    over = {
        "clock_ghz": draw(st.sampled_from([0.5, 1.0, 2.0])),
        "dram.channels": draw(st.sampled_from([1, 2, 4, 8])),
        "dram.channel_gbps": draw(st.sampled_from([12.8, 25.6, 32.0])),
        "dot.lanes": lanes,
        "dot.multipliers": lanes * draw(st.sampled_from([1, 4, 16, 32])),
        "dot.arrays": draw(st.sampled_from(["shared", "separate"])),
        "buffers.query_kib": draw(st.sampled_from([4, 16, 64])),
        "buffers.key_kib": draw(st.sampled_from([8, 32, 256])),
        "buffers.value_kib": draw(st.sampled_from([8, 32, 256])),
        "softmax.lanes": draw(st.sampled_from([4, 16, 64])),
        "topk.comparators": draw(st.sampled_from([1, 8, 32])),
        "engine.grain_rows": draw(st.sampled_from([32, 128, 1024])),
    }
    if over["dot.arrays"] == "separate" and over["dot.multipliers"] < 2 * lanes:
        over["dot.multipliers"] = 2 * lanes
    trace = synth_trace(
        prompt_tokens=draw(st.sampled_from([16, 48, 130])),
        decode_steps=draw(st.integers(0, 3)), layers=draw(st.integers(1, 3)),
        heads=draw(st.integers(1, 4)), head_dim=draw(st.sampled_from([32, 64])),
        token_keep=draw(st.sampled_from([1.0, 0.6])), head_keep=draw(st.sampled_from([1.0, 0.5])),
        value_keep=draw(st.sampled_from([1.0, 0.4])), lsb_fraction=draw(st.sampled_from([0.0, 0.5])),
        seed=draw(st.integers(0, 5)))
    return over, trace


@settings(max_examples=25, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(_configs_and_traces())
def test_roofline_never_beaten(case):
    """Consistency of the engine with its own closed-form model (common practice, no source):
    simulated cycles are never below the roofline the result reports (the shape of the bound
    is Williams et al. 2009; the numbers come from the code under test, so this is no outside
    reference -- tests/test_engine_reference_bound.py computes one independently)."""
    over, trace = case
    arch = sim.load_arch(os.path.join(CONFIGS, "mid.yaml")).with_overrides(over)
    doc = sim.simulate(arch, trace).to_dict()
    b = doc["bounds"]
    assert doc["cycles"] >= b["compute_cycles"] * (1 - 1e-9)
    assert doc["cycles"] >= b["memory_cycles"] * (1 - 1e-9)
    # the closed-form model, computed without simulating, agrees on the bytes and bounds the run
    cf = closed_form(arch, trace)
    assert cf["fetched_bytes"] == doc["dram"]["read_bytes"]
    assert cf["compulsory_bytes"] == doc["dram"]["compulsory_bytes"]
    assert cf["macs"] == doc["compute"]["macs"]
    assert doc["cycles"] >= cf["roofline_cycles"] * (1 - 1e-9)
    # achieved bandwidth never above the pool's peak (JEDEC-style peak = channels x channel rate)
    assert doc["dram"]["achieved_gbps"] <= doc["dram"]["peak_gbps"] * (1 + 1e-9)
