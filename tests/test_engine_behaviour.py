"""Engine behaviour: state accounting, reuse, determinism, granularity, stalls, bad input.

Mostly internal consistency of the model (common practice, no source), plus
the quickselect cost against Knuth, TAOCP Vol. 3, 5.2.2, exercise 32.
"""

import itertools
import json
import os

import numpy as np
import pytest

import sim
from sim.engine import program, topk
from sim.engine.due import Due
from sim.errors import ConfigError, SimulationStalled
from sim.trace.format import Trace, make_step, new_header, validate
from sim.trace.files import load_trace
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
CONFIGS = os.path.join(ROOT, "arch_configs")
TRACES = os.path.join(ROOT, "traces")


def _mid(**over):
    return sim.load_arch(os.path.join(CONFIGS, "mid.yaml")).with_overrides(over)


def _trace(steps, name="test"):
    return validate(Trace(new_header("hand", name=name), steps, f"<{name}>"))


@pytest.fixture(scope="module")
def pruned_trace():
    return synth_trace(prompt_tokens=128, decode_steps=4, layers=3, heads=4, head_dim=64,
                       token_keep=0.7, head_keep=0.75, value_keep=0.5, lsb_fraction=0.5, seed=7)


def test_state_fractions_sum_to_one_and_stalls_to_starved_plus_blocked(pruned_trace):
    doc = sim.simulate(_mid(), pruned_trace).to_dict()
    assert set(doc["units"]) >= {"dram", "fetch", "dot", "softmax", "topk"}
    for name, u in doc["units"].items():
        total = u["busy"] + u["starved"] + u["blocked"] + u["idle"]
        assert total == pytest.approx(1.0, abs=1e-6), name
        assert sum(u["stalls"].values()) == pytest.approx(u["starved"] + u["blocked"], abs=1e-6), name
        assert all(v >= -1e-12 for v in u["stalls"].values())


def test_cycles_split_by_stage_and_layer(pruned_trace):
    doc = sim.simulate(_mid(), pruned_trace).to_dict()
    assert sum(doc["per_stage_cycles"].values()) == pytest.approx(doc["cycles"], abs=1)
    assert sum(doc["per_layer_cycles"].values()) == pytest.approx(doc["cycles"], abs=1)
    assert len(doc["per_step_cycles"]) == len(pruned_trace.steps)
    assert doc["seconds"] == pytest.approx(doc["cycles"] / (doc["arch"]["config"]["clock_ghz"] * 1e9),
                                           rel=1e-6)


def test_deterministic_byte_for_byte(pruned_trace):
    a = json.dumps(sim.simulate(_mid(), pruned_trace).to_dict(), sort_keys=True)
    b = json.dumps(sim.simulate(_mid(), pruned_trace).to_dict(), sort_keys=True)
    assert a == b
    doc = json.loads(a)
    assert doc["engine"]["seed"] == 0
    other = sim.simulate(_mid(), pruned_trace, seed=11).to_dict()
    assert other["engine"]["seed"] == 11


def test_small_key_buffer_restreams_keys():
    """K that does not fit is re-streamed per query block: bytes fetched exceed compulsory."""
    steps = [make_step(0, "prefill", 64, 2, 1024, 1024)]
    tr = _trace(steps, "restream")
    ample = sim.simulate(_mid(**{"buffers.key_kib": 256, "buffers.value_kib": 512}), tr).to_dict()
    small = sim.simulate(_mid(**{"buffers.key_kib": 8, "buffers.value_kib": 16}), tr).to_dict()
    assert ample["dram"]["bytes"] == ample["dram"]["compulsory_bytes"]
    assert small["dram"]["compulsory_bytes"] == ample["dram"]["compulsory_bytes"]
    # query buffer 16 KiB holds 128 query rows per block -> 8 blocks, K and V each streamed 8 times
    qbytes = 2 * 1024 * 64
    kv = 2 * 1024 * 64 * (4 + 8) // 8
    assert small["dram"]["bytes"] == qbytes + 8 * kv
    assert small["dram"]["fetched_over_compulsory"] > 1.5


