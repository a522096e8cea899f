"""Recorder: turns the attention tensors of one forward pass into a trace.

It is framework-neutral: per layer it takes numpy arrays (attention
probabilities, head outputs, keys and optionally queries), applies a
:class:`~sim.trace.policies.Policy` and remembers one trace step. It also
decides which tokens and heads survive into the next layer (cascade pruning),
so a forward pass that can act on the decision really runs the next layer on
fewer tokens and heads. Our numpy encoder does that (:mod:`sim.trace.capture`).

A framework that cannot prune mid-pass may hand over the *dense* tensors from
a hook: the recorder then slices them to the survivors and renormalizes the
kept probability columns, which is what the pruned layer would have computed
had its inputs been unchanged (an emulation; say so in the trace notes).

Semantics of the recorded prefill step (see :mod:`sim.trace.format`):

* ``kept_k`` -- original positions of the tokens entering the layer;
  ``q_rows`` their count; ``heads`` the active head ids.
* ``kept_v`` -- per head, V rows fetched after local value pruning. Value
  pruning acts per query row; a prefill step records the *mean* kept count
  over its rows, rounded up, so ``q_rows * kept_v * head_dim`` is (to within
  rounding) the p.V MACs the pruned layer really did.
* ``lsb_rows`` -- per head, query rows whose maximum probability from the MSB
  key plane fell under the threshold (they refetched the LSB plane).
* ``token_scores`` / ``head_scores`` -- the importance the top-k selector
  ranks after this layer (accumulated over layers when the rule says so).

With ``policy.decode`` the recorder also emits one decode step per layer: the
last live ordinary token (not a special token) acts as the single query row
against the live context, and its value-pruned V positions go into
``kept_v_idx``. That is a stand-in for generation in an encoder-only model.
"""

import dataclasses
import math

import numpy as np

from .format import Trace, make_step, new_header
from .files import save_trace
from .policies import (DENSE, effective_key_bits, head_importance, keep_count, load_policy,
                       quant_step, quantize_uniform, softmax, split_planes, msb_reconstruct,
                       token_importance, topk_sorted)


@dataclasses.dataclass
class LayerDecision:
    """What the recorder decided after one layer: survivors for the next."""

    layer: int
    tokens: np.ndarray  # original positions alive in the next layer
    heads: np.ndarray   # head ids alive in the next layer
    keep_rows: np.ndarray  # positions into this layer's rows that survive


