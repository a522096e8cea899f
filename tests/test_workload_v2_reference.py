"""Reference checks of the engine on trace format version 2 workloads.

Grouped-query heads, batches of requests, causal and windowed prefill, and the
roofline bound of such traces, plus the version-1 results the engine gave
before it learned version 2. Every expected value is computed here from the
trace's own fields and the config's knobs -- never through ``Step.work()``,
``sim.engine`` or ``sim.model`` -- with the source of the rule named beside
each check:

* grouped-query attention (J. Ainslie et al., "GQA", EMNLP 2023) and
  multi-query attention (N. Shazeer, 2019): the query heads of a group read one
  K/V head, so K/V bytes = kv_heads x context x head_dim x bits / 8 per plane
  (arithmetic; K and V each at its precision knob's width);
* causal attention: row i sees keys 0..i, a prefill of n kept tokens does
  d x n(n+1)/2 q.K MACs per head (arithmetic of the triangle); a sliding window
  of W positions (I. Beltagy, M. Peters, A. Cohan, "Longformer", 2020) gives
  sum over i of min(i + 1, W) (arithmetic of the band);
* roofline (S. Williams, A. Waterman, D. Patterson, CACM 52(4), 2009): a run
  takes at least max(work / peak compute, bytes that must move / peak
  bandwidth);
* work of attention per head: q.K is rows x seen keys x head_dim MACs, p.V rows
  x used value rows x head_dim MACs, one softmax element per score (common
  practice, no source; the rules for which keys a row sees are the trace
  format's, traces/README.md).

The last parts hold the results every bundled version-1 trace gave on every
bundled config before the engine learned version 2 (tests/data; its note names
the commit), compared exactly, and the refusals of issue 12's "Bad input"
section (one line naming the file, the dotted field, the value and what was
expected; exit status 2). ``python tests/test_workload_v2_reference.py
--record`` re-measures the fixture (only when a change of results is intended
and explained; then update the note).
"""

import functools
import json
import os
import subprocess
import sys

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.trace.format import Trace, make_step, new_header, validate
from sim.trace.files import load_trace
from sim.trace.synth import synth_trace

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
FIXTURE = os.path.join(HERE, "data", "v1_results_before_v2_engine.json")


def config(name):
    return os.path.join(ROOT, "arch_configs", name + ".yaml")


def run(arch, trace):
    return sim.simulate(arch, trace, keep_intervals=False).to_dict()


def hand_trace(steps, layers, heads, kv_heads, head_dim):
    model = {"layers": layers, "heads": heads, "kv_heads": kv_heads, "head_dim": head_dim}
    return validate(Trace(new_header("hand", name="v2-reference", model=model), steps, "<test>"))


def bytes_of(rows, head_dim, bits):
    """Bytes of ``rows`` rows of ``head_dim`` elements at ``bits`` bits (not burst-rounded)."""
    return rows * head_dim * bits // 8


# --------------------------------------------------------------------------
# Grouped-query heads


