"""Synthetic traces: seeded, ratios honoured, cascade holds, decode context grows."""

import math
import os
import tempfile

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from sim.errors import TraceError
from sim.trace.files import load_trace, save_trace
from sim.trace.synth import synth_trace

HERE = os.path.dirname(os.path.abspath(__file__))
TRACES = os.path.join(os.path.dirname(HERE), "traces")

PRUNED = dict(prompt_tokens=300, decode_steps=12, layers=6, heads=8, head_dim=64,
              token_keep=0.7, head_keep=0.8, value_keep=0.4, lsb_fraction=0.3,
              lsb_fraction_rows=0.25, seed=11)

# the arguments of synth_version 1; version 2 adds the rest of ARGS
ARGS_V1 = ("prompt_tokens", "decode_steps", "layers", "heads", "head_dim", "token_keep", "head_keep",
           "value_keep", "lsb_fraction", "lsb_fraction_rows", "seed", "include_prefill")
ARGS = ARGS_V1 + ("kv_heads", "batch", "length_spread", "causal", "window", "writes")


def prefill(trace):
    return [s for s in trace.steps if s.stage == "prefill"]


def decode(trace):
    return [s for s in trace.steps if s.stage == "decode"]


# --------------------------------------------------------------------------
# Determinism and provenance


def test_same_arguments_same_trace():
    assert synth_trace(**PRUNED).digest() == synth_trace(**PRUNED).digest()


def test_seed_changes_the_trace():
    a = synth_trace(**PRUNED)
    b = synth_trace(**{**PRUNED, "seed": 12})
    assert a.digest() != b.digest()
    # the counts are fixed by the ratios; which rows survive is what changes
    assert [s.n_kept_k for s in a.steps] == [s.n_kept_k for s in b.steps]
    assert not np.array_equal(prefill(a)[-1].kept_k, prefill(b)[-1].kept_k)


def test_provenance_records_every_argument():
    t = synth_trace(**PRUNED, name="x")
    prov = t.header["provenance"]
    assert prov["method"] == "synth"
    for key in ARGS:
        assert key in prov
    assert prov["token_keep"] == 0.7
    assert prov["token_keep_per_layer"] == [1.0] + [0.7] * 5
    assert t.header["name"] == "x"
    assert t.header["model"] == {"layers": 6, "heads": 8, "kv_heads": 8, "head_dim": 64}


@pytest.mark.parametrize("name", ["synth_prefill.npz", "synth_decode.npz", "demo_decode.yaml"])
def test_bundled_synthetic_traces_remake_from_their_provenance(name):
    """The bundled synthetic traces were made by synth_version 1 (before cache
    writes): the same arguments with writes off remake their steps exactly."""
    t = load_trace(os.path.join(TRACES, name))
    prov = t.header["provenance"]
    assert prov["method"] == "synth" and prov["synth_version"] == 1
    again = synth_trace(**{k: prov[k] for k in ARGS_V1}, name=t.header["name"], writes=False)
    again.header = t.header  # version 2 records more provenance; the steps are what must agree
    assert again.digest() == t.digest()


@pytest.mark.parametrize("name", ["demo_gqa_batch.yaml", "long_prompt/dec1b_p8k_d64.npz"])
def test_bundled_version_2_synthetic_trace_remakes_from_its_provenance(name):
    t = load_trace(os.path.join(TRACES, name))
    prov = t.header["provenance"]
    assert prov["synth_version"] == 2
    shape = {"shape": prov["shape"]} if "shape" in prov else {}   # a named model shape is recorded too
    again = synth_trace(**{k: prov[k] for k in ARGS}, **shape, name=t.header["name"])
    assert again.digest() == t.digest()


def test_a_version_2_trace_remakes_from_its_provenance(tmp_path):
    t = synth_trace(prompt_tokens=40, decode_steps=3, layers=3, heads=4, kv_heads=2, batch=3, causal=True,
                    window=[0, 8, 0], token_keep=0.8, value_keep=0.5, seed=5, name="v2")
    save_trace(t, tmp_path / "v2.npz")
    prov = load_trace(tmp_path / "v2.npz").header["provenance"]
    again = synth_trace(**{k: prov[k] for k in ARGS}, name="v2")
    assert again.digest() == t.digest()