class Recorder:
    """Collects trace steps for one forward pass under a policy.

    ``layers``, ``heads``, ``head_dim``: model shape. ``tokens``: sequence
    length (special tokens included). ``strength`` in [0, 1] scales the token
    and head schedules toward dense (used by the fidelity-target search).
    ``special``: positions never used as the decode query row.

    A causal decoder's prefill (:mod:`sim.trace.generation`) also gives
    ``kv_heads`` (K/V heads; query head h reads ``h // (heads / kv_heads)``),
    ``causal=True`` (steps are causal; each head's ``kept_v`` is then the count
    c whose capped rows ``sum_i min(c, i + 1)`` come closest to the V rows the
    layer used, from above), ``writes=True`` (every live token's K/V and output
    are written), ``keep_last=True`` (the last token always survives the cascade:
    its output predicts the next token) and ``emulate_decode=False`` (real
    decode steps are recorded by the caller).
    """

    def __init__(self, policy=DENSE, layers=None, heads=None, head_dim=None, tokens=None,
                 strength=1.0, special=(), kv_heads=None, causal=False, writes=False, keep_last=False,
                 emulate_decode=True):
        for name, v in (("layers", layers), ("heads", heads), ("head_dim", head_dim), ("tokens", tokens)):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
                raise ValueError(f"{name}={v!r}: expected a whole number >= 1")
        if not 0.0 <= strength <= 1.0:
            raise ValueError(f"strength={strength!r}: expected a number in [0, 1]")
        self.policy = load_policy(policy).check_layers(int(layers))
        self.layers, self.heads, self.head_dim, self.tokens = int(layers), int(heads), int(head_dim), int(tokens)
        self.strength = float(strength)
        self.special = set(int(p) for p in special)
        self.live_tokens = np.arange(self.tokens, dtype=np.int64)
        self.live_heads = np.arange(self.heads, dtype=np.int64)
        self._tok_acc = np.zeros(self.tokens)
        self._head_acc = np.zeros(self.heads)
        self.kv_heads = None if kv_heads is None else int(kv_heads)
        self.group = 1 if kv_heads is None else self.heads // self.kv_heads
        self.causal, self.writes, self.keep_last = bool(causal), bool(writes), bool(keep_last)
        self.emulate_decode = bool(emulate_decode)
        self.steps = []
        self.decode_steps = []
        self.stats = []
        self._next_layer = 0
        self.emulated = False

    # ------------------------------------------------------------------

    def layer(self, layer, probs, head_out, keys=None, queries=None, lsb_mask=None, value_mask=None):
        """Record one layer and return the :class:`LayerDecision` for the next.

        Arrays are (heads, rows, ...) over the *live* heads and tokens, or
        dense (all heads, all tokens), which the recorder slices itself.
        ``lsb_mask`` (heads, rows) and ``value_mask`` (heads, rows, rows) may
        be given by a pass that already applied the policy; otherwise the
        recorder derives them (progressive quantization needs ``queries`` and
        ``keys`` for that, else it judges rows by the given probabilities).
        """
        if layer != self._next_layer:
            raise ValueError(f"layer={layer!r}: expected layer {self._next_layer} (layers arrive in order)")
        pol = self.policy
        h_live, n_live = len(self.live_heads), len(self.live_tokens)
        probs = np.asarray(probs)
        dense_shape = (self.heads, self.tokens, self.tokens)
        if probs.shape == (h_live, n_live, n_live):
            sliced = False
        elif probs.shape == dense_shape:
            sliced = True
            self.emulated = self.emulated or (h_live, n_live) != (self.heads, self.tokens)
            probs = probs[np.ix_(self.live_heads, self.live_tokens, self.live_tokens)]
            probs = probs / probs.sum(axis=-1, keepdims=True)
        else:
            raise ValueError(f"probs shape {probs.shape}: expected {(h_live, n_live, n_live)} "
                             f"(live heads, tokens, tokens) or dense {dense_shape}")
        head_out = self._rows(head_out, "head_out", sliced)
        keys = None if keys is None else self._rows(keys, "keys", sliced)
        queries = None if queries is None else self._rows(queries, "queries", sliced)

        if lsb_mask is None:
            lsb_mask = self._lsb(probs, keys, queries)
        lsb_mask = np.asarray(lsb_mask, dtype=bool).reshape(h_live, n_live)
        if value_mask is None:
            value_mask = pol.values.keep_mask(probs)
        value_mask = np.asarray(value_mask, dtype=bool)
        kept_per_row = value_mask.sum(axis=-1)  # (heads, rows)

        # importance the selector ranks after this layer
        t_now = token_importance(probs)
        h_now = head_importance(head_out)
        if pol.tokens.accumulate:
            self._tok_acc[self.live_tokens] += t_now
            t_score = self._tok_acc[self.live_tokens].copy()
        else:
            t_score = t_now
        if pol.heads.accumulate:
            self._head_acc[self.live_heads] += h_now
            h_score = self._head_acc[self.live_heads].copy()
        else:
            h_score = h_now

        if self.causal:
            kept_v = _causal_kept_v(kept_per_row.sum(axis=1), n_live)
        else:
            kept_v = np.clip(np.ceil(kept_per_row.mean(axis=1) - 1e-9), 1, n_live).astype(np.int64)
        rows_written = n_live if self.writes else 0
        self.steps.append(make_step(layer, "prefill", self.head_dim, self.live_heads, n_live, self.tokens,
                                    kept_k=self.live_tokens, kept_v=kept_v,
                                    lsb_rows=lsb_mask.sum(axis=1), token_scores=t_score,
                                    head_scores=h_score, kv_heads=self.live_heads // self.group,
                                    causal=self.causal, new_kv_rows=rows_written, out_rows=rows_written))
        self.stats.append({
            "layer": layer, "tokens": n_live, "heads": h_live,
            "value_entries": int(kept_per_row.sum()),
            "dense_entries": h_live * (n_live * (n_live + 1) // 2 if self.causal else n_live * n_live),
            "lsb_rows": int(lsb_mask.sum()), "lsb_heads": int(np.count_nonzero(lsb_mask.any(axis=1))),
        })
        if pol.decode and self.emulate_decode:
            self._decode_step(layer, probs, head_out, lsb_mask, value_mask)

        # cascade: survivors for the next layer, chosen by top-k on the scores
        k_tok = keep_count(pol.tokens.ratio(layer, self.strength), self.tokens, n_live)
        if self.keep_last and k_tok < n_live:
            keep_rows = np.append(topk_sorted(t_score[:-1], k_tok - 1), n_live - 1) if k_tok > 1 \
                else np.array([n_live - 1])
        else:
            keep_rows = topk_sorted(t_score, k_tok)
        k_head = keep_count(pol.heads.ratio(layer, self.strength), self.heads, h_live)
        keep_heads = topk_sorted(h_score, k_head)
        self.live_tokens = self.live_tokens[keep_rows]
        self.live_heads = self.live_heads[keep_heads]
        self._next_layer += 1
        return LayerDecision(layer, self.live_tokens.copy(), self.live_heads.copy(), keep_rows)

    def _rows(self, arr, name, sliced):
        arr = np.asarray(arr)
        if sliced:
            if arr.shape[:2] != (self.heads, self.tokens):
                raise ValueError(f"{name} shape {arr.shape}: expected dense ({self.heads}, {self.tokens}, ...)")
            return arr[np.ix_(self.live_heads, self.live_tokens)]
        if arr.shape[:2] != (len(self.live_heads), len(self.live_tokens)):
            raise ValueError(f"{name} shape {arr.shape}: expected "
                             f"({len(self.live_heads)}, {len(self.live_tokens)}, ...) (live heads, tokens)")
        return arr

    def _lsb(self, probs, keys, queries):
        kr = self.policy.keys
        if not kr.enabled:
            return np.zeros(probs.shape[:2], dtype=bool)
        if keys is None or queries is None:
            # no queries: judge each row by the probabilities we were given
            return probs.max(axis=-1) < kr.threshold
        step = quant_step(keys, kr.bits, axis=(1, 2))
        msb, _ = split_planes(quantize_uniform(keys, kr.bits, step), kr.lsb_bits)
        k_msb = msb_reconstruct(msb, kr.lsb_bits) * step
        p_msb = softmax(np.matmul(queries.astype(np.float64), np.swapaxes(k_msb, -1, -2))
                        / math.sqrt(self.head_dim))
        return p_msb.max(axis=-1) < kr.threshold

    def _decode_step(self, layer, probs, head_out, lsb_mask, value_mask):
        live = self.live_tokens
        ordinary = [i for i in range(len(live) - 1, -1, -1) if int(live[i]) not in self.special]
        row = ordinary[0] if ordinary else len(live) - 1
        idx = [live[value_mask[j, row]] for j in range(len(self.live_heads))]
        self.decode_steps.append(make_step(
            layer, "decode", self.head_dim, self.live_heads, 1, self.tokens, kept_k=live,
            kept_v=[len(a) for a in idx], kept_v_idx=idx, lsb_rows=lsb_mask[:, row].astype(np.int64),
            token_scores=probs[:, row, :].sum(axis=0, dtype=np.float64),
            head_scores=np.abs(head_out[:, row]).sum(axis=-1, dtype=np.float64)))

    # ------------------------------------------------------------------

    def summary(self):
        """Tokens, heads, values kept and effective key bits over the recorded layers."""
        st = self.stats
        if not st:
            raise ValueError("no layer recorded yet")
        head_steps = sum(s["heads"] for s in st)
        lsb_heads = sum(s["lsb_heads"] for s in st)
        row_heads = sum(s["heads"] * s["tokens"] for s in st)
        return {
            "layers_recorded": len(st),
            "tokens": self.tokens,
            "tokens_per_layer": [s["tokens"] for s in st],
            "tokens_after_last": int(len(self.live_tokens)),
            "tokens_kept": sum(s["tokens"] for s in st) / (len(st) * self.tokens),
            "heads_per_layer": [s["heads"] for s in st],
            "heads_kept": head_steps / (len(st) * self.heads),
            "values_kept": sum(s["value_entries"] for s in st) / sum(s["dense_entries"] for s in st),
            "lsb_row_fraction": sum(s["lsb_rows"] for s in st) / row_heads,
            "lsb_head_fraction": lsb_heads / head_steps,
            "key_bits": effective_key_bits(self.policy.keys, lsb_heads / head_steps),
            "key_bits_full": self.policy.keys.bits if self.policy.keys.enabled else None,
        }

    def trace(self, name=None, fidelity=None, notes=None, **provenance):
        """The recorded steps as a :class:`Trace` (prefill steps, then decode steps)."""
        if not self.steps:
            raise ValueError("no layer recorded yet")
        prov = {"policy": self.policy.to_dict(), "policy_digest": self.policy.digest(),
                "strength": self.strength, **provenance}
        model = {"layers": self.layers, "heads": self.heads, "head_dim": self.head_dim}
        if self.kv_heads is not None:
            model["kv_heads"] = self.kv_heads
        hdr = new_header("capture", name=name, model=model, **prov)
        if fidelity is not None:
            hdr["fidelity"] = fidelity
        text = [notes] if notes else []
        if self.emulated:
            text.append("pruning emulated on dense tensors: later layers of the source run saw all tokens")
        if text:
            hdr["notes"] = "; ".join(text)
        return Trace(hdr, self.steps + self.decode_steps)

    def save(self, path, name=None, fidelity=None, notes=None, **provenance):
        """Validate and write the trace atomically; returns the path."""
        return save_trace(self.trace(name, fidelity, notes, **provenance), path)


def _causal_kept_v(used, n):
    """Per head, the smallest count c in [1, n] whose causal p.V rows
    sum_i min(c, i + 1) (i < n) reach the V rows the head really used
    (``used``); with nothing pruned that is n, the full triangle."""
    c = np.arange(1, n + 1, dtype=np.int64)
    rows = c * (c + 1) // 2 + c * (n - c)  # sum_i min(c, i + 1), rising in c
    return np.minimum(np.searchsorted(rows, np.asarray(used, dtype=np.int64), side="left") + 1, n).astype(np.int64)
