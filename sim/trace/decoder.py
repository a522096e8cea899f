"""Decoder-only language models in numpy: the GPT-2 and Llama families.

It models the forward pass of a pre-norm decoder in float32 on the CPU, the
way the reference implementations compute it:

* **GPT-2 family** -- learned position embeddings, LayerNorm, a fused Q/K/V
  projection (stored input-major), GELU feed-forward, biases everywhere,
  output projection tied to the token embeddings;
* **Llama family** -- rotary position embeddings (half-split layout),
  RMSNorm, a gated feed-forward (SiLU(gate) x up, then down), grouped-query
  attention (``num_key_value_heads`` K/V heads shared by the query heads),
  no biases unless the config asks for them.

A model is a folder in the common layout: ``config.json``, one or more
``*.safetensors`` weight files and ``tokenizer.json``, read with
``safetensors.numpy`` and ``tokenizers``; torch is never needed. Every shape is
checked against the config on load. This module knows the model; running it
under a policy with a KV cache and recording the trace is
:mod:`sim.trace.generation`.
"""

import dataclasses
import glob
import hashlib
import json
import math
import os

import numpy as np

from .encoder import ModelError
from .nn import gelu, layer_norm, rms_norm, rotary_tables, rotate, silu

DECODERS = ("gpt2", "llama")
ENCODERS = ("bert",)
INSTALL_READERS = "pip install tokenizers safetensors"
_GPT2_ACTS = ("gelu_new", "gelu", "gelu_pytorch_tanh", "relu")


@dataclasses.dataclass(frozen=True)
class ModelFolder:
    """The files of a model folder."""

    folder: str
    config: str
    tokenizer: str
    weights: tuple
    model_type: str

    @property
    def model_id(self):
        return f"user:{os.path.basename(os.path.normpath(self.folder))}"


def read_folder(folder):
    """Find config.json, tokenizer.json and the weights of a model folder and
    read its architecture name; a missing file or an unsupported architecture
    is one error naming it."""
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise ModelError(folder, "--model", folder, "expected a model folder (config.json, *.safetensors, "
                                                    "tokenizer.json)")
    config = os.path.join(folder, "config.json")
    tokenizer = os.path.join(folder, "tokenizer.json")
    for path, what in ((config, "the model's config.json"), (tokenizer, "the tokenizer's tokenizer.json")):
        if not os.path.isfile(path):
            raise ModelError(path, "<file>", os.path.basename(path), f"file not found: the folder needs {what}")
    weights = tuple(sorted(glob.glob(os.path.join(folder, "*.safetensors"))))
    if not weights:
        raise ModelError(os.path.join(folder, "*.safetensors"), "<file>", "*.safetensors",
                         "file not found: the folder needs the weights as .safetensors")
    doc = _json(config)
    kind = doc.get("model_type")
    if kind not in DECODERS + ENCODERS:
        raise ModelError(config, "model_type", kind,
                         f"unsupported architecture; supported: {', '.join(DECODERS)} (decoders), "
                         f"{', '.join(ENCODERS)} (encoders)")
    return ModelFolder(folder, config, tokenizer, weights, kind)


def _json(path):
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelError(path, "<file>", "...", f"expected a JSON model config ({exc.__class__.__name__})") from None
    if not isinstance(doc, dict):
        raise ModelError(path, "<root>", type(doc).__name__, "expected a JSON object")
    return doc


# --------------------------------------------------------------------------
# Config


@dataclasses.dataclass(frozen=True)
class DecoderConfig:
    """Shape and numerics of a decoder, in one vocabulary for both families."""

    family: str
    hidden: int
    heads: int
    kv_heads: int
    head_dim: int
    layers: int
    intermediate: int
    max_positions: int
    vocab: int
    eps: float
    act: str
    rope_theta: float = None      # Llama: rotary base
    tied: bool = True             # output projection = token embeddings
    attn_bias: bool = False
    mlp_bias: bool = False
    inverse_layer_scale: bool = False  # GPT-2 option: scores / (layer + 1)

    @property
    def group(self):
        return self.heads // self.kv_heads


