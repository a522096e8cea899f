"""The engine against a roofline bound computed from the trace alone.

Reference: the roofline model (S. Williams, A. Waterman, D. Patterson,
"Roofline: an insightful visual performance model for multicore
architectures", CACM 52(4), 2009): a run takes at least
max(work / peak compute, compulsory bytes / peak bandwidth).

Everything expected here is arithmetic on the trace's own fields and the
config's knobs, with no call into ``sim.engine`` or ``sim.model`` (the planning
code the engine uses is not consulted):

* work per step (common practice, no source; 1 MAC = one multiply-accumulate):
  q.K = heads x q_rows x kept keys x head_dim; LSB recompute =
  sum(lsb_rows) x kept keys x head_dim; p.V = q_rows x sum(kept_v) x head_dim;
* compulsory bytes: every kept row of every plane that must cross the memory
  interface at least once, at the precision knobs' widths -- the query rows,
  the kept key rows' most-significant plane, the least-significant plane of
  the heads that ask for it, and at least ``kept_v`` value rows per head;
* peak compute: ``dot.multipliers`` MACs per cycle (half each for q.K and p.V
  when the arrays are separate); peak bandwidth: channels x GB/s per channel.
"""

import os

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")


def trace_work(trace):
    """(q.K, LSB recompute, p.V) MACs the trace asks for."""
    qk = lsb = pv = 0
    for s in trace.steps:
        n, d = len(s.kept_k), s.head_dim
        qk += len(s.heads) * s.q_rows * n * d
        lsb += int(np.sum(s.lsb_rows)) * n * d
        pv += s.q_rows * int(np.sum(s.kept_v)) * d
    return qk, lsb, pv


def compulsory_bytes(trace, precision):
    """Bytes that must cross the memory interface at least once (not burst-rounded)."""
    p = precision
    total = 0.0
    for s in trace.steps:
        n, d, h = len(s.kept_k), s.head_dim, len(s.heads)
        total += h * s.q_rows * d * p["q_bits"] / 8
        total += h * n * d * p["k_msb_bits"] / 8
        if p["k_lsb_bits"]:
            total += int(np.count_nonzero(s.lsb_rows)) * n * d * p["k_lsb_bits"] / 8
        total += int(np.sum(s.kept_v)) * d * p["v_bits"] / 8
    return total


def roofline_floor(cfg, trace):
    """max(work / peak compute, compulsory bytes / peak bandwidth), in cycles."""
    qk, lsb, pv = trace_work(trace)
    m = cfg["dot"]["multipliers"]
    if cfg["dot"]["arrays"] == "separate":
        compute = max((qk + lsb) / (m // 2), pv / (m // 2))
    else:
        compute = (qk + lsb + pv) / m
    bytes_per_cycle = cfg["dram"]["channels"] * cfg["dram"]["channel_gbps"] / cfg["clock_ghz"]
    return max(compute, compulsory_bytes(trace, cfg["precision"]) / bytes_per_cycle)


@st.composite
def _cases(draw):
    lanes = draw(st.sampled_from([16, 32, 64]))
    over = {
        "clock_ghz": draw(st.sampled_from([0.5, 1.0, 2.0])),
        "dram.channels": draw(st.sampled_from([1, 2, 4, 8])),
        "dram.channel_gbps": draw(st.sampled_from([12.8, 25.6, 32.0])),
        "dot.lanes": lanes,
        "dot.multipliers": lanes * draw(st.sampled_from([2, 4, 16, 32])),
        "dot.arrays": draw(st.sampled_from(["shared", "separate"])),
        "dot.lookahead": draw(st.integers(1, 6)),
        # small query buffers: long prefills get many query blocks
        "buffers.query_kib": draw(st.sampled_from([1, 2, 4, 64])),
        "buffers.key_kib": draw(st.sampled_from([4, 8, 32, 256])),
        "buffers.value_kib": draw(st.sampled_from([4, 8, 32, 256])),
        "softmax.lanes": draw(st.sampled_from([4, 16, 64])),
        "topk.comparators": draw(st.sampled_from([1, 8, 32])),
        "fetch.issue_window": draw(st.sampled_from([0, 1, 3, 16, 1000])),
        "engine.grain_rows": draw(st.sampled_from([8, 32, 128, 1024])),
        "dot.tile_rows": 16,
    }
    trace = synth_trace(
        prompt_tokens=draw(st.sampled_from([16, 48, 130, 300])),
        decode_steps=draw(st.integers(0, 3)), layers=draw(st.integers(1, 3)),
        heads=draw(st.integers(1, 4)), head_dim=draw(st.sampled_from([32, 64])),
        token_keep=draw(st.sampled_from([1.0, 0.6])), head_keep=draw(st.sampled_from([1.0, 0.5])),
        value_keep=draw(st.sampled_from([1.0, 0.4])), lsb_fraction=draw(st.sampled_from([0.0, 0.5, 1.0])),
        lsb_fraction_rows=draw(st.sampled_from([0.1, 0.5, 1.0])), seed=draw(st.integers(0, 5)))
    return over, trace


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(_cases())
def test_no_run_beats_the_roofline_of_its_trace_and_work_is_exact(case):
    """Cycles >= max(trace work / multipliers, compulsory bytes / peak bandwidth), and the
    reported MACs equal the trace's work, over random datapaths (many query blocks, LSB
    flags, small buffers, random issue windows and lookahead, any grain)."""
    over, trace = case
    arch = sim.load_arch(MID).with_overrides(over)
    doc = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    cfg = doc["arch"]["config"]
    assert doc["cycles"] >= roofline_floor(cfg, trace) * (1 - 1e-9)
    qk, lsb, pv = trace_work(trace)
    c = doc["compute"]
    assert (c["macs_qk"], c["macs_lsb_recompute"], c["macs_pv"]) == (qk, lsb, pv)
    assert c["macs"] == qk + lsb + pv
    assert doc["dram"]["bytes"] >= compulsory_bytes(trace, cfg["precision"])


def test_flagged_rows_over_many_short_blocks_are_all_recomputed():
    """A 600-token prefill with every row flagged recomputes 600 rows per flagged head,
    however the query blocks fall (the last block short): recompute MACs =
    rows x kept keys x head_dim (arithmetic)."""
    arch = sim.load_arch(MID).with_overrides({"buffers.query_kib": 8})   # 64-row blocks: 9 full + 24
    trace = synth_trace(prompt_tokens=600, decode_steps=0, layers=1, heads=2, head_dim=64,
                        lsb_fraction=1.0, lsb_fraction_rows=1.0, seed=1)
    doc = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert doc["compute"]["macs_lsb_recompute"] == 2 * 600 * 600 * 64
