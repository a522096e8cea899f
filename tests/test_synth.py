"""Synthetic traces: seeded, ratios honoured, cascade holds, decode context grows."""

import math
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from sim.errors import TraceError
from sim.trace.format import load_trace, save_trace
from sim.trace.synth import synth_trace

HERE = os.path.dirname(os.path.abspath(__file__))
TRACES = os.path.join(os.path.dirname(HERE), "traces")

PRUNED = dict(prompt_tokens=300, decode_steps=12, layers=6, heads=8, head_dim=64,
              token_keep=0.7, head_keep=0.8, value_keep=0.4, lsb_fraction=0.3,
              lsb_fraction_rows=0.25, seed=11)

ARGS = ("prompt_tokens", "decode_steps", "layers", "heads", "head_dim", "token_keep", "head_keep",
        "value_keep", "lsb_fraction", "lsb_fraction_rows", "seed", "include_prefill")


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
    assert t.header["model"] == {"layers": 6, "heads": 8, "head_dim": 64}


@pytest.mark.parametrize("name", ["synth_prefill.npz", "synth_decode.npz", "demo_decode.yaml"])
def test_bundled_synthetic_traces_remake_from_their_provenance(name):
    t = load_trace(os.path.join(TRACES, name))
    prov = t.header["provenance"]
    assert prov["method"] == "synth"
    again = synth_trace(**{k: prov[k] for k in ARGS}, name=t.header["name"])
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
