"""Capture: run a real encoder on a text under a policy and write the trace.

One capture is two forward passes of the same model on the same tokens: a
dense reference (every rule off) and the pruned pass, in which the recorder's
cascade decisions really shrink the later layers. The trace header carries
the fidelity report -- how far the pruned pass is from the dense one -- so the
accuracy cost sits next to the cycle savings the simulator will show.

With a fidelity target (``fit.cosine`` in the policy) the capture searches,
by bisection over a strength in [0, 1] that blends the token and head
schedules toward dense, for the strongest pruning whose pooled embedding
still meets the target.

Texts longer than the model's position table are refused, not truncated: a
truncated capture would describe a different workload than the user asked for.
"""

import dataclasses
import hashlib
import os

import numpy as np

from ..errors import InputError
from .encoder import Encoder
from .policies import load_policy
from .recorder import Recorder


class CaptureError(InputError):
    """The text to capture is unusable (missing, empty, too long, not UTF-8)."""


@dataclasses.dataclass
class Capture:
    """A finished capture: the trace, its fidelity report and any warnings."""

    trace: object
    fidelity: dict
    warnings: list


def read_text(path):
    """Read a UTF-8 text file; refuse missing, undecodable or empty ones."""
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise CaptureError(path, "<file>", path, "text file not found")
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except UnicodeDecodeError as exc:
        raise CaptureError(path, "<file>", f"byte {exc.start}", "expected UTF-8 text") from None
    if not text.strip():
        raise CaptureError(path, "text", text[:20], "expected some text to encode (the file is empty)")
    return text


def tokens_for(encoder, text, source="<text>"):
    """Token ids and special positions; refuse empty or over-long texts."""
    if not isinstance(text, str) or not text.strip():
        raise CaptureError(source, "text", text, "expected some text to encode (it is empty)")
    ids, special = encoder.tokenize(text)
    if len(ids) - len(special) < 1:
        raise CaptureError(source, "text", text[:40], "expected at least one ordinary token (only special tokens)")
    limit = encoder.config.max_positions
    if len(ids) > limit:
        raise CaptureError(source, "text", f"{len(ids)} tokens",
                           f"expected at most {limit} tokens (the model's max_position_embeddings); "
                           "longer texts are refused, not truncated: shorten or split it")
    return ids, special


def cosine(a, b):
    na, nb = np.linalg.norm(a), np.linalg.norm(b)
    if na == 0 or nb == 0:
        return 0.0
    return float(np.dot(a, b) / (na * nb))


def hidden_errors(dense, pruned):
    """Per layer: ||h_pruned - h_dense|| / ||h_dense|| over the tokens that layer computed."""
    out = []
    for (pos, h), (_, ref) in zip(pruned.states, dense.states):
        r = ref[pos].astype(np.float64)
        den = np.linalg.norm(r)
        out.append(float(np.linalg.norm(h.astype(np.float64) - r) / den) if den else 0.0)
    return out


def _run(encoder, ids, special, policy, strength):
    rec = Recorder(policy, layers=encoder.config.layers, heads=encoder.config.heads,
                   head_dim=encoder.config.head_dim, tokens=len(ids), strength=strength, special=special)
    return encoder.forward(ids, recorder=rec)


def capture(encoder, text, policy, name=None, text_source="<text>", policy_source=None):
    """Capture ``text`` through ``encoder`` under ``policy``; returns a :class:`Capture`.

    Nothing is written; call :func:`sim.trace.files.save_trace` on
    ``result.trace`` (atomic) or use :func:`capture_to_file`.
    """
    policy = load_policy(policy).check_layers(encoder.config.layers, encoder.config.heads).check_encoder()
    ids, special = tokens_for(encoder, text, text_source)
    return capture_ids(encoder, ids, policy, special=special, name=name,
                       text_digest=hashlib.sha256(text.encode("utf-8")).hexdigest(),
                       text_source=text_source, policy_source=policy_source)


def capture_ids(encoder, ids, policy, special=(), name=None, text_digest=None, text_source="<ids>",
                policy_source=None):
    """Capture from token ids (the benchmark and tests use this directly)."""
    policy = load_policy(policy).check_layers(encoder.config.layers, encoder.config.heads).check_encoder()
    ids = np.asarray(ids, dtype=np.int64)
    if not 1 <= len(ids) <= encoder.config.max_positions:
        raise CaptureError(text_source, "text", f"{len(ids)} tokens",
                           f"expected 1..{encoder.config.max_positions} tokens")
    warnings = []
    dense = _run(encoder, ids, special, policy.dense(), 1.0)
    ref = dense.pooled()

    def attempt(strength):
        run = _run(encoder, ids, special, policy, strength)
        return run, cosine(run.pooled(), ref)

    passes = 1
    strength = 1.0
    target = policy.fit.cosine if policy.fit.enabled else None
    if target is None:
        run, cos = attempt(1.0)
        passes += 1
    else:
        run, cos, strength, n = _fit(attempt, target, policy.fit.steps)
        passes += n
        if cos < target:
            warnings.append(f"fidelity target cosine >= {target} not met even with token and head pruning "
                            f"off (cosine {cos:.5f}): the value or key rules alone cost more")

    rec = run.recorder
    fid = {"reference": "dense pass of the same model on the same tokens (all rules off)",
           "pooled_cosine": cos, "hidden_rel_error": hidden_errors(dense, run)}
    fid.update(rec.summary())
    fid.update({"strength": strength, "target_cosine": target,
                "target_met": None if target is None else bool(cos >= target), "passes": passes})
    fid = _plain(fid)
    prov = {"model_id": encoder.files.model_id, "weights_sha256": encoder.weights_digest,
            "text": os.path.basename(text_source), "text_sha256": text_digest, "tokens": int(len(ids))}
    if policy_source:
        prov["policy_file"] = os.path.basename(policy_source)
    trace = rec.trace(name=name, fidelity=fid, **prov)
    return Capture(trace, fid, warnings)


