"""Pruning and quantization policies applied while attention runs.

Four published methods, each a plain function over numpy arrays so that any
forward pass (ours in :mod:`sim.trace.capture`, or someone else's through
:mod:`sim.trace.recorder`) can call them:

* **cascade token pruning** -- a token's importance is the attention
  probability it receives (column sums of the probability matrix, summed over
  heads and, optionally, accumulated over layers). After each layer the top-k
  tokens by a per-layer schedule survive; pruned tokens never return.
* **cascade head pruning** -- a head's importance is the accumulated magnitude
  of its output; the top-k heads by schedule survive, and never return.
* **local value pruning** -- per probability row keep only the largest
  probabilities (a count, a ratio of the row, or a cumulative-mass target);
  only those V rows are fetched and multiplied.
* **progressive key quantization** -- K is stored as integer codes split into
  a most-significant and a least-significant bit plane. Scores come from the
  MSB plane first; a row whose maximum probability falls under a threshold
  fetches the LSB plane and is recomputed at full key precision.

and three KV-cache methods for decoders generating text (decode steps), each
deciding per KV head which cached rows a step reads:

* **heavy hitters plus a recent window** (Zhang et al., NeurIPS 2023): keep the
  ``recent`` newest rows and, up to ``budget`` rows, those with the largest
  attention accumulated so far; evicted rows never return;
* **attention sinks plus a recent window** (Xiao et al., ICLR 2024): keep the
  first ``sinks`` rows and the ``recent`` newest; the rest are evicted;
* **query-aware page selection** (Tang et al., ICML 2024): nothing is evicted;
  each step scores fixed-size pages of the cache by an upper bound of q.k
  from the per-page elementwise minimum and maximum of the keys, and reads
  only the ``pages`` best pages.

The knobs live in a YAML policy file validated here, once (:func:`load_policy`).
"""

import copy
import dataclasses
import hashlib
import json
import math
import os

import numpy as np

from ..errors import NO_VALUE, InputError, closest
from ..yamlio import guess_kind, locate, read_document, unknown_keys_error


class PolicyError(InputError):
    """A pruning/quantization policy file is malformed or inconsistent."""


# --------------------------------------------------------------------------
# Numerics shared by every policy


def softmax(scores, axis=-1):
    """Numerically stable softmax (subtract the row maximum before exp)."""
    m = np.max(scores, axis=axis, keepdims=True)
    e = np.exp(scores - m)
    return e / np.sum(e, axis=axis, keepdims=True)


def quantize_uniform(x, bits, scale):
    """Symmetric uniform quantizer: integer codes in [-(2^(b-1)-1), 2^(b-1)-1].

    ``scale`` is the step Delta (value of one code). Returns int32 codes;
    ``codes * scale`` reconstructs. Values beyond the range clip.
    """
    if bits < 2:
        raise ValueError(f"bits={bits!r}: a signed quantizer needs at least 2 bits")
    qmax = 2 ** (bits - 1) - 1
    return np.clip(np.rint(x / scale), -qmax, qmax).astype(np.int32)


def quant_step(x, bits, axis=None):
    """Step Delta that maps max|x| (along ``axis``) onto the largest code."""
    qmax = 2 ** (bits - 1) - 1
    amax = np.max(np.abs(x), axis=axis, keepdims=axis is not None)
    return np.where(amax > 0, amax / qmax, 1.0).astype(np.float64)


def split_planes(codes, lsb_bits):
    """Split signed codes into an MSB plane (floor division) and an LSB plane.

    ``msb * 2**lsb_bits + lsb == codes`` exactly, with ``0 <= lsb < 2**lsb_bits``.
    """
    msb = np.right_shift(codes, lsb_bits)
    lsb = codes - np.left_shift(msb, lsb_bits)
    return msb, lsb


def msb_reconstruct(msb, lsb_bits):
    """Key codes known from the MSB plane alone: the centre of each LSB bucket."""
    if lsb_bits == 0:
        return msb.astype(np.float64)
    return msb.astype(np.float64) * (1 << lsb_bits) + ((1 << lsb_bits) - 1) / 2.0


