"""Decoder capture: causal prefill plus cached generation under a policy,
recorded as a version-2 trace, with a fidelity report against the dense pass.

Work counts are checked against the arithmetic of the causal triangle and of
one cached query row per step (computed here, not through the Step helpers);
footprints against each cache rule's budget; bad input against the one-line
error contract.
"""

import functools
import json
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from helpers_decoder import make_decoder
from sim.cli import main
from sim.trace.decoder import Decoder
from sim.trace.files import load_trace
from sim.trace.generation import capture_decoder, compare, run
from sim.trace.policies import load_policy

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


@functools.lru_cache(maxsize=None)
def model(family="llama", **kw):
    import tempfile

    folder = tempfile.mkdtemp(prefix=f"attnsim-{family}-")
    return Decoder.load(make_decoder(folder, family=family, **kw))


def llama():
    """3 layers, 8 query heads on 2 KV heads, head width 8, 96 positions."""
    return model("llama", layers=3, hidden=64, heads=8, kv_heads=2, vocab=100, positions=96, seed=3)


def prompt(n, seed=0):
    return np.random.default_rng(seed).integers(0, 99, n)


SINKS = {"cache": {"sinks": {"sinks": 2, "recent": 6}}}
HEAVY = {"cache": {"heavy_hitters": {"budget": 10, "recent": 3}}}
PAGES = {"cache": {"pages": {"page_size": 4, "pages": 3}}}


# --------------------------------------------------------------------------
# Work of the dense capture: the causal and cached shapes, exactly