def read_config(path):
    """Load and check a decoder's config.json; errors name the key and the value."""
    doc = _json(path)

    def whole(key, low=1, default=None):
        v = doc.get(key, default)
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise ModelError(path, key, v, f"expected a whole number >= {low}")
        return v

    def number(key, default, low=0.0, high=1.0):
        v = doc.get(key, default)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not low < v < high:
            raise ModelError(path, key, v, f"expected a number in ({low:g}, {high:g})")
        return float(v)

    kind = doc.get("model_type")
    if kind == "gpt2":
        hidden, heads = whole("n_embd"), whole("n_head")
        if hidden % heads:
            raise ModelError(path, "n_head", heads, f"expected a divisor of n_embd={hidden}")
        act = doc.get("activation_function", "gelu_new")
        if act not in _GPT2_ACTS:
            raise ModelError(path, "activation_function", act, f"expected one of {', '.join(_GPT2_ACTS)}")
        inner = doc.get("n_inner")
        inner = 4 * hidden if inner is None else whole("n_inner")
        if doc.get("scale_attn_weights", True) is not True:
            raise ModelError(path, "scale_attn_weights", doc.get("scale_attn_weights"),
                             "expected true (scores scaled by 1/sqrt(head width))")
        return DecoderConfig("gpt2", hidden, heads, heads, hidden // heads, whole("n_layer"), inner,
                             whole("n_positions"), whole("vocab_size"), number("layer_norm_epsilon", 1e-5),
                             act, tied=True, attn_bias=True, mlp_bias=True,
                             inverse_layer_scale=doc.get("scale_attn_by_inverse_layer_idx", False) is True)
    if kind != "llama":
        raise ModelError(path, "model_type", kind,
                         f"unsupported architecture; supported decoders: {', '.join(DECODERS)}")
    hidden, heads = whole("hidden_size"), whole("num_attention_heads")
    kv = whole("num_key_value_heads", default=heads)
    if heads % kv:
        raise ModelError(path, "num_key_value_heads", kv, f"expected a divisor of num_attention_heads={heads}")
    head_dim = doc.get("head_dim")
    head_dim = hidden // heads if head_dim is None else whole("head_dim")
    if head_dim % 2:
        raise ModelError(path, "head_dim", head_dim, "expected an even head width (rotary pairs)")
    if doc.get("hidden_act", "silu") != "silu":
        raise ModelError(path, "hidden_act", doc.get("hidden_act"), "expected 'silu' (Llama gated feed-forward)")
    return DecoderConfig("llama", hidden, heads, kv, head_dim, whole("num_hidden_layers"),
                         whole("intermediate_size"), whole("max_position_embeddings"), whole("vocab_size"),
                         number("rms_norm_eps", 1e-6), "silu", _rope_theta(path, doc),
                         tied=doc.get("tie_word_embeddings", False) is True,
                         attn_bias=doc.get("attention_bias", False) is True, mlp_bias=doc.get("mlp_bias", False) is True)


def _rope_theta(path, doc):
    """The rotary base; only the plain (unscaled) rotary embedding is modelled."""
    params = doc.get("rope_parameters") or {}
    scaling = doc.get("rope_scaling")
    kind = params.get("rope_type", (scaling or {}).get("rope_type", (scaling or {}).get("type", "default")))
    if kind != "default":
        field = "rope_parameters.rope_type" if params else "rope_scaling"
        raise ModelError(path, field, kind, "expected the default rotary embedding (no scaling)")
    theta = params.get("rope_theta", doc.get("rope_theta", 10000.0))
    if isinstance(theta, bool) or not isinstance(theta, (int, float)) or theta <= 1:
        raise ModelError(path, "rope_theta", theta, "expected a number > 1")
    return float(theta)


# --------------------------------------------------------------------------
# Weights