def topk_sorted(scores, k):
    """Positions (into ``scores``) of the ``k`` largest, returned in index order.

    Ties break toward the earlier position so a run is reproducible.
    """
    n = len(scores)
    k = int(min(max(k, 1), n))
    if k == n:
        return np.arange(n)
    # stable descending order: sort by (-score, index)
    order = np.lexsort((np.arange(n), -np.asarray(scores, dtype=np.float64)))
    return np.sort(order[:k])


def keep_count(ratio, n_original, n_live):
    """Rows kept when a schedule entry ``ratio`` applies to ``n_original`` rows.

    Never more than are live (cascade), never fewer than one.
    """
    return int(max(1, min(n_live, math.ceil(ratio * n_original - 1e-9))))


# --------------------------------------------------------------------------
# Policy objects


@dataclasses.dataclass(frozen=True)
class CascadeRule:
    """Top-k schedule for tokens or heads.

    ``schedule[i]`` is the fraction of the *original* tokens (heads) still
    alive after layer ``i``; a schedule shorter than the model repeats its last
    entry. ``accumulate``: importance sums over all layers so far (cascade)
    instead of the current layer only.
    """

    schedule: tuple = ()
    accumulate: bool = True

    @property
    def enabled(self):
        return any(r < 1.0 for r in self.schedule)

    def ratio(self, layer, strength=1.0):
        """Kept fraction after ``layer``; ``strength`` in [0, 1] blends toward dense."""
        if not self.schedule:
            return 1.0
        r = self.schedule[min(layer, len(self.schedule) - 1)]
        return 1.0 - strength * (1.0 - r)


@dataclasses.dataclass(frozen=True)
class ValueRule:
    """Local value pruning of each probability row: one of count/ratio/mass."""

    mode: str = "off"  # off | count | ratio | mass
    amount: float = 1.0

    @property
    def enabled(self):
        return self.mode != "off"

    def keep_mask(self, probs, valid=None):
        """Boolean mask of the probabilities kept per row (last axis).

        A row keeps every probability >= its cut-off value, so exact ties at
        the cut-off are all kept (rare with real scores). ``valid`` (broadcast
        to ``probs``), optional: the entries a row may use at all (causal
        attention); counts and ratios then apply to each row's valid entries.
        """
        n = probs.shape[-1]
        if valid is not None:
            return self._keep_valid(probs, np.broadcast_to(valid, probs.shape))
        if self.mode == "off":
            return np.ones(probs.shape, dtype=bool)
        if self.mode in ("count", "ratio"):
            k = min(int(self.amount), n) if self.mode == "count" else max(1, math.ceil(self.amount * n - 1e-9))
            if k >= n:
                return np.ones(probs.shape, dtype=bool)
            cut = np.partition(probs, n - k, axis=-1)[..., n - k:n - k + 1]  # k-th largest per row
            return probs >= cut
        # mass: the fewest largest probabilities whose sum reaches the target
        desc = -np.sort(-probs, axis=-1)
        csum = np.cumsum(desc, axis=-1, dtype=np.float64)
        need = self.amount * csum[..., -1:] * (1 - 1e-9)
        # index of the first sorted entry at which the running sum reaches the target
        last = np.minimum((csum < need).sum(axis=-1, keepdims=True), n - 1)
        cut = np.take_along_axis(desc, last, axis=-1)
        return probs >= cut

    def _keep_valid(self, probs, valid):
        if self.mode == "off":
            return valid.copy()
        if self.mode == "mass":
            return self.keep_mask(np.where(valid, probs, 0)) & valid
        nv = valid.sum(axis=-1, keepdims=True)
        k = np.minimum(nv, int(self.amount)) if self.mode == "count" else \
            np.maximum(1, np.ceil(self.amount * nv - 1e-9)).astype(np.int64)
        desc = -np.sort(-np.where(valid, probs, -np.inf), axis=-1)
        cut = np.take_along_axis(desc, np.maximum(k - 1, 0), axis=-1)  # k-th largest valid entry per row
        return (probs >= cut) & valid