def test_pruning_scatter_costs_whole_bursts():
    """An isolated kept row still moves a whole burst: bytes fall less than rows (common practice)."""
    arch = _mid()
    dense = _trace([make_step(0, "decode", 64, 1, 1, 1024)], "dense")
    every_other = _trace([make_step(0, "decode", 64, 1, 1, 1024, kept_k=np.arange(0, 1024, 2))], "scattered")
    d = sim.simulate(arch, dense).to_dict()["dram"]["bytes_by_plane"]
    s = sim.simulate(arch, every_other).to_dict()["dram"]["bytes_by_plane"]
    # K rows are 32 B (64 x 4 bits) in 64 B bursts: keeping every other row saves nothing on K
    assert s["K"] == d["K"]
    # V rows are 64 B, one burst each: half the rows, half the bytes
    assert s["V"] == d["V"] // 2


def test_buffer_too_small_for_a_tile_names_the_knob():
    tr = _trace([make_step(0, "decode", 64, 1, 1, 256)])
    with pytest.raises(ConfigError) as err:
        sim.simulate(_mid(**{"buffers.key_kib": 1}), tr)
    msg = str(err.value)
    assert "buffers.key_kib" in msg and "tile" in msg and "2 KiB" in msg


def test_bad_engine_option():
    tr = _trace([make_step(0, "decode", 64, 1, 1, 256)])
    with pytest.raises(ConfigError, match="engine.grain_rows"):
        sim.simulate(_mid(), tr, grain_rows=0)


def test_lost_dependency_raises_instead_of_hanging(monkeypatch):
    """A datapath that stops making progress raises SimulationStalled naming the waiting units."""
    real = program.ProgramBuilder._fetch
    made = []

    def broken(self, *args, **kwargs):
        txn = real(self, *args, **kwargs)
        made.append(txn)
        if len(made) == 4:   # the fourth fetch waits for a result nothing produces
            txn.waits = list(txn.waits) + [(Due(self.env), "never")]
        return txn

    monkeypatch.setattr(program.ProgramBuilder, "_fetch", broken)
    tr = _trace([make_step(0, "decode", 64, 4, 1, 512)])
    with pytest.raises(SimulationStalled, match="waits for never"):
        sim.simulate(_mid(), tr)


# a case random testing found: the unit timed its wait for the oldest ready transaction
# while a later one (of the descriptor under way, needing more slots) was the one to go
_SPUN = dict(prompt_tokens=187, decode_steps=3, layers=2, heads=2, kv_heads=1, batch=3, token_keep=0.7,
             value_keep=0.5, head_dim=64, seed=0)


def _edge(**over):
    return sim.load_arch(os.path.join(CONFIGS, "edge.yaml")).with_overrides(over)


def test_fetch_waits_for_the_room_of_the_transaction_it_issues_next():
    """The wait for request slots is timed for the transaction that goes next (before the
    fix this run spun a nanosecond at a time for ever)."""
    doc = sim.simulate(_edge(**{"engine.grain_rows": 16}), synth_trace(**_SPUN), keep_intervals=False).to_dict()
    assert doc["cycles"] > 0 and doc["fetch"]["transactions"] > 0


def test_a_fetch_unit_that_spins_raises_instead_of_hanging(monkeypatch):
    """A wait timed wrong (room said to be there when it is not) must end in SimulationStalled,
    not in a run that never ends."""
    from sim.engine import fetch
    monkeypatch.setattr(fetch.FetchUnit, "when_room", lambda self, txn: self.env.now)
    with pytest.raises(SimulationStalled, match="still blocked by inflight_limit .*edge.yaml"):
        sim.simulate(_edge(), synth_trace(**_SPUN), keep_intervals=False)


def test_value_pruning_waits_for_topk_and_fetches_fewer_values():
    dense = _trace([make_step(0, "decode", 64, 4, 1, 2048)], "dense")
    pruned = _trace([make_step(0, "decode", 64, 4, 1, 2048, kept_v=256)], "pruned")
    d = sim.simulate(_mid(), dense).to_dict()
    p = sim.simulate(_mid(), pruned).to_dict()
    assert p["dram"]["bytes_by_plane"]["V"] < d["dram"]["bytes_by_plane"]["V"] / 4
    assert p["compute"]["topk_comparisons"] > 0
    assert p["units"]["fetch"]["stalls"].get("topk", 0) > 0


# --- quickselect cost (Knuth, TAOCP Vol. 3, 5.2.2, ex. 32) ---------------------------------

def test_knuth_expected_comparisons_worked_example():
    """E[C(10, 3)] = 17.75 to two decimals (brute-force average quoted in ../shared/references.md;
    the exact value of the formula is 17.7468...)."""
    assert topk.expected_comparisons(10, 3) == pytest.approx(17.75, abs=0.005)