def expected_shapes(cfg):
    """Tensor name -> shape the checkpoint must hold (names as the reference
    implementation saves them)."""
    h, d, inter = cfg.hidden, cfg.head_dim, cfg.intermediate
    out = {}
    if cfg.family == "gpt2":
        out.update({"transformer.wte.weight": (cfg.vocab, h), "transformer.wpe.weight": (cfg.max_positions, h),
                    "transformer.ln_f.weight": (h,), "transformer.ln_f.bias": (h,)})
        for n in range(cfg.layers):
            p = f"transformer.h.{n}."
            out.update({f"{p}ln_1.weight": (h,), f"{p}ln_1.bias": (h,), f"{p}ln_2.weight": (h,),
                        f"{p}ln_2.bias": (h,), f"{p}attn.c_attn.weight": (h, 3 * h),
                        f"{p}attn.c_attn.bias": (3 * h,), f"{p}attn.c_proj.weight": (h, h),
                        f"{p}attn.c_proj.bias": (h,), f"{p}mlp.c_fc.weight": (h, inter),
                        f"{p}mlp.c_fc.bias": (inter,), f"{p}mlp.c_proj.weight": (inter, h),
                        f"{p}mlp.c_proj.bias": (h,)})
        return out
    out.update({"model.embed_tokens.weight": (cfg.vocab, h), "model.norm.weight": (h,)})
    if not cfg.tied:
        out["lm_head.weight"] = (cfg.vocab, h)
    for n in range(cfg.layers):
        p = f"model.layers.{n}."
        q, kv = cfg.heads * d, cfg.kv_heads * d
        out.update({f"{p}input_layernorm.weight": (h,), f"{p}post_attention_layernorm.weight": (h,),
                    f"{p}self_attn.q_proj.weight": (q, h), f"{p}self_attn.k_proj.weight": (kv, h),
                    f"{p}self_attn.v_proj.weight": (kv, h), f"{p}self_attn.o_proj.weight": (h, q),
                    f"{p}mlp.gate_proj.weight": (inter, h), f"{p}mlp.up_proj.weight": (inter, h),
                    f"{p}mlp.down_proj.weight": (h, inter)})
        if cfg.attn_bias:
            out.update({f"{p}self_attn.q_proj.bias": (q,), f"{p}self_attn.k_proj.bias": (kv,),
                        f"{p}self_attn.v_proj.bias": (kv,), f"{p}self_attn.o_proj.bias": (h,)})
        if cfg.mlp_bias:
            out.update({f"{p}mlp.gate_proj.bias": (inter,), f"{p}mlp.up_proj.bias": (inter,),
                        f"{p}mlp.down_proj.bias": (h,)})
    return out


def read_weights(files, cfg, config_path):
    """Load every tensor the decoder needs from the .safetensors files and
    check its shape against the config."""
    try:
        from safetensors import SafetensorError, safe_open
    except ImportError:
        raise ModelError("<model>", "safetensors", "not installed",
                         f"the capture reader needs it; install with: {INSTALL_READERS}") from None
    raw, where = {}, {}
    for path in files:
        try:
            # tensor by tensor, so the file is never held twice in memory
            with safe_open(path, framework="np") as fh:
                for key in fh.keys():
                    raw[key] = fh.get_tensor(key)
                    where[key] = path
        except (SafetensorError, OSError, ValueError) as exc:
            raise ModelError(path, "<file>", "...", f"expected a .safetensors weights file ({exc})") from None
    if cfg.family == "gpt2" and not any(k.startswith("transformer.") for k in raw):
        # a bare GPT2Model checkpoint has no 'transformer.' prefix
        raw = {f"transformer.{k}": v for k, v in raw.items()}
        where = {f"transformer.{k}": v for k, v in where.items()}
    shown = os.path.basename(config_path)
    out = {}
    for name, shape in expected_shapes(cfg).items():
        if name not in raw:
            raise ModelError(files[0] if len(files) == 1 else os.path.dirname(files[0]), name, "missing",
                             f"expected a tensor of shape {shape} ({cfg.family} layout)")
        t = raw[name]
        if tuple(t.shape) != shape:
            raise ModelError(where[name], name, tuple(t.shape), f"expected shape {shape} from {shown}")
        if not np.issubdtype(t.dtype, np.floating):
            raise ModelError(where[name], name, str(t.dtype), "expected floating-point weights")
        out[name] = np.ascontiguousarray(t, dtype=np.float32)
    return out