@dataclasses.dataclass(frozen=True)
class KeyRule:
    """Progressive key quantization: MSB plane first, LSB plane on demand.

    Codes have ``msb_bits + lsb_bits`` bits with one step per head (max|K| of
    that head onto the largest code). A query row whose maximum probability,
    computed from the MSB plane, is below ``threshold`` refetches the LSB plane.
    """

    enabled: bool = False
    msb_bits: int = 6
    lsb_bits: int = 4
    threshold: float = 0.1

    @property
    def bits(self):
        return self.msb_bits + self.lsb_bits


@dataclasses.dataclass(frozen=True)
class CacheRule:
    """Which cached rows a decode step reads, per KV head (decoders only).

    ``mode``: ``off``, ``heavy_hitters`` (``budget`` rows: the ``recent``
    newest plus the largest accumulated attention), ``sinks`` (the first
    ``sinks`` rows plus the ``recent`` newest) or ``pages`` (the ``pages``
    best pages of ``page_size`` rows by their key bounds).
    """

    mode: str = "off"
    budget: int = 0
    recent: int = 0
    sinks: int = 0
    page_size: int = 0
    pages: int = 0

    @property
    def enabled(self):
        return self.mode != "off"

    @property
    def rows(self):
        """Most cached rows one decode step reads per KV head under this rule."""
        return {"off": None, "heavy_hitters": self.budget, "sinks": self.sinks + self.recent,
                "pages": self.page_size * self.pages}[self.mode]

    def at_strength(self, strength, context):
        """The rule blended toward reading everything: strength 1 is the rule as
        written, 0 reads the whole ``context``; budgets in between are rounded."""
        if not self.enabled or strength >= 1.0:
            return self

        def blend(full, mine):
            return int(round(full - strength * (full - mine)))

        if self.mode == "heavy_hitters":
            budget = blend(context, self.budget)
            return dataclasses.replace(self, budget=budget, recent=min(self.recent, budget))
        if self.mode == "sinks":
            return dataclasses.replace(self, recent=blend(context, self.sinks + self.recent) - self.sinks)
        return dataclasses.replace(self, pages=blend(math.ceil(context / self.page_size), self.pages))

    def to_dict(self):
        if self.mode == "heavy_hitters":
            return {"heavy_hitters": {"budget": self.budget, "recent": self.recent}}
        if self.mode == "sinks":
            return {"sinks": {"sinks": self.sinks, "recent": self.recent}}
        if self.mode == "pages":
            return {"pages": {"page_size": self.page_size, "pages": self.pages}}
        return {}


@dataclasses.dataclass(frozen=True)
class FitRule:
    """Search the strongest pruning that keeps a fidelity target.

    Encoders: ``cosine``, the minimum cosine similarity between the pooled
    embeddings of the pruned and the dense run. Decoders: ``agreement``, the
    minimum share of next-token predictions equal to the dense run's. The
    search scales the token and head schedules (and a decoder's cache rule)
    toward dense (strength 1 = the policy as written), trying ``steps`` evenly
    spaced strengths and refining the best one.
    """

    cosine: float = None
    steps: int = 8
    agreement: float = None

    @property
    def enabled(self):
        return self.cosine is not None or self.agreement is not None

    def to_dict(self):
        if self.agreement is not None:
            return {"agreement": self.agreement, "steps": self.steps}
        return {} if self.cosine is None else {"cosine": self.cosine, "steps": self.steps}


