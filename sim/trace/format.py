"""Attention trace: what the workload asked of the datapath, step by step.

A trace is a header (format version, provenance, optional model shape and
fidelity figures) and a list of :class:`Step`. One step is one layer of one
forward pass: for every active head, ``q_rows`` query rows against the kept key
rows. Two encodings share one schema:

* ``.npz`` -- columnar arrays plus a JSON header stored as bytes; read with
  ``allow_pickle=False``. For captured and long synthetic traces.
* ``.yaml`` -- a ``header`` mapping and a ``steps`` list. For hand-written ones.

Validation happens on load, once; the engine trusts a loaded :class:`Trace`.
"""

import dataclasses
import hashlib
import json
import os
import tempfile

import numpy as np
import yaml

from ..errors import TraceError, closest

FORMAT_NAME = "attnsim-trace"
FORMAT_VERSION = 1
STAGES = ("prefill", "decode")

STEP_KEYS = ("layer", "stage", "head_dim", "heads", "q_rows", "kv_rows", "kept_k",
             "kept_v", "kept_v_idx", "lsb_rows", "token_scores", "head_scores")
HEADER_KEYS = ("format", "version", "name", "provenance", "model", "fidelity", "notes")

# libyaml's safe loader and dumper when present (same documents, many times faster)
_YAML_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
_YAML_DUMPER = getattr(yaml, "CSafeDumper", yaml.SafeDumper)


@dataclasses.dataclass
class Step:
    """One attention step (one layer of one forward pass).

    ``heads``: ids of the active heads. ``kept_k``: sorted positions of the
    kept key rows (shared by all heads; cascade token pruning). ``kept_v``:
    per active head, how many V rows value pruning kept; ``kept_v_idx``
    optionally gives those positions per head. ``lsb_rows``: per active head,
    how many query rows needed the least-significant key plane (progressive
    quantization). ``token_scores`` / ``head_scores``: importance scores the
    top-k selector ranks after this layer, when the trace carries them.
    """

    layer: int
    stage: str
    head_dim: int
    heads: np.ndarray
    q_rows: int
    kv_rows: int
    kept_k: np.ndarray
    kept_v: np.ndarray
    lsb_rows: np.ndarray
    kept_v_idx: list = None
    token_scores: np.ndarray = None
    head_scores: np.ndarray = None

    @property
    def n_heads(self):
        return int(len(self.heads))

    @property
    def n_kept_k(self):
        return int(len(self.kept_k))

    def macs(self):
        """q.K and p.V MACs of this step (1 MAC = one multiply-accumulate)."""
        qk = self.n_heads * self.q_rows * self.n_kept_k * self.head_dim
        pv = int(self.q_rows * int(np.sum(self.kept_v)) * self.head_dim)
        return qk, pv


