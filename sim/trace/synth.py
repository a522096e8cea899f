"""Synthetic attention traces: seeded prefill and decode passes.

A synthetic trace stands in for a real model when only the shape of the
workload matters: how many layers, heads and tokens, and how hard each kind of
pruning bites. It models

* **prefill** -- one step per layer; every live token is a query row and a key
  row. Cascade token pruning keeps a fraction of the live tokens after each
  layer (pruned tokens never return); which tokens survive is decided by an
  importance score drawn from a seeded generator, so the kept rows are
  scattered over the prompt, not a prefix. Cascade head pruning does the same
  for heads.
* **decode** -- ``decode_steps`` generated tokens, each a pass over all layers
  with one query row. Layer ``l`` attends to the tokens that were live at
  layer ``l`` during prefill (only those have cached K/V there) plus every
  generated token so far, so ``kv_rows`` grows by one per generated token.
  Value pruning keeps a fraction of those rows' V per head: the positions with
  the highest attention probability of that head.
* **progressive quantization** -- each head of each step needs the
  least-significant key plane with probability ``lsb_fraction``; when it does,
  ``lsb_fraction_rows`` of its query rows are recomputed (``lsb_rows``).

The importance scores the pruning was decided from are written into the trace
(``token_scores``, ``head_scores``) on every step after which a selection
happens, so the top-k selector replays the same selection. Token scores are
column sums of attention probabilities over the active heads and query rows,
so they are positive and add up to ``heads * q_rows``.

Every argument is checked once, here; a bad one raises
:class:`sim.errors.TraceError` naming it. All arguments are recorded in
``header.provenance`` (method ``synth``), so a trace says how to remake it.
"""

import math
import numbers

import numpy as np

from ..errors import TraceError
from .format import Step, Trace, new_header, validate

SOURCE = "trace synth"
SYNTH_VERSION = 1

# Spread of the log-importance of tokens and heads, and of the per-layer and
# per-head wobble around it. Chosen by eye so that pruned sets are scattered
# but persistent from layer to layer (our own model, not from a source).
TOKEN_SIGMA = 1.0
TOKEN_LAYER_SIGMA = 0.5
HEAD_SIGMA = 1.0
HEAD_LAYER_SIGMA = 0.5
VALUE_HEAD_SIGMA = 0.5
VALUE_STEP_SIGMA = 0.25