@dataclasses.dataclass(frozen=True)
class Policy:
    """Everything a capture applies: token, head, value and key rules."""

    name: str = "dense"
    tokens: CascadeRule = CascadeRule()
    heads: CascadeRule = CascadeRule()
    values: ValueRule = ValueRule()
    keys: KeyRule = KeyRule()
    fit: FitRule = FitRule()
    decode: bool = False
    cache: CacheRule = CacheRule()
    source: str = dataclasses.field(default="<memory>", compare=False)

    def to_dict(self):
        """Plain mapping that :func:`load_policy` reads back to an equal Policy."""
        values = {} if self.values.mode == "off" else {self.values.mode: self.values.amount}
        doc = {
            "name": self.name,
            "tokens": {"schedule": list(self.tokens.schedule), "accumulate": self.tokens.accumulate},
            "heads": {"schedule": list(self.heads.schedule), "accumulate": self.heads.accumulate},
            "values": values,
            "keys": {"enabled": self.keys.enabled, "msb_bits": self.keys.msb_bits,
                     "lsb_bits": self.keys.lsb_bits, "threshold": self.keys.threshold},
            "fit": self.fit.to_dict(),
            "decode": self.decode,
        }
        if self.cache.enabled:  # absent when off, so older policies keep their digest
            doc["cache"] = self.cache.to_dict()
        return doc

    def digest(self):
        return hashlib.sha256(json.dumps(self.to_dict(), sort_keys=True).encode()).hexdigest()

    def check_layers(self, layers, heads=None):
        """Schedules may not be longer than the model is deep (checked per model)."""
        for sec in ("tokens", "heads"):
            sched = getattr(self, sec).schedule
            if len(sched) > layers:
                raise PolicyError(self.source, f"{sec}.schedule", list(sched),
                                  f"expected at most {layers} entries (one per layer of the model)")
        return self

    def check_decoder(self, context, prompt):
        """A decoder capture of ``prompt`` tokens growing to ``context``: the cache
        rule's budget must fit the context and the fit target must be a decoder's."""
        c = self.cache
        if c.enabled and c.rows > context:
            field = {"heavy_hitters": "cache.heavy_hitters.budget", "sinks": "cache.sinks.recent",
                     "pages": "cache.pages.pages"}[c.mode]
            value = {"heavy_hitters": c.budget, "sinks": c.recent, "pages": c.pages}[c.mode]
            raise PolicyError(self.source, field, value,
                              f"expected a budget of at most the context ({c.rows} rows asked, the context "
                              f"is {context} tokens: {prompt} prompt + {context - prompt} generated)")
        if self.fit.cosine is not None:
            raise PolicyError(self.source, "fit.cosine", self.fit.cosine,
                              "expected fit.agreement for a decoder (next-token agreement); "
                              "cosine targets are for encoders")
        return self

    def check_encoder(self):
        """An encoder capture: no cache rule and no agreement target."""
        if self.cache.enabled:
            raise PolicyError(self.source, "cache", self.cache.to_dict(),
                              "expected no cache rule for an encoder (KV-cache methods act in decoder generation)")
        if self.fit.agreement is not None:
            raise PolicyError(self.source, "fit.agreement", self.fit.agreement,
                              "expected fit.cosine for an encoder; agreement targets are for decoders")
        return self

    def dense(self):
        """The same policy with every rule off: the reference run."""
        return dataclasses.replace(self, name="dense", tokens=CascadeRule(), heads=CascadeRule(),
                                   values=ValueRule(), keys=KeyRule(), fit=FitRule(), cache=CacheRule())


DENSE = Policy()

_TOP_KEYS = ("name", "tokens", "heads", "values", "keys", "fit", "decode", "cache")
_CASCADE_KEYS = ("schedule", "accumulate")
_VALUE_KEYS = ("count", "ratio", "mass")
_KEY_KEYS = ("enabled", "msb_bits", "lsb_bits", "threshold")
_FIT_KEYS = ("cosine", "agreement", "steps")
_CACHE_KEYS = {"heavy_hitters": ("budget", "recent"), "sinks": ("sinks", "recent"),
               "pages": ("page_size", "pages")}


MAX_SCHEDULE = 1024     # entries of a token/head schedule (one per layer)


def load_policy(path_or_dict, source=None):
    """Read and validate a policy from a YAML file or a mapping."""
    if isinstance(path_or_dict, Policy):
        return path_or_dict
    doc = None
    if isinstance(path_or_dict, dict):
        data = copy.deepcopy(path_or_dict)
        src = source or "<policy>"
    else:
        src = os.fspath(path_or_dict)
        doc = read_document(src, PolicyError, "pruning policy")
        data = doc.data
        kind = guess_kind(data)
        if kind not in (None, "a pruning policy"):
            raise PolicyError(src, "<file>", NO_VALUE, f"this looks like {kind}, not a pruning policy")
    try:
        return _policy(src, data)
    except PolicyError as exc:
        raise (locate(exc, doc) if doc is not None else exc) from None


