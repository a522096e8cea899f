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
* **grouped K/V heads** -- ``kv_heads`` (a divisor of ``heads``): query head h
  reads KV head ``h // (heads // kv_heads)``.
* **batches** -- ``batch`` requests, each with its own prompt length, cascade
  and generator; steps interleave as a batched run executes them (prefill
  layer by layer over the requests, then per token and layer one step per
  request).
* **causal prefill** and **sliding windows** (a window per layer; in decode
  the cache keeps only the rows the window can still see).
* **cache writes** -- prefill writes the K/V and the output of every live
  token (``new_kv_rows = out_rows = q_rows``), decode one row of each.

Kept rows are stored compactly: every decode step of a layer views a prefix
(or, with a window, a slice) of one array per request and layer, and layers
with the same live tokens share it, so a 128k-token context over hundreds of
steps costs a few arrays, not one per step.

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
SYNTH_VERSION = 2  # 2: cache writes, KV heads, batches, causal, windows

# Spread of the log-importance of tokens and heads, and of the per-layer and
# per-head wobble around it. Chosen by eye so that pruned sets are scattered
# but persistent from layer to layer (our own model, not from a source).
TOKEN_SIGMA = 1.0
TOKEN_LAYER_SIGMA = 0.5
HEAD_SIGMA = 1.0
HEAD_LAYER_SIGMA = 0.5
VALUE_HEAD_SIGMA = 0.5
VALUE_STEP_SIGMA = 0.25


