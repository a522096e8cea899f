"""Attention trace: what the workload asked of the datapath, step by step.

A trace is a header (format version, provenance, optional model shape and
fidelity figures) and a list of :class:`~sim.trace.step.Step`. One step is one
layer of one forward pass of one request: for every active query head,
``q_rows`` query rows against the kept key rows of its K/V head. Two encodings
share one schema:

* ``.npz`` -- columnar arrays plus a JSON header stored as bytes; read with
  ``allow_pickle=False`` (layout in :mod:`sim.trace.npz`). For captured and
  long synthetic traces.
* ``.yaml`` -- a ``header`` mapping and a ``steps`` list. For hand-written ones.

This reader reads format versions 1 and 2; a version-1 file reads as version 2
with the defaults (one KV head per query head, request 0, not causal, no
window, no cache writes) and a loaded trace is version 2 in memory. Writers
write version 2. Validation happens on load, once; the engine trusts a loaded
:class:`Trace`. Files are read and written by :mod:`sim.trace.files`.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os

import numpy as np

from ..errors import TraceError, closest
from .step import STAGES, Step, Work, dense_rows, make_step  # noqa: F401 (re-exported)

FORMAT_NAME = "attnsim-trace"
FORMAT_VERSION = 2
READS_VERSIONS = (1, 2)
# The digest identifies content, not the encoding: the header is hashed with
# this version whatever version the file was written in, so a version-1 trace
# keeps the digest it always had and its version-2 re-save shares it.
DIGEST_HEADER_VERSION = 1

STEP_KEYS_V1 = ("layer", "stage", "head_dim", "heads", "q_rows", "kv_rows", "kept_k",
                "kept_v", "kept_v_idx", "lsb_rows", "token_scores", "head_scores")
STEP_KEYS_V2_ONLY = ("request", "kv_heads", "causal", "window", "kv_kept_k", "new_kv_rows", "out_rows")
STEP_KEYS = STEP_KEYS_V1 + STEP_KEYS_V2_ONLY
HEADER_KEYS = ("format", "version", "name", "provenance", "model", "fidelity", "notes")
MODEL_KEYS = ("layers", "heads", "kv_heads", "head_dim")

# Ranges the engine relies on: addresses, counts and products stay far inside int64,
# and nothing a trace asks for makes the reader or the engine allocate absurd arrays.
MAX_LAYERS = 1 << 20          # layer ids and header.model.layers
MAX_HEADS = 1 << 16           # query and KV head ids and counts
MAX_HEAD_DIM = 1 << 14
MAX_POSITIONS = 1 << 40       # kv_rows, q_rows, window, key positions
MAX_REQUESTS = 1 << 31
MAX_KEPT_ROWS = 1 << 26       # kept positions one step lists (8 bytes each)
MAX_STEP_MACS = 1 << 60       # q.K MACs of one step
MAX_STEP_BYTES = 2 << 30      # working memory the reader and engine need for one step
MAX_STEPS = 1 << 24


@dataclasses.dataclass
class Trace:
    """A validated attention trace: header plus steps.

    ``file_version``: the format version of the file it was read from (the
    header in memory is always :data:`FORMAT_VERSION`).
    """

    header: dict
    steps: list
    source: str = "<memory>"
    file_version: int = FORMAT_VERSION

    @property
    def name(self):
        return self.header.get("name", os.path.basename(self.source))

    def __repr__(self):
        st = self.steps
        pre = sum(s.stage == "prefill" for s in st)
        layers = len({s.layer for s in st})
        return (f"Trace({self.name!r}: {len(st)} steps ({pre} prefill, {len(st) - pre} decode), "
                f"{layers} layers, from {self.source})")

    def _repr_html_(self):
        import html

        sm = self.summary()
        rows = [("steps", f"{sm['steps']} ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode)"),
                ("layers", sm["layers"]), ("requests", sm["requests"]), ("head_dims", sm["head_dims"]),
                ("q.K MACs", f"{sm['macs_qk']:,}"), ("p.V MACs", f"{sm['macs_pv']:,}"),
                ("kept keys", f"{sm['kept_key_fraction']:.1%} of dense"),
                ("made by", sm["provenance"].get("method")), ("digest", sm["digest"][:16])]
        body = "".join(f"<tr><td>{html.escape(str(k))}</td><td>{html.escape(str(v))}</td></tr>" for k, v in rows)
        return (f"<div><b>Trace {html.escape(str(self.name))}</b> <code>{html.escape(str(self.source))}</code>"
                f"<table>{body}</table></div>")

    def digest(self):
        """SHA-256 over the canonical content (independent of the encoding and of
        the format version the file was written in).

        Version-2 fields enter the hash only for steps where one differs from its
        default, so content a version-1 trace can hold hashes as it always did.
        """
        h = hashlib.sha256()
        hdr = dict(self.header, version=DIGEST_HEADER_VERSION)
        h.update(json.dumps(hdr, sort_keys=True, default=str).encode())
        for s in self.steps:
            h.update(json.dumps([s.layer, s.stage, s.head_dim, s.q_rows, s.kv_rows]).encode())
            for arr in (s.heads, s.kept_k, s.kept_v, s.lsb_rows):
                h.update(np.ascontiguousarray(arr, dtype=np.int64))
            if s.kept_v_idx is not None:
                for arr in s.kept_v_idx:
                    h.update(b"|" + np.ascontiguousarray(arr, dtype=np.int64).tobytes())
            for arr in (s.token_scores, s.head_scores):
                if arr is not None:
                    # at the precision the .npz stores, so every encoding hashes alike
                    h.update(b"#" + np.ascontiguousarray(arr, dtype=np.float32).tobytes())
            if not _v1_defaults(s):
                h.update(b"v2" + json.dumps([int(s.request), bool(s.causal), int(s.window),
                                             int(s.new_kv_rows), int(s.out_rows)]).encode())
                h.update(np.ascontiguousarray(s.kv_heads, dtype=np.int64))
                for arr in s.kv_kept_k or ():
                    h.update(b"/")
                    h.update(np.ascontiguousarray(arr, dtype=np.int64))
        return h.hexdigest()

    def work(self):
        """Total :class:`~sim.trace.step.Work` of all steps."""
        total = Work()
        for s in self.steps:
            total = total + s.work()
        return total

    def summary(self):
        """Totals a person reads first (used by ``attnsim trace info``)."""
        stages = {st: [s for s in self.steps if s.stage == st] for st in STAGES}
        work = self.work()
        model = self.header.get("model") or {}
        # dense: every head of the model reads every context row, pruned heads included
        all_heads = model.get("heads") or max((int(s.heads.max()) + 1 for s in self.steps), default=0)
        dense_k = sum(s.kv_rows * max(all_heads, s.n_heads) for s in self.steps)
        kept_k = sum(_kept_per_head(s) for s in self.steps)
        kept_v = sum(int(np.sum(s.kept_v)) for s in self.steps)
        lsb_heads = sum(int(np.count_nonzero(s.lsb_rows)) for s in self.steps)
        head_steps = sum(s.n_heads for s in self.steps)
        kv_head_steps = sum(len(s.kv_ids()) for s in self.steps)
        return {
            "name": self.name,
            "version": self.header.get("version"),
            "file_version": self.file_version,
            "provenance": self.header.get("provenance", {}),
            "model": model,
            "steps": len(self.steps),
            "prefill_steps": len(stages["prefill"]),
            "decode_steps": len(stages["decode"]),
            "requests": len({s.request for s in self.steps}),
            "layers": len({s.layer for s in self.steps}),
            "head_steps": head_steps,
            "kv_head_steps": kv_head_steps,
            "causal_steps": sum(bool(s.causal) for s in self.steps),
            "window_steps": sum(s.window > 0 for s in self.steps),
            "macs_qk": work.qk_macs,
            "macs_lsb": work.lsb_macs,
            "macs_pv": work.pv_macs,
            "softmax_elements": work.softmax + work.lsb_softmax,
            "kv_rows_written": sum(s.new_kv_rows * len(s.kv_ids()) for s in self.steps),
            "out_rows_written": sum(s.out_rows * s.n_heads for s in self.steps),
            "kept_key_fraction": kept_k / dense_k if dense_k else 1.0,
            "kept_key_rows": kept_k,
            "dense_key_rows": dense_k,
            "kept_value_fraction": kept_v / kept_k if kept_k else 1.0,
            "lsb_refetch_head_fraction": lsb_heads / head_steps if head_steps else 0.0,
            "head_dims": sorted({s.head_dim for s in self.steps}),
            "max_kv_rows": max((s.kv_rows for s in self.steps), default=0),
            "max_q_rows": max((s.q_rows for s in self.steps), default=0),
            "token_score_steps": sum(s.token_scores is not None for s in self.steps),
            "head_score_steps": sum(s.head_scores is not None for s in self.steps),
            "digest": self.digest(),
        }


def _kept_per_head(s):
    """Key rows the step's active query heads read, each its KV head's kept set."""
    if s.kv_kept_k is None:
        return s.n_kept_k * s.n_heads
    ids = np.unique(s.kv_heads)
    sizes = np.array([len(a) for a in s.kv_kept_k], dtype=np.int64)
    return int(sizes[np.searchsorted(ids, s.kv_heads)].sum())


def _v1_defaults(s):
    """True when every version-2 field of the step has its default."""
    return (s.request == 0 and not s.causal and s.window == 0 and s.new_kv_rows == 0
            and s.out_rows == 0 and s.kv_kept_k is None
            and (s.kv_heads is s.heads or np.array_equal(s.kv_heads, s.heads)))


# --------------------------------------------------------------------------
# Validation


def validate(trace):
    """Check a Trace in place; raise TraceError naming file, field and value."""
    src = trace.source
    hdr = trace.header
    if not isinstance(hdr, dict):
        raise TraceError(src, "header", hdr, "expected a mapping")
    for key in hdr:
        if key not in HEADER_KEYS:
            raise TraceError(src, f"header.{key}", hdr[key], "unknown header key" + closest(key, HEADER_KEYS))
    if hdr.get("format") != FORMAT_NAME:
        raise TraceError(src, "header.format", hdr.get("format"), f"expected '{FORMAT_NAME}'")
    if hdr.get("version") != FORMAT_VERSION:
        raise TraceError(src, "header.version", hdr.get("version"), _version_expected())
    if not isinstance(hdr.get("provenance"), dict) or not hdr["provenance"].get("method"):
        raise TraceError(src, "header.provenance", hdr.get("provenance"),
                         "expected a mapping with at least 'method' (how the trace was made)")
    if "name" in hdr and (not isinstance(hdr["name"], str) or not hdr["name"].strip()
                          or len(hdr["name"]) > 200 or not hdr["name"].isprintable()):
        raise TraceError(src, "header.name", hdr["name"], "expected a short line of text")
    if "notes" in hdr and not isinstance(hdr["notes"], (str, list)):
        raise TraceError(src, "header.notes", hdr["notes"], "expected text or a list of texts")
    if "fidelity" in hdr and not isinstance(hdr["fidelity"], dict):
        raise TraceError(src, "header.fidelity", hdr["fidelity"], "expected a mapping")
    model = _validate_model(src, hdr.get("model"))
    if not isinstance(trace.steps, list) or not trace.steps:
        raise TraceError(src, "steps", [], "expected at least one attention step")
    if len(trace.steps) > MAX_STEPS:
        raise TraceError(src, "steps", len(trace.steps), f"expected at most {MAX_STEPS:,} steps")
    seen = {}
    for i, s in enumerate(trace.steps):
        _validate_step(src, f"steps[{i}]", s, model, seen)
    _validate_requests(src, trace.steps)
    _validate_cascade(src, trace.steps)
    return trace


def _version_expected():
    return (f"unknown trace format version; this attnsim reads version "
            f"{' or '.join(map(str, READS_VERSIONS))} (writes {FORMAT_VERSION})")


def _validate_model(src, model):
    model = model or {}
    if not isinstance(model, dict):
        raise TraceError(src, "header.model", model, "expected a mapping (layers, heads, kv_heads, head_dim)")
    for key in model:
        if key not in MODEL_KEYS:
            raise TraceError(src, f"header.model.{key}", model[key], "unknown key" + closest(key, MODEL_KEYS))
    limits = {"layers": MAX_LAYERS, "heads": MAX_HEADS, "kv_heads": MAX_HEADS, "head_dim": MAX_HEAD_DIM}
    for key in MODEL_KEYS:
        if key in model and not _int_ok(model[key], 1, limits[key]):
            raise TraceError(src, f"header.model.{key}", model[key],
                             f"expected a whole number in [1, {limits[key]:,}]")
    if "kv_heads" in model and "heads" in model and model["kv_heads"] > model["heads"]:
        raise TraceError(src, "header.model.kv_heads", model["kv_heads"],
                         f"expected at most header.model.heads={model['heads']} (query heads share K/V heads)")
    return model


def _int_ok(v, low, high=None):
    return (isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= low
            and (high is None or v <= high))


def _whole(src, field, v, low, high):
    if not _int_ok(v, low):
        raise TraceError(src, field, v, f"expected a whole number >= {low}")
    if v > high:
        raise TraceError(src, field, v, f"expected a whole number <= {high:,}")


def _validate_step(src, at, s, model, seen):
    if not isinstance(s, Step):
        raise TraceError(src, at, type(s).__name__, "expected an attention step")
    _whole(src, f"{at}.layer", s.layer, 0, MAX_LAYERS - 1)
    _whole(src, f"{at}.head_dim", s.head_dim, 1, MAX_HEAD_DIM)
    _whole(src, f"{at}.q_rows", s.q_rows, 1, MAX_POSITIONS)
    _whole(src, f"{at}.kv_rows", s.kv_rows, 1, MAX_POSITIONS)
    _whole(src, f"{at}.request", s.request, 0, MAX_REQUESTS - 1)
    if not isinstance(s.stage, str):
        raise TraceError(src, f"{at}.stage", s.stage, "expected 'prefill' or 'decode'")
    if "layers" in model and s.layer >= model["layers"]:
        raise TraceError(src, f"{at}.layer", s.layer, f"expected < header.model.layers={model['layers']}")
    if s.stage not in STAGES:
        raise TraceError(src, f"{at}.stage", s.stage, "expected 'prefill' or 'decode'" + closest(s.stage, STAGES))
    if not _int_ok(s.head_dim, 1):
        raise TraceError(src, f"{at}.head_dim", s.head_dim, "expected a whole number >= 1")
    if "head_dim" in model and s.head_dim != model["head_dim"]:
        raise TraceError(src, f"{at}.head_dim", s.head_dim, f"expected header.model.head_dim={model['head_dim']}")
    if not _int_ok(s.q_rows, 1):
        raise TraceError(src, f"{at}.q_rows", s.q_rows, "expected a whole number >= 1")
    if not _int_ok(s.kv_rows, 1):
        raise TraceError(src, f"{at}.kv_rows", s.kv_rows, "expected a whole number >= 1")
    if s.stage == "decode" and s.q_rows > s.kv_rows:
        raise TraceError(src, f"{at}.q_rows", s.q_rows,
                         f"expected at most kv_rows={s.kv_rows} (decode query rows are the newest context rows)")
    if not _int_ok(s.request, 0):
        raise TraceError(src, f"{at}.request", s.request, "expected a whole number >= 0 (request id)")
    _validate_heads(src, at, s, model)
    k = s.kept_k
    _validate_rows(src, f"{at}.kept_k", k, s.kv_rows, seen)
    _validate_size(src, at, s)
    if s.stage == "prefill" and s.q_rows != len(k):
        raise TraceError(src, f"{at}.q_rows", s.q_rows,
                         f"a prefill step has one query row per live token: expected {len(k)} (len of kept_k)")
    _validate_rules(src, at, s)
    sizes = _validate_kv_kept(src, at, s, seen)
    for name in ("kept_v", "lsb_rows"):
        arr = getattr(s, name)
        if not isinstance(arr, np.ndarray) or arr.shape != s.heads.shape or arr.dtype.kind not in "iu":
            raise TraceError(src, f"{at}.{name}", _shown(arr),
                             f"expected one entry per active head ({len(s.heads)})")
    if np.any(s.kept_v < 1) or np.any(s.kept_v > sizes):
        raise TraceError(src, f"{at}.kept_v", s.kept_v.tolist()[:8],
                         f"expected counts in [1, kept key rows of the head's KV head] "
                         f"({sizes.tolist()[:8] if sizes.ndim else int(sizes)})")
    if np.any(s.lsb_rows < 0) or np.any(s.lsb_rows > s.q_rows):
        raise TraceError(src, f"{at}.lsb_rows", s.lsb_rows.tolist()[:8],
                         f"expected counts in [0, q_rows={s.q_rows}]")
    if s.kept_v_idx is not None:
        _validate_kept_v_idx(src, at, s)
    if s.token_scores is not None:
        if not isinstance(s.token_scores, np.ndarray) or s.token_scores.dtype.kind not in "fiu" or \
                s.token_scores.shape != k.shape or not np.all(np.isfinite(s.token_scores)) or \
                np.any(np.abs(s.token_scores) > 3e38):
            raise TraceError(src, f"{at}.token_scores", _shown(s.token_scores),
                             f"expected {len(k)} finite scores (one per kept key row, float32 range)")
    if s.head_scores is not None:
        if not isinstance(s.head_scores, np.ndarray) or s.head_scores.dtype.kind not in "fiu" or \
                s.head_scores.shape != s.heads.shape or not np.all(np.isfinite(s.head_scores)) or \
                np.any(np.abs(s.head_scores) > 3e38):
            raise TraceError(src, f"{at}.head_scores", _shown(s.head_scores),
                             f"expected {len(s.heads)} finite scores (one per active head, float32 range)")
    _validate_visible(src, at, s)


def _validate_size(src, at, s):
    """Refuse a step whose work or working memory is absurd, with the estimate, before the engine runs."""
    macs = int(s.q_rows) * len(s.kept_k) * int(s.head_dim) * len(s.heads)
    if macs > MAX_STEP_MACS:
        raise TraceError(src, f"{at}.q_rows", int(s.q_rows),
                         f"the step asks for about {macs:.3g} q.K MACs; expected at most {MAX_STEP_MACS:.3g}")
    # per query row and per kept row the reader and engine hold a few int64 arrays
    need = 8 * (4 * int(s.q_rows) + 4 * len(s.kept_k)) + 8 * 8 * len(s.heads)
    if need > MAX_STEP_BYTES:
        raise TraceError(src, f"{at}.q_rows", int(s.q_rows),
                         f"a step of {int(s.q_rows):,} query rows and {len(s.kept_k):,} kept rows needs about "
                         f"{need / 2**30:,.1f} GiB of working memory; expected at most "
                         f"{MAX_STEP_BYTES / 2**30:g} GiB per step")


def _shown(arr):
    if isinstance(arr, np.ndarray):
        return arr.item() if arr.ndim == 0 else arr.reshape(-1)[:8].tolist()
    return arr


def _validate_heads(src, at, s, model):
    h = s.heads
    if not isinstance(h, np.ndarray) or h.ndim != 1 or len(h) == 0 or h.dtype.kind not in "iu":
        raise TraceError(src, f"{at}.heads", _shown(h), "expected at least one active head id")
    if len(h) > MAX_HEADS or np.any(h < 0) or np.any(h >= MAX_HEADS) or len(np.unique(h)) != len(h):
        raise TraceError(src, f"{at}.heads", h.tolist()[:8], f"expected distinct head ids in [0, {MAX_HEADS})")
    if "heads" in model and np.any(h >= model["heads"]):
        raise TraceError(src, f"{at}.heads", h.tolist(), f"expected head ids < header.model.heads={model['heads']}")
    g = s.kv_heads
    if not isinstance(g, np.ndarray) or g.shape != h.shape or g.dtype.kind not in "iu":
        raise TraceError(src, f"{at}.kv_heads", _shown(g),
                         f"expected one KV head per active query head ({len(h)} entries, parallel to heads)")
    limit, where = (model["kv_heads"], "header.model.kv_heads") if "kv_heads" in model else \
        (model.get("heads"), "header.model.heads" if "heads" in model else None)
    limit = MAX_HEADS if limit is None else limit
    if np.any(g < 0) or np.any(g >= limit):
        bad = g[(g < 0) | (g >= limit)]
        raise TraceError(src, f"{at}.kv_heads", bad[:4].tolist(),
                         "expected KV head ids >= 0" + (f" and < {where}={limit}" if where else f" and < {limit}"))


def _validate_rows(src, field, k, kv_rows, seen):
    """Sorted distinct positions in [0, kv_rows). Rows that are views of an
    array already checked from the same start are checked for their range only
    (steps of a long trace share storage)."""
    if not isinstance(k, np.ndarray) or k.ndim != 1 or len(k) == 0 or k.dtype.kind not in "iu":
        raise TraceError(src, field, _shown(k), "expected at least one kept key row")
    if len(k) > MAX_KEPT_ROWS:
        raise TraceError(src, field, len(k), f"expected at most {MAX_KEPT_ROWS:,} kept rows in one step")
    key = _view_key(k)
    if key is None or seen.get(key, 0) < len(k):
        if k[0] < 0 or np.any(np.diff(k) <= 0):
            bad = k[k < 0]
            shown = bad[:4].tolist() if len(bad) else k[:8].tolist()
            raise TraceError(src, field, shown, f"expected sorted distinct row indices in [0, kv_rows={kv_rows})")
        if key is not None:
            seen[key] = len(k)
    if k[-1] >= kv_rows:
        raise TraceError(src, field, k[k >= kv_rows][:4].tolist(),
                         f"expected sorted distinct row indices in [0, kv_rows={kv_rows})")


def _view_key(a):
    """(owner id, start) of a contiguous int64 view, or None."""
    owner = a.base if isinstance(a.base, np.ndarray) else None
    if owner is None or a.dtype != np.int64 or not a.flags.c_contiguous or owner.dtype != np.int64:
        return None
    return id(owner), a.__array_interface__["data"][0]


def _validate_rules(src, at, s):
    if not isinstance(s.causal, (bool, np.bool_)):
        raise TraceError(src, f"{at}.causal", s.causal, "expected true or false")
    if s.causal and s.stage != "prefill":
        raise TraceError(src, f"{at}.causal", True,
                         "expected false on a decode step (causal masking applies to prefill only)")
    if not _int_ok(s.window, 0, MAX_POSITIONS):
        raise TraceError(src, f"{at}.window", s.window,
                         "expected a whole number >= 1 (keys within the last W positions), or 0 for no window")
    for name in ("new_kv_rows", "out_rows"):
        v = getattr(s, name)
        if not _int_ok(v, 0) or v > s.q_rows:
            raise TraceError(src, f"{at}.{name}", v, f"expected a whole number in [0, q_rows={s.q_rows}]")


def _validate_kv_kept(src, at, s, seen):
    """Per-KV-head kept keys: subsets of kept_k whose union is kept_k. Returns
    the kept key count each active head's KV head holds."""
    if s.kv_kept_k is None:
        return np.asarray(len(s.kept_k))
    ids, inv = np.unique(s.kv_heads, return_inverse=True)
    if not isinstance(s.kv_kept_k, list) or len(s.kv_kept_k) != len(ids):
        n = len(s.kv_kept_k) if isinstance(s.kv_kept_k, list) else s.kv_kept_k
        raise TraceError(src, f"{at}.kv_kept_k", n,
                         f"expected one position list per distinct active KV head ({len(ids)}: "
                         f"{ids.tolist()[:8]}, ascending)")
    k = s.kept_k
    for j, rows in enumerate(s.kv_kept_k):
        field = f"{at}.kv_kept_k[{j}]"
        _validate_rows(src, field, rows, s.kv_rows, seen)
        pos = np.minimum(np.searchsorted(k, rows), len(k) - 1)
        if not np.all(k[pos] == rows):
            raise TraceError(src, field, rows[k[pos] != rows][:4].tolist(), "expected positions drawn from kept_k")
    covered = np.zeros(len(k), dtype=bool)
    for rows in s.kv_kept_k:
        covered[np.searchsorted(k, rows)] = True
    if not covered.all():
        raise TraceError(src, f"{at}.kept_k", k[~covered][:4].tolist(),
                         "expected the union of kv_kept_k (these rows no KV head keeps)")
    sizes = np.array([len(a) for a in s.kv_kept_k], dtype=np.int64)
    return sizes[inv]


