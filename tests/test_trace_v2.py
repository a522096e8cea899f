"""Trace format version 2: grouped K/V heads, requests, causal and windowed
attention, per-KV-head kept keys and cache writes.

Reference checks compute their expected values from the arithmetic named beside
them (never through the Step helpers under test); round trips and refusals check
the format itself.
"""

import os
import tracemalloc

import numpy as np
import pytest
import yaml

from sim.errors import TraceError
from sim.trace.format import FORMAT_VERSION, Trace, make_step, new_header, validate
from sim.trace.files import load_trace, save_trace
from sim.trace.npz import to_arrays
from sim.trace.synth import synth_trace

HERE = os.path.dirname(os.path.abspath(__file__))
TRACES = os.path.join(os.path.dirname(HERE), "traces")

# Digests of the bundled version-1 traces as the version-1 reader computed them
# (recorded before format version 2 existed): reading them now must give the
# same content.
V1_DIGESTS = {
    "captured_log_fit95.npz": "a684ef296b16f77b64abff42c3022edff791569a45538e16bcf4405fe8af099e",
    "captured_log_moderate.npz": "1e16b535ea0d304f286e9738ff1805ccea600d268fa680489c8bee856f52d401",
    "captured_short_fit95.npz": "6fecf8d13899b8e5be2154a2196fb5f0abe9d444091f7be76bb2ed8ae1e6b7ac",
    "captured_short_moderate.npz": "08ce0c03702d171206f3599d88131b2d1cfdca71edcccb7a5e89264ad315f8c1",
    "demo_decode.yaml": "0cc5541a319a9ff97d260db88885e1013d2b25c1747a805650670cbefa0c3754",
    "demo_prefill.yaml": "be30524c21bc62839ae9528e91c562eed3c54b7abaa15aba3cb29906206111ab",
    "synth_decode.npz": "46f5eafbd6995c8d7d96f54985d15479fc93dab5a6cbe6b037bd18cc3aef2458",
    "synth_prefill.npz": "37048f876334078c29d28ca4288bc558e82de0963705c87bdaf425288ddd8533",
}


def v2_doc():
    """A small version-2 document using every new field: two requests, a
    grouped-query model (4 query heads, 2 KV heads), causal windowed prefill,
    per-KV-head kept keys in decode, cache writes."""
    return {
        "header": {"format": "attnsim-trace", "version": 2, "name": "v2",
                   "provenance": {"method": "hand"},
                   "model": {"layers": 2, "heads": 4, "kv_heads": 2, "head_dim": 16}},
        "steps": [
            {"layer": 0, "stage": "prefill", "head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1],
             "q_rows": 6, "kv_rows": 6, "kept_k": 6, "causal": True, "window": 4,
             "new_kv_rows": 6, "out_rows": 6},
            {"layer": 0, "stage": "prefill", "head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1],
             "q_rows": 3, "kv_rows": 3, "kept_k": 3, "causal": True, "request": 1,
             "new_kv_rows": 3, "out_rows": 3},
            {"layer": 1, "stage": "prefill", "head_dim": 16, "heads": [0, 2, 3], "kv_heads": [0, 1, 1],
             "q_rows": 4, "kv_rows": 6, "kept_k": [0, 2, 4, 5], "causal": True,
             "new_kv_rows": 4, "out_rows": 4},
            {"layer": 0, "stage": "decode", "head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1],
             "q_rows": 1, "kv_rows": 7, "kept_k": 7, "kv_kept_k": [[0, 1, 5, 6], [0, 2, 3, 4, 6]],
             "kept_v": [4, 3, 5, 2], "kept_v_idx": [[0, 1, 5, 6], [0, 5, 6], [0, 2, 3, 4, 6], [4, 6]],
             "new_kv_rows": 1, "out_rows": 1},
            {"layer": 0, "stage": "decode", "head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1],
             "q_rows": 1, "kv_rows": 4, "kept_k": 4, "request": 1, "window": 2,
             "new_kv_rows": 1, "out_rows": 1},
        ],
    }