def test_file_and_memory_replay_alike(tmp_path):
    t = synth_trace(**PRUNED)
    save_trace(t, tmp_path / "s.npz")
    assert load_trace(tmp_path / "s.npz").digest() == t.digest()


# --------------------------------------------------------------------------
# Ratios


def test_token_and_head_keep_ratios_are_honoured():
    t = synth_trace(**PRUNED)
    pre = prefill(t)
    assert len(pre) == 6
    live, heads = 300, 8
    for i, s in enumerate(pre):
        if i:
            live = math.ceil(live * 0.7 - 1e-9)
            heads = math.ceil(heads * 0.8 - 1e-9)
        assert s.n_kept_k == live == s.q_rows
        assert s.n_heads == heads
        assert s.kv_rows == 300
    assert [s.n_kept_k for s in pre] == [300, 210, 147, 103, 73, 52]
    assert [s.n_heads for s in pre] == [8, 7, 6, 5, 4, 4]


def test_per_layer_schedule():
    t = synth_trace(prompt_tokens=100, decode_steps=0, layers=4, heads=4,
                    token_keep=[1.0, 1.0, 0.5, 0.5], head_keep=[1.0, 0.5, 1.0, 1.0], seed=0)
    assert [s.n_kept_k for s in t.steps] == [100, 100, 50, 25]
    assert [s.n_heads for s in t.steps] == [4, 2, 2, 2]
    t0 = synth_trace(prompt_tokens=100, decode_steps=0, layers=2, heads=2,
                     token_keep=[0.5, 1.0], seed=0)
    assert t0.steps[0].n_kept_k == 50  # entry 0 trims the prompt itself


def test_value_keep_ratio_is_honoured_in_decode():
    t = synth_trace(**PRUNED)
    for s in decode(t):
        want = math.ceil(s.n_kept_k * 0.4 - 1e-9)
        assert s.kept_v.tolist() == [want] * s.n_heads
        assert len(s.kept_v_idx) == s.n_heads
        for idx in s.kept_v_idx:
            assert len(idx) == want
            assert np.all(np.diff(idx) > 0)
            assert np.isin(idx, s.kept_k).all()
    for s in prefill(t):
        assert s.kept_v.tolist() == [s.n_kept_k] * s.n_heads
        assert s.kept_v_idx is None


def test_value_rows_differ_between_heads():
    s = decode(synth_trace(**PRUNED))[-1]
    assert len({tuple(idx.tolist()) for idx in s.kept_v_idx}) > 1


def test_lsb_fraction_matches_a_binomial():
    """Each head-step is flagged independently with probability p, so the count
    of flagged head-steps is Binomial(n, p); scipy.stats.binomtest checks it."""
    t = synth_trace(prompt_tokens=64, decode_steps=200, layers=4, heads=8, lsb_fraction=0.3,
                    lsb_fraction_rows=0.25, seed=5)
    flagged = sum(int(np.count_nonzero(s.lsb_rows)) for s in t.steps)
    n = sum(s.n_heads for s in t.steps)
    assert stats.binomtest(flagged, n, 0.3).pvalue > 1e-3
    for s in t.steps:
        rows = math.ceil(s.q_rows * 0.25 - 1e-9)
        assert set(s.lsb_rows.tolist()) <= {0, rows}


def test_no_pruning_gives_a_dense_trace():
    t = synth_trace(prompt_tokens=50, decode_steps=3, layers=3, heads=2, seed=1)
    for s in t.steps:
        assert s.n_kept_k == s.kv_rows
        assert s.n_heads == 2
        assert s.kept_v_idx is None
        assert s.token_scores is None and s.head_scores is None
        assert not s.lsb_rows.any()
    assert t.summary()["kept_key_fraction"] == 1.0


# --------------------------------------------------------------------------
# Cascade and scores