def _first_pivot_comparisons(seq, m):
    """Hoare's FIND with the first key as pivot; a partition of n keys costs n - 1."""
    c = 0
    while len(seq) > 1:
        p = seq[0]
        c += len(seq) - 1
        less = [x for x in seq if x < p]
        if m <= len(less):
            seq = less
        elif m == len(less) + 1:
            return c
        else:
            m -= len(less) + 1
            seq = [x for x in seq if x > p]
    return c


@pytest.mark.parametrize("n", [5, 7])
def test_knuth_formula_matches_brute_force_average(n):
    for m in range(1, n + 1):
        perms = list(itertools.permutations(range(n)))
        avg = sum(_first_pivot_comparisons(list(p), m) for p in perms) / len(perms)
        assert topk.expected_comparisons(n, m) == pytest.approx(avg), (n, m)


def test_counted_quickselect_averages_to_the_formula():
    rng = np.random.default_rng(5)
    n, keep = 400, 40
    vals = rng.permutation(n).astype(float)
    runs = [topk.counted_quickselect(vals, keep, rng) for _ in range(3000)]
    assert np.mean(runs) == pytest.approx(topk.select_cost(n, keep), rel=0.03)


@pytest.mark.parametrize("key_kib", [8, 16])
def test_scattered_rows_in_small_buffers_do_not_deadlock(key_kib):
    """Scattered kept rows cost whole bursts: chunks are cut by bursts, so the
    LSB plane and the re-fetched MSB plane still fit the key buffer together."""
    tr = synth_trace(prompt_tokens=128, decode_steps=32, layers=2, heads=2, token_keep=0.75,
                     value_keep=0.5, lsb_fraction=0.25, seed=11)
    doc = sim.simulate(_mid(**{"buffers.key_kib": key_kib}), tr).to_dict()
    assert doc["buffers"]["key"]["peak_bytes"] <= key_kib * 1024


from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from([2, 4, 8, 16]), st.sampled_from([4, 8, 32]), st.sampled_from([2, 4, 16]),
       st.sampled_from([0.5, 0.8, 1.0]), st.sampled_from([0.0, 0.5, 1.0]), st.sampled_from([16, 64, 1024]),
       st.integers(0, 3), st.sampled_from([0, 1, 2, 5, 16, 1 << 16]), st.integers(1, 6))
def test_small_buffers_never_stall(key_kib, value_kib, query_kib, keep, lsb, grain, seed, window,
                                   lookahead):
    """Any buffer that holds a tile finishes the run (no fetch/buffer deadlock), with any
    issue window (room is still reserved in program order; a window far deeper than the
    buffers simply stops where room stops) and any array lookahead."""
    arch = _mid(**{"buffers.key_kib": key_kib, "buffers.value_kib": value_kib,
                   "buffers.query_kib": query_kib, "dot.tile_rows": 32, "engine.grain_rows": grain,
                   "fetch.issue_window": window, "dot.lookahead": lookahead})
    tr = synth_trace(prompt_tokens=96, decode_steps=3, layers=2, heads=3, head_dim=64, token_keep=keep,
                     value_keep=keep, lsb_fraction=lsb, seed=seed)
    doc = sim.simulate(arch, tr).to_dict()
    for name in ("query", "key", "value"):
        assert doc["buffers"][name]["peak_bytes"] <= doc["buffers"][name]["capacity_bytes"]


@pytest.mark.parametrize("cfg", ["mid", "hbm2_stack"])
def test_row_hits_first_at_a_fine_grain_completes_and_agrees(cfg):
    """A share held for a row-hits-first decision is placed from its arrival; its data is
    handed over no earlier than the decision (this once raised 'Negative delay'), and the
    grain still changes the cycles by under 2 % (internal consistency, no source)."""
    arch = sim.load_arch(os.path.join(CONFIGS, f"{cfg}.yaml")).with_overrides({"dram.scheduler": "row_hits_first"})
    trace = os.path.join(TRACES, "synth_decode.npz")
    coarse = sim.simulate(arch, trace, keep_intervals=False).to_dict()["cycles"]
    fine = sim.simulate(arch, trace, grain_rows=16, keep_intervals=False).to_dict()["cycles"]
    assert abs(fine - coarse) <= 0.02 * coarse
