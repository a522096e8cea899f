"""The numpy encoder against outside references.

* Hidden states against the reference BERT implementation in the
  ``transformers`` package on CPU (``BertModel``, eager attention), loaded
  from the same local model files with hub access off; float32, 1e-4.
* The erf behind exact GELU against ``scipy.special.erf``
  (Abramowitz & Stegun 7.1.26 promises |error| < 1.5e-7).
"""

import functools
import json
import os

os.environ["HF_HUB_OFFLINE"] = "1"  # never reach a model hub: local files only
os.environ["TRANSFORMERS_OFFLINE"] = "1"

import numpy as np  # noqa: E402
import pytest  # noqa: E402
import scipy.special  # noqa: E402

from sim.trace.encoder import Encoder, erf, gelu, user_files  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
TEXTS = os.path.join(HERE, "..", "traces", "texts")


@functools.lru_cache(maxsize=None)
def bundled():
    return Encoder.load()


@functools.lru_cache(maxsize=None)
def reference_model(folder):
    import torch  # a missing torch fails the test: CI installs the CPU build
    from transformers import BertModel

    torch.manual_seed(0)
    return BertModel.from_pretrained(folder, local_files_only=True, attn_implementation="eager").eval()


def reference_states(folder, ids):
    import torch

    model = reference_model(folder)
    with torch.no_grad():
        out = model(torch.tensor(ids[None]), output_hidden_states=True)
    return [h[0].numpy() for h in out.hidden_states]


@pytest.mark.parametrize("text", ["lighthouse_short.txt", "lighthouse_log.txt"])
def test_hidden_states_match_transformers(text):
    """Every layer's hidden states within 1e-4 of transformers' BertModel (pruning off)."""
    enc = bundled()
    with open(os.path.join(TEXTS, text), encoding="utf-8") as fh:
        ids, _ = enc.tokenize(fh.read())
    ours = enc.forward(ids)
    ref = reference_states(os.path.dirname(enc.files.config), ids)
    assert len(ref) == enc.config.layers + 1
    for layer, (pos, h) in enumerate(ours.states):
        assert len(pos) == len(ids)
        np.testing.assert_allclose(h, ref[layer + 1], rtol=0, atol=1e-4,
                                   err_msg=f"layer {layer} of {text}")
    # mean pooling as the sentence encoder does it
    np.testing.assert_allclose(ours.pooled(), ref[-1].astype(np.float64).mean(axis=0), atol=1e-5)


def test_user_supplied_encoder_matches_transformers(tmp_path):
    """A small random BERT-style encoder given by --weights/--tokenizer/--model-config paths."""
    from safetensors.numpy import save_file
    from transformers import BertConfig, BertModel
    import torch

    base = bundled()
    cfg = {"hidden_size": 64, "num_attention_heads": 4, "num_hidden_layers": 2, "intermediate_size": 128,
           "max_position_embeddings": 64, "vocab_size": base.config.vocab, "type_vocab_size": 2,
           "layer_norm_eps": 1e-12, "hidden_act": "gelu", "model_type": "bert"}
    torch.manual_seed(7)
    model = BertModel(BertConfig(**cfg), add_pooling_layer=False).eval()
    weights = {k: v.detach().numpy().copy() for k, v in model.state_dict().items()}
    save_file(weights, str(tmp_path / "w.safetensors"))
    (tmp_path / "config.json").write_text(json.dumps(cfg))
    enc = Encoder(user_files(str(tmp_path / "w.safetensors"), base.files.tokenizer, str(tmp_path / "config.json")))
    ids, _ = enc.tokenize("The fog bell rang twice at the north jetty.")
    ours = enc.forward(ids)
    with torch.no_grad():
        ref = model(torch.tensor(ids[None]), output_hidden_states=True).hidden_states
    for layer, (_, h) in enumerate(ours.states):
        np.testing.assert_allclose(h, ref[layer + 1][0].numpy(), rtol=0, atol=1e-4)
    assert enc.files.model_id == "user:w.safetensors"


def test_erf_against_scipy():
    """A&S 7.1.26: |erf error| < 1.5e-7 (checked in float64 against scipy.special.erf)."""
    x = np.linspace(-6, 6, 20001)
    assert np.max(np.abs(erf(x) - scipy.special.erf(x))) < 1.5e-7


def test_gelu_against_scipy_form():
    """Exact GELU is x * Phi(x) (Hendrycks & Gimpel 2016), Phi via scipy.special.ndtr."""
    x = np.linspace(-8, 8, 4001).astype(np.float32)
    ref = x.astype(np.float64) * scipy.special.ndtr(x.astype(np.float64))
    assert np.max(np.abs(gelu(x) - ref)) < 2e-6