@dataclasses.dataclass
class Trace:
    """A validated attention trace: header plus steps."""

    header: dict
    steps: list
    source: str = "<memory>"

    @property
    def name(self):
        return self.header.get("name", os.path.basename(self.source))

    def digest(self):
        """SHA-256 over the canonical content (independent of the encoding)."""
        h = hashlib.sha256()
        h.update(json.dumps(self.header, sort_keys=True, default=str).encode())
        for s in self.steps:
            h.update(json.dumps([s.layer, s.stage, s.head_dim, s.q_rows, s.kv_rows]).encode())
            for arr in (s.heads, s.kept_k, s.kept_v, s.lsb_rows):
                h.update(np.ascontiguousarray(arr, dtype=np.int64).tobytes())
            if s.kept_v_idx is not None:
                for arr in s.kept_v_idx:
                    h.update(b"|" + np.ascontiguousarray(arr, dtype=np.int64).tobytes())
            for arr in (s.token_scores, s.head_scores):
                if arr is not None:
                    # at the precision the .npz stores, so every encoding hashes alike
                    h.update(b"#" + np.ascontiguousarray(arr, dtype=np.float32).tobytes())
        return h.hexdigest()

    def summary(self):
        """Totals a person reads first (used by ``attnsim trace info``)."""
        stages = {st: [s for s in self.steps if s.stage == st] for st in STAGES}
        qk = pv = 0
        for s in self.steps:
            a, b = s.macs()
            qk += a
            pv += b
        dense_k = sum(s.kv_rows * s.n_heads for s in self.steps)
        kept_k = sum(s.n_kept_k * s.n_heads for s in self.steps)
        kept_v = sum(int(np.sum(s.kept_v)) for s in self.steps)
        lsb_heads = sum(int(np.count_nonzero(s.lsb_rows)) for s in self.steps)
        head_steps = sum(s.n_heads for s in self.steps)
        return {
            "name": self.name,
            "version": self.header.get("version"),
            "provenance": self.header.get("provenance", {}),
            "steps": len(self.steps),
            "prefill_steps": len(stages["prefill"]),
            "decode_steps": len(stages["decode"]),
            "layers": len({s.layer for s in self.steps}),
            "head_steps": head_steps,
            "macs_qk": qk,
            "macs_pv": pv,
            "kept_key_fraction": kept_k / dense_k if dense_k else 1.0,
            "kept_value_fraction": kept_v / kept_k if kept_k else 1.0,
            "lsb_refetch_head_fraction": lsb_heads / head_steps if head_steps else 0.0,
            "head_dims": sorted({s.head_dim for s in self.steps}),
            "max_kv_rows": max((s.kv_rows for s in self.steps), default=0),
            "max_q_rows": max((s.q_rows for s in self.steps), default=0),
            "token_score_steps": sum(s.token_scores is not None for s in self.steps),
            "head_score_steps": sum(s.head_scores is not None for s in self.steps),
            "digest": self.digest(),
        }


def make_step(layer, stage, head_dim, heads, q_rows, kv_rows, kept_k=None, kept_v=None,
              lsb_rows=None, kept_v_idx=None, token_scores=None, head_scores=None):
    """Build a Step from plain values, filling the defaults (no pruning).

    ``heads`` may be a count (heads 0..n-1) or ids; ``kept_k`` a count (rows
    0..n-1), a list of positions, or None (all ``kv_rows``). Not validated:
    pass the result through :func:`validate` (``Trace`` writers do).
    """
    heads = np.arange(heads, dtype=np.int64) if np.isscalar(heads) else np.asarray(heads, dtype=np.int64)
    if kept_k is None:
        kept_k = np.arange(kv_rows, dtype=np.int64)
    elif np.isscalar(kept_k):
        kept_k = np.arange(int(kept_k), dtype=np.int64)
    else:
        kept_k = np.asarray(kept_k, dtype=np.int64)
    n = len(heads)
    # a single number applies to every head; a list is kept as given, so a
    # wrong length reaches validate() and is reported against its field
    kept_v = np.full(n, len(kept_k), dtype=np.int64) if kept_v is None else _per_head(kept_v, n)
    lsb_rows = np.zeros(n, dtype=np.int64) if lsb_rows is None else _per_head(lsb_rows, n)
    if kept_v_idx is not None:
        kept_v_idx = [np.asarray(a, dtype=np.int64) for a in kept_v_idx]
    if token_scores is not None:
        token_scores = np.asarray(token_scores, dtype=np.float64)
    if head_scores is not None:
        head_scores = np.asarray(head_scores, dtype=np.float64)
    return Step(int(layer), str(stage), int(head_dim), heads, int(q_rows), int(kv_rows), kept_k,
                kept_v, lsb_rows, kept_v_idx, token_scores, head_scores)


def _per_head(value, n):
    if np.isscalar(value):
        return np.full(n, value, dtype=np.int64)
    return np.asarray(value, dtype=np.int64)


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
        raise TraceError(src, "header.version", hdr.get("version"),
                         f"unknown trace format version; this attnsim reads version {FORMAT_VERSION}")
    if not isinstance(hdr.get("provenance"), dict) or not hdr["provenance"].get("method"):
        raise TraceError(src, "header.provenance", hdr.get("provenance"),
                         "expected a mapping with at least 'method' (how the trace was made)")
    model = hdr.get("model") or {}
    if not isinstance(model, dict):
        raise TraceError(src, "header.model", model, "expected a mapping (layers, heads, head_dim)")
    if not trace.steps:
        raise TraceError(src, "steps", [], "expected at least one attention step")
    for i, s in enumerate(trace.steps):
        _validate_step(src, f"steps[{i}]", s, model)
    _validate_cascade(src, trace.steps)
    return trace


