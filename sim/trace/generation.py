"""Generation under a policy: a decoder's causal prefill and cached decode
steps, with the policy acting inside the pass, recorded as a version-2 trace.

One run is a prompt of n tokens and N decode steps. The prefill runs every
layer causally over the live tokens (cascade token and head pruning, value
pruning and progressive key quantization act as in the encoder, the last
token always survives since its output predicts the next token) and writes
each layer's K/V into the cache. Decode step t feeds one token at position
``n + t`` through every layer: its K/V row is appended to the cache, the
policy's cache rule decides per KV head which cached rows the step reads
(heavy hitters, sinks, pages; or all), value pruning and progressive key
quantization act on that one query row, and the output goes on. The
prediction of the prefill and of each decode step (N + 1 in all) is kept.

A capture runs the dense pass first, greedily: its predictions are the
generated tokens. The policy pass is then fed the same tokens (teacher
forcing), so step t of both passes sees the same context and their next-token
distributions compare one to one: next-token agreement, mean KL divergence
and per-layer hidden-state cosine (:func:`compare`).
"""

import dataclasses
import hashlib
import os

import numpy as np

from .capture import CaptureError, _fit, _plain, check_out, read_text
from .format import make_step
from .nn import one_blas_thread
from .policies import (attend, heavy_hitter_keep, load_policy, page_select, sink_keep)
from .recorder import Recorder


@dataclasses.dataclass
class Run:
    """One pass of prefill plus decode steps.

    ``predictions``: argmax of the N + 1 next-token distributions;
    ``logits``: those distributions' logits (float32); ``logprobs``: as
    log-probabilities (float64); ``prefill_logits``: every prompt row's logits
    when asked for (``all_logits``), else None;
    ``fed``: the tokens fed to the decode steps; ``hidden[l]``: positions and
    hidden states layer l computed; ``recorder``: the trace steps;
    ``reads``/``context``: rows each decode KV-head-step read, and the context
    it had; ``cache_rows``: rows each KV head holds at the end, per layer.
    """

    predictions: np.ndarray
    logits: np.ndarray
    logprobs: np.ndarray
    fed: np.ndarray
    hidden: list
    recorder: Recorder
    reads: list
    context: list
    cache_rows: list
    prefill_logits: np.ndarray = None