@dataclasses.dataclass
class Layer:
    """One decoder block's weights, input-major (``x @ w``), split per projection."""

    norm1: tuple
    norm2: tuple
    wq: np.ndarray
    wk: np.ndarray
    wv: np.ndarray
    bq: np.ndarray
    bk: np.ndarray
    bv: np.ndarray
    wo: np.ndarray
    bo: np.ndarray
    mlp: dict


def _layers(cfg, w):
    """Per-layer weights of either family in one layout (Llama's (out, in)
    matrices as transposed views: BLAS reads them as they are, no copy)."""
    t = lambda a: a.T  # noqa: E731  (out, in) -> (in, out)
    h = cfg.hidden
    out = []
    for n in range(cfg.layers):
        if cfg.family == "gpt2":
            p = f"transformer.h.{n}."
            qkv, b = w[f"{p}attn.c_attn.weight"], w[f"{p}attn.c_attn.bias"]
            out.append(Layer((w[f"{p}ln_1.weight"], w[f"{p}ln_1.bias"]), (w[f"{p}ln_2.weight"], w[f"{p}ln_2.bias"]),
                             *(np.ascontiguousarray(qkv[:, i * h:(i + 1) * h]) for i in range(3)),
                             *(b[i * h:(i + 1) * h] for i in range(3)),
                             w[f"{p}attn.c_proj.weight"], w[f"{p}attn.c_proj.bias"],
                             {"fc": (w[f"{p}mlp.c_fc.weight"], w[f"{p}mlp.c_fc.bias"]),
                              "proj": (w[f"{p}mlp.c_proj.weight"], w[f"{p}mlp.c_proj.bias"])}))
            continue
        p = f"model.layers.{n}."
        a = f"{p}self_attn."
        bias = (lambda name: w.get(name))  # noqa: E731
        out.append(Layer((w[f"{p}input_layernorm.weight"], None), (w[f"{p}post_attention_layernorm.weight"], None),
                         t(w[f"{a}q_proj.weight"]), t(w[f"{a}k_proj.weight"]), t(w[f"{a}v_proj.weight"]),
                         bias(f"{a}q_proj.bias"), bias(f"{a}k_proj.bias"), bias(f"{a}v_proj.bias"),
                         t(w[f"{a}o_proj.weight"]), bias(f"{a}o_proj.bias"),
                         {k: (t(w[f"{p}mlp.{k}_proj.weight"]), bias(f"{p}mlp.{k}_proj.bias"))
                          for k in ("gate", "up", "down")}))
    return out


# --------------------------------------------------------------------------
# The model