def write_yaml(tmp_path, doc, name="t.yaml"):
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


def refused(tmp_path, doc):
    with pytest.raises(TraceError) as err:
        load_trace(write_yaml(tmp_path, doc))
    assert "\n" not in str(err.value)
    where = f"{err.value.source}:{err.value.line}" if err.value.line else err.value.source
    assert str(err.value).startswith(where + ": ")  # the file and, when known, the line of the key
    return err.value


def one(step, model=None):
    """Validate a single hand-made step (in memory) and return it."""
    validate(Trace(new_header("hand", model=model), [step], "<test>"))
    return step


# --------------------------------------------------------------------------
# Version 1 reads as version 2


@pytest.mark.parametrize("name", sorted(V1_DIGESTS))
def test_bundled_version_1_traces_read_unchanged(tmp_path, name):
    """Each bundled version-1 trace reads with its version-1 digest, every new
    field at its default, and keeps content and digest through version-2
    re-saves in both encodings."""
    t = load_trace(os.path.join(TRACES, name))
    assert t.file_version == 1 and t.header["version"] == FORMAT_VERSION
    assert t.digest() == V1_DIGESTS[name]
    for s in t.steps:
        assert s.request == 0 and s.causal is False and s.window == 0 and s.kv_kept_k is None
        assert s.new_kv_rows == 0 and s.out_rows == 0
        np.testing.assert_array_equal(s.kv_heads, s.heads)
    for ext in ("npz", "yaml"):
        p = save_trace(load_trace(os.path.join(TRACES, name)), tmp_path / f"again.{ext}")
        back = load_trace(p)
        assert back.file_version == 2
        assert back.digest() == V1_DIGESTS[name]
        for a, b in zip(t.steps, back.steps):
            for field in ("layer", "stage", "head_dim", "q_rows", "kv_rows", "request", "causal", "window",
                          "new_kv_rows", "out_rows"):
                assert getattr(a, field) == getattr(b, field)
            for field in ("heads", "kv_heads", "kept_k", "kept_v", "lsb_rows"):
                np.testing.assert_array_equal(getattr(a, field), getattr(b, field))


def test_version_1_yaml_may_not_use_version_2_fields(tmp_path):
    doc = v2_doc()
    doc["header"]["version"] = 1
    doc["header"]["model"].pop("kv_heads")
    err = refused(tmp_path, doc)
    assert err.field == "steps[0].kv_heads"
    assert "version 2 adds it" in err.expected


def test_version_1_npz_reads_with_defaults(tmp_path):
    """A version-1 .npz (kept_k segments with kept_k_off, no new columns) reads
    as version 2 with the defaults."""
    t = load_trace(write_yaml(tmp_path, v2_doc()))
    # strip the v2 content so a v1 file can hold it, then write the v1 layout by hand
    for s in t.steps:
        s.request, s.causal, s.window, s.kv_kept_k, s.new_kv_rows, s.out_rows = 0, False, 0, None, 0, 0
        s.kv_heads = s.heads.copy()
        s.kept_v = np.minimum(s.kept_v, len(s.kept_k))
        s.kept_v_idx = None
    t.steps = [s for s in t.steps if s.kv_rows >= 6]
    t.header["model"].pop("kv_heads")
    a = to_arrays(t)
    v1 = {k: a[k] for k in ("layer", "stage", "head_dim", "q_rows", "kv_rows", "heads", "heads_off",
                            "kept_v", "lsb_rows", "token_scores", "token_scores_off", "head_scores")}
    v1["kept_k"] = np.concatenate([s.kept_k for s in t.steps])
    v1["kept_k_off"] = np.cumsum([0] + [s.n_kept_k for s in t.steps])
    hdr = dict(t.header, version=1)
    import json
    v1["header"] = np.frombuffer(json.dumps(hdr).encode(), dtype=np.uint8)
    np.savez(tmp_path / "v1.npz", **v1)
    back = load_trace(tmp_path / "v1.npz")
    assert back.file_version == 1
    assert back.digest() == t.digest()