def _policy(src, doc):
    if doc is None:
        doc = {}
    if not isinstance(doc, dict):
        raise PolicyError(src, "<root>", type(doc).__name__, "expected a mapping of policy sections")
    unknown = [(str(k), doc[k], closest(k, _TOP_KEYS)) for k in doc if k not in _TOP_KEYS]
    for sec, allowed in (("tokens", _CASCADE_KEYS), ("heads", _CASCADE_KEYS), ("values", _VALUE_KEYS),
                         ("keys", _KEY_KEYS), ("fit", _FIT_KEYS)):
        if isinstance(doc.get(sec), dict):
            unknown += [(f"{sec}.{k}", v, closest(k, allowed)) for k, v in doc[sec].items() if k not in allowed]
    if unknown:
        raise unknown_keys_error(PolicyError, src, unknown)
    name = doc.get("name", "unnamed")
    if not isinstance(name, str) or not name or len(name) > 200 or not name.isprintable():
        raise PolicyError(src, "name", name, "expected a non-empty line of text (at most 200 characters)")
    decode = doc.get("decode", False)
    if not isinstance(decode, bool):
        raise PolicyError(src, "decode", decode, "expected true or false")
    return Policy(name=name, tokens=_cascade(src, "tokens", doc.get("tokens")),
                  heads=_cascade(src, "heads", doc.get("heads")),
                  values=_values(src, doc.get("values")), keys=_keys(src, doc.get("keys")),
                  fit=_fit(src, doc.get("fit")), decode=decode, cache=_cache(src, doc.get("cache")), source=src)


def _no_unknown(src, prefix, doc, allowed):
    for key in doc:
        if key not in allowed:
            raise PolicyError(src, f"{prefix}{key}", doc[key], "unknown key" + closest(key, allowed))


def _section(src, name, doc):
    if doc is None:
        return {}
    if not isinstance(doc, dict):
        raise PolicyError(src, name, doc, "expected a mapping")
    return doc


def _ratio(src, path, value):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise PolicyError(src, path, value, "expected a number in (0, 1]")
    if not 0.0 < value <= 1.0:
        raise PolicyError(src, path, value, "expected a ratio in (0, 1]")
    return float(value)


def _cascade(src, name, doc):
    doc = _section(src, name, doc)
    _no_unknown(src, f"{name}.", doc, _CASCADE_KEYS)
    sched = doc.get("schedule", [])
    if isinstance(sched, (int, float)) and not isinstance(sched, bool):
        sched = [sched]
    if not isinstance(sched, list) or len(sched) > MAX_SCHEDULE:
        raise PolicyError(src, f"{name}.schedule", sched, f"expected a list of kept fractions, one per layer "
                          f"(at most {MAX_SCHEDULE})")
    out = tuple(_ratio(src, f"{name}.schedule[{i}]", v) for i, v in enumerate(sched))
    for i in range(1, len(out)):
        if out[i] > out[i - 1]:
            raise PolicyError(src, f"{name}.schedule[{i}]", out[i],
                              f"expected <= {out[i - 1]} (cascade: pruned {name} never return)")
    acc = doc.get("accumulate", True)
    if not isinstance(acc, bool):
        raise PolicyError(src, f"{name}.accumulate", acc, "expected true or false")
    return CascadeRule(out, acc)


def _values(src, doc):
    doc = _section(src, "values", doc)
    _no_unknown(src, "values.", doc, _VALUE_KEYS)
    if not doc:
        return ValueRule()
    if len(doc) > 1:
        raise PolicyError(src, "values", sorted(doc), "expected exactly one of count, ratio, mass")
    (mode, amount), = doc.items()
    if mode == "count":
        if isinstance(amount, bool) or not isinstance(amount, int) or amount < 1:
            raise PolicyError(src, "values.count", amount, "expected a whole number >= 1")
        if amount > 2 ** 31 - 1:
            raise PolicyError(src, "values.count", amount, "expected a whole number <= 2**31 - 1")
        return ValueRule("count", int(amount))
    return ValueRule(mode, _ratio(src, f"values.{mode}", amount))