@pytest.mark.parametrize("family", ["llama", "gpt2"])
def test_dense_capture_work_is_the_causal_and_cached_shapes(family):
    """Causal prefill of n tokens: q.K = heads x d x n(n+1)/2 per layer (row i
    sees keys 0..i); decode step t: one query row against n + t + 1 cached rows,
    heads x d x (n + t + 1) (arithmetic). Cache writes: n rows per KV head in
    prefill, one per step; outputs likewise."""
    m = llama() if family == "llama" else model("gpt2", layers=2, hidden=32, heads=4, kv_heads=4, vocab=100,
                                                positions=64, seed=4)
    cfg = m.config
    n, gen, d, h = 17, 5, cfg.head_dim, cfg.heads
    tr = capture_decoder(m, prompt(n), load_policy({}), gen).trace
    pre = [s for s in tr.steps if s.stage == "prefill"]
    dec = [s for s in tr.steps if s.stage == "decode"]
    assert len(pre) == cfg.layers and len(dec) == gen * cfg.layers
    for s in pre:
        assert s.causal and s.q_rows == s.kv_rows == n and s.n_heads == h
        assert s.kv_heads.tolist() == [j // (h // cfg.kv_heads) for j in range(h)]
        w = s.work()
        assert w.qk_macs == w.pv_macs == h * d * n * (n + 1) // 2
        assert w.softmax == h * n * (n + 1) // 2
        assert s.new_kv_rows == s.out_rows == n
    for i, s in enumerate(dec):
        t = i // cfg.layers
        assert (s.layer, s.q_rows, s.kv_rows) == (i % cfg.layers, 1, n + t + 1)
        assert s.kept_k.tolist() == list(range(n + t + 1)) and s.kv_kept_k is None
        assert s.work().qk_macs == s.work().pv_macs == h * d * (n + t + 1)
        assert s.new_kv_rows == s.out_rows == 1
    total = tr.work()
    assert total.qk_macs == cfg.layers * h * d * (n * (n + 1) // 2 + sum(n + t + 1 for t in range(gen)))
    assert tr.header["model"] == {"layers": cfg.layers, "heads": h, "kv_heads": cfg.kv_heads, "head_dim": d}


def test_dense_policy_against_itself_agrees_fully():
    c = capture_decoder(llama(), prompt(20), load_policy({}), 6)
    f = c.fidelity
    assert f["agreement"] == 1.0 and f["mean_kl"] == 0.0 and f["max_kl"] == 0.0
    assert f["hidden_cosine"] == pytest.approx([1.0] * 3, abs=1e-12)
    assert f["decode_rows_read"] == 1.0 and len(f["generated_tokens"]) == 7


# --------------------------------------------------------------------------
# Cache rules: footprints equal their budgets


def _decode(tr):
    return [s for s in tr.steps if s.stage == "decode"]


def _sets(s):
    return s.kv_kept_k if s.kv_kept_k is not None else [s.kept_k] * len(np.unique(s.kv_heads))


def test_heavy_hitters_read_exactly_their_budget():
    """Every decode KV-head-step reads min(budget, context) rows, always its
    newest `recent`; the cache ends at the budget."""
    c = capture_decoder(llama(), prompt(24), load_policy(HEAVY), 6)
    for s in _decode(c.trace):
        for rows in _sets(s):
            assert len(rows) == min(10, s.kv_rows)
            assert rows[-3:].tolist() == list(range(s.kv_rows - 3, s.kv_rows))
    assert c.fidelity["cache_rows_after"] == [[10, 10]] * 3


def test_sinks_read_the_first_and_the_newest_rows():
    c = capture_decoder(llama(), prompt(24), load_policy(SINKS), 6)
    for s in _decode(c.trace):
        want = [0, 1] + list(range(s.kv_rows - 6, s.kv_rows))
        assert s.kv_kept_k is None and s.kept_k.tolist() == want
    assert c.fidelity["cache_rows_after"] == [[8, 8]] * 3


def test_pages_read_whole_pages_including_their_own():
    """Query-aware page selection reads at most pages x page_size rows, made of
    whole pages of the cache, one of them the query's own; nothing is evicted."""
    c = capture_decoder(llama(), prompt(30), load_policy(PAGES), 6)
    for s in _decode(c.trace):
        pos = s.kv_rows - 1
        for rows in _sets(s):
            assert len(rows) <= 12
            pages = set((rows // 4).tolist())
            assert len(pages) == 3 and pos // 4 in pages
            full = [p for p in range(pos // 4 + 1) if p in pages]
            assert rows.tolist() == [r for p in full for r in range(4 * p, min(4 * p + 4, pos + 1))]
    # the KV heads choose different pages: the step records each one's rows
    assert any(s.kv_kept_k is not None for s in _decode(c.trace))
    assert c.fidelity["cache_rows_after"] == [[36, 36]] * 3


def test_value_pruning_and_key_quantization_act_in_decode_too():
    pol = load_policy({"values": {"mass": 0.8}, "keys": {"msb_bits": 3, "lsb_bits": 4, "threshold": 0.5}})
    c = capture_decoder(llama(), prompt(24), pol, 4)
    dec = _decode(c.trace)
    assert all(s.kept_v_idx is not None for s in dec)
    assert any((s.kept_v < s.n_kept_k).any() for s in dec)
    assert any(s.lsb_rows.any() for s in dec)
    for s in dec:
        assert all(len(ix) == kv for ix, kv in zip(s.kept_v_idx, s.kept_v))


def test_cascade_pruning_in_prefill_shapes_the_decode_cache():
    """Tokens pruned after layer l are not in layers > l's cache: decode at layer
    l reads the prefill survivors at l plus every generated token; the last
    prompt token always survives (it predicts the first generated one)."""
    pol = load_policy({"tokens": {"schedule": [0.6, 0.3]}, "heads": {"schedule": [1.0, 0.5]}})
    c = capture_decoder(llama(), prompt(20), pol, 3)
    pre = [s for s in c.trace.steps if s.stage == "prefill"]
    assert [s.q_rows for s in pre] == [20, 12, 6]
    assert all(19 in s.kept_k for s in pre)
    for s in _decode(c.trace):
        live = pre[s.layer].kept_k.tolist()
        assert s.kept_k.tolist() == live + list(range(20, s.kv_rows))
        assert s.heads.tolist() == pre[s.layer].heads.tolist()


# --------------------------------------------------------------------------
# Families of rules: footprint falls with strength; reading everything is dense


FAMILIES = {"sinks": lambda x: {"cache": {"sinks": {"sinks": 2, "recent": x}}},
            "heavy": lambda x: {"cache": {"heavy_hitters": {"budget": x, "recent": 1}}},
            "pages": lambda x: {"cache": {"pages": {"page_size": 4, "pages": x}}}}


@settings(max_examples=12, deadline=None, derandomize=True)
@given(seed=st.integers(0, 10_000), family=st.sampled_from(sorted(FAMILIES)),
       s1=st.floats(0.0, 1.0), s2=st.floats(0.0, 1.0))
def test_a_stronger_setting_never_reads_more_rows(seed, family, s1, s2):
    """Blending a rule toward dense (strength 1 = as written, 0 = read all) is
    monotone in what decode steps read, step by step (hypothesis over prompts
    and strengths)."""
    weak, strong = sorted((s1, s2))
    m, ids = llama(), prompt(24, seed)
    pol = load_policy(FAMILIES[family](2 if family != "sinks" else 3))
    dense = run(m, ids, 4, pol.dense())
    a = run(m, ids, 4, pol, strength=weak, follow=dense.fed)
    b = run(m, ids, 4, pol, strength=strong, follow=dense.fed)
    assert all(y <= x for x, y in zip(a.reads, b.reads))


@settings(max_examples=8, deadline=None, derandomize=True)
@given(seed=st.integers(0, 10_000), family=st.sampled_from(sorted(FAMILIES)))
def test_a_rule_that_reads_everything_is_the_dense_pass(seed, family):
    """A member of each family whose budget covers the whole context reads what
    the dense pass reads: agreement 1.0, KL 0 and the same logits, bit for bit."""
    m, ids, gen = llama(), prompt(20, seed), 5
    covering = {"sinks": 30, "heavy": 25, "pages": 7}[family]
    dense = run(m, ids, gen, load_policy({}))
    r = run(m, ids, gen, load_policy(FAMILIES[family](covering)), follow=dense.fed)
    f = compare(r, dense)
    assert f["agreement"] == 1.0 and f["mean_kl"] == 0.0
    np.testing.assert_array_equal(r.logits, dense.logits)


def test_mean_agreement_falls_as_the_budget_shrinks():
    """On a random model single prompts do not order the settings (a smaller
    cache can by chance agree more often), but over a set of prompts the mean
    next-token agreement falls as each rule's budget shrinks. Twelve fixed
    prompts of 32 tokens, 12 generated tokens each."""
    m = model("llama", layers=2, hidden=32, heads=4, kv_heads=2, vocab=100, positions=96, seed=3)
    budgets = {"sinks": (32, 12, 3), "heavy": (32, 12, 3), "pages": (8, 3, 1)}
    means = {f: np.zeros(3) for f in budgets}
    for k in range(12):
        ids = np.random.default_rng(100 + k).integers(0, 99, 32)
        dense = run(m, ids, 12, load_policy({}))
        for f, xs in budgets.items():
            for i, x in enumerate(xs):
                means[f][i] += compare(run(m, ids, 12, load_policy(FAMILIES[f](x)), follow=dense.fed),
                                       dense)["agreement"] / 12
    for f, mean in means.items():
        assert mean[0] > mean[1] > mean[2], (f, mean)


def test_fit_search_finds_the_strongest_setting_meeting_agreement():
    pol = load_policy({"cache": {"sinks": {"sinks": 1, "recent": 2}}, "fit": {"agreement": 0.8, "steps": 4}})
    c = capture_decoder(llama(), prompt(30, 7), pol, 8)
    f = c.fidelity
    assert f["target_agreement"] == 0.8 and f["passes"] >= 2
    if f["target_met"]:
        assert f["agreement"] >= 0.8
    assert 0.0 <= f["strength"] <= 1.0
    rule = f["cache_rule"]["sinks"]
    assert rule["sinks"] == 1 and rule["recent"] >= 2
    reads = max(len(r) for s in _decode(c.trace) for r in _sets(s))
    assert reads == min(1 + rule["recent"], 38)


# --------------------------------------------------------------------------
# Command line: success and bad input


def _folder(tmp_path, **kw):
    return make_decoder(str(tmp_path / "model"), **kw)


def _text(tmp_path, n):
    p = tmp_path / "prompt.txt"
    p.write_text(" ".join(f"w{i % 90}" for i in range(n)))
    return str(p)


def _policy(tmp_path, doc):
    p = tmp_path / "policy.yaml"
    p.write_text(json.dumps(doc))
    return str(p)


def test_cli_captures_a_decoder(tmp_path, capsys):
    folder = _folder(tmp_path, layers=2, hidden=32, heads=4, kv_heads=2, positions=64)
    out = tmp_path / "t.npz"
    code = main(["trace", "capture", "--model", folder, "--text", _text(tmp_path, 12),
                 "--policy", _policy(tmp_path, HEAVY), "--generate", "4", "--out", str(out)])
    text = capsys.readouterr().out
    assert code == 0 and "next-token agreement" in text and "heavy_hitters" in text
    tr = load_trace(str(out))
    prov = tr.header["provenance"]
    assert prov["model_family"] == "llama" and prov["generate"] == 4 and prov["tokens"] == 12
    assert tr.header["fidelity"]["generated_tokens"] and len(tr.steps) == 2 + 4 * 2


def test_cli_reads_an_encoder_folder_too(tmp_path, capsys):
    """--model DIR with a BERT-style encoder folder runs the encoder capture."""
    from sim.trace.encoder import bundled_files

    folder = os.path.dirname(bundled_files().config)
    out = tmp_path / "e.npz"
    code = main(["trace", "capture", "--model", folder, "--text", os.path.join(ROOT, "traces", "texts",
                 "lighthouse_short.txt"), "--policy", os.path.join(ROOT, "traces", "policies", "moderate.yaml"),
                 "--out", str(out)])
    assert code == 0, capsys.readouterr().err
    ref = load_trace(os.path.join(ROOT, "traces", "captured_short_moderate.npz"))
    assert [s.kept_k.tolist() for s in load_trace(str(out)).steps] == [s.kept_k.tolist() for s in ref.steps]


def _bad(tmp_path, capsys, args):
    out = tmp_path / "t.npz"
    code = main(["trace", "capture", *args, "--out", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.count("\n") == 0 and err.startswith("attnsim: error: "), err
    assert not out.exists() and not any(p.name.startswith(".tmp-") for p in tmp_path.iterdir())
    return err


@pytest.mark.parametrize("case, words", [
    ("no_config", "config.json"), ("no_tokenizer", "tokenizer.json"), ("no_weights", "*.safetensors"),
    ("shape", "expected shape"), ("architecture", "supported: gpt2, llama (decoders), bert (encoders)"),
    ("too_long", "refused, not truncated"), ("budget", "cache.heavy_hitters.budget"),
    ("generate_zero", "--generate"), ("cosine_target", "fit.agreement"),
])
def test_bad_decoder_input_is_one_line_exit_2(tmp_path, capsys, case, words):
    folder = _folder(tmp_path, layers=1, hidden=16, heads=2, kv_heads=1, positions=32)
    text, pol, gen = _text(tmp_path, 10), _policy(tmp_path, {}), "4"
    if case.startswith("no_"):
        os.remove(os.path.join(folder, {"no_config": "config.json", "no_tokenizer": "tokenizer.json",
                                        "no_weights": "model.safetensors"}[case]))
    elif case in ("shape", "architecture"):
        cfg = json.load(open(os.path.join(folder, "config.json")))
        if case == "shape":
            cfg["intermediate_size"] = 48  # the file holds 32-wide feed-forward weights
        else:
            cfg["model_type"] = "mamba"
        json.dump(cfg, open(os.path.join(folder, "config.json"), "w"))
    elif case == "too_long":
        text = _text(tmp_path, 30)  # 30 + 4 > 32 positions
    elif case == "budget":
        pol = _policy(tmp_path, {"cache": {"heavy_hitters": {"budget": 20, "recent": 2}}})  # 10 + 4 < 20
    elif case == "generate_zero":
        gen = "0"
    else:
        pol = _policy(tmp_path, {"fit": {"cosine": 0.9}})
    err = _bad(tmp_path, capsys, ["--model", folder, "--text", text, "--policy", pol, "--generate", gen])
    assert words in err


def test_generate_with_an_encoder_is_refused(tmp_path, capsys):
    err = _bad(tmp_path, capsys, ["--text", os.path.join(ROOT, "traces", "texts", "lighthouse_short.txt"),
                                  "--policy", os.path.join(ROOT, "traces", "policies", "dense.yaml"),
                                  "--generate", "4"])
    assert "--generate" in err