class _Pass:
    """The state of one pass: the KV cache, per-KV-head cached positions and
    heavy-hitter scores, the recorder."""

    def __init__(self, model, policy, prompt, generate, strength):
        cfg = model.config
        self.model, self.cfg, self.policy = model, cfg, policy
        cap = prompt + generate
        self.K = np.zeros((cfg.layers, cfg.kv_heads, cap, cfg.head_dim), np.float32)
        self.V = np.zeros_like(self.K)
        self.acc = np.zeros((cfg.layers, cfg.kv_heads, cap))
        self.rule = policy.cache.at_strength(strength, cap)
        self.rec = Recorder(policy, layers=cfg.layers, heads=cfg.heads, head_dim=cfg.head_dim, tokens=prompt,
                            strength=strength, kv_heads=cfg.kv_heads, causal=True, writes=True, keep_last=True,
                            emulate_decode=False)
        self.hidden = [([], []) for _ in range(cfg.layers)]
        self.reads, self.context = [], []

    # ------------------------------------------------------------------ prefill

    def prefill(self, ids, all_logits=False):
        m, cfg, pol = self.model, self.cfg, self.policy
        live = np.arange(len(ids))
        heads = np.arange(cfg.heads)
        x = m.embed(ids, live)
        self.live_tok, self.live_heads = [], []
        for layer in range(cfg.layers):
            q, k, v = m.qkv(layer, x, live)
            self.K[layer][:, live], self.V[layer][:, live] = k, v
            kv_of = heads // cfg.group
            mask = live[:, None] >= live[None, :]
            probs, lsb = attend(q[heads], k[kv_of], pol.keys, m.scale_of(layer), mask)
            probs = probs.astype(np.float32, copy=False)
            vmask = pol.values.keep_mask(probs, valid=mask) if pol.values.enabled else None
            head_out = np.matmul(probs if vmask is None else probs * vmask, v[kv_of])
            x_out = m.finish(layer, x, _merge(head_out, heads, cfg))
            self._keep_hidden(layer, live, x_out)
            for g in np.unique(kv_of):
                self.acc[layer, g, live] += probs[kv_of == g].sum(axis=(0, 1))
            self.live_tok.append(live)
            self.live_heads.append(heads)
            dec = self.rec.layer(layer, probs, head_out, k[kv_of], lsb_mask=lsb,
                                 value_mask=np.broadcast_to(mask, probs.shape) if vmask is None else vmask)
            final = x_out
            x, live, heads = x_out[dec.keep_rows], dec.tokens, dec.heads
        self.cached = [[t.copy() for _ in range(cfg.kv_heads)] for t in self.live_tok]
        return m.logits(final if all_logits else final[-1:])

    # ------------------------------------------------------------------ decode

    def decode(self, token, pos):
        m, cfg = self.model, self.cfg
        x = m.embed([token], [pos])
        for layer in range(cfg.layers):
            heads = self.live_heads[layer]
            q, k, v = m.qkv(layer, x, [pos])
            self.K[layer][:, pos], self.V[layer][:, pos] = k[:, 0], v[:, 0]
            head_out, fields = self._decode_heads(layer, heads, q[heads], pos)
            x = m.finish(layer, x, _merge(head_out, heads, cfg))
            self._keep_hidden(layer, [pos], x)
            self.rec.decode_steps.append(make_step(layer, "decode", cfg.head_dim, heads, 1, pos + 1,
                                                   kv_heads=heads // cfg.group, new_kv_rows=1, out_rows=1,
                                                   **fields))
        return m.logits(x)[0]

    def _decode_heads(self, layer, heads, q, pos):
        """Attention of one query row per live head, KV head by KV head, under
        the cache rule; returns the head outputs and the step's trace fields."""
        pol, cfg = self.policy, self.cfg
        kv_of = heads // cfg.group
        out = np.zeros((len(heads), 1, cfg.head_dim), np.float32)
        kept_v = np.zeros(len(heads), np.int64)
        lsb = np.zeros(len(heads), np.int64)
        vidx, read = [None] * len(heads), {}
        for g in np.unique(kv_of).tolist():
            mine = np.flatnonzero(kv_of == g)
            rows = self._select(layer, g, np.append(self.cached[layer][g], pos), q[mine, 0], pos)
            read[g] = rows
            keys = np.broadcast_to(self.K[layer][g, rows], (len(mine), len(rows), cfg.head_dim))
            probs, lsb_m = attend(q[mine], keys, pol.keys, self.model.scale_of(layer))
            probs = probs.astype(np.float32, copy=False)
            self.acc[layer, g, rows] += probs.sum(axis=(0, 1))
            vmask = pol.values.keep_mask(probs) if pol.values.enabled else None
            out[mine] = np.matmul(probs if vmask is None else probs * vmask, self.V[layer][g, rows])
            lsb[mine] = lsb_m[:, 0]
            kept_v[mine] = len(rows) if vmask is None else vmask[:, 0].sum(axis=-1)
            for i, j in enumerate(mine.tolist()):
                vidx[j] = None if vmask is None else rows[vmask[i, 0]]
            self.reads.append(len(rows))
            self.context.append(pos + 1)
        sets = [read[g] for g in sorted(read)]
        union = np.unique(np.concatenate(sets))
        same = all(len(s) == len(union) for s in sets)
        fields = {"kept_k": union, "kept_v": kept_v, "lsb_rows": lsb,
                  "kv_kept_k": None if same else sets,
                  "kept_v_idx": vidx if pol.values.enabled else None}
        return out, fields

    def _select(self, layer, g, cached, queries, pos):
        """Rows of KV head g that this step reads; evicting rules also shrink its cache."""
        rule = self.rule
        if rule.mode == "heavy_hitters":
            cached = heavy_hitter_keep(cached, self.acc[layer, g, cached], rule.budget, rule.recent, pos)
        elif rule.mode == "sinks":
            cached = sink_keep(cached, rule.sinks, rule.recent, pos)
        self.cached[layer][g] = cached
        if rule.mode == "pages":
            return page_select(cached, self.K[layer][g, cached], queries, rule.page_size, rule.pages, pos)
        return cached

    def _keep_hidden(self, layer, positions, states):
        pos, st = self.hidden[layer]
        pos.append(np.asarray(positions))
        st.append(states)


def _merge(head_out, heads, cfg):
    """Head outputs (live heads, rows, d) as (rows, heads * d), zeros for pruned heads."""
    rows = head_out.shape[1]
    ctx = np.zeros((rows, cfg.heads, cfg.head_dim), np.float32)
    ctx[:, heads] = head_out.transpose(1, 0, 2)
    return ctx.reshape(rows, cfg.heads * cfg.head_dim)