def _keys(src, doc):
    doc = _section(src, "keys", doc)
    _no_unknown(src, "keys.", doc, _KEY_KEYS)
    if not doc:
        return KeyRule()
    enabled = doc.get("enabled", True)
    if not isinstance(enabled, bool):
        raise PolicyError(src, "keys.enabled", enabled, "expected true or false")
    bits = {}
    for key, low, default in (("msb_bits", 2, 6), ("lsb_bits", 0, 4)):
        v = doc.get(key, default)
        if isinstance(v, bool) or not isinstance(v, int) or not low <= v <= 16:
            raise PolicyError(src, f"keys.{key}", v, f"expected a whole number in [{low}, 16]")
        bits[key] = v
    if bits["msb_bits"] + bits["lsb_bits"] > 24:
        raise PolicyError(src, "keys.lsb_bits", bits["lsb_bits"],
                          f"expected msb_bits + lsb_bits <= 24 (got {bits['msb_bits'] + bits['lsb_bits']})")
    thr = _ratio(src, "keys.threshold", doc.get("threshold", 0.1))
    return KeyRule(enabled, bits["msb_bits"], bits["lsb_bits"], thr)


def _fit(src, doc):
    doc = _section(src, "fit", doc)
    _no_unknown(src, "fit.", doc, _FIT_KEYS)
    if not doc:
        return FitRule()
    targets = [k for k in ("cosine", "agreement") if k in doc]
    if len(targets) != 1:
        raise PolicyError(src, "fit", doc, "expected exactly one of 'cosine' (encoders: the minimum "
                                           "pooled-embedding cosine similarity) or 'agreement' (decoders: the "
                                           "minimum next-token agreement)")
    target = _ratio(src, f"fit.{targets[0]}", doc[targets[0]])
    steps = doc.get("steps", 8)
    if isinstance(steps, bool) or not isinstance(steps, int) or not 1 <= steps <= 30:
        raise PolicyError(src, "fit.steps", steps, "expected a whole number in [1, 30]")
    if targets[0] == "cosine":
        return FitRule(target, steps)
    return FitRule(None, steps, target)


def _cache(src, doc):
    doc = _section(src, "cache", doc)
    _no_unknown(src, "cache.", doc, tuple(_CACHE_KEYS))
    if not doc:
        return CacheRule()
    if len(doc) > 1:
        raise PolicyError(src, "cache", sorted(doc), "expected exactly one of heavy_hitters, sinks, pages")
    (mode, knobs), = doc.items()
    knobs = _section(src, f"cache.{mode}", knobs)
    _no_unknown(src, f"cache.{mode}.", knobs, _CACHE_KEYS[mode])
    got = {}
    for key in _CACHE_KEYS[mode]:
        low = 0 if key == "sinks" else 1
        v = knobs.get(key)
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise PolicyError(src, f"cache.{mode}.{key}", v, f"expected a whole number >= {low}")
        got[key] = v
    if mode == "heavy_hitters" and got["recent"] > got["budget"]:
        raise PolicyError(src, "cache.heavy_hitters.recent", got["recent"],
                          f"expected at most budget={got['budget']} (the recent rows are part of the budget)")
    return CacheRule(mode, **got)


# --------------------------------------------------------------------------
# Per-layer operations


def attend(q, k, keys, scale, mask=None):
    """Attention probabilities under progressive key quantization.

    ``q``, ``k``: (heads, rows, head_dim) float arrays; ``scale`` multiplies
    the scores (1/sqrt(head_dim)). ``mask`` (rows, keys), optional: true where
    a row may see a key (causal attention); the others get probability 0.
    Returns ``(probs, lsb_mask)``, with ``lsb_mask`` (heads, rows) true where a
    row refetched the LSB plane. With the rule off, plain float scores and an
    all-false mask.
    """
    def probs_of(kt, qq):
        scores = np.matmul(qq, kt) * scale
        if mask is not None:
            scores = np.where(mask, scores, -np.inf).astype(scores.dtype)
        return softmax(scores)

    if not keys.enabled:
        return probs_of(np.ascontiguousarray(np.swapaxes(k, -1, -2)), q), np.zeros(q.shape[:2], dtype=bool)
    step = quant_step(k, keys.bits, axis=(1, 2))  # (heads, 1, 1): one step per head
    codes = quantize_uniform(k, keys.bits, step)
    msb, _ = split_planes(codes, keys.lsb_bits)
    k_msb_t = np.ascontiguousarray(np.swapaxes(msb_reconstruct(msb, keys.lsb_bits) * step, -1, -2), q.dtype)
    probs = probs_of(k_msb_t, q)
    lsb = probs.max(axis=-1) < keys.threshold
    hs = np.flatnonzero(lsb.any(axis=1))
    if len(hs):
        # recompute only the heads that have rows under the threshold
        k_full_t = np.ascontiguousarray(np.swapaxes(codes[hs] * step[hs], -1, -2), q.dtype)
        full = probs_of(k_full_t, q[hs])
        probs[hs] = np.where(lsb[hs][..., None], full, probs[hs])
    return probs, lsb