# --------------------------------------------------------------------------
# Round trips of every version-2 field


def test_every_version_2_field_round_trips_npz_and_yaml(tmp_path):
    t = load_trace(write_yaml(tmp_path, v2_doc()))
    d = t.digest()
    a = load_trace(save_trace(t, tmp_path / "a.npz"))
    b = load_trace(save_trace(a, tmp_path / "b.yaml"))
    c = load_trace(save_trace(b, tmp_path / "c.npz"))
    assert a.digest() == b.digest() == c.digest() == d
    for x in (a, b, c):
        s0, s1, s2, s3, s4 = x.steps
        assert x.header["model"]["kv_heads"] == 2
        assert (s0.causal, s0.window, s0.new_kv_rows, s0.out_rows, s0.request) == (True, 4, 6, 6, 0)
        assert s0.kv_heads.tolist() == [0, 0, 1, 1]
        assert (s1.request, s1.kv_rows) == (1, 3)
        assert s2.kv_heads.tolist() == [0, 1, 1]
        assert [k.tolist() for k in s3.kv_kept_k] == [[0, 1, 5, 6], [0, 2, 3, 4, 6]]
        assert s3.kept_v_idx[3].tolist() == [4, 6]
        assert (s3.causal, s3.window, s3.new_kv_rows) == (False, 0, 1)
        assert (s4.request, s4.window) == (1, 2)
        assert s4.kv_kept_k is None


def test_digest_sees_each_version_2_field(tmp_path):
    base = load_trace(write_yaml(tmp_path, v2_doc())).digest()
    changes = [(0, "window", 3), (0, "causal", False), (1, "request", 2), (0, "new_kv_rows", 5),
               (0, "out_rows", 5), (0, "kv_heads", [0, 1, 1, 1]),
               (3, "kv_kept_k", [[0, 1, 5, 6], [0, 2, 3, 4, 5, 6]])]
    for i, (step, key, value) in enumerate(changes):
        doc = v2_doc()
        doc["steps"][step][key] = value
        assert load_trace(write_yaml(tmp_path, doc, f"c{i}.yaml")).digest() != base, key


def test_yaml_writer_leaves_defaults_out(tmp_path):
    t = synth_trace(prompt_tokens=8, decode_steps=1, layers=1, heads=2, writes=False)
    save_trace(t, tmp_path / "d.yaml")
    doc = yaml.safe_load((tmp_path / "d.yaml").read_text())
    assert doc["header"]["version"] == 2
    for s in doc["steps"]:
        assert not set(s) & {"request", "kv_heads", "causal", "window", "kv_kept_k", "new_kv_rows", "out_rows"}


# --------------------------------------------------------------------------
# Work: causal triangle, window band, grouped heads (arithmetic in the test)


@pytest.mark.parametrize("n, heads, d", [(1, 1, 8), (7, 3, 16), (64, 4, 64), (1000, 2, 128)])
def test_causal_prefill_work_is_the_triangle(n, heads, d):
    """Causal prefill of n dense tokens: q.K MACs = heads x d x n(n+1)/2 and as
    many softmax elements / d (arithmetic of the causal triangle; row i sees
    keys 0..i)."""
    s = one(make_step(0, "prefill", d, heads, n, n, causal=True))
    w = s.work()
    assert w.qk_macs == heads * d * n * (n + 1) // 2
    assert w.softmax == heads * n * (n + 1) // 2
    assert w.pv_macs == heads * d * n * (n + 1) // 2  # no value pruning: p.V follows the scores
    assert s.macs() == (w.qk_macs, w.pv_macs)