def synth_trace(prompt_tokens=512, decode_steps=128, layers=None, heads=None, head_dim=None,
                token_keep=1.0, head_keep=1.0, value_keep=1.0, lsb_fraction=0.0,
                lsb_fraction_rows=1.0, seed=0, name=None, include_prefill=True, kv_heads=None,
                batch=1, length_spread=0.5, causal=False, window=0, writes=True, shape=None):
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

    ``shape``: a :class:`~sim.trace.shapes.Shape` or a name/file for
    :func:`~sim.trace.shapes.load_shape`; it supplies ``layers``, ``heads``,
    ``kv_heads`` and ``head_dim`` not given explicitly (defaults without a
    shape: 12, 12, one KV head per query head, 64). ``kv_heads`` must divide
    ``heads``: query head h reads KV head ``h // (heads // kv_heads)``.
    ``batch``: requests decoded together; request 0 has ``prompt_tokens``,
    request r >= 1 a prompt of ``round(prompt_tokens * (1 - length_spread * u))``
    tokens, u uniform in [0, 1) from the seeded generator. ``causal``: causal
    prefill. ``window``: sliding window, one number or one per layer (0: none).
    ``writes``: record cache writes and output write-back (``new_kv_rows``,
    ``out_rows``). Same arguments, same trace, bit for bit.
    """
    from .shapes import Shape, load_shape

    if shape is not None and not isinstance(shape, Shape):
        shape = load_shape(shape)
    if shape is not None:
        layers = shape.layers if layers is None else layers
        heads = shape.heads if heads is None else heads
        head_dim = shape.head_dim if head_dim is None else head_dim
        kv_heads = shape.kv_heads if kv_heads is None else kv_heads
    layers = _whole("layers", 12 if layers is None else layers, 1)
    heads = _whole("heads", 12 if heads is None else heads, 1)
    head_dim = _whole("head_dim", 64 if head_dim is None else head_dim, 1)
    kv_heads = _whole("kv_heads", heads if kv_heads is None else kv_heads, 1)
    if heads % kv_heads:
        raise TraceError(SOURCE, "kv_heads", kv_heads,
                         f"expected a divisor of heads={heads} (equal groups of query heads per KV head)")
    prompt_tokens = _whole("prompt_tokens", prompt_tokens, 1)
    decode_steps = _whole("decode_steps", decode_steps, 0)
    tok_sched = _schedule("token_keep", token_keep, layers)
    head_sched = _schedule("head_keep", head_keep, layers)
    value_keep = _ratio("value_keep", value_keep, low_open=True)
    lsb_fraction = _ratio("lsb_fraction", lsb_fraction, low_open=False)
    lsb_fraction_rows = _ratio("lsb_fraction_rows", lsb_fraction_rows, low_open=True)
    seed = _whole("seed", seed, 0)
    batch = _whole("batch", batch, 1)
    length_spread = _ratio("length_spread", length_spread, low_open=False)
    windows = _windows(window, layers)
    for arg, value in (("include_prefill", include_prefill), ("causal", causal), ("writes", writes)):
        if not isinstance(value, bool):
            raise TraceError(SOURCE, arg, value, "expected true or false")
    if name is not None and (not isinstance(name, str) or not name):
        raise TraceError(SOURCE, "name", name, "expected a non-empty text or None")
    if not include_prefill and decode_steps == 0:
        raise TraceError(SOURCE, "decode_steps", decode_steps,
                         "expected >= 1 when the prefill steps are left out (the trace would be empty)")

    # Request 0 draws from the seed itself (so one request is what synth_version 1
    # made); the prompt lengths and every further request from spawned streams.
    children = np.random.SeedSequence(seed).spawn(batch)
    u = np.random.default_rng(children[0]).random(batch)
    prompts = [prompt_tokens] + [max(1, round(prompt_tokens * (1.0 - length_spread * x))) for x in u[1:]]
    group = heads // kv_heads
    reqs = [_Request(r, np.random.default_rng(seed if r == 0 else children[r]), prompts[r], decode_steps,
                     layers, heads, tok_sched, head_sched) for r in range(batch)]
    common = dict(head_dim=head_dim, group=group, causal=causal, windows=windows, writes=writes,
                  lsb=(lsb_fraction, lsb_fraction_rows), value_keep=value_keep)

    steps = []
    if include_prefill:
        for layer in range(layers):
            steps.extend(q.prefill_step(layer, **common) for q in reqs)
    for q in reqs:
        q.start_decode(value_keep)
    for t in range(decode_steps):
        for layer in range(layers):
            steps.extend(q.decode_step(t, layer, **common) for q in reqs)

    provenance = {
        "synth_version": SYNTH_VERSION,
        "generator": "numpy.random.default_rng (PCG64)",
        "seed": seed,
        "prompt_tokens": prompt_tokens,
        "decode_steps": decode_steps,
        "layers": layers,
        "heads": heads,
        "kv_heads": kv_heads,
        "head_dim": head_dim,
        "shape": shape.name if shape is not None else None,
        "token_keep": _plain(token_keep),
        "head_keep": _plain(head_keep),
        "token_keep_per_layer": tok_sched,
        "head_keep_per_layer": head_sched,
        "value_keep": value_keep,
        "lsb_fraction": lsb_fraction,
        "lsb_fraction_rows": lsb_fraction_rows,
        "include_prefill": include_prefill,
        "batch": batch,
        "length_spread": length_spread,
        "prompt_tokens_per_request": prompts,
        "causal": causal,
        "window": _plain_int(window),
        "writes": writes,
        "live_tokens_per_layer": [int(len(t)) for t in reqs[0].live_tok],
        "live_heads_per_layer": [int(len(h)) for h in reqs[0].live_head],
    }
    if name is None:
        name = f"synth-p{prompt_tokens}-d{decode_steps}-L{layers}-H{heads}-s{seed}"
    header = new_header("synth", name=name,
                        model={"layers": layers, "heads": heads, "kv_heads": kv_heads, "head_dim": head_dim},
                        **provenance)
    return validate(Trace(header, steps, f"<{SOURCE}>"))


class _Request:
    """One sequence of a synthetic batch: its cascade and its steps, drawn from its own generator.

    The order of draws is fixed (prefill selections per layer, prefill LSB flags
    per layer, per-head value preferences, then per token and layer the decode
    draws), whatever the interleaving of requests in the trace.
    """

    def __init__(self, request, rng, prompt, decode_steps, layers, heads, tok_sched, head_sched):
        self.request, self.rng, self.prompt, self.decode_steps = request, rng, prompt, decode_steps
        total = prompt + decode_steps
        self.tok_latent = rng.normal(0.0, TOKEN_SIGMA, total)
        head_latent = rng.normal(0.0, HEAD_SIGMA, heads)
        # Prefill: decide each layer's live tokens and heads (the cascade).
        self.live_tok, self.live_head, self.tok_scores, self.head_scores = [], [], [], []
        tokens = np.arange(prompt, dtype=np.int64)
        hs = np.arange(heads, dtype=np.int64)
        for layer in range(layers):
            if layer == 0:
                tokens = _keep_top(tokens, self.tok_latent[tokens], tok_sched[0])
                hs = _keep_top(hs, head_latent[hs], head_sched[0])
            self.live_tok.append(tokens)
            self.live_head.append(hs)
            # What this layer's selector ranks, and what the next layer keeps.
            t_logit = self.tok_latent[tokens] + rng.normal(0.0, TOKEN_LAYER_SIGMA, len(tokens))
            h_logit = head_latent[hs] + rng.normal(0.0, HEAD_LAYER_SIGMA, len(hs))
            nxt = layer + 1
            t_sel = nxt < layers and _count(len(tokens), tok_sched[nxt]) < len(tokens)
            h_sel = nxt < layers and _count(len(hs), head_sched[nxt]) < len(hs)
            if t_sel:
                w = np.exp(t_logit - t_logit.max())
                self.tok_scores.append(_f32(w * (len(hs) * len(tokens) / w.sum())))
            else:
                self.tok_scores.append(None)
            self.head_scores.append(_f32(np.exp(h_logit)) if h_sel else None)
            if nxt < layers:
                tokens = _keep_top(tokens, t_logit, tok_sched[nxt])
                hs = _keep_top(hs, h_logit, head_sched[nxt])

    def prefill_step(self, layer, head_dim, group, causal, windows, writes, lsb, value_keep):
        t, h = self.live_tok[layer], self.live_head[layer]
        n = len(t)
        lsb_rows = _lsb_rows(self.rng, len(h), n, *lsb)
        return Step(layer, "prefill", head_dim, h, n, self.prompt, t, np.full(len(h), n, dtype=np.int64),
                    lsb_rows, None, self.tok_scores[layer], self.head_scores[layer], self.request,
                    h // group, causal, windows[layer], None, n if writes else 0, n if writes else 0)

    def start_decode(self, value_keep):
        """Per layer: the decode context as one array each step views a prefix
        of (live prompt tokens, then every generated token), and a fixed per-head
        preference on top of token importance deciding which V rows value pruning
        keeps (a small per-step wobble moves it)."""
        if not self.decode_steps:
            return
        layers = len(self.live_tok)
        total = self.prompt + self.decode_steps
        if value_keep < 1.0:  # heads x context per layer: drawn only when value pruning needs it
            self.head_bias = [self.rng.normal(0.0, VALUE_HEAD_SIGMA, (len(self.live_head[layer]), total))
                              for layer in range(layers)]
        gen = np.arange(self.prompt, total, dtype=np.int64)
        self.context, made = [], {}
        for layer in range(layers):
            live = self.live_tok[layer]
            if id(live) not in made:  # layers with the same live tokens share one array
                made[id(live)] = np.concatenate([live, gen])
            self.context.append(made[id(live)])

    def decode_step(self, t, layer, head_dim, group, causal, windows, writes, lsb, value_keep):
        rng = self.rng
        h = self.live_head[layer]
        kv_rows = self.prompt + t + 1
        kept = self.context[layer][:len(self.live_tok[layer]) + t + 1]
        w = windows[layer]
        if w:  # the cache keeps the rows the window can still see
            kept = kept[np.searchsorted(kept, kv_rows - 1 - w, side="right"):]
        nk = len(kept)
        nv = _count(nk, value_keep)
        lsb_rows = _lsb_rows(rng, len(h), 1, *lsb)
        kv_idx = None
        if nv < nk:
            logit = (self.tok_latent[kept][None, :] + self.head_bias[layer][:, kept]
                     + rng.normal(0.0, VALUE_STEP_SIGMA, (len(h), nk)))
            top = np.argpartition(-logit, nv - 1, axis=1)[:, :nv]
            top.sort(axis=1)
            kv_idx = list(kept[top])
        return Step(layer, "decode", head_dim, h, 1, kv_rows, kept, np.full(len(h), nv, dtype=np.int64),
                    lsb_rows, kv_idx, None, None, self.request, h // group, False, w, None,
                    1 if writes else 0, 1 if writes else 0)


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


def _windows(value, layers):
    """One window per layer (0: none) from a number or a list."""
    if isinstance(value, (list, tuple, np.ndarray)):
        if len(value) != layers:
            raise TraceError(SOURCE, "window", list(value), f"expected one window per layer ({layers}), or one number")
        return [_whole(f"window[{i}]", v, 0) for i, v in enumerate(value)]
    return [_whole("window", value, 0)] * layers


def _plain_int(value):
    if isinstance(value, (list, tuple, np.ndarray)):
        return [int(v) for v in value]
    return int(value)