def _validate_kept_v_idx(src, at, s):
    h = s.heads
    if not isinstance(s.kept_v_idx, list) or len(s.kept_v_idx) != len(h):
        n = len(s.kept_v_idx) if isinstance(s.kept_v_idx, list) else s.kept_v_idx
        raise TraceError(src, f"{at}.kept_v_idx", n, f"expected one index list per active head ({len(h)})")
    for j, idx in enumerate(s.kept_v_idx):
        if not isinstance(idx, np.ndarray) or idx.ndim != 1 or idx.dtype.kind not in "iu":
            raise TraceError(src, f"{at}.kept_v_idx[{j}]", _shown(idx), "expected a list of positions")
        if len(idx) != s.kept_v[j]:
            raise TraceError(src, f"{at}.kept_v_idx[{j}]", len(idx), f"expected kept_v[{j}]={int(s.kept_v[j])} indices")
    keys_of = s.kv_keys() if s.kv_kept_k is not None else None
    groups = [(s.kept_k, np.arange(len(h)))] if keys_of is None else \
        [(keys_of[g], idx) for g, idx in s.kv_groups().items()]
    for k, members in groups:
        # all heads of one key set at once: membership by binary search, order by diff
        parts = [s.kept_v_idx[j] for j in members.tolist()]
        counts = s.kept_v[members]
        flat = np.concatenate(parts)
        pos = np.minimum(np.searchsorted(k, flat), len(k) - 1)
        good = k[pos] == flat
        rising = np.diff(flat) > 0
        starts = np.cumsum(counts)[:-1]  # a new head may start lower
        rising[starts[starts < len(flat)] - 1] = True
        if not (good.all() and rising.all()):
            first = min(np.flatnonzero(~good)[:1].tolist() + (np.flatnonzero(~rising)[:1] + 1).tolist())
            j = int(members[int(np.searchsorted(np.cumsum(counts), first, side="right"))])
            raise TraceError(src, f"{at}.kept_v_idx[{j}]", s.kept_v_idx[j][:8].tolist(),
                             "expected sorted distinct positions drawn from kept_k"
                             + (" (of the head's KV head, kv_kept_k)" if keys_of is not None else ""))