def test_cascade_holds_and_follows_the_scores():
    pre = prefill(synth_trace(**PRUNED))
    for a, b in zip(pre, pre[1:]):
        assert np.isin(b.kept_k, a.kept_k).all()
        assert np.isin(b.heads, a.heads).all()
        # the next layer's rows are the top-k of this layer's token scores
        top = np.sort(a.kept_k[np.argsort(-a.token_scores, kind="stable")[:b.n_kept_k]])
        np.testing.assert_array_equal(top, b.kept_k)
        if b.n_heads < a.n_heads:
            top_h = np.sort(a.heads[np.argsort(-a.head_scores, kind="stable")[:b.n_heads]])
            np.testing.assert_array_equal(top_h, b.heads)
        else:  # nothing to select: no scores, same heads
            assert a.head_scores is None
            np.testing.assert_array_equal(a.heads, b.heads)
    assert pre[-1].token_scores is None and pre[-1].head_scores is None


def test_token_scores_are_column_sums_of_probabilities():
    for s in prefill(synth_trace(**PRUNED))[:-1]:
        assert np.all(s.token_scores > 0)
        # float32 storage: relative error about 1e-7 per element
        assert s.token_scores.sum() == pytest.approx(s.n_heads * s.q_rows, rel=1e-5)


def test_kept_rows_are_scattered_over_the_prompt():
    """Importance is drawn independently of position, so survivors should be
    uniform over the prompt: scipy.stats.kstest against a uniform law."""
    t = synth_trace(prompt_tokens=2000, decode_steps=0, layers=4, heads=2, token_keep=0.5, seed=3)
    last = t.steps[-1].kept_k
    assert last[-1] > len(last)  # not a prefix
    assert stats.kstest((last + 0.5) / 2000, "uniform").pvalue > 1e-3


# --------------------------------------------------------------------------
# Decode


def test_decode_context_grows_by_one_per_token():
    t = synth_trace(**PRUNED)
    pre = prefill(t)
    dec = decode(t)
    assert len(dec) == 12 * 6
    for i, s in enumerate(dec):
        tok, layer = divmod(i, 6)
        assert s.layer == layer
        assert s.q_rows == 1
        assert s.kv_rows == 300 + tok + 1
        gen = np.arange(300, 300 + tok + 1)
        np.testing.assert_array_equal(s.kept_k, np.concatenate([pre[layer].kept_k, gen]))
        np.testing.assert_array_equal(s.heads, pre[layer].heads)
        if tok:
            assert s.n_kept_k == dec[i - 6].n_kept_k + 1


def test_decode_without_prefill_keeps_the_pruning():
    full = synth_trace(**PRUNED)
    only = synth_trace(**{**PRUNED, "include_prefill": False})
    assert all(s.stage == "decode" for s in only.steps)
    assert len(only.steps) == len(decode(full))
    for a, b in zip(only.steps, decode(full)):
        np.testing.assert_array_equal(a.kept_k, b.kept_k)
        np.testing.assert_array_equal(a.heads, b.heads)


def test_decode_macs_match_the_closed_form():
    """q.K = n_q * n_kv * d per head, p.V = n_q * n_kept_v * d per head
    (shared/references.md, common practice)."""
    t = synth_trace(prompt_tokens=40, decode_steps=5, layers=2, heads=3, value_keep=0.5, seed=2)
    for s in decode(t):
        qk, pv = s.macs()
        assert qk == 3 * 1 * s.n_kept_k * 64
        assert pv == 3 * 1 * math.ceil(s.n_kept_k * 0.5) * 64


# --------------------------------------------------------------------------
# Arguments


@pytest.mark.parametrize("arg, value", [
    ("prompt_tokens", 0), ("prompt_tokens", 2.5), ("prompt_tokens", "512"), ("decode_steps", -1),
    ("layers", 0), ("heads", True), ("head_dim", 0), ("token_keep", 0.0), ("token_keep", 1.2),
    ("head_keep", -0.5), ("value_keep", 0), ("value_keep", float("nan")), ("lsb_fraction", 1.5),
    ("lsb_fraction", -0.1), ("lsb_fraction_rows", 0.0), ("seed", -3), ("name", ""),
    ("name", 5), ("include_prefill", "yes"),
])
def test_bad_arguments_name_themselves(arg, value):
    with pytest.raises(TraceError) as err:
        synth_trace(**{**PRUNED, arg: value})
    assert err.value.field == arg
    assert err.value.source == "trace synth"