def synth_trace(prompt_tokens=512, decode_steps=128, layers=12, heads=12, head_dim=64,
                token_keep=1.0, head_keep=1.0, value_keep=1.0, lsb_fraction=0.0,
                lsb_fraction_rows=1.0, seed=0, name=None, include_prefill=True):
    """Build a seeded synthetic trace (see the module docstring).

    ``token_keep`` / ``head_keep``: a number r (layer 0 sees every token or
    head; each later layer keeps the fraction r of the previous layer's live
    ones), or a list with one ratio per layer (entry 0 applies to the prompt
    itself). Counts are rounded up and never fall below one.
    ``value_keep``: fraction of a decode step's kept key rows whose V rows
    each head keeps. ``lsb_fraction``: probability that a head of a step needs
    the least-significant key plane; ``lsb_fraction_rows``: share of that
    head's query rows that are recomputed then. ``include_prefill=False``
    leaves the prefill steps out (the decode steps still see its pruning).
    Same arguments, same trace, bit for bit.
    """
    prompt_tokens = _whole("prompt_tokens", prompt_tokens, 1)
    decode_steps = _whole("decode_steps", decode_steps, 0)
    layers = _whole("layers", layers, 1)
    heads = _whole("heads", heads, 1)
    head_dim = _whole("head_dim", head_dim, 1)
    tok_sched = _schedule("token_keep", token_keep, layers)
    head_sched = _schedule("head_keep", head_keep, layers)
    value_keep = _ratio("value_keep", value_keep, low_open=True)
    lsb_fraction = _ratio("lsb_fraction", lsb_fraction, low_open=False)
    lsb_fraction_rows = _ratio("lsb_fraction_rows", lsb_fraction_rows, low_open=True)
    seed = _whole("seed", seed, 0)
    if name is not None and (not isinstance(name, str) or not name):
        raise TraceError(SOURCE, "name", name, "expected a non-empty text or None")
    if not isinstance(include_prefill, bool):
        raise TraceError(SOURCE, "include_prefill", include_prefill, "expected true or false")
    if not include_prefill and decode_steps == 0:
        raise TraceError(SOURCE, "decode_steps", decode_steps,
                         "expected >= 1 when the prefill steps are left out (the trace would be empty)")

    rng = np.random.default_rng(seed)
    total = prompt_tokens + decode_steps
    tok_latent = rng.normal(0.0, TOKEN_SIGMA, total)
    head_latent = rng.normal(0.0, HEAD_SIGMA, heads)

    # Prefill: decide each layer's live tokens and heads (the cascade).
    live_tok, live_head = [], []
    tokens = np.arange(prompt_tokens, dtype=np.int64)
    hs = np.arange(heads, dtype=np.int64)
    tok_scores, head_scores = [], []
    for layer in range(layers):
        if layer == 0:
            tokens = _keep_top(tokens, tok_latent[tokens], tok_sched[0])
            hs = _keep_top(hs, head_latent[hs], head_sched[0])
        live_tok.append(tokens)
        live_head.append(hs)
        # What this layer's selector ranks, and what the next layer keeps.
        t_logit = tok_latent[tokens] + rng.normal(0.0, TOKEN_LAYER_SIGMA, len(tokens))
        h_logit = head_latent[hs] + rng.normal(0.0, HEAD_LAYER_SIGMA, len(hs))
        nxt = layer + 1
        t_sel = nxt < layers and _count(len(tokens), tok_sched[nxt]) < len(tokens)
        h_sel = nxt < layers and _count(len(hs), head_sched[nxt]) < len(hs)
        if t_sel:
            w = np.exp(t_logit - t_logit.max())
            tok_scores.append(_f32(w * (len(hs) * len(tokens) / w.sum())))
        else:
            tok_scores.append(None)
        head_scores.append(_f32(np.exp(h_logit)) if h_sel else None)
        if nxt < layers:
            tokens = _keep_top(tokens, t_logit, tok_sched[nxt])
            hs = _keep_top(hs, h_logit, head_sched[nxt])

    steps = []
    if include_prefill:
        for layer in range(layers):
            t, h = live_tok[layer], live_head[layer]
            n = len(t)
            lsb = _lsb_rows(rng, len(h), n, lsb_fraction, lsb_fraction_rows)
            steps.append(Step(layer, "prefill", head_dim, h, n, prompt_tokens, t,
                              np.full(len(h), n, dtype=np.int64), lsb, None,
                              tok_scores[layer], head_scores[layer]))

    # Decode: per layer, a fixed per-head preference on top of token importance
    # decides which V rows value pruning keeps; a small per-step wobble moves it.
    if decode_steps:
        head_bias = [rng.normal(0.0, VALUE_HEAD_SIGMA, (len(live_head[layer]), total))
                     for layer in range(layers)]
        gen = np.arange(prompt_tokens, total, dtype=np.int64)
        for t in range(decode_steps):
            kv_rows = prompt_tokens + t + 1
            for layer in range(layers):
                h = live_head[layer]
                kept = np.concatenate([live_tok[layer], gen[:t + 1]])
                nk = len(kept)
                nv = _count(nk, value_keep)
                lsb = _lsb_rows(rng, len(h), 1, lsb_fraction, lsb_fraction_rows)
                kv_idx = None
                if nv < nk:
                    logit = (tok_latent[kept][None, :] + head_bias[layer][:, kept]
                             + rng.normal(0.0, VALUE_STEP_SIGMA, (len(h), nk)))
                    top = np.argpartition(-logit, nv - 1, axis=1)[:, :nv]
                    top.sort(axis=1)
                    kv_idx = list(kept[top])
                steps.append(Step(layer, "decode", head_dim, h, 1, kv_rows, kept,
                                  np.full(len(h), nv, dtype=np.int64), lsb, kv_idx, None, None))

    provenance = {
        "synth_version": SYNTH_VERSION,
        "generator": "numpy.random.default_rng (PCG64)",
        "seed": seed,
        "prompt_tokens": prompt_tokens,
        "decode_steps": decode_steps,
        "layers": layers,
        "heads": heads,
        "head_dim": head_dim,
        "token_keep": _plain(token_keep),
        "head_keep": _plain(head_keep),
        "token_keep_per_layer": tok_sched,
        "head_keep_per_layer": head_sched,
        "value_keep": value_keep,
        "lsb_fraction": lsb_fraction,
        "lsb_fraction_rows": lsb_fraction_rows,
        "include_prefill": include_prefill,
        "live_tokens_per_layer": [int(len(t)) for t in live_tok],
        "live_heads_per_layer": [int(len(h)) for h in live_head],
    }
    if name is None:
        name = f"synth-p{prompt_tokens}-d{decode_steps}-L{layers}-H{heads}-s{seed}"
    header = new_header("synth", name=name,
                        model={"layers": layers, "heads": heads, "head_dim": head_dim},
                        **provenance)
    return validate(Trace(header, steps, f"<{SOURCE}>"))