@pytest.mark.parametrize("n, window", [(10, 1), (10, 3), (10, 10), (10, 25), (500, 64)])
def test_causal_window_work_is_the_band(n, window):
    """Causal sliding window W (Beltagy et al., 2020): row i sees
    min(i + 1, W) keys; total = sum over i of min(i + 1, W)."""
    s = one(make_step(0, "prefill", 32, 2, n, n, causal=True, window=window))
    expected = sum(min(i + 1, window) for i in range(n))
    assert s.work().softmax == 2 * expected
    assert s.work().qk_macs == 2 * 32 * expected


def test_non_causal_window_is_a_two_sided_band():
    """Without causal masking a window limits only the past: row i sees keys
    j with i - W < j (and every later key); counted by brute force here."""
    n, w = 12, 3
    s = one(make_step(0, "prefill", 8, 1, n, n, window=w))
    assert s.work().softmax == sum(1 for i in range(n) for j in range(n) if j > i - w)


def test_pruned_causal_prefill_counts_kept_keys_at_or_before_each_row():
    """Token pruning leaves holes: row i (at position p_i) sees the kept keys at
    positions <= p_i -- with every key kept that is i + 1 (brute force)."""
    kept = [0, 3, 4, 9, 10, 15, 22]
    s = one(make_step(1, "prefill", 16, 3, len(kept), 30, kept_k=kept, causal=True, window=8))
    brute = sum(1 for p in kept for k in kept if k <= p and k > p - 8)
    assert s.work().softmax == 3 * brute
    assert s.visible_counts().tolist() == [sum(1 for k in kept if p - 8 < k <= p) for p in kept]


def test_decode_window_sees_the_last_positions():
    """A decode query sits at position kv_rows - 1 and with window W sees the
    kept keys at positions > kv_rows - 1 - W (Beltagy et al., 2020)."""
    s = one(make_step(0, "decode", 64, 4, 1, 100, window=16))
    assert s.work().qk_macs == 4 * 64 * 16
    # three query rows at 97, 98, 99; not causal, so each also sees the later ones
    s = one(make_step(0, "decode", 64, 4, 3, 100, window=16))
    assert s.work().softmax == 4 * sum(1 for p in (97, 98, 99) for k in range(100) if k > p - 16)


def test_value_pruning_in_a_causal_step_caps_each_row_at_what_it_sees():
    """p.V per row uses min(kept_v, visible) V rows: a row seeing 2 keys cannot
    use 5 (the kept_v count is per row)."""
    n = 8
    s = one(make_step(0, "prefill", 4, 2, n, n, kept_v=[5, 8], causal=True))
    assert s.work().pv_macs == 4 * (sum(min(5, i + 1) for i in range(n)) + sum(i + 1 for i in range(n)))


def test_lsb_recompute_in_a_causal_step_is_charged_to_the_last_rows():
    n = 10
    s = one(make_step(0, "prefill", 4, 2, n, n, lsb_rows=[3, 0], causal=True))
    assert s.work().lsb_softmax == 10 + 9 + 8
    assert s.work().lsb_macs == 4 * (10 + 9 + 8)