def _fit(attempt, target, steps):
    """Strongest schedule strength whose pass meets the cosine target.

    Fidelity is not monotone in the strength (dropping one token of a short
    sentence can matter more than dropping two), so a bisection alone can
    stop early: scan ``steps`` evenly spaced strengths from the strongest
    down, then bisect once between the best feasible point and the next
    stronger one. Returns (run, cosine, strength, passes).
    """
    grid = [i / steps for i in range(steps, 0, -1)]
    passes = 0
    lo, hi, best = 0.0, grid[-1], None
    for i, s in enumerate(grid):
        run, cos = attempt(s)
        passes += 1
        if cos >= target:
            if i == 0:
                return run, cos, s, passes
            lo, hi, best = s, grid[i - 1], (run, cos)
            break
    for _ in range(3):
        mid = 0.5 * (lo + hi)
        r, c = attempt(mid)
        passes += 1
        if c >= target:
            lo, best = mid, (r, c)
        else:
            hi = mid
    if best is None:  # nothing met the target: fall back to token/head pruning off
        best = attempt(0.0)
        passes += 1
    return best[0], best[1], lo, passes


def capture_to_file(text_path, policy_path, out_path, encoder=None, name=None):
    """Read, capture and write atomically; every input is checked before writing."""
    policy = load_policy(policy_path)
    text = read_text(text_path)
    check_out(out_path)
    encoder = encoder or Encoder.load()
    if name is None:
        name = os.path.splitext(os.path.basename(os.fspath(out_path)))[0]
    result = capture(encoder, text, policy, name=name, text_source=os.fspath(text_path),
                     policy_source=os.fspath(policy_path))
    from .files import save_trace
    save_trace(result.trace, out_path)
    return result


def check_out(out_path):
    """The output path names a .npz or .yaml trace in an existing folder."""
    ext = os.path.splitext(os.fspath(out_path))[1].lower()
    if ext not in (".npz", ".yaml", ".yml"):
        raise CaptureError(os.fspath(out_path), "--out", ext or out_path, "expected a .npz or .yaml trace path")
    folder = os.path.dirname(os.path.abspath(out_path))
    if not os.path.isdir(folder):
        raise CaptureError(os.fspath(out_path), "--out", folder, "output folder does not exist")


def _plain(obj):
    """JSON-ready copy (numpy scalars to Python numbers)."""
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    return obj


def format_report(trace, fid, warnings=()):
    """The fidelity report as printed by ``attnsim trace capture``."""
    prov = trace.header["provenance"]
    pol = prov["policy"]["name"]
    lines = [f"captured {trace.name or 'trace'}: {fid['tokens']} tokens, policy '{pol}', model {prov['model_id']}"]
    tgt = fid.get("target_cosine")
    fit = ""
    if tgt is not None:
        fit = (f"   (target >= {tgt:g}: {'met' if fid['target_met'] else 'NOT met'}; "
               f"schedule strength {fid['strength']:.3f} after {fid['passes']} passes)")
    lines.append(f"  pooled embedding cosine to dense   {fid['pooled_cosine']:.5f}{fit}")
    lines.append(f"  tokens kept over all layers        {100 * fid['tokens_kept']:6.1f} %"
                 f"   ({fid['tokens_after_last']} of {fid['tokens']} survive the last layer)")
    lines.append(f"  heads kept over all layers         {100 * fid['heads_kept']:6.1f} %")
    lines.append(f"  probabilities kept (value rows)    {100 * fid['values_kept']:6.1f} %")
    if fid.get("key_bits") is not None:
        lines.append(f"  key bits fetched per element       {fid['key_bits']:6.2f} of {fid['key_bits_full']}"
                     f"   (LSB plane: {100 * fid['lsb_head_fraction']:.1f} % of head-layers, "
                     f"{100 * fid['lsb_row_fraction']:.1f} % of rows)")
    else:
        lines.append("  key bits fetched per element       full precision (progressive quantization off)")
    lines.append("  layer  tokens  heads  hidden-state rel. error")
    for i, err in enumerate(fid["hidden_rel_error"]):
        lines.append(f"  {i:5d}  {fid['tokens_per_layer'][i]:6d}  {fid['heads_per_layer'][i]:5d}  {err:.2e}")
    for w in warnings:
        lines.append(f"  warning: {w}")
    return "\n".join(lines)