def decode_trace(heads, kv_heads, context, head_dim, layers=2, tokens=1, requests=1, writes=False):
    """``tokens`` dense decode tokens of ``requests`` identical requests; query head h reads
    KV head h // (heads // kv_heads). No prefill steps, no pruning, no LSB plane."""
    group = heads // kv_heads
    steps = []
    for t in range(tokens):
        for layer in range(layers):
            for r in range(requests):
                steps.append(make_step(layer, "decode", head_dim, heads, 1, context + t,
                                       kv_heads=[h // group for h in range(heads)], request=r,
                                       new_kv_rows=int(writes), out_rows=int(writes)))
    return hand_trace(steps, layers, heads, kv_heads, head_dim)


@pytest.mark.parametrize("kv_heads", [8, 4, 2, 1])
def test_grouped_query_decode_fetches_kv_once_per_group(kv_heads):
    """Ainslie et al. (EMNLP 2023); Shazeer (2019) for kv_heads = 1. 8 query heads of
    width 128 on a 1024-token context, 2 layers, one decode token, on the HBM2 stack
    (1 MiB key and value buffers: a layer's K/V, at most 8 heads x 1024 rows x 64 B,
    fits, so nothing re-streams). Reads = Q rows (8 x 128 B per layer) + K/V bytes,
    K/V bytes = kv_heads x 1024 x 128 x (k_msb_bits + v_bits) / 8 per layer, and each
    row is a whole number of 64-byte bursts (K MSB row 64 B, Q and V rows 128 B), so
    the check is exact: group size g fetches 1/g of the multi-head bytes. q.K and p.V
    MACs stay 8 x 1024 x 128 per layer whatever the grouping."""
    heads, n, d, layers = 8, 1024, 128, 2
    arch = sim.load_arch(config("hbm2_stack"))
    p = arch.precision
    doc = run(arch, decode_trace(heads, kv_heads, n, d, layers))
    q_bytes = layers * bytes_of(heads, d, p.q_bits)
    kv_bytes = layers * (bytes_of(kv_heads * n, d, p.k_msb_bits) + bytes_of(kv_heads * n, d, p.v_bits))
    mha_kv_bytes = layers * (bytes_of(heads * n, d, p.k_msb_bits) + bytes_of(heads * n, d, p.v_bits))
    assert kv_bytes * (heads // kv_heads) == mha_kv_bytes
    assert doc["dram"]["read_bytes"] == q_bytes + kv_bytes
    assert doc["dram"]["write_bytes"] == 0
    assert doc["compute"]["macs_qk"] == layers * heads * n * d
    assert doc["compute"]["macs_pv"] == layers * heads * n * d
    assert doc["compute"]["softmax_elements"] == layers * heads * n


# --------------------------------------------------------------------------
# Causal prefill and sliding windows


def triangle(n):
    return n * (n + 1) // 2


def band(n, window):
    return sum(min(i + 1, window) for i in range(n))


@pytest.mark.parametrize("n, heads, kv_heads, d, query_kib", [
    (1, 1, 1, 32, 256),
    (37, 2, 1, 64, 1),       # 1 KiB query buffer: 16-row query blocks, the last one short
    (130, 4, 2, 64, 2),
    (300, 4, 4, 32, 256),
])
def test_causal_prefill_work_is_the_triangle(n, heads, kv_heads, d, query_kib):
    """Arithmetic of the causal triangle: row i of n sees keys 0..i, so q.K MACs =
    heads x d x n(n+1)/2, softmax elements = heads x n(n+1)/2, and (every V row kept)
    p.V MACs likewise; however the query rows fall into blocks."""
    group = heads // kv_heads
    step = make_step(0, "prefill", d, heads, n, n, kv_heads=[h // group for h in range(heads)], causal=True)
    arch = sim.load_arch(config("mid")).with_overrides({"buffers.query_kib": query_kib})
    c = run(arch, hand_trace([step], 1, heads, kv_heads, d))["compute"]
    assert c["macs_qk"] == heads * d * triangle(n)
    assert c["softmax_elements"] == heads * triangle(n)
    assert c["macs_pv"] == heads * d * triangle(n)


def test_pruned_causal_prefill_counts_the_triangle_of_kept_tokens():
    """Arithmetic of the causal triangle on n kept tokens: the i-th kept token (in
    position order) sees the i+1 kept tokens at or before it, whatever the holes
    token pruning left, so q.K MACs = heads x d x n(n+1)/2 with n = kept tokens."""
    rng = np.random.default_rng(12)
    kept = np.sort(rng.choice(400, size=150, replace=False))
    heads, d = 3, 64
    step = make_step(0, "prefill", d, heads, len(kept), 400, kept_k=kept, causal=True)
    arch = sim.load_arch(config("mid")).with_overrides({"buffers.query_kib": 2})
    c = run(arch, hand_trace([step], 1, heads, heads, d))["compute"]
    assert c["macs_qk"] == heads * d * triangle(150)
    assert c["softmax_elements"] == heads * triangle(150)


@pytest.mark.parametrize("n, window", [(64, 1), (64, 16), (200, 37), (200, 200), (50, 1000)])
def test_causal_window_work_is_the_band(n, window):
    """Beltagy et al. (2020) sliding window on a causal prefill: row i sees keys
    max(0, i - W + 1)..i, i.e. min(i + 1, W) of them (arithmetic of the band):
    q.K MACs = heads x d x sum over i of min(i + 1, W), softmax elements likewise."""
    heads, d = 2, 64
    step = make_step(0, "prefill", d, heads, n, n, causal=True, window=window)
    arch = sim.load_arch(config("mid")).with_overrides({"buffers.query_kib": 1})
    c = run(arch, hand_trace([step], 1, heads, heads, d))["compute"]
    assert c["macs_qk"] == heads * d * band(n, window)
    assert c["softmax_elements"] == heads * band(n, window)
    assert c["macs_pv"] == heads * d * band(n, window)


def test_decode_window_reads_only_the_last_positions():
    """Beltagy et al. (2020): a decode token at position p with window W sees the
    keys at p - W + 1..p, W of them: q.K MACs = heads x W x d, and only those K and V
    rows need to be read (arithmetic; 128-byte rows, whole bursts)."""
    heads, n, d, w = 4, 2048, 128, 256
    step = make_step(0, "decode", d, heads, 1, n, window=w)
    arch = sim.load_arch(config("hbm2_stack"))
    p = arch.precision
    doc = run(arch, hand_trace([step], 1, heads, heads, d))
    assert doc["compute"]["macs_qk"] == heads * w * d
    needed = bytes_of(heads, d, p.q_bits) + bytes_of(heads * w, d, p.k_msb_bits) + bytes_of(heads * w, d, p.v_bits)
    assert needed <= doc["dram"]["read_bytes"] < needed + bytes_of(heads * (n - w), d, p.k_msb_bits)


# --------------------------------------------------------------------------
# Batches


@pytest.mark.parametrize("batch", [2, 8])
def test_batch_of_identical_decodes(batch):
    """B identical requests (8 query heads on 2 KV heads, width 128, 2048-token
    context, 2 layers x 2 tokens) on the HBM2 stack, where decode is memory-bound
    by arithmetic (checked first: MACs / multipliers is far below bytes / peak
    bandwidth). Roofline (Williams et al. 2009): the batch takes at least B times
    one request's bytes / peak bandwidth, and at most B times one request's cycles
    (the requests could always run one after another). Each request has its own
    context, so the batch streams exactly B times one request's bytes: reads = B x
    (Q + K + V bytes), arithmetic, whole bursts."""
    heads, kv_heads, n, d, layers, tokens = 8, 2, 2048, 128, 2, 2
    arch = sim.load_arch(config("hbm2_stack"))
    p = arch.precision
    one = run(arch, decode_trace(heads, kv_heads, n, d, layers, tokens))
    many = run(arch, decode_trace(heads, kv_heads, n, d, layers, tokens, requests=batch))
    per_request = sum(bytes_of(heads, d, p.q_bits) + bytes_of(kv_heads * (n + t), d, p.k_msb_bits)
                      + bytes_of(kv_heads * (n + t), d, p.v_bits) for t in range(tokens)) * layers
    macs = 2 * sum(heads * (n + t) * d for t in range(tokens)) * layers
    bytes_per_cycle = arch.dram.channels * arch.dram.channel_gbps / arch.clock_ghz
    assert macs / arch.dot.multipliers < 0.1 * per_request / bytes_per_cycle  # memory-bound by arithmetic
    assert one["dram"]["read_bytes"] == per_request
    assert many["dram"]["read_bytes"] == batch * per_request
    assert many["dram"]["bytes"] == batch * one["dram"]["bytes"]
    assert many["compute"]["macs"] == batch * macs
    assert batch * per_request / bytes_per_cycle <= many["cycles"] <= batch * one["cycles"]


def test_batch_with_cache_writes_streams_b_times_the_bytes():
    """Same as above with each decode step appending its K/V row and writing its
    output back: a memory-bound batch of B identical decodes moves B times one
    request's read bytes and B times its write bytes (each request writes its own
    cache rows and outputs; arithmetic), and takes at least all of them over the
    peak bandwidth (roofline, Williams et al. 2009: writes cross the interface too).

    B times one request's cycles is no upper bound here: a lone request drains its
    posted writes while the channels idle, nearly for free, but a batch leaves no
    idle time, so its writes drain at the write queue's high mark between reads (bus
    turnarounds, rows reopened). Measured (2 tokens, 4 requests): one request 6,827
    cycles without writes and 7,305 with (the run ends once its last write is in
    memory); four take 26,914 without writes and 29,861 with (4.09 x one)."""
    heads, kv_heads, n, d, batch = 8, 2, 1024, 128, 4
    arch = sim.load_arch(config("hbm2_stack"))
    one = run(arch, decode_trace(heads, kv_heads, n, d, tokens=2, writes=True))
    many = run(arch, decode_trace(heads, kv_heads, n, d, tokens=2, requests=batch, writes=True))
    assert one["dram"]["write_bytes"] > 0
    assert many["dram"]["write_bytes"] == batch * one["dram"]["write_bytes"]
    assert many["dram"]["read_bytes"] == batch * one["dram"]["read_bytes"]
    bytes_per_cycle = arch.dram.channels * arch.dram.channel_gbps / arch.clock_ghz
    moved = batch * (one["dram"]["read_bytes"] + one["dram"]["write_bytes"])
    assert many["cycles"] >= moved / bytes_per_cycle


# --------------------------------------------------------------------------
# Roofline of version-2 traces (hypothesis)


def query_positions(s):
    """Trace format rule (traces/README.md): prefill rows sit at the kept positions,
    decode row i at kv_rows - q_rows + i."""
    if s.stage == "prefill":
        return np.asarray(s.kept_k, dtype=np.int64)
    return np.arange(s.kv_rows - s.q_rows, s.kv_rows, dtype=np.int64)


def seen(s, keys, rows):
    """Boolean rows x keys: which key positions each query position sees (causal:
    key <= query; window W: key > query - W). Brute force on purpose."""
    keys = np.asarray(keys, dtype=np.int64)[None, :]
    q = rows[:, None]
    ok = np.ones((len(rows), keys.shape[1]), dtype=bool)
    if s.causal:
        ok &= keys <= q
    if s.window:
        ok &= keys > q - s.window
    return ok


def step_demand(s, precision):
    """(q.K MACs, LSB MACs, p.V MACs, softmax elements, bytes that must be read) of one
    step, from its fields alone. Bytes are a floor, not burst-rounded: every query row
    of every active head; per KV head the K rows (MSB plane) some row sees, the LSB
    plane of the rows seen by its flagged rows (the last ones, traces/README.md), and
    at least as many V rows as its most demanding head uses for one row."""
    p = precision
    d = s.head_dim
    rows = query_positions(s)
    kv_heads = np.asarray(s.kv_heads)
    kv_ids = sorted(set(kv_heads.tolist()))
    key_sets = dict(zip(kv_ids, s.kv_kept_k)) if s.kv_kept_k is not None else {g: s.kept_k for g in kv_ids}
    qk = lsb = pv = 0
    need = len(s.heads) * s.q_rows * d * p["q_bits"] / 8
    for g in kv_ids:
        vis = seen(s, key_sets[g], rows)
        per_row = vis.sum(axis=1)
        members = np.flatnonzero(kv_heads == g)
        need += vis.any(axis=0).sum() * d * p["k_msb_bits"] / 8
        most_lsb = max(int(s.lsb_rows[j]) for j in members)
        if most_lsb and p["k_lsb_bits"]:
            need += vis[s.q_rows - most_lsb:].any(axis=0).sum() * d * p["k_lsb_bits"] / 8
        v_rows = 0
        for j in members:
            qk += int(per_row.sum()) * d
            m = int(s.lsb_rows[j])
            lsb += int(per_row[s.q_rows - m:].sum()) * d if m else 0
            if s.kept_v_idx is not None:
                used = seen(s, s.kept_v_idx[j], rows).sum(axis=1)
            else:
                used = np.minimum(per_row, int(s.kept_v[j]))
            pv += int(used.sum()) * d
            v_rows = max(v_rows, int(used.max()))
        need += v_rows * d * p["v_bits"] / 8
    softmax = (qk + lsb) // d
    return qk, lsb, pv, softmax, need


@st.composite
def _v2_cases(draw):
    lanes = draw(st.sampled_from([16, 32, 64]))
    over = {
        "clock_ghz": draw(st.sampled_from([0.5, 1.0, 2.0])),
        "dram.channels": draw(st.sampled_from([1, 2, 4, 8])),
        "dram.channel_gbps": draw(st.sampled_from([12.8, 25.6, 32.0])),
        "dot.lanes": lanes,
        "dot.multipliers": lanes * draw(st.sampled_from([2, 4, 16, 32])),
        "dot.arrays": draw(st.sampled_from(["shared", "separate"])),
        "buffers.query_kib": draw(st.sampled_from([1, 4, 64])),
        "buffers.key_kib": draw(st.sampled_from([4, 8, 32, 256])),
        "buffers.value_kib": draw(st.sampled_from([4, 8, 32, 256])),
        "softmax.lanes": draw(st.sampled_from([4, 16, 64])),
        "fetch.issue_window": draw(st.sampled_from([0, 3, 16])),
        "engine.grain_rows": draw(st.sampled_from([16, 128, 1024])),
        "dot.tile_rows": 16,
    }
    heads = draw(st.sampled_from([2, 4, 6]))
    trace = synth_trace(
        prompt_tokens=draw(st.sampled_from([16, 70, 200])), decode_steps=draw(st.integers(0, 3)),
        layers=draw(st.integers(1, 2)), heads=heads,
        kv_heads=draw(st.sampled_from([k for k in (1, 2, heads) if heads % k == 0])),
        head_dim=draw(st.sampled_from([32, 64])), batch=draw(st.integers(1, 3)),
        causal=draw(st.booleans()), window=draw(st.sampled_from([0, 8, 50])),
        writes=draw(st.booleans()),
        token_keep=draw(st.sampled_from([1.0, 0.6])), head_keep=draw(st.sampled_from([1.0, 0.5])),
        value_keep=draw(st.sampled_from([1.0, 0.4])), lsb_fraction=draw(st.sampled_from([0.0, 0.5])),
        lsb_fraction_rows=draw(st.sampled_from([0.2, 1.0])), seed=draw(st.integers(0, 5)))
    return over, trace


@settings(max_examples=30, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(_v2_cases())
def test_no_v2_run_beats_its_roofline_and_work_is_exact(case):
    """Roofline (Williams, Waterman, Patterson, CACM 2009) of version-2 traces
    (grouped KV heads, batches, causal prefill, windows, writes, pruning, LSB flags):
    cycles >= max(compute floor, bytes that must be read / peak bytes per cycle), the
    compute floor being MACs / multipliers (half the multipliers each for q.K and p.V
    when the arrays are separate) and softmax elements / softmax lanes (a lane takes
    at most one element a cycle); the reported MACs and softmax elements equal the
    work counted here by brute force from the fields; reads are at least that floor."""
    over, trace = case
    arch = sim.load_arch(config("mid")).with_overrides(over)
    doc = run(arch, trace)
    (qk, lsb, pv, softmax, need), floor = roofline(trace, doc["arch"]["config"])
    c = doc["compute"]
    assert (c["macs_qk"], c["macs_lsb_recompute"], c["macs_pv"]) == (qk, lsb, pv)
    assert c["softmax_elements"] == softmax
    assert doc["dram"]["read_bytes"] >= need
    assert doc["cycles"] >= floor * (1 - 1e-9)


def roofline(trace, cfg):
    """((q.K, LSB, p.V MACs, softmax elements, bytes that must be read), the roofline bound
    in cycles) of ``trace`` on the config document ``cfg``, by :func:`step_demand`. Also
    used by ``bench/engine_fuzz.py``."""
    qk = lsb = pv = softmax = 0
    need = 0.0
    for s in trace.steps:
        a, b, c, e, n = step_demand(s, cfg["precision"])
        qk, lsb, pv, softmax, need = qk + a, lsb + b, pv + c, softmax + e, need + n
    m = cfg["dot"]["multipliers"]
    if cfg["dot"]["arrays"] == "separate":
        dot_floor = max((qk + lsb) / (m // 2), pv / (m // 2))
    else:
        dot_floor = (qk + lsb + pv) / m
    compute = max(dot_floor, softmax / cfg["softmax"]["lanes"])
    bytes_per_cycle = cfg["dram"]["channels"] * cfg["dram"]["channel_gbps"] / cfg["clock_ghz"]
    return (qk, lsb, pv, softmax, need), max(compute, need / bytes_per_cycle)


# --------------------------------------------------------------------------
# Version-1 traces: the results measured before the engine learned version 2


def _fixture():
    with open(FIXTURE, encoding="utf-8") as fh:
        return json.load(fh)


def _pairs():
    runs = _fixture()["runs"]
    return [(t, c) for t in sorted(runs) for c in sorted(runs[t])]


@functools.lru_cache(maxsize=None)
def _bundled_trace(name):
    return load_trace(os.path.join(ROOT, "traces", name))


def _field(doc, dotted):
    for part in dotted.split("."):
        doc = doc[part]
    return doc


def _measure(trace_name, config_name, fields):
    doc = run(sim.load_arch(config(config_name)), _bundled_trace(trace_name))
    return {f: _field(doc, f) for f in fields}


def test_fixture_covers_every_bundled_version_1_trace_and_config():
    """The fixture holds every version-1 trace in traces/ on every bundled config."""
    import sim.bundled

    runs = _fixture()["runs"]
    names = sorted(f for f in os.listdir(os.path.join(ROOT, "traces"))
                   if f.endswith((".npz", ".yaml")) and f != "shapes.yaml")
    v1 = [n for n in names if _bundled_trace(n).file_version == 1]
    assert sorted(runs) == v1
    for t in v1:
        assert sorted(runs[t]) == sim.bundled.config_names()


@pytest.mark.parametrize("trace_name, config_name", _pairs())
def test_version_1_traces_give_the_results_they_gave_before(trace_name, config_name):
    """Issue 12: version-1 traces read as version 2 with the defaults (one KV head per
    query head, one request, not causal, no window, no writes) and give exactly the
    cycles, bytes and work measured before the change (tests/data fixture; its note
    names the commit)."""
    fix = _fixture()
    got = _measure(trace_name, config_name, fix["fields"])
    assert got == fix["runs"][trace_name][config_name]


# --------------------------------------------------------------------------
# Bad input (issue 12): one line naming the file, the dotted field, the value and
# what was expected; exit status 2. Checked through the command line.


def bad_input_doc():
    """A valid version-2 trace: 4 query heads on 2 KV heads, a causal prefill of 6
    tokens (layers 0 and 1) and two decode tokens of request 0, a second request."""
    common = {"head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1]}
    return {
        "header": {"format": "attnsim-trace", "version": 2, "provenance": {"method": "hand"},
                   "model": {"layers": 2, "heads": 4, "kv_heads": 2, "head_dim": 16}},
        "steps": [
            dict(common, layer=0, stage="prefill", q_rows=6, kv_rows=6, causal=True, window=4,
                 new_kv_rows=6, out_rows=6),
            dict(common, layer=1, stage="prefill", q_rows=6, kv_rows=6, causal=True, new_kv_rows=6, out_rows=6),
            dict(common, layer=0, stage="decode", q_rows=1, kv_rows=7, new_kv_rows=1, out_rows=1),
            dict(common, layer=1, stage="decode", q_rows=1, kv_rows=7, new_kv_rows=1, out_rows=1),
            dict(common, layer=0, stage="decode", q_rows=1, kv_rows=8, new_kv_rows=1, out_rows=1),
            dict(common, layer=1, stage="decode", q_rows=1, kv_rows=8, new_kv_rows=1, out_rows=1),
            dict(common, layer=0, stage="prefill", q_rows=3, kv_rows=3, request=1),
        ],
    }


BAD_INPUTS = {
    # name: (step, field, new value, dotted field reported, value shown, words of what was expected);
    # a mapping in place of the field sets several fields of the step
    "kv head outside the model": (0, "kv_heads", [0, 0, 1, 2], "steps[0].kv_heads", "[2]",
                                  "< header.model.kv_heads=2"),
    "query head without a kv head": (2, "kv_heads", [0, 0, 1], "steps[2].kv_heads", "[0, 0, 1]",
                                     "one KV head per active query head"),
    "negative window": (0, "window", -3, "steps[0].window", "-3", "whole number >= 1"),
    "fractional window": (0, "window", 2.5, "steps[0].window", "2.5", "whole numbers"),
    "causal decode": (2, "causal", True, "steps[2].causal", "True", "prefill only"),
    "prompt reused with another length": (1, {"kv_rows": 9, "kept_k": 6}, None, "steps[1].kv_rows", "9",
                                          "share one kv_rows"),
    "decode context shorter than its prompt": (4, "kv_rows", 5, "steps[4].kv_rows", "5",
                                               "shorter than its prompt"),
    "decode context shrinks": (4, "kv_rows", 6, "steps[4].kv_rows", "6", "cannot shrink"),
    "layers of one token disagree": (3, "kv_rows", 8, "steps[3].kv_rows", "8",
                                     "one context at every layer: expected 7"),
    "more cache rows than new rows": (0, "new_kv_rows", 7, "steps[0].new_kv_rows", "7", "q_rows=6"),
    "more output rows than query rows": (2, "out_rows", 2, "steps[2].out_rows", "2", "q_rows=1"),
}


def test_bad_input_base_document_is_valid(tmp_path):
    from sim.cli import main

    path = tmp_path / "ok.yaml"
    path.write_text(yaml.safe_dump(bad_input_doc(), sort_keys=False))
    assert main(["trace", "check", str(path)]) == 0


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_bad_version_2_input_is_refused_in_one_line(tmp_path, capsys, case):
    """Issue 12, "Bad input": exit 2 and one line `attnsim: error: FILE:LINE: FIELD = VALUE: EXPECTED`."""
    from sim.cli import main

    step, key, value, field, shown, words = BAD_INPUTS[case]
    doc = bad_input_doc()
    doc["steps"][step].update(key if isinstance(key, dict) else {key: value})
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    code = main(["trace", "check", str(path)])
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and not out, (code, out, err)
    assert lines[0].startswith(f"attnsim: error: {path}:")
    assert f" {field} = {shown}: " in lines[0]
    assert words in lines[0]


def test_bad_input_through_python_dash_m(tmp_path):
    """The same through `python -m sim.cli trace check` in its own process (exit status 2)."""
    doc = bad_input_doc()
    doc["steps"][3]["kv_rows"] = 8
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    proc = subprocess.run([sys.executable, "-m", "sim.cli", "trace", "check", str(path)],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [proc.stderr.strip()]
    assert "steps[3].kv_rows = 8" in proc.stderr


def record():
    """Re-measure the fixture on this checkout (keeps the commit note for the caller to update)."""
    fix = _fixture()
    for t, c in _pairs():
        fix["runs"][t][c] = _measure(t, c, fix["fields"])
    with open(FIXTURE, "w", encoding="utf-8") as fh:
        json.dump(fix, fh, indent=1)
        fh.write("\n")


if __name__ == "__main__":
    if sys.argv[1:] == ["--record"]:
        record()
