"""Small decoder model folders for the capture tests (not a test module).

``make_decoder`` writes config.json, random weights (.safetensors, written with
``safetensors.numpy``) and a word-level tokenizer.json made with the
``tokenizers`` package: the common folder layout a user's model comes in.
"""

import json
import os

import numpy as np

from sim.trace.decoder import expected_shapes, read_config


def write_tokenizer(folder, vocab):
    """A word-level tokenizer.json: words "w0".."w{vocab-2}" and an unknown token."""
    from tokenizers import Tokenizer, models, pre_tokenizers

    words = {f"w{i}": i for i in range(vocab - 1)}
    words["[UNK]"] = vocab - 1
    tok = Tokenizer(models.WordLevel(words, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    tok.save(os.path.join(folder, "tokenizer.json"))


def decoder_config(family, layers, hidden, heads, kv_heads, vocab, positions, inter=None):
    if family == "gpt2":
        return {"model_type": "gpt2", "n_embd": hidden, "n_layer": layers, "n_head": heads,
                "n_positions": positions, "vocab_size": vocab, "n_inner": inter}
    return {"model_type": "llama", "hidden_size": hidden, "num_hidden_layers": layers,
            "num_attention_heads": heads, "num_key_value_heads": kv_heads, "intermediate_size": inter or 2 * hidden,
            "max_position_embeddings": positions, "vocab_size": vocab, "rms_norm_eps": 1e-6,
            "rope_parameters": {"rope_type": "default", "rope_theta": 10000.0}}


def make_decoder(folder, family="llama", layers=2, hidden=32, heads=4, kv_heads=2, vocab=100, positions=64,
                 seed=0, std=0.02, inter=None):
    """Write a random decoder folder; returns its path. Norm weights are 1 (as
    freshly initialised models have them), everything else N(0, std)."""
    os.makedirs(folder, exist_ok=True)
    from safetensors.numpy import save_file

    cfg = decoder_config(family, layers, hidden, heads, kv_heads, vocab, positions, inter)
    path = os.path.join(folder, "config.json")
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(cfg, fh)
    rng = np.random.default_rng(seed)
    tensors = {}
    for name, shape in expected_shapes(read_config(path)).items():
        norm = name.endswith(("norm.weight", "layernorm.weight", "ln_1.weight", "ln_2.weight", "ln_f.weight"))
        tensors[name] = np.ones(shape, np.float32) if norm else rng.normal(0, std, shape).astype(np.float32)
    save_file(tensors, os.path.join(folder, "model.safetensors"))
    write_tokenizer(folder, vocab)
    return folder