class Decoder:
    """A loaded decoder: config, weights and tokenizer, and the block math."""

    def __init__(self, files):
        if files.model_type not in DECODERS:
            raise ModelError(files.config, "model_type", files.model_type,
                             f"expected a decoder ({', '.join(DECODERS)})")
        self.files = files
        self.config = cfg = read_config(files.config)
        w = read_weights(files.weights, cfg, files.config)
        self.layers = _layers(cfg, w)
        if cfg.family == "gpt2":
            self.wte, self.wpe = w["transformer.wte.weight"], w["transformer.wpe.weight"]
            self.norm_f = (w["transformer.ln_f.weight"], w["transformer.ln_f.bias"])
            self.head = self.wte
        else:
            self.wte, self.wpe = w["model.embed_tokens.weight"], None
            self.norm_f = (w["model.norm.weight"], None)
            self.head = self.wte if cfg.tied else w["lm_head.weight"]
        self.head_t = self.head.T  # a view: the product reads the embedding table as stored
        self.tokenizer = _tokenizer(files.tokenizer, cfg, files.config)
        self.scale = np.float32(1.0 / math.sqrt(cfg.head_dim))
        self._digest = None

    @classmethod
    def load(cls, folder):
        return cls(read_folder(folder))

    @property
    def weights_digest(self):
        """SHA-256 over the weight files' SHA-256s, in file-name order."""
        if self._digest is None:
            from .nn import file_digest
            h = hashlib.sha256()
            for path in self.files.weights:
                h.update(file_digest(path).encode())
            self._digest = h.hexdigest()
        return self._digest

    def tokenize(self, text):
        """Token ids of ``text`` as the tokenizer's template makes them."""
        return np.asarray(self.tokenizer.encode(text).ids, dtype=np.int64)

    # ------------------------------------------------------------------ block math

    def embed(self, ids, positions):
        x = self.wte[np.asarray(ids)]
        if self.wpe is not None:
            x = x + self.wpe[np.asarray(positions)]
        return x.astype(np.float32)

    def _norm(self, x, params):
        w, b = params
        if self.config.family == "gpt2":
            return layer_norm(x, w, b, np.float32(self.config.eps)).astype(np.float32)
        return rms_norm(x, w, self.config.eps)

    def qkv(self, layer, x, positions):
        """Queries (heads, rows, d), keys and values (kv_heads, rows, d) of the
        normed input, with rotary positions applied (Llama)."""
        cfg, L = self.config, self.layers[layer]
        h = self._norm(x, L.norm1)
        n, d = len(x), cfg.head_dim

        def proj(w, b, heads):
            y = h @ w
            if b is not None:
                y = y + b
            return np.ascontiguousarray(y.reshape(n, heads, d).transpose(1, 0, 2))

        q, k, v = proj(L.wq, L.bq, cfg.heads), proj(L.wk, L.bk, cfg.kv_heads), proj(L.wv, L.bv, cfg.kv_heads)
        if cfg.family == "llama":
            cos, sin = rotary_tables(positions, d, cfg.rope_theta)
            q, k = rotate(q, cos, sin), rotate(k, cos, sin)
        return q.astype(np.float32), k.astype(np.float32), v

    def scale_of(self, layer):
        """Score scale of a layer: 1/sqrt(head width), and 1/(layer+1) with GPT-2's option."""
        if self.config.inverse_layer_scale:
            return np.float32(self.scale / (layer + 1))
        return self.scale

    def finish(self, layer, x, ctx):
        """Residual block after attention: output projection of ``ctx`` (rows,
        heads * d; zeros for pruned heads), then the feed-forward."""
        cfg, L = self.config, self.layers[layer]
        attn = ctx @ L.wo
        if L.bo is not None:
            attn = attn + L.bo
        x = x + attn
        h = self._norm(x, L.norm2)
        if cfg.family == "gpt2":
            (w1, b1), (w2, b2) = L.mlp["fc"], L.mlp["proj"]
            y = gelu((h @ w1 + b1).astype(np.float32), cfg.act) @ w2 + b2  # gelu_new: the tanh form
        else:
            g = _lin(h, *L.mlp["gate"])
            y = _lin(silu(g) * _lin(h, *L.mlp["up"]), *L.mlp["down"])
        return (x + y).astype(np.float32)

    def logits(self, x):
        """Next-token logits of the final hidden rows."""
        return self._norm(x, self.norm_f) @ self.head_t


def _lin(x, w, b):
    y = x @ w
    return y if b is None else y + b


def _tokenizer(path, cfg, config_path):
    try:
        from tokenizers import Tokenizer
    except ImportError:
        raise ModelError("<model>", "tokenizers", "not installed",
                         f"the capture reader needs it; install with: {INSTALL_READERS}") from None
    try:
        tok = Tokenizer.from_file(path)
    except Exception as exc:  # the tokenizers package raises a bare Exception
        raise ModelError(path, "<file>", "...", f"expected a tokenizer.json ({exc})") from None
    tok.no_truncation()
    tok.no_padding()
    if tok.get_vocab_size() > cfg.vocab:
        raise ModelError(path, "vocab", tok.get_vocab_size(),
                         f"expected at most vocab_size={cfg.vocab} from {os.path.basename(config_path)}")
    return tok