def _validate_visible(src, at, s):
    """Under causal or window rules every query row must see at least one key."""
    if not s.causal and not s.window:
        return
    if s.stage == "prefill" and s.kv_kept_k is None:
        return  # each query row is one of the keys and sees at least itself
    for g, keys in s.kv_keys().items():
        vis = s.visible_counts(keys)
        if vis.min() < 1:
            row = int(np.argmin(vis))
            raise TraceError(src, f"{at}.window" if s.window else f"{at}.causal", s.window or True,
                             f"query row {row} (position {int(s.query_positions()[row])}) sees no kept key "
                             f"of KV head {g}: expected every query row to see at least one")


def _validate_requests(src, steps):
    """A request's prefill steps share one kv_rows (its prompt) and come before
    its decode steps; a decode step's context is at least the prompt, never
    shrinks from one token to the next at the same layer, and is the same at
    every layer of one token (the k-th decode step of a request at each layer)."""
    prompt, decoded, last = {}, set(), {}
    tokens, context = {}, {}
    for i, s in enumerate(steps):
        r = int(s.request)
        if s.stage == "prefill":
            if r in decoded:
                raise TraceError(src, f"steps[{i}].stage", s.stage,
                                 f"request {r} already has decode steps: its prefill steps come first")
            if r in prompt and prompt[r][0] != s.kv_rows:
                raise TraceError(src, f"steps[{i}].kv_rows", s.kv_rows,
                                 f"request {r}'s prefill steps share one kv_rows (its prompt): "
                                 f"expected {prompt[r][0]} as at steps[{prompt[r][1]}]")
            prompt.setdefault(r, (s.kv_rows, i))
            continue
        decoded.add(r)
        if r in prompt and s.kv_rows < prompt[r][0]:
            raise TraceError(src, f"steps[{i}].kv_rows", s.kv_rows,
                             f"request {r}'s decode context cannot be shorter than its prompt "
                             f"(kv_rows={prompt[r][0]} at steps[{prompt[r][1]}])")
        before = last.get((r, s.layer))
        if before is not None and s.kv_rows < before[0]:
            raise TraceError(src, f"steps[{i}].kv_rows", s.kv_rows,
                             f"request {r}'s context at layer {s.layer} cannot shrink between tokens: "
                             f"expected >= {before[0]} (steps[{before[1]}])")
        last[(r, s.layer)] = (s.kv_rows, i)
        k = tokens.get((r, s.layer), 0)
        tokens[(r, s.layer)] = k + 1
        first = context.setdefault((r, k), (s.kv_rows, i, s.layer))
        if first[0] != s.kv_rows:
            raise TraceError(src, f"steps[{i}].kv_rows", s.kv_rows,
                             f"request {r}'s decode token {k} reads one context at every layer: expected "
                             f"{first[0]} as at layer {first[2]} (steps[{first[1]}])")