def test_grouped_query_heads_share_kv_but_keep_their_work():
    """Grouped-query attention (Ainslie et al., EMNLP 2023): q.K and p.V work
    stays per query head whatever the grouping."""
    mha = one(make_step(0, "decode", 128, 32, 1, 4096))
    gqa = one(make_step(0, "decode", 128, 32, 1, 4096, kv_heads=np.arange(32) // 4))
    mqa = one(make_step(0, "decode", 128, 32, 1, 4096, kv_heads=np.zeros(32, dtype=int)))
    assert mha.work() == gqa.work() == mqa.work()
    assert mha.work().qk_macs == 32 * 1 * 4096 * 128
    assert len(np.unique(gqa.kv_heads)) == 8 and len(np.unique(mqa.kv_heads)) == 1
    assert {k: v.tolist() for k, v in gqa.kv_groups().items()} == {g: [4 * g + i for i in range(4)]
                                                                   for g in range(8)}


def test_per_kv_head_kept_keys_set_each_groups_work():
    """With kv_kept_k, query heads of KV head g attend to g's kept rows only:
    work = sum over heads of |keys of its KV head| x d (decode, one row)."""
    s = one(make_step(0, "decode", 16, [0, 1, 2, 3], 1, 10, kept_k=[0, 1, 2, 5, 8, 9],
                      kv_heads=[0, 0, 1, 1], kv_kept_k=[[0, 1, 9], [2, 5, 8, 9]]))
    assert s.kept_v.tolist() == [3, 3, 4, 4]  # defaults follow each head's KV head
    assert s.work().qk_macs == 16 * (3 + 3 + 4 + 4)


def test_kv_cache_bytes_of_grouped_heads():
    """KV-cache bytes = 2 x layers x kv_heads x context x head_dim x bits / 8
    (Ainslie et al., EMNLP 2023; arithmetic). Summed from the trace's own
    fields (distinct KV heads of each layer's last decode step times its kept
    rows), for a multi-head, a grouped and a multi-query trace of the same
    query heads: the grouped one is 1/g of the multi-head one."""
    layers, heads, context, d, bits = 4, 16, 300, 64, 16
    sizes = {}
    for kv in (16, 4, 1):
        t = synth_trace(prompt_tokens=context - 1, decode_steps=1, layers=layers, heads=heads,
                        kv_heads=kv, head_dim=d, include_prefill=False, seed=1)
        last = [s for s in t.steps if s.stage == "decode"]
        assert len(last) == layers and all(s.kv_rows == context for s in last)
        sizes[kv] = sum(2 * len(np.unique(s.kv_heads)) * s.n_kept_k * s.head_dim * bits // 8 for s in last)
        assert sizes[kv] == 2 * layers * kv * context * d * bits // 8
    assert sizes[4] * 4 == sizes[16] and sizes[1] * 16 == sizes[16]


# --------------------------------------------------------------------------
# Memory: long contexts never build rows x keys arrays


def test_validating_and_counting_a_128k_causal_step_stays_linear():
    """A 131072-token causal, windowed prefill with per-KV-head kept keys: a
    rows x keys matrix would need 16 GiB per head; validation and work counts
    must stay within a few linear arrays (tracemalloc peak, not time)."""
    n = 131072
    half = np.arange(0, n, 2, dtype=np.int64)
    step = make_step(0, "prefill", 128, 8, n, n, causal=True, window=4096, kv_heads=np.arange(8) // 4,
                     kv_kept_k=[np.arange(n, dtype=np.int64), half])
    tracemalloc.start()
    try:
        one(step)
        w = step.work()
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 64 * 2**20
    # rows see min(i + 1, 4096) of every key, or of the even ones (arithmetic)
    i = np.arange(n)
    full = np.minimum(i + 1, 4096).sum()
    even = (i // 2 + 1 - np.maximum(0, (i - 4096) // 2 + 1)).sum()
    assert w.softmax == 4 * full + 4 * even


def test_long_dense_decode_shares_its_rows(tmp_path):
    """Dense decode steps at a 128k context view one shared 0..n-1 array, and
    the .npz stores that run once."""
    t = synth_trace(prompt_tokens=131072, decode_steps=4, layers=2, heads=4, kv_heads=2, head_dim=64,
                    include_prefill=False, seed=0)
    ks = [s.kept_k for s in t.steps]
    assert all(np.shares_memory(ks[0], k) for k in ks[1:])
    p = save_trace(t, tmp_path / "long.npz")
    with np.load(p) as z:
        assert len(z["kept_k"]) == 131072 + 4
    back = load_trace(p)
    assert back.digest() == t.digest()
    assert all(np.shares_memory(back.steps[0].kept_k, s.kept_k) for s in back.steps)


# --------------------------------------------------------------------------
# Refusals


@pytest.mark.parametrize("step, key, value, field, words", [
    (0, "kv_heads", [0, 0, 1, 2], "steps[0].kv_heads", "header.model.kv_heads=2"),
    (0, "kv_heads", [0, 0, 1], "steps[0].kv_heads", "one KV head per active query head"),
    (0, "kv_heads", [0, 0, -1, 1], "steps[0].kv_heads", ">= 0"),
    (0, "window", -1, "steps[0].window", "whole number >= 1"),
    (0, "window", 2.5, "steps[0].window", "whole numbers"),
    (3, "causal", True, "steps[3].causal", "prefill only"),
    (0, "causal", "yes", "steps[0].causal", "true or false"),
    (0, "new_kv_rows", 7, "steps[0].new_kv_rows", "q_rows=6"),
    (3, "out_rows", 2, "steps[3].out_rows", "q_rows=1"),
    (0, "new_kv_rows", -1, "steps[0].new_kv_rows", "q_rows=6"),
    (1, "request", -1, "steps[1].request", ">= 0"),
    (3, "kv_kept_k", [[0, 1, 5, 6]], "steps[3].kv_kept_k", "distinct active KV head"),
    (3, "kv_kept_k", [[0, 1, 5, 6], [0, 2, 3, 4, 7]], "steps[3].kv_kept_k[1]", "kv_rows=7"),
    (3, "kv_kept_k", [[0, 1, 5, 6], [0, 2, 3, 6]], "steps[3].kept_k", "union of kv_kept_k"),
    (3, "kept_v", [4, 3, 6, 2], "steps[3].kept_v", "of the head's KV head"),
])
def test_bad_version_2_fields_are_refused(tmp_path, step, key, value, field, words):
    doc = v2_doc()
    doc["steps"][step][key] = value
    err = refused(tmp_path, doc)
    assert err.field == field
    assert words in err.expected


def test_kept_v_idx_outside_its_kv_heads_keys_is_refused(tmp_path):
    doc = v2_doc()
    doc["steps"][3]["kept_v_idx"][1] = [0, 2, 6]  # KV head 0 does not keep row 2
    err = refused(tmp_path, doc)
    assert err.field == "steps[3].kept_v_idx[1]"


def test_model_kv_heads_must_fit_the_query_heads(tmp_path):
    doc = v2_doc()
    doc["header"]["model"]["kv_heads"] = 8
    assert refused(tmp_path, doc).field == "header.model.kv_heads"
    doc["header"]["model"]["kv_heads"] = 0
    assert refused(tmp_path, doc).field == "header.model.kv_heads"


def test_without_model_kv_heads_the_query_head_count_bounds_them(tmp_path):
    doc = v2_doc()
    doc["header"]["model"].pop("kv_heads")
    doc["steps"][0]["kv_heads"] = [0, 0, 1, 4]
    err = refused(tmp_path, doc)
    assert err.field == "steps[0].kv_heads" and "header.model.heads=4" in err.expected


def test_request_prefill_steps_share_one_context(tmp_path):
    doc = v2_doc()
    doc["steps"][2]["kv_rows"] = 7
    err = refused(tmp_path, doc)
    assert err.field == "steps[2].kv_rows" and "share one kv_rows" in err.expected


def test_request_decode_context_never_shrinks(tmp_path):
    doc = v2_doc()
    later = dict(doc["steps"][4], kv_rows=3, kept_k=3, window=0)  # request 1, layer 0: 4 then 3
    doc["steps"].append(later)
    err = refused(tmp_path, doc)
    assert err.field == "steps[5].kv_rows" and "cannot shrink" in err.expected
    doc["steps"][5]["kv_rows"] = 2  # also shorter than the prompt (3)
    doc["steps"][5]["kept_k"] = 2
    assert "shorter than its prompt" in refused(tmp_path, doc).expected


def test_request_prefill_after_its_decode_is_refused(tmp_path):
    doc = v2_doc()
    doc["steps"].append(dict(doc["steps"][1], layer=1))  # request 1's layer-1 prefill after its decode
    err = refused(tmp_path, doc)
    assert err.field == "steps[5].stage"


def test_requests_are_independent_cascades(tmp_path):
    """Interleaved requests: cascade pruning is checked within each request, so
    request 1 may keep a head request 0 pruned, but not one it pruned itself."""
    doc = v2_doc()
    doc["steps"][1]["heads"] = [0, 1, 2]    # request 1 drops head 3 after layer 0
    doc["steps"][1]["kv_heads"] = [0, 0, 1]
    doc["steps"].insert(3, {"layer": 1, "stage": "prefill", "head_dim": 16, "heads": [0, 1],
                            "kv_heads": [0, 0], "q_rows": 3, "kv_rows": 3, "kept_k": 3, "request": 1})
    load_trace(write_yaml(tmp_path, doc))  # head 1 was pruned by request 0 only
    doc["steps"][3]["heads"] = [0, 3]
    err = refused(tmp_path, doc)
    assert err.field == "steps[3].heads" and err.value == [3] and "steps[1]" in err.expected


def test_a_query_row_that_sees_nothing_is_refused(tmp_path):
    doc = v2_doc()
    doc["steps"][4]["kept_k"] = [0, 1, 3]   # decode at position 3, window 2 sees 3 only: fine
    load_trace(write_yaml(tmp_path, doc))
    doc["steps"][3]["window"] = 1           # position 6 sees row 6: fine
    load_trace(write_yaml(tmp_path, doc, "b.yaml"))
    doc["steps"][4]["kept_k"] = [0, 1]      # decode row at 3 with window 2 sees no kept key
    doc["steps"][4]["kv_rows"] = 4
    err = refused(tmp_path, doc)
    assert err.field == "steps[4].window" and "sees no kept key" in err.expected


def test_decode_query_rows_cannot_exceed_the_context(tmp_path):
    doc = v2_doc()
    doc["steps"][4]["q_rows"] = 5
    assert refused(tmp_path, doc).field == "steps[4].q_rows"


@pytest.mark.parametrize("drop", ["kv_heads", "request", "causal", "window", "new_kv_rows", "out_rows",
                                  "kept_k_lo"])
def test_version_2_npz_without_a_column_is_refused(tmp_path, drop):
    arrays = to_arrays(load_trace(write_yaml(tmp_path, v2_doc())))
    del arrays[drop]
    np.savez(tmp_path / "x.npz", **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(tmp_path / "x.npz")
    assert err.value.field == drop and "version 2" in err.value.expected


def test_npz_slices_outside_the_row_pool_are_refused(tmp_path):
    arrays = to_arrays(load_trace(write_yaml(tmp_path, v2_doc())))
    arrays["kept_k_hi"] = arrays["kept_k_hi"] + len(arrays["kept_k"])
    np.savez(tmp_path / "x.npz", **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(tmp_path / "x.npz")
    assert err.value.field == "kept_k_lo"
    arrays = to_arrays(load_trace(write_yaml(tmp_path, v2_doc())))
    del arrays["kv_kept_k_off"]
    np.savez(tmp_path / "y.npz", **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(tmp_path / "y.npz")
    assert err.value.field == "kv_kept_k_off"


def test_npz_kv_heads_out_of_the_model_is_refused(tmp_path):
    arrays = to_arrays(load_trace(write_yaml(tmp_path, v2_doc())))
    arrays["kv_heads"] = arrays["kv_heads"] + 1
    np.savez(tmp_path / "x.npz", **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(tmp_path / "x.npz")
    assert err.value.field == "steps[0].kv_heads"