# --------------------------------------------------------------------------
# Helpers


def _count(n, ratio):
    """Rows kept out of ``n`` at ``ratio``: rounded up, at least one."""
    # the small slack keeps 0.5 * 10 at 5 despite float error
    return max(1, min(n, math.ceil(n * ratio - 1e-9)))


def _keep_top(ids, score, ratio):
    """The ``ratio`` share of ``ids`` with the highest scores, in id order."""
    k = _count(len(ids), ratio)
    if k >= len(ids):
        return ids
    top = np.argpartition(-score, k - 1)[:k]
    return np.sort(ids[top])


def _f32(x):
    """Scores at the precision the .npz stores, so a trace replays alike from memory or file."""
    return x.astype(np.float32).astype(np.float64)


def _lsb_rows(rng, n_heads, q_rows, p, row_share):
    """Per head: 0, or the query rows that needed the LSB key plane."""
    if p == 0.0:
        return np.zeros(n_heads, dtype=np.int64)
    flagged = rng.random(n_heads) < p
    return np.where(flagged, _count(q_rows, row_share), 0).astype(np.int64)


def _whole(arg, value, low):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            raise TraceError(SOURCE, arg, value, f"expected a whole number >= {low}")
    value = int(value)
    if value < low:
        raise TraceError(SOURCE, arg, value, f"expected a whole number >= {low}")
    return value


def _ratio(arg, value, low_open):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TraceError(SOURCE, arg, value, "expected a number in " + ("(0, 1]" if low_open else "[0, 1]"))
    value = float(value)
    ok = math.isfinite(value) and value <= 1.0 and (value > 0.0 if low_open else value >= 0.0)
    if not ok:
        raise TraceError(SOURCE, arg, value, "expected a number in " + ("(0, 1]" if low_open else "[0, 1]"))
    return value


def _schedule(arg, value, layers):
    """A keep ratio per layer from a number or a list (see synth_trace)."""
    if isinstance(value, (list, tuple, np.ndarray)):
        if len(value) != layers:
            raise TraceError(SOURCE, arg, list(value),
                             f"expected one ratio per layer ({layers}), or a single number")
        return [_ratio(f"{arg}[{i}]", v, low_open=True) for i, v in enumerate(value)]
    r = _ratio(arg, value, low_open=True)
    return [1.0] + [r] * (layers - 1)


def _plain(value):
    if isinstance(value, (list, tuple, np.ndarray)):
        return [float(v) for v in value]
    return float(value)