def test_bad_schedule_entries():
    with pytest.raises(TraceError) as err:
        synth_trace(layers=3, token_keep=[1.0, 0.5])
    assert err.value.field == "token_keep"
    with pytest.raises(TraceError) as err:
        synth_trace(layers=3, head_keep=[1.0, 0.5, 0.0])
    assert err.value.field == "head_keep[2]"


def test_empty_trace_is_refused():
    with pytest.raises(TraceError) as err:
        synth_trace(decode_steps=0, include_prefill=False)
    assert err.value.field == "decode_steps"


def test_whole_floats_are_accepted():
    t = synth_trace(prompt_tokens=16.0, decode_steps=2.0, layers=2, heads=2)
    assert t.header["provenance"]["prompt_tokens"] == 16


@settings(max_examples=60, deadline=None, derandomize=True)
@given(prompt=st.integers(1, 80), dec=st.integers(0, 4), layers=st.integers(1, 5),
       heads=st.integers(1, 6), tk=st.floats(0.01, 1.0), hk=st.floats(0.01, 1.0),
       vk=st.floats(0.01, 1.0), lsb=st.floats(0.0, 1.0), seed=st.integers(0, 2**32))
def test_any_arguments_give_a_valid_cascade(prompt, dec, layers, heads, tk, hk, vk, lsb, seed):
    """Over random arguments (hypothesis): the trace validates, counts follow
    the ratios, the cascade holds and decode context grows by one per token."""
    t = synth_trace(prompt_tokens=prompt, decode_steps=dec, layers=layers, heads=heads,
                    head_dim=16, token_keep=tk, head_keep=hk, value_keep=vk, lsb_fraction=lsb,
                    seed=seed)
    pre, dcd = prefill(t), decode(t)
    assert len(pre) == layers and len(dcd) == dec * layers
    for a, b in zip(pre, pre[1:]):
        assert b.n_kept_k == max(1, math.ceil(a.n_kept_k * tk - 1e-9))
        assert b.n_heads == max(1, math.ceil(a.n_heads * hk - 1e-9))
        assert set(b.kept_k.tolist()) <= set(a.kept_k.tolist())
        assert set(b.heads.tolist()) <= set(a.heads.tolist())
    for i, s in enumerate(dcd):
        assert s.kv_rows == prompt + i // layers + 1
        assert s.n_kept_k == pre[s.layer].n_kept_k + i // layers + 1


# --------------------------------------------------------------------------
# Version 2: KV heads, batches, causal prefill, windows, cache writes, shapes