def _int_ok(v, low):
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= low


def _validate_step(src, at, s, model):
    if not _int_ok(s.layer, 0):
        raise TraceError(src, f"{at}.layer", s.layer, "expected a whole number >= 0")
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
    h = s.heads
    if h.ndim != 1 or len(h) == 0:
        raise TraceError(src, f"{at}.heads", h.tolist(), "expected at least one active head id")
    if np.any(h < 0) or len(np.unique(h)) != len(h):
        raise TraceError(src, f"{at}.heads", h.tolist(), "expected distinct head ids >= 0")
    if "heads" in model and np.any(h >= model["heads"]):
        raise TraceError(src, f"{at}.heads", h.tolist(), f"expected head ids < header.model.heads={model['heads']}")
    k = s.kept_k
    if k.ndim != 1 or len(k) == 0:
        raise TraceError(src, f"{at}.kept_k", k.tolist()[:8], "expected at least one kept key row")
    if k[0] < 0 or k[-1] >= s.kv_rows or np.any(np.diff(k) <= 0):
        bad = k[(k < 0) | (k >= s.kv_rows)]
        shown = bad[:4].tolist() if len(bad) else k[:8].tolist()
        raise TraceError(src, f"{at}.kept_k", shown,
                         f"expected sorted distinct row indices in [0, kv_rows={s.kv_rows})")
    if s.stage == "prefill" and s.q_rows != len(k):
        raise TraceError(src, f"{at}.q_rows", s.q_rows,
                         f"a prefill step has one query row per live token: expected {len(k)} (len of kept_k)")
    for name in ("kept_v", "lsb_rows"):
        arr = getattr(s, name)
        if arr.shape != h.shape:
            raise TraceError(src, f"{at}.{name}", arr.tolist()[:8],
                             f"expected one entry per active head ({len(h)})")
    if np.any(s.kept_v < 1) or np.any(s.kept_v > len(k)):
        raise TraceError(src, f"{at}.kept_v", s.kept_v.tolist()[:8],
                         f"expected counts in [1, {len(k)}] (kept key rows)")
    if np.any(s.lsb_rows < 0) or np.any(s.lsb_rows > s.q_rows):
        raise TraceError(src, f"{at}.lsb_rows", s.lsb_rows.tolist()[:8],
                         f"expected counts in [0, q_rows={s.q_rows}]")
    if s.kept_v_idx is not None:
        if len(s.kept_v_idx) != len(h):
            raise TraceError(src, f"{at}.kept_v_idx", len(s.kept_v_idx),
                             f"expected one index list per active head ({len(h)})")
        for j, idx in enumerate(s.kept_v_idx):
            if len(idx) != s.kept_v[j]:
                raise TraceError(src, f"{at}.kept_v_idx[{j}]", len(idx), f"expected kept_v[{j}]={int(s.kept_v[j])} indices")
        # all heads at once: membership in kept_k by binary search, order by diff
        flat = np.concatenate(s.kept_v_idx)
        pos = np.minimum(np.searchsorted(k, flat), len(k) - 1)
        good = k[pos] == flat
        rising = np.diff(flat) > 0
        starts = np.cumsum(s.kept_v)[:-1]  # a new head may start lower
        rising[starts[starts < len(flat)] - 1] = True
        if not (good.all() and rising.all()):
            first = min(np.flatnonzero(~good)[:1].tolist() + (np.flatnonzero(~rising)[:1] + 1).tolist())
            j = int(np.searchsorted(np.cumsum(s.kept_v), first, side="right"))
            idx = s.kept_v_idx[j]
            raise TraceError(src, f"{at}.kept_v_idx[{j}]", idx[:8].tolist(),
                             "expected sorted distinct positions drawn from kept_k")
    if s.token_scores is not None:
        if s.token_scores.shape != k.shape or not np.all(np.isfinite(s.token_scores)):
            raise TraceError(src, f"{at}.token_scores", s.token_scores.shape,
                             f"expected {len(k)} finite scores (one per kept key row)")
    if s.head_scores is not None:
        if s.head_scores.shape != h.shape or not np.all(np.isfinite(s.head_scores)):
            raise TraceError(src, f"{at}.head_scores", s.head_scores.shape,
                             f"expected {len(h)} finite scores (one per active head)")


