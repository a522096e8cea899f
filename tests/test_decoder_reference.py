"""The numpy decoder against the reference implementation in ``transformers``.

Small GPT-2 and Llama models are initialised at random in the test with the
library's own config classes and a fixed seed, saved with ``save_pretrained``
to a temporary folder (no download), and read back by our decoder from the
files alone. Logits must agree within 1e-4 for every prompt row and for 8
cached generation steps (``past_key_values`` on the reference side, our KV
cache on ours). Rotary positions (with a non-default base), grouped-query and
multi-query heads, tied and untied output projections, attention and
feed-forward biases, GPT-2's fused Q/K/V, exact GELU and its per-layer score
scaling option are covered.
"""

import functools
import os

os.environ["HF_HUB_OFFLINE"] = "1"  # never reach a model hub: local files only
os.environ["TRANSFORMERS_OFFLINE"] = "1"

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from helpers_decoder import write_tokenizer  # noqa: E402
from sim.trace.decoder import Decoder  # noqa: E402
from sim.trace.generation import run  # noqa: E402
from sim.trace.policies import DENSE  # noqa: E402

VOCAB = 160


CASES = {
    "gpt2": dict(kind="gpt2", n_embd=64, n_layer=3, n_head=4, n_positions=96),
    "llama_gqa": dict(kind="llama", hidden_size=64, intermediate_size=112, num_hidden_layers=3,
                      num_attention_heads=8, num_key_value_heads=2, max_position_embeddings=96,
                      rope_parameters={"rope_type": "default", "rope_theta": 500000.0}),
    "llama_mqa_tied": dict(kind="llama", hidden_size=48, intermediate_size=80, num_hidden_layers=2,
                           num_attention_heads=4, num_key_value_heads=1, max_position_embeddings=96,
                           tie_word_embeddings=True, rms_norm_eps=1e-5),
    "llama_biases": dict(kind="llama", hidden_size=32, intermediate_size=48, num_hidden_layers=2,
                         num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=96,
                         attention_bias=True, mlp_bias=True),
    "gpt2_layer_scaled": dict(kind="gpt2", n_embd=32, n_layer=2, n_head=2, n_positions=96,
                              scale_attn_by_inverse_layer_idx=True, activation_function="gelu"),
}


@functools.lru_cache(maxsize=None)
def reference(case, folder):
    """(transformers model, its saved folder) for a case; seeded, CPU, eager attention."""
    import torch
    from transformers import GPT2Config, GPT2LMHeadModel, LlamaConfig, LlamaForCausalLM

    args = dict(CASES[case])
    kind = args.pop("kind")
    torch.manual_seed(1234)
    if kind == "gpt2":
        model = GPT2LMHeadModel(GPT2Config(vocab_size=VOCAB, bos_token_id=0, eos_token_id=0, **args))
    else:
        model = LlamaForCausalLM(LlamaConfig(vocab_size=VOCAB, bos_token_id=0, eos_token_id=0, **args))
    # fresh models start with zero biases and unit norm weights: perturb them, so
    # the check sees whether they are applied where they belong
    with torch.no_grad():
        for name, param in model.named_parameters():
            if "bias" in name or "norm" in name or ".ln_" in name:
                param.add_(torch.randn_like(param) * 0.05)
    model.eval()
    model.save_pretrained(folder)
    write_tokenizer(folder, VOCAB)
    return model


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    base = tmp_path_factory.mktemp("models")
    out = {}
    for case in CASES:
        folder = str(base / case)
        out[case] = (reference(case, folder), Decoder.load(folder))
    return out


@pytest.mark.parametrize("case", sorted(CASES))
def test_prefill_and_cached_steps_match_transformers(models, case):
    """Logits within 1e-4 of transformers for every prompt row and 8 cached steps."""
    import torch

    ref, ours = models[case]
    ids = np.random.default_rng(5).integers(0, VOCAB, 21)
    with torch.no_grad():
        out = ref(torch.tensor(ids[None]), use_cache=True)
        ref_prefill = out.logits[0].numpy()
        past, tokens, ref_steps = _cache(out), [], []
        nxt = int(ref_prefill[-1].argmax())
        for _ in range(8):
            tokens.append(nxt)
            out = ref(torch.tensor([[nxt]]), **{_CACHE_ARG: past}, use_cache=True)
            past = _cache(out)
            ref_steps.append(out.logits[0, -1].numpy())
            nxt = int(ref_steps[-1].argmax())
    mine = run(ours, ids, 8, DENSE, follow=tokens, all_logits=True)
    np.testing.assert_allclose(mine.prefill_logits, ref_prefill, rtol=0, atol=1e-4)
    np.testing.assert_allclose(mine.logits[1:], np.array(ref_steps), rtol=0, atol=1e-4)
    # and greedy decoding on our side picks the same tokens
    assert mine.predictions[:8].tolist() == tokens


# the library renamed its cache argument (past_key_values -> cache); use whichever it has
_CACHE_ARG = "cache"


def _cache(out):
    global _CACHE_ARG
    if "cache" in out:
        return out["cache"]
    _CACHE_ARG = "past_key_values"
    return out["past_key_values"]


def test_the_cases_cover_rotary_and_grouped_heads(models):
    cfgs = {case: models[case][1].config for case in CASES}
    assert cfgs["llama_gqa"].family == "llama" and cfgs["llama_gqa"].kv_heads == 2 and cfgs["llama_gqa"].heads == 8
    assert cfgs["llama_gqa"].rope_theta == 500000.0
    assert cfgs["llama_mqa_tied"].kv_heads == 1 and cfgs["llama_mqa_tied"].tied
    assert cfgs["gpt2"].family == "gpt2" and cfgs["gpt2"].kv_heads == cfgs["gpt2"].heads


def max_logit_error(models):
    """The largest |ours - transformers| over all cases (printed for the report)."""
    import torch

    worst = 0.0
    for case in CASES:
        ref, ours = models[case]
        ids = np.random.default_rng(6).integers(0, VOCAB, 30)
        with torch.no_grad():
            want = ref(torch.tensor(ids[None])).logits[0].numpy()
        got = run(ours, ids, 1, DENSE, all_logits=True).prefill_logits
        worst = max(worst, float(np.abs(got - want).max()))
    return worst


def test_report_the_largest_logit_error(models, capsys):
    err = max_logit_error(models)
    with capsys.disabled():
        print(f"\nnumpy decoder vs transformers: max |logit error| {err:.2e} over {len(CASES)} models")
    assert err < 1e-4