def test_kv_heads_group_query_heads_evenly():
    """Grouped-query attention (Ainslie et al., EMNLP 2023): g = heads / kv_heads
    consecutive query heads share a KV head; with head pruning the survivors keep
    their KV head."""
    t = synth_trace(prompt_tokens=50, decode_steps=2, layers=3, heads=8, kv_heads=2, head_keep=0.6, seed=4)
    for s in t.steps:
        np.testing.assert_array_equal(s.kv_heads, s.heads // 4)
    assert t.header["model"]["kv_heads"] == 2
    with pytest.raises(TraceError) as err:
        synth_trace(heads=8, kv_heads=3)
    assert err.value.field == "kv_heads" and "divisor" in err.value.expected


def test_batch_requests_have_their_own_seeded_contexts():
    """Request 0 has the prompt; the others round(P (1 - S u)) tokens with u in
    [0, 1), so within [ceil(P (1 - S)), P]. Steps interleave as batched
    execution does: prefill layer by layer over the requests, then per token
    and layer one step per request."""
    P, B, S, D, L = 400, 6, 0.5, 3, 2
    t = synth_trace(prompt_tokens=P, decode_steps=D, layers=L, heads=2, batch=B, length_spread=S, seed=9)
    prompts = t.header["provenance"]["prompt_tokens_per_request"]
    assert prompts[0] == P and len(prompts) == B
    assert all(math.ceil(P * (1 - S)) <= p <= P for p in prompts)
    assert len(set(prompts)) > 1
    order = [(s.stage, s.layer, s.request) for s in t.steps]
    assert order == ([("prefill", l, r) for l in range(L) for r in range(B)]
                     + [("decode", l, r) for _ in range(D) for l in range(L) for r in range(B)])
    for i, s in enumerate(decode(t)):
        tok = i // (L * B)
        assert s.kv_rows == prompts[s.request] + tok + 1
    for s in prefill(t):
        assert s.kv_rows == prompts[s.request] == s.q_rows
    again = synth_trace(prompt_tokens=P, decode_steps=D, layers=L, heads=2, batch=B, length_spread=S, seed=9)
    assert again.digest() == t.digest()


def test_request_zero_of_a_batch_is_the_single_request():
    one = synth_trace(**PRUNED)
    many = synth_trace(**PRUNED, batch=3)
    mine = [s for s in many.steps if s.request == 0]
    assert len(mine) == len(one.steps)
    for a, b in zip(one.steps, mine):
        np.testing.assert_array_equal(a.kept_k, b.kept_k)
        np.testing.assert_array_equal(a.lsb_rows, b.lsb_rows)
        assert (a.kept_v_idx is None) == (b.kept_v_idx is None)


def test_causal_flag_marks_prefill_only():
    t = synth_trace(prompt_tokens=30, decode_steps=2, layers=2, heads=2, causal=True)
    assert all(s.causal for s in prefill(t)) and not any(s.causal for s in decode(t))


def test_window_keeps_the_decode_cache_inside_the_window():
    """Sliding window W (Beltagy et al., 2020): the decode query at position
    kv_rows - 1 sees positions > kv_rows - 1 - W, and the synthetic cache keeps
    exactly those of its live rows; a window of 0 on a layer means full context."""
    t = synth_trace(prompt_tokens=100, decode_steps=3, layers=2, heads=2, window=[16, 0], token_keep=0.6, seed=2)
    pre = prefill(t)
    for s in decode(t):
        assert s.window == [16, 0][s.layer]
        full = np.concatenate([pre[s.layer].kept_k, np.arange(100, s.kv_rows)])
        want = full[full > s.kv_rows - 1 - 16] if s.layer == 0 else full
        np.testing.assert_array_equal(s.kept_k, want)
    assert all(s.window == [16, 0][s.layer] for s in pre)


def test_writes_follow_the_cache():
    """Prefill writes the K/V and output of every live token; decode appends one
    K/V row per KV head and writes one output row."""
    t = synth_trace(prompt_tokens=40, decode_steps=2, layers=3, heads=4, kv_heads=2, token_keep=0.5)
    for s in prefill(t):
        assert s.new_kv_rows == s.out_rows == s.q_rows
    for s in decode(t):
        assert s.new_kv_rows == s.out_rows == 1
    quiet = synth_trace(prompt_tokens=40, decode_steps=2, layers=3, heads=4, writes=False)
    assert all(s.new_kv_rows == s.out_rows == 0 for s in quiet.steps)


def test_named_shapes_fill_the_model_and_options_override():
    t = synth_trace(prompt_tokens=16, decode_steps=1, shape="dec-8b")
    assert t.header["model"] == {"layers": 32, "heads": 32, "kv_heads": 8, "head_dim": 128}
    assert t.header["provenance"]["shape"] == "dec-8b"
    t = synth_trace(prompt_tokens=16, decode_steps=1, shape="dec-8b", layers=2, kv_heads=4)
    assert t.header["model"] == {"layers": 2, "heads": 32, "kv_heads": 4, "head_dim": 128}


def test_shape_files_are_validated(tmp_path):
    from sim.trace.shapes import load_shape, read_shapes

    bundled = read_shapes(os.path.join(TRACES, "shapes.yaml"))
    assert bundled["dec-8b"].description.startswith("8B-class decoder")
    f = tmp_path / "mine.yaml"
    f.write_text("shapes:\n  tiny: {layers: 2, heads: 4, kv_heads: 2, head_dim: 16}\n")
    assert load_shape(str(f)).heads == 4
    assert load_shape(f"{f}:tiny").kv_heads == 2
    for text, field in [("shapes:\n  t: {layers: 2, heads: 4, kv_heads: 3, head_dim: 16}\n", "shapes.t.kv_heads"),
                        ("shapes:\n  t: {layers: 0, heads: 4, kv_heads: 2, head_dim: 16}\n", "shapes.t.layers"),
                        ("shapes:\n  t: {layers: 2, heads: 4, kv_head: 2, head_dim: 16}\n", "shapes.t.kv_head"),
                        ("layers: 2\n", "shapes")]:
        f.write_text(text)
        with pytest.raises(TraceError) as err:
            load_shape(str(f))
        assert err.value.field == field
    with pytest.raises(TraceError) as err:
        load_shape("dec-9b")
    assert "dec-8b" in err.value.expected


@pytest.mark.parametrize("arg, value", [("kv_heads", 0), ("batch", 0), ("length_spread", 1.5),
                                        ("window", -1), ("window", [4, 4]), ("causal", "yes"),
                                        ("writes", 1)])
def test_bad_version_2_arguments_name_themselves(arg, value):
    with pytest.raises(TraceError) as err:
        synth_trace(**{**PRUNED, arg: value})
    assert err.value.field == arg


@settings(max_examples=40, deadline=None, derandomize=True)
@given(prompt=st.integers(1, 60), dec=st.integers(0, 3), layers=st.integers(1, 4),
       groups=st.sampled_from([(4, 1), (4, 2), (4, 4), (6, 3)]), batch=st.integers(1, 4),
       causal=st.booleans(), window=st.integers(0, 20), tk=st.floats(0.05, 1.0), seed=st.integers(0, 2**32))
def test_any_version_2_arguments_give_a_valid_trace(prompt, dec, layers, groups, batch, causal, window, tk, seed):
    """Over random version-2 arguments (hypothesis): the trace validates, every
    request has one prefill context and a context growing by one per token,
    and the .npz round trip keeps the digest."""
    heads, kv = groups
    t = synth_trace(prompt_tokens=prompt, decode_steps=dec, layers=layers, heads=heads, kv_heads=kv,
                    head_dim=8, batch=batch, causal=causal, window=window, token_keep=tk, seed=seed)
    prompts = t.header["provenance"]["prompt_tokens_per_request"]
    for s in t.steps:
        if s.stage == "decode":
            assert s.kv_rows - prompts[s.request] >= 1
            assert window == 0 or s.kept_k[0] > s.kv_rows - 1 - window
        else:
            assert s.kv_rows == prompts[s.request]
    with tempfile.TemporaryDirectory() as tmp:
        assert load_trace(save_trace(t, os.path.join(tmp, "t.npz"))).digest() == t.digest()


def test_cli_synth_with_version_2_options(tmp_path, capsys):
    from sim.cli import main

    out = str(tmp_path / "b.npz")
    code = main(["trace", "synth", "--out", out, "--shape", "dec-1b", "--layers", "2", "--prompt", "64",
                 "--decode", "2", "--batch", "3", "--causal", "--window", "8,0", "--seed", "4"])
    assert code == 0
    assert "3 requests" in capsys.readouterr().out
    t = load_trace(out)
    assert t.header["model"] == {"layers": 2, "heads": 32, "kv_heads": 8, "head_dim": 64}
    assert {s.request for s in t.steps} == {0, 1, 2}
    assert [s.window for s in t.steps[:2]] == [8, 8] and all(s.causal for s in prefill(t))
    assert main(["trace", "info", out]) == 0
    info = capsys.readouterr().out
    assert "kv_heads 8" in info and "requests   3" in info
    for bad in (["--shape", "nope"], ["--kv-heads", "5"], ["--window", "-2"], ["--window", "a"],
                ["--batch", "0"]):
        assert main(["trace", "synth", "--out", out] + bad) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and err.startswith("attnsim: error:")