def _validate_cascade(src, steps):
    """Within one prefill pass of a request, pruned tokens and heads never come back."""
    prev = {}
    for i, b in enumerate(steps):
        if b.stage != "prefill":
            continue
        j = prev.get(b.request)
        prev[b.request] = i
        if j is None:
            continue
        a = steps[j]
        if b.layer != a.layer + 1 or a.kv_rows != b.kv_rows:
            continue
        if not np.isin(b.kept_k, a.kept_k).all():
            back = b.kept_k[~np.isin(b.kept_k, a.kept_k)][:4].tolist()
            raise TraceError(src, f"steps[{i}].kept_k", back,
                             f"cascade pruning: rows pruned at steps[{j}] cannot return")
        if not np.isin(b.heads, a.heads).all():
            back = b.heads[~np.isin(b.heads, a.heads)][:4].tolist()
            raise TraceError(src, f"steps[{i}].heads", back,
                             f"cascade pruning: heads pruned at steps[{j}] cannot return")


# --------------------------------------------------------------------------
# Versions and headers


def check_version(path, header):
    """The file's version, if this reader knows it; header upgraded in place to
    the current version (the defaults fill what an older version lacks)."""
    version = header.get("version")
    if isinstance(version, bool) or version not in READS_VERSIONS:
        # refuse before trying to interpret a layout we do not know
        raise TraceError(path, "header.version", version, _version_expected())
    header["version"] = FORMAT_VERSION
    return version


def new_header(method, name=None, model=None, **provenance):
    """A header for a trace made by ``method`` (``synth``, ``capture``, ``hand``...)."""
    hdr = {"format": FORMAT_NAME, "version": FORMAT_VERSION,
           "provenance": {"method": method, **provenance}}
    if name:
        hdr["name"] = name
    if model:
        hdr["model"] = dict(model)
    return hdr