def _log_softmax(z):
    z = np.asarray(z, dtype=np.float64)
    z = z - z.max()
    return z - np.log(np.exp(z).sum())


def run(model, ids, generate, policy, strength=1.0, follow=None, all_logits=False):
    """Prefill ``ids`` and run ``generate`` decode steps under ``policy``.

    ``follow``: the tokens to feed the decode steps (teacher forcing); None
    feeds each step the previous prediction (greedy generation).
    ``all_logits``: also keep the logits of every prompt row (costs a vocab
    projection per row; the last row's are always kept).
    """
    ids = np.asarray(ids, dtype=np.int64)
    p = _Pass(model, policy, len(ids), generate, strength)
    with one_blas_thread():
        first = p.prefill(ids, all_logits)
        logits, fed = [first[-1]], []
        for t in range(generate):
            token = int(np.argmax(logits[-1])) if follow is None else int(follow[t])
            fed.append(token)
            logits.append(p.decode(token, len(ids) + t))
    logits = np.array(logits)
    logps = np.array([_log_softmax(z) for z in logits])
    hidden = []
    for pos, st in p.hidden:
        hidden.append((np.concatenate(pos), np.concatenate(st, axis=0)))
    cache_rows = [[len(c) for c in per_layer] for per_layer in p.cached]
    return Run(np.argmax(logits, axis=1), logits, logps, np.array(fed, np.int64), hidden, p.rec, p.reads,
               p.context, cache_rows, first if all_logits else None)


def compare(run_, dense):
    """Fidelity of a pass against the dense pass fed the same tokens."""
    agree = float(np.mean(run_.predictions == dense.predictions))
    pd = np.exp(dense.logprobs)
    kl = (pd * (dense.logprobs - run_.logprobs)).sum(axis=1)
    cos = []
    for (pos, h), (dpos, dh) in zip(run_.hidden, dense.hidden):
        ref = np.empty((int(dpos.max()) + 1, dh.shape[1]), np.float64)
        ref[dpos] = dh
        a, b = h.astype(np.float64), ref[pos]
        den = np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1)
        cos.append(float(np.mean(np.where(den > 0, (a * b).sum(axis=1) / np.where(den > 0, den, 1), 1.0))))
    return {"agreement": agree, "mean_kl": float(np.mean(kl)), "max_kl": float(np.max(kl)),
            "kl_per_prediction": [float(x) for x in kl], "hidden_cosine": cos}


# --------------------------------------------------------------------------
# Capture


@dataclasses.dataclass
class DecoderCapture:
    """A finished decoder capture: the trace, its fidelity report and warnings."""

    trace: object
    fidelity: dict
    warnings: list


def prompt_ids(model, text, generate, source="<text>"):
    """Token ids of the prompt; refuse empty prompts and prompt + generation
    longer than the model's positions (never truncated)."""
    if not isinstance(text, str) or not text.strip():
        raise CaptureError(source, "text", text, "expected some text to prompt with (it is empty)")
    ids = model.tokenize(text)
    if len(ids) < 1:
        raise CaptureError(source, "text", text[:40], "expected at least one token")
    check_length(model, len(ids), generate, source)
    return ids


def check_length(model, prompt, generate, source):
    limit = model.config.max_positions
    if prompt + generate > limit:
        raise CaptureError(source, "text", f"{prompt} tokens + {generate} generated",
                           f"expected at most {limit} positions in all (the model's maximum positions); "
                           "longer prompts are refused, not truncated: shorten the text or --generate")


