"""On a memory-bound decode, bytes saved by sparsity become time saved.

Reference: the roofline model (S. Williams, A. Waterman, D. Patterson, CACM
52(4), 2009): a memory-bound run takes about bytes / peak bandwidth, so a
technique that cuts the bytes by a factor r should cut the time by nearly r.
Decode -- one query row against the cached keys and values -- is memory-bound
(common practice, no source). Each technique is compared with the same trace
with the technique off:

* cascade token pruning: half the cached tokens kept vs all;
* value pruning: 30 % of the V rows kept after the top-k vs all;
* progressive key quantization: a 6-bit most-significant key plane plus the
  6-bit least-significant plane for the 20 % of heads that ask for it, vs
  12-bit keys fetched whole.

With a deep issue window (the fetch unit keeps fetching other heads' keys
while one head waits for its top-k or softmax decision) and the default array
lookahead, each speedup is at least 0.85 x its byte reduction. The test also
prints the strict in-order fetch with one block of lookahead (the engine's
behaviour before the window existed), so a reader sees what the two buy.
"""

import os

import numpy as np
import pytest

import sim
from sim.trace.format import Trace, make_step, new_header, validate

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# A datapath of our own: 1024 multipliers on 16 HBM2-class channels, 12-bit data,
# keys in two 6-bit planes, 8/192/192 KiB of query/key/value buffer.
DATAPATH = {
    "extends": os.path.join(ROOT, "arch_configs", "hbm2_stack.yaml"), "name": "decode-testbed",
    "dram": {"channels": 16}, "fetch": {"issue_window": 64, "inflight": 64},
    "buffers": {"query_kib": 8, "key_kib": 192, "value_kib": 192},
    "dot": {"multipliers": 1024, "lanes": 64, "arrays": "shared"},
    "softmax": {"lanes": 64}, "topk": {"comparators": 32},
    "precision": {"q_bits": 12, "k_msb_bits": 6, "k_lsb_bits": 6, "v_bits": 12},
}
FULL_KEYS = {"precision.k_msb_bits": 12, "precision.k_lsb_bits": 0}
LAYERS, HEADS, CONTEXT, TOKENS = 4, 16, 1024, 4


def decode_trace(token_keep=1.0, value_keep=1.0, lsb_fraction=0.0, seed=0):
    rng = np.random.default_rng(seed)
    steps = []
    for t in range(TOKENS):
        kv = CONTEXT + t
        for layer in range(LAYERS):
            n = int(kv * token_keep)
            kept = np.sort(rng.choice(kv, n, replace=False)) if n < kv else None
            lsb = (rng.random(HEADS) < lsb_fraction).astype(int)
            steps.append(make_step(layer, "decode", 64, HEADS, 1, kv, kept_k=kept,
                                   kept_v=max(1, int(n * value_keep)), lsb_rows=lsb))
    return validate(Trace(new_header("synthetic", name="decode"), steps, "<decode>"))


CASES = {
    "token pruning": ({}, {}, dict(token_keep=0.5)),
    "value pruning": ({}, {}, dict(value_keep=0.3)),
    "key-plane skipping": (FULL_KEYS, {}, dict(lsb_fraction=0.2)),
}


def _gain(technique, **engine):
    """(byte reduction, speedup) of a technique: off / on."""
    arch_off, arch_on, on = CASES[technique]
    base = sim.load_arch(DATAPATH).with_overrides(engine) if engine else sim.load_arch(DATAPATH)
    runs = []
    for over, knobs in ((arch_off, {}), (arch_on, on)):
        arch = base.with_overrides(over) if over else base
        doc = sim.simulate(arch, decode_trace(**knobs), keep_intervals=False).to_dict()
        runs.append(doc)
    off, on_doc = runs
    assert off["bounds"]["bound"] == "memory"
    return off["dram"]["bytes"] / on_doc["dram"]["bytes"], off["cycles"] / on_doc["cycles"]


@pytest.mark.parametrize("technique", list(CASES))
def test_bytes_saved_become_time_saved(technique, capsys):
    saved, speedup = _gain(technique)
    before = _gain(technique, **{"fetch.issue_window": 0, "dot.lookahead": 1})
    with capsys.disabled():
        print(f"\n{technique}: bytes /{saved:.2f}, time /{speedup:.2f} ({speedup / saved:.2f} of it); "
              f"strict fetch, one block of lookahead: time /{before[1]:.2f} ({before[1] / before[0]:.2f})")
    assert saved > 1.2
    assert speedup >= 0.85 * saved, (technique, saved, speedup)
