"""A long step is made a few query blocks at a time, with the same result.

Checks of our own engine (common practice, no source): the program builder
makes a step of more than one query block in parts as the units reach it
(``BLOCKS_PER_MAKE`` blocks, fewer past ``TXNS_PER_MAKE`` fetch transactions), settling each transaction's last reader (the operation that
frees its buffer room) once no later block can read it. Made in parts, a run
must give the very same document as made whole, and the operations waiting
in the feeds must follow the parts, not the step.
"""

import json
import os

import pytest

import sim
from sim.engine import program
from sim.engine.datapath import run_datapath
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def config(name):
    return os.path.join(ROOT, "arch_configs", f"{name}.yaml")


def document(arch, trace):
    doc = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    doc.pop("build", None)
    return json.dumps(doc, sort_keys=True, default=str)


CASES = [
    # resident K and V across many 16-row blocks, causal, the LSB plane resident
    ("mid", {"buffers.key_kib": 256, "buffers.value_kib": 256},
     dict(prompt_tokens=400, decode_steps=1, layers=2, heads=4, kv_heads=2, head_dim=64, causal=True,
          lsb_fraction=0.5, lsb_fraction_rows=1.0, seed=2)),
    # a window: early resident chunks stop being read before the step ends
    ("server", {"buffers.query_kib": 4},
     dict(prompt_tokens=300, decode_steps=1, layers=1, heads=2, kv_heads=1, head_dim=64, causal=True,
          window=50, seed=3)),
    # chunks that do not fit: streamed per block, value and token pruning, writes
    ("edge", {},
     dict(prompt_tokens=200, decode_steps=2, layers=2, heads=4, kv_heads=4, head_dim=32, token_keep=0.6,
          value_keep=0.4, seed=4)),
    # many heads of one block each: one query vector every block reads
    ("hbm2_stack", {},
     dict(prompt_tokens=64, decode_steps=3, layers=1, heads=8, kv_heads=8, head_dim=32, include_prefill=False,
          seed=5)),
]


@pytest.mark.parametrize("name, over, kw", CASES, ids=[c[0] for c in CASES])
@pytest.mark.parametrize("parts, txns", [(1, 4096), (3, 4096), (64, 5)])
def test_a_step_made_in_parts_gives_the_same_document(monkeypatch, name, over, kw, parts, txns):
    arch = sim.load_arch(config(name)).with_overrides(over)
    trace = synth_trace(**kw)
    monkeypatch.setattr(program, "BLOCKS_PER_MAKE", 10**9)
    monkeypatch.setattr(program, "TXNS_PER_MAKE", 10**9)
    whole = document(arch, trace)
    monkeypatch.setattr(program, "BLOCKS_PER_MAKE", parts)
    monkeypatch.setattr(program, "TXNS_PER_MAKE", txns)
    made = []
    real = program.ProgramBuilder._emit_blocks
    monkeypatch.setattr(program.ProgramBuilder, "_emit_blocks", lambda self, st: made.append(st.s) or real(self, st))
    assert document(arch, trace) == whole
    assert len(made) > len(set(made))          # some step was made in more than one part


def test_operations_in_the_feeds_follow_the_parts(monkeypatch):
    """One causal 1,024-token prefill step on mid with small buffers (4-row query blocks, K and V
    streamed again for each): made whole, the fetch feed holds every transaction of the step
    at once; made 16 blocks at a time (of 256), a small share of them (causal: later parts
    see more keys, so the last part is the largest); made until 64 transactions are passed,
    fewer again."""
    arch = sim.load_arch(config("mid")).with_overrides(
        {"buffers.query_kib": 4, "buffers.key_kib": 32, "buffers.value_kib": 32})
    trace = synth_trace(prompt_tokens=1024, decode_steps=0, layers=1, heads=4, kv_heads=1, head_dim=128,
                        causal=True, seed=1)
    peaks = {}
    real = program.ProgramBuilder._emit_blocks
    for parts, txns in ((10**9, 10**9), (16, 10**9), (10**9, 64)):
        monkeypatch.setattr(program, "BLOCKS_PER_MAKE", parts)
        monkeypatch.setattr(program, "TXNS_PER_MAKE", txns)
        peak = [0]

        def emit(self, st, peak=peak):
            real(self, st)
            peak[0] = max(peak[0], len(self.prog.fetch.ops))

        monkeypatch.setattr(program.ProgramBuilder, "_emit_blocks", emit)
        stats = run_datapath(arch, trace, keep_intervals=False)
        peaks[parts, txns] = (peak[0], stats.fetch_stats["transactions"])
    whole, total = peaks[10**9, 10**9]
    part, total_parts = peaks[16, 10**9]
    few, total_few = peaks[10**9, 64]
    assert total_parts == total == total_few and whole == total
    assert part * 4 < total
    assert 64 <= few < part / 2
