"""Result fields that make pruning gains readable: dense-equivalent and executed operations, key bits.

Hand checks: attention work per head is n_q x n_kv x d MACs for q.K and as many
for p.V (common practice), 1 MAC = 2 operations (common practice); a causal
prefill of n tokens sees n(n+1)/2 (query, key) pairs per head (arithmetic, as
in /shared references: d * n(n+1)/2 q.K MACs per head).
"""

import pytest

import sim
from sim.model.dense import dense_macs

PRUNED = """\
header:
  format: attnsim-trace
  version: 1
  name: pruned_hand
  provenance: {method: hand}
  model: {layers: 1, heads: 4, head_dim: 64}
steps:
- layer: 0
  stage: decode
  head_dim: 64
  heads: [0, 2]
  q_rows: 1
  kv_rows: 8
  kept_k: [0, 3, 5, 7]
  kept_v: [2, 4]
  lsb_rows: [LSB0, LSB1]
"""


def write(tmp_path, text, name="t.yaml"):
    p = tmp_path / name
    p.write_text(text)
    return str(p)


def run(path, **over):
    arch = sim.load_arch("arch_configs/mid.yaml").with_overrides(over) if over else "arch_configs/mid.yaml"
    return sim.simulate(arch, path, keep_intervals=False).to_dict()


def test_dense_equivalent_and_executed_operations(tmp_path):
    doc = run(write(tmp_path, PRUNED.replace("LSB0", "0").replace("LSB1", "0")))
    # dense: 4 heads x 1 query row x 8 context rows x 64 wide, for q.K and again for p.V
    dense = 2 * 4 * 1 * 8 * 64
    assert doc["compute"]["dense_macs"] == dense
    # executed: 2 heads x 4 kept keys x 64 (q.K) + (2 + 4) kept V rows x 64 (p.V)
    executed = 2 * 4 * 64 + (2 + 4) * 64
    assert doc["compute"]["macs"] == executed
    t = doc["throughput"]
    assert t["ops_per_s"] == pytest.approx(2 * executed / doc["seconds"], rel=1e-9)
    assert t["dense_equivalent_ops_per_s"] == pytest.approx(2 * dense / doc["seconds"], rel=1e-9)
    assert doc["compute"]["executed_over_dense"] == pytest.approx(executed / dense, rel=1e-9)


def test_causal_prefill_dense_is_the_triangle():
    from sim.trace.format import Trace, new_header
    from sim.trace.step import make_step

    n, heads, d = 10, 3, 32
    steps = [make_step(0, "prefill", d, heads, n, n, causal=True)]
    trace = Trace(new_header("hand", name="causal", model={"layers": 1, "heads": heads, "head_dim": d}), steps)
    assert dense_macs(trace) == 2 * heads * d * n * (n + 1) // 2


def test_effective_key_bits(tmp_path):
    """MSB plane only: k_msb_bits; every head refetching the LSB plane for its rows: k_msb + k_lsb."""
    arch = sim.load_arch("arch_configs/mid.yaml")
    msb, lsb = arch.precision.k_msb_bits, arch.precision.k_lsb_bits
    none = run(write(tmp_path, PRUNED.replace("LSB0", "0").replace("LSB1", "0"), "a.yaml"))
    assert none["dram"]["effective_key_bits"] == pytest.approx(msb)
    every = run(write(tmp_path, PRUNED.replace("LSB0", "1").replace("LSB1", "1"), "b.yaml"))
    assert every["dram"]["effective_key_bits"] == pytest.approx(msb + lsb)
    # consistency with the document's own plane bytes (not a reference check)
    half = run(write(tmp_path, PRUNED.replace("LSB0", "1").replace("LSB1", "0"), "c.yaml"))
    planes = half["dram"]["bytes_by_plane"]
    assert half["dram"]["effective_key_bits"] == pytest.approx(msb * (planes["K"] + planes["KL"]) / planes["K"])
    assert msb < half["dram"]["effective_key_bits"] < msb + lsb


def test_build_and_engine_settings_recorded():
    from sim.build import build_id

    doc = sim.simulate("arch_configs/mid.yaml", "traces/demo_decode.yaml", grain_rows=256, seed=3,
                       keep_intervals=False).to_dict()
    assert doc["simulator"]["build"] == build_id() and doc["simulator"]["build"].startswith(sim.__version__ + "+")
    assert doc["engine"] == {"grain_rows": 256, "seed": 3}
    assert doc["trace"]["head_dims"] == [64]


def test_step_layer_and_stage_cycles_add_up_and_are_never_negative():
    """Steps of requests decoded together overlap, and one may end before a step listed
    before it: each step counts what it added to the run (arithmetic: the increments of
    the latest end so far are >= 0 and sum to the run's end; so do layers and stages)."""
    doc = sim.simulate("arch_configs/server.yaml", "traces/demo_gqa_batch.yaml", keep_intervals=False).to_dict()
    steps = doc["per_step_cycles"]
    assert min(steps) >= 0.0
    for part in (steps, list(doc["per_layer_cycles"].values()), list(doc["per_stage_cycles"].values())):
        assert doc["cycles"] - 1 < sum(part) <= doc["cycles"] + 1e-6   # cycles: the end, rounded up


def test_write_tail_is_the_run_after_the_last_step():
    """A run ends when its last write is in memory: the write tail is the run's end less the
    last step's end (arithmetic on the per-step figures: steps sum to the run, so the tail is
    at most the last step's share), zero for a trace without writes."""
    doc = sim.simulate("arch_configs/memory/ddr4_3200.yaml", "traces/demo_gqa_batch.yaml",
                       keep_intervals=False).to_dict()
    tail = doc["dram"]["write_tail_cycles"]
    assert doc["dram"]["write_bytes"] > 0 and 0 < tail <= doc["per_step_cycles"][-1]
    assert run("traces/demo_decode.yaml")["dram"]["write_tail_cycles"] == 0.0