def _validate_cascade(src, steps):
    """Within one prefill pass, pruned tokens and heads never come back."""
    for i in range(1, len(steps)):
        a, b = steps[i - 1], steps[i]
        if a.stage == b.stage == "prefill" and b.layer == a.layer + 1 and a.kv_rows == b.kv_rows:
            if not np.isin(b.kept_k, a.kept_k).all():
                back = b.kept_k[~np.isin(b.kept_k, a.kept_k)][:4].tolist()
                raise TraceError(src, f"steps[{i}].kept_k", back,
                                 f"cascade pruning: rows pruned at steps[{i - 1}] cannot return")
            if not np.isin(b.heads, a.heads).all():
                back = b.heads[~np.isin(b.heads, a.heads)][:4].tolist()
                raise TraceError(src, f"steps[{i}].heads", back,
                                 f"cascade pruning: heads pruned at steps[{i - 1}] cannot return")


# --------------------------------------------------------------------------
# Reading


def load_trace(path):
    """Read and validate a trace from ``.npz`` or ``.yaml``/``.yml``."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise TraceError(path, "<file>", path, "file not found")
    ext = os.path.splitext(path)[1].lower()
    if ext == ".npz":
        trace = _read_npz(path)
    elif ext in (".yaml", ".yml"):
        trace = _read_yaml(path)
    else:
        raise TraceError(path, "<file>", ext, "expected a .npz or .yaml trace")
    return validate(trace)


def _read_yaml(path):
    try:
        with open(path, encoding="utf-8") as fh:
            doc = yaml.load(fh, Loader=_YAML_LOADER)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark else "<file>"
        raise TraceError(path, where, "...", f"not valid YAML ({getattr(exc, 'problem', exc)})") from None
    if not isinstance(doc, dict):
        raise TraceError(path, "<root>", type(doc).__name__, "expected a mapping with 'header' and 'steps'")
    for key in doc:
        if key not in ("header", "steps"):
            raise TraceError(path, key, doc[key], "unknown key" + closest(key, ("header", "steps")))
    header = doc.get("header")
    if not isinstance(header, dict):
        raise TraceError(path, "header", header, "expected a mapping")
    raw_steps = doc.get("steps")
    if not isinstance(raw_steps, list):
        raise TraceError(path, "steps", raw_steps, "expected a list of attention steps")
    steps = []
    for i, raw in enumerate(raw_steps):
        at = f"steps[{i}]"
        if not isinstance(raw, dict):
            raise TraceError(path, at, raw, "expected a mapping")
        for key in raw:
            if key not in STEP_KEYS:
                raise TraceError(path, f"{at}.{key}", raw[key], "unknown step key" + closest(key, STEP_KEYS))
        for key in ("layer", "stage", "head_dim", "heads", "q_rows", "kv_rows"):
            if key not in raw:
                raise TraceError(path, f"{at}.{key}", None, "required field is missing")
        for key in ("layer", "head_dim", "q_rows", "kv_rows", "heads", "kept_k", "kept_v",
                    "lsb_rows", "kept_v_idx"):
            # numpy would quietly truncate 1.5 to 1; refuse it here instead
            if key in raw and not _all_whole(raw[key]):
                raise TraceError(path, f"{at}.{key}", raw[key], "expected whole numbers")
        try:
            step = make_step(**raw)
        except (TypeError, ValueError) as exc:
            raise TraceError(path, at, raw, f"fields of the wrong kind ({exc})") from None
        steps.append(step)
    return Trace(header, steps, path)


def _all_whole(value):
    if isinstance(value, list):
        return all(_all_whole(v) for v in value)
    return isinstance(value, int) and not isinstance(value, bool)


def _read_npz(path):
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except ValueError as exc:
        raise TraceError(path, "<file>", "...", f"not a plain-array .npz ({exc})") from None
    except Exception as exc:  # zip or format damage
        raise TraceError(path, "<file>", "...", f"cannot read as .npz ({exc})") from None
    if "header" not in arrays:
        raise TraceError(path, "header", None, "missing JSON header array")
    try:
        header = json.loads(arrays.pop("header").tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise TraceError(path, "header", "...", f"not valid JSON ({exc})") from None
    if not isinstance(header, dict):
        raise TraceError(path, "header", header, "expected a JSON object")
    if header.get("version") != FORMAT_VERSION:
        # refuse before trying to interpret arrays of an unknown layout
        raise TraceError(path, "header.version", header.get("version"),
                         f"unknown trace format version; this attnsim reads version {FORMAT_VERSION}")
    need = ("layer", "stage", "head_dim", "q_rows", "kv_rows", "heads", "heads_off", "kept_k",
            "kept_k_off", "kept_v", "lsb_rows")
    for key in need:
        if key not in arrays:
            raise TraceError(path, key, None, "missing array in the .npz")
    a = arrays
    _check_npz_layout(path, a)
    n = len(a["layer"])
    ho = a["heads_off"]
    ko = a["kept_k_off"]
    vio = a.get("kept_v_idx_off")
    tso = a.get("token_scores_off")
    steps = []
    for i in range(n):
        h0, h1 = int(ho[i]), int(ho[i + 1])
        k0, k1 = int(ko[i]), int(ko[i + 1])
        kv_idx = None
        if vio is not None and vio[h1] > vio[h0]:
            kv_idx = [a["kept_v_idx"][int(vio[j]):int(vio[j + 1])].astype(np.int64) for j in range(h0, h1)]
        ts = None
        if tso is not None and tso[i + 1] > tso[i]:
            ts = a["token_scores"][int(tso[i]):int(tso[i + 1])].astype(np.float64)
        hs = None
        if "head_scores" in a:
            seg = a["head_scores"][h0:h1].astype(np.float64)
            if not np.all(np.isnan(seg)):
                hs = seg
        stage_code = int(a["stage"][i])
        stage = STAGES[stage_code] if 0 <= stage_code < len(STAGES) else f"<code {stage_code}>"
        steps.append(Step(int(a["layer"][i]), stage, int(a["head_dim"][i]),
                          a["heads"][h0:h1].astype(np.int64), int(a["q_rows"][i]), int(a["kv_rows"][i]),
                          a["kept_k"][k0:k1].astype(np.int64), a["kept_v"][h0:h1].astype(np.int64),
                          a["lsb_rows"][h0:h1].astype(np.int64), kv_idx, ts, hs))
    return Trace(header, steps, path)


def _check_npz_layout(path, a):
    """Array kinds, lengths and offsets agree, so slicing cannot go wrong."""
    for key, arr in a.items():
        if arr.ndim != 1:
            raise TraceError(path, key, arr.shape, "expected a one-dimensional array")
        want = "f" if key in ("token_scores", "head_scores") else "iu"
        if arr.dtype.kind not in want and not (want == "f" and arr.dtype.kind in "iu"):
            raise TraceError(path, key, str(arr.dtype),
                             "expected " + ("numbers" if want == "f" else "whole numbers"))
    n = len(a["layer"])
    for key in ("stage", "head_dim", "q_rows", "kv_rows"):
        if len(a[key]) != n:
            raise TraceError(path, key, len(a[key]), f"expected {n} entries (one per step, as layer)")

    def offsets(key, count, values):
        off = a[key]
        if len(off) != count + 1:
            raise TraceError(path, key, len(off), f"expected {count + 1} offsets")
        if off[0] != 0 or np.any(np.diff(off) < 0) or off[-1] != len(a[values]):
            raise TraceError(path, key, off[:8].tolist(),
                             f"expected rising offsets from 0 to len({values})={len(a[values])}")

    offsets("heads_off", n, "heads")
    offsets("kept_k_off", n, "kept_k")
    total_heads = len(a["heads"])
    for key in ("kept_v", "lsb_rows", "head_scores"):
        if key in a and len(a[key]) != total_heads:
            raise TraceError(path, key, len(a[key]),
                             f"expected {total_heads} entries (one per head-step, as heads)")
    for values, key, count in (("kept_v_idx", "kept_v_idx_off", total_heads),
                               ("token_scores", "token_scores_off", n)):
        if (values in a) != (key in a):
            missing = key if values in a else values
            raise TraceError(path, missing, None, f"missing array in the .npz (needed with {values})")
        if key in a:
            offsets(key, count, values)


# --------------------------------------------------------------------------
# Writing


def new_header(method, name=None, model=None, **provenance):
    """A header for a trace made by ``method`` (``synth``, ``capture``, ``hand``...)."""
    hdr = {"format": FORMAT_NAME, "version": FORMAT_VERSION,
           "provenance": {"method": method, **provenance}}
    if name:
        hdr["name"] = name
    if model:
        hdr["model"] = dict(model)
    return hdr


def save_trace(trace, path):
    """Validate and write a trace; the file appears whole or not at all."""
    trace.source = os.fspath(path)
    validate(trace)
    ext = os.path.splitext(trace.source)[1].lower()
    folder = os.path.dirname(os.path.abspath(trace.source))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".tmp-", suffix=ext)
    os.close(fd)
    try:
        if ext == ".npz":
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, **_to_arrays(trace))
        elif ext in (".yaml", ".yml"):
            with open(tmp, "w", encoding="utf-8") as fh:
                yaml.dump(_to_yaml_doc(trace), fh, Dumper=_YAML_DUMPER, sort_keys=False,
                          default_flow_style=None, width=100)
        else:
            raise TraceError(trace.source, "<file>", ext, "expected a .npz or .yaml trace")
        # mkstemp makes the file private; give it the permissions open() would
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, trace.source)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return trace.source


def _to_arrays(trace):
    st = trace.steps
    cat = lambda parts, dt: np.concatenate(parts).astype(dt) if parts else np.zeros(0, dt)  # noqa: E731
    offs = lambda parts: np.concatenate([[0], np.cumsum([len(p) for p in parts])]).astype(np.int64)  # noqa: E731
    heads = [s.heads for s in st]
    kept = [s.kept_k for s in st]
    vidx = []
    for s in st:
        for j in range(s.n_heads):
            vidx.append(s.kept_v_idx[j] if s.kept_v_idx is not None else np.zeros(0, np.int64))
    ts = [s.token_scores if s.token_scores is not None else np.zeros(0) for s in st]
    hs = [s.head_scores if s.head_scores is not None else np.full(s.n_heads, np.nan) for s in st]
    return {
        "header": np.frombuffer(json.dumps(trace.header, sort_keys=True).encode("utf-8"), dtype=np.uint8),
        "layer": np.array([s.layer for s in st], np.int32),
        "stage": np.array([STAGES.index(s.stage) for s in st], np.int8),
        "head_dim": np.array([s.head_dim for s in st], np.int32),
        "q_rows": np.array([s.q_rows for s in st], np.int64),
        "kv_rows": np.array([s.kv_rows for s in st], np.int64),
        "heads": cat(heads, np.int32), "heads_off": offs(heads),
        "kept_k": cat(kept, np.int64), "kept_k_off": offs(kept),
        "kept_v": cat([s.kept_v for s in st], np.int64),
        "lsb_rows": cat([s.lsb_rows for s in st], np.int64),
        "kept_v_idx": cat(vidx, np.int64), "kept_v_idx_off": offs(vidx),
        "token_scores": cat(ts, np.float32), "token_scores_off": offs(ts),
        "head_scores": cat(hs, np.float32),
    }


def _to_yaml_doc(trace):
    steps = []
    for s in trace.steps:
        contiguous = s.kept_k[0] == 0 and s.kept_k[-1] == len(s.kept_k) - 1
        d = {"layer": s.layer, "stage": s.stage, "head_dim": s.head_dim, "heads": s.heads.tolist(),
             "q_rows": s.q_rows, "kv_rows": s.kv_rows,
             "kept_k": len(s.kept_k) if contiguous else s.kept_k.tolist(),
             "kept_v": s.kept_v.tolist(), "lsb_rows": s.lsb_rows.tolist()}
        if s.kept_v_idx is not None:
            d["kept_v_idx"] = [a.tolist() for a in s.kept_v_idx]
        if s.token_scores is not None:
            d["token_scores"] = [float(x) for x in s.token_scores]
        if s.head_scores is not None:
            d["head_scores"] = [float(x) for x in s.head_scores]
        steps.append(d)
    return {"header": trace.header, "steps": steps}