def token_importance(probs):
    """Cascade token score: probability each key column receives, over heads and rows."""
    return probs.sum(axis=(0, 1), dtype=np.float64)


def head_importance(head_out):
    """Cascade head score: magnitude of each head's output (sum of |values|)."""
    return np.abs(head_out).sum(axis=tuple(range(1, head_out.ndim)), dtype=np.float64)


def effective_key_bits(keys, lsb_heads_fraction):
    """Mean bits fetched per key element: MSB always, LSB for heads that refetched."""
    if not keys.enabled:
        return None
    return keys.msb_bits + keys.lsb_bits * float(lsb_heads_fraction)


# --------------------------------------------------------------------------
# KV-cache selection in decode (per KV head; positions are token positions)


def heavy_hitter_keep(cached, scores, budget, recent, pos):
    """Heavy hitters plus a recent window (Zhang et al., NeurIPS 2023).

    ``cached``: sorted positions in the cache, the new token at ``pos``
    included; ``scores``: attention each has accumulated so far (same order).
    Keeps the rows at positions > ``pos - recent`` and, of the others, the
    ``budget - (rows kept as recent)`` with the largest score (ties keep the
    earlier position). Returns the kept positions, sorted.
    """
    cached = np.asarray(cached)
    if len(cached) <= budget:
        return cached
    new = cached > pos - recent
    old = np.flatnonzero(~new)
    room = max(budget - int(new.sum()), 0)
    keep = np.zeros(len(cached), dtype=bool)
    keep[new] = True
    if room:
        keep[old[topk_sorted(np.asarray(scores)[old], room)]] = True
    return cached[keep]


def sink_keep(cached, sinks, recent, pos):
    """Attention sinks plus a recent window (Xiao et al., ICLR 2024): the cached
    rows at positions < ``sinks`` and > ``pos - recent``."""
    cached = np.asarray(cached)
    return cached[(cached < sinks) | (cached > pos - recent)]


def page_bounds(cached, keys, page_size):
    """Per page of ``page_size`` positions holding cached rows: its id and the
    elementwise minimum and maximum of its keys (``keys``: (rows, head_dim))."""
    page_of = np.asarray(cached) // page_size
    ids, start = np.unique(page_of, return_index=True)
    return ids, np.minimum.reduceat(keys, start, axis=0), np.maximum.reduceat(keys, start, axis=0)


def page_select(cached, keys, queries, page_size, pages, pos):
    """Query-aware page selection (Tang et al., ICML 2024).

    Each page's score is the upper bound of q.k over its keys,
    ``sum over channels of max(q_c * min_c, q_c * max_c)``, summed over the
    ``queries`` (rows = the query heads reading this KV head). The ``pages``
    best pages are read (ties toward the earlier page); the page holding the
    query's own position ``pos`` is always one of them. Returns the positions
    read, sorted.
    """
    cached = np.asarray(cached)
    ids, lo, hi = page_bounds(cached, keys, page_size)
    q = np.asarray(queries, dtype=np.float64)[:, None, :]
    score = np.maximum(q * lo[None], q * hi[None]).sum(axis=(0, 2))
    score[ids == pos // page_size] = np.inf
    chosen = ids[topk_sorted(score, pages)]
    return cached[np.isin(cached // page_size, chosen)]