def capture_decoder(model, ids, policy, generate, name=None, text_source="<ids>", text_digest=None,
                    policy_source=None):
    """Capture a prompt (token ids) and ``generate`` decode steps under ``policy``."""
    cfg = model.config
    ids = np.asarray(ids, dtype=np.int64)
    if isinstance(generate, bool) or not isinstance(generate, (int, np.integer)) or generate < 1:
        raise CaptureError(text_source, "--generate", generate, "expected a whole number >= 1")
    if len(ids) < 1:
        raise CaptureError(text_source, "text", "0 tokens", "expected at least one token")
    check_length(model, len(ids), generate, text_source)
    policy = load_policy(policy).check_layers(cfg.layers, cfg.heads).check_decoder(len(ids) + generate, len(ids))
    dense = run(model, ids, generate, policy.dense())

    def attempt(strength):
        r = run(model, ids, generate, policy, strength, follow=dense.fed)
        return r, compare(r, dense)["agreement"]

    warnings = []
    target = policy.fit.agreement
    if target is None:
        pruned, _ = attempt(1.0)
        strength, passes = 1.0, 2
    else:
        pruned, agree, strength, n = _fit(attempt, target, policy.fit.steps)
        passes = 1 + n
        if agree < target:
            warnings.append(f"fidelity target agreement >= {target} not met even with the cascade and cache "
                            f"rules backed off to dense (agreement {agree:.3f}): value or key rules alone cost more")
    fid = {"reference": "dense pass of the same model fed the same tokens (all rules off)"}
    fid.update(compare(pruned, dense))
    fid.update(_decode_summary(pruned, policy, strength, len(ids) + generate))
    fid.update(pruned.recorder.summary())
    fid.update({"strength": strength, "target_agreement": target,
                "target_met": None if target is None else bool(fid["agreement"] >= target), "passes": passes,
                "generate": int(generate), "generated_tokens": [int(t) for t in dense.predictions]})
    fid = _plain(fid)
    prov = {"model_id": model.files.model_id, "model_family": cfg.family, "weights_sha256": model.weights_digest,
            "text": os.path.basename(text_source), "text_sha256": text_digest, "tokens": int(len(ids)),
            "generate": int(generate)}
    if policy_source:
        prov["policy_file"] = os.path.basename(policy_source)
    trace = pruned.recorder.trace(name=name, fidelity=fid, **prov)
    return DecoderCapture(trace, fid, warnings)


def _decode_summary(r, policy, strength, context):
    rule = policy.cache.at_strength(strength, context)
    reads, ctx = np.array(r.reads), np.array(r.context)
    return {"cache_rule": rule.to_dict() or None,
            "decode_rows_read": float(reads.sum() / ctx.sum()) if len(ctx) else 1.0,
            "decode_rows_read_max": int(reads.max()) if len(reads) else 0,
            "cache_rows_after": r.cache_rows}


def capture_decoder_to_file(model, text_path, policy_path, generate, out_path, name=None):
    """Read the text and the policy, capture, and write the trace atomically;
    every input is checked before anything is written."""
    from .files import save_trace

    policy = load_policy(policy_path)
    text = read_text(text_path)
    check_out(out_path)
    ids = prompt_ids(model, text, generate, os.fspath(text_path))
    if name is None:
        name = os.path.splitext(os.path.basename(os.fspath(out_path)))[0]
    result = capture_decoder(model, ids, policy, generate, name=name, text_source=os.fspath(text_path),
                             text_digest=hashlib.sha256(text.encode("utf-8")).hexdigest(),
                             policy_source=os.fspath(policy_path))
    save_trace(result.trace, out_path)
    return result


def format_decoder_report(trace, fid, warnings=()):
    """The fidelity report as printed by ``attnsim trace capture --model``."""
    prov = trace.header["provenance"]
    lines = [f"captured {trace.name or 'trace'}: {fid['tokens']} prompt tokens + {fid['generate']} generated, "
             f"policy '{prov['policy']['name']}', model {prov['model_id']} ({prov['model_family']})"]
    tgt = fid.get("target_agreement")
    fit = ""
    if tgt is not None:
        fit = (f"   (target >= {tgt:g}: {'met' if fid['target_met'] else 'NOT met'}; "
               f"strength {fid['strength']:.3f} after {fid['passes']} passes)")
    lines.append(f"  next-token agreement with dense     {fid['agreement']:.3f}{fit}")
    lines.append(f"  mean KL(dense || policy)             {fid['mean_kl']:.3e} nats (max {fid['max_kl']:.3e})")
    rule = fid["cache_rule"]
    lines.append(f"  cache rule                           {_rule_text(rule)}; decode steps read "
                 f"{100 * fid['decode_rows_read']:.1f} % of their context")
    lines.append(f"  prefill tokens kept over all layers  {100 * fid['tokens_kept']:6.1f} %   heads kept "
                 f"{100 * fid['heads_kept']:.1f} %   values kept {100 * fid['values_kept']:.1f} %")
    if fid.get("key_bits") is not None:
        lines.append(f"  key bits fetched per element (prefill) {fid['key_bits']:.2f} of {fid['key_bits_full']}")
    lines.append("  layer  hidden-state cosine to dense")
    for i, c in enumerate(fid["hidden_cosine"]):
        lines.append(f"  {i:5d}  {c:.6f}")
    for w in warnings:
        lines.append(f"  warning: {w}")
    return "\n".join(lines)


def _rule_text(rule):
    if not rule:
        return "none (every cached row read)"
    (mode, knobs), = rule.items()
    return mode + " " + ", ".join(f"{k} {v}" for k, v in knobs.items())
