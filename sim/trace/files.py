"""Trace files: read and write a :class:`~sim.trace.format.Trace` as ``.yaml`` (here) or
``.npz`` (columns laid out by :mod:`sim.trace.npz`).

Reading validates once (:func:`sim.trace.format.validate`), so every error
names the file, the dotted field, the value and what was expected; writing
validates first and replaces the file whole or not at all.
"""

from __future__ import annotations

import os
import tempfile

import numpy as np

from .. import yamlio
from ..errors import NO_VALUE, TraceError, closest
from .format import (FORMAT_VERSION, MAX_HEADS, MAX_KEPT_ROWS, MAX_POSITIONS, MAX_STEPS, STEP_KEYS,
                     STEP_KEYS_V1, Trace, check_version, make_step, validate)
from .npz import ZIP_MAGIC, read_npz, to_arrays


# --------------------------------------------------------------------------
# Reading

def load_trace(path: str | os.PathLike) -> Trace:
    """Read and validate a trace from ``.npz`` or ``.yaml``/``.yml``."""
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    yamlio.check_file(path, TraceError, "trace")  # a missing file, a folder or a device first
    if ext not in (".npz", ".yaml", ".yml"):
        raise TraceError(path, "<file>", ext, "expected a .npz or .yaml trace")
    if ext == ".npz":
        head = _head(path)
        if not head.startswith(ZIP_MAGIC):
            kind = yamlio.kind_of_bytes(head) or _text_kind(head)
            raise TraceError(path, "<file>", NO_VALUE, f"this looks like {kind}, not an .npz trace (a zip archive)")
        return validate(read_npz(path))
    return _read_yaml(path)  # validated there, so errors get their lines


def _head(path, n=4096):
    with open(path, "rb") as fh:
        return fh.read(n)


def _text_kind(head):
    """What a text file that should have been an .npz looks like."""
    try:
        doc = yamlio.parse_text(head.decode("utf-8"), "<head>", TraceError, want_lines=False).data
    except (TraceError, UnicodeDecodeError):
        return "a text file"
    return yamlio.guess_kind(doc) or "a text file"


def _read_yaml(path):
    ydoc = yamlio.read_mapping_doc(path, TraceError, "expected a mapping with 'header' and 'steps'",
                                   what="YAML trace", max_bytes=yamlio.MAX_TRACE_BYTES)
    kind = yamlio.guess_kind(ydoc.data)
    if kind not in (None, "an attention trace"):
        raise TraceError(path, "<file>", NO_VALUE, f"this looks like {kind}, not an attention trace")
    try:
        trace = _trace_of(path, ydoc.data)
        return validate(trace)
    except TraceError as exc:
        raise yamlio.locate(exc, ydoc) from None


def _trace_of(path, doc):
    for key in doc:
        if key not in ("header", "steps"):
            raise TraceError(path, key, doc[key], "unknown key" + closest(key, ("header", "steps")))
    header = doc.get("header")
    if not isinstance(header, dict):
        raise TraceError(path, "header", header, "expected a mapping")
    version = check_version(path, header)
    allowed = STEP_KEYS if version >= 2 else STEP_KEYS_V1
    raw_steps = doc.get("steps")
    if not isinstance(raw_steps, list):
        raise TraceError(path, "steps", raw_steps, "expected a list of attention steps")
    if len(raw_steps) > MAX_STEPS:
        raise TraceError(path, "steps", len(raw_steps), f"expected at most {MAX_STEPS:,} steps")
    steps = [_yaml_step(path, f"steps[{i}]", raw, allowed) for i, raw in enumerate(raw_steps)]
    return Trace(header, steps, path, version)


def _yaml_step(path, at, raw, allowed):
    if not isinstance(raw, dict):
        raise TraceError(path, at, raw, "expected a mapping")
    for key in raw:
        if key not in allowed:
            if key in STEP_KEYS:
                raise TraceError(path, f"{at}.{key}", raw[key],
                                 "not a version-1 field (format version 2 adds it: set header.version: 2)")
            raise TraceError(path, f"{at}.{key}", raw[key], "unknown step key" + closest(key, STEP_KEYS))
    for key in ("layer", "stage", "head_dim", "heads", "q_rows", "kv_rows"):
        if key not in raw:
            raise TraceError(path, f"{at}.{key}", None, "required field is missing")
    for key in ("layer", "head_dim", "q_rows", "kv_rows", "heads", "kept_k", "kept_v", "lsb_rows",
                "kept_v_idx", "request", "kv_heads", "window", "kv_kept_k", "new_kv_rows", "out_rows"):
        # numpy would quietly truncate 1.5 to 1 (or overflow past 2**63); refuse it here instead
        if key in raw and not _all_whole(raw[key]):
            raise TraceError(path, f"{at}.{key}", raw[key], f"expected whole numbers below {MAX_POSITIONS:,}")
    if not isinstance(raw["stage"], str):
        raise TraceError(path, f"{at}.stage", raw["stage"], "expected 'prefill' or 'decode'")
    # counts stand for 0..n-1 and are built before validation: bound them first
    for key, limit in (("heads", MAX_HEADS), ("kept_k", MAX_KEPT_ROWS)):
        if isinstance(raw.get(key), int) and not 0 <= raw[key] <= limit:
            raise TraceError(path, f"{at}.{key}", raw[key], f"expected a count in [0, {limit:,}] or a list")
    if isinstance(raw.get("kept_k"), int) and raw["kept_k"] > raw["kv_rows"]:
        raise TraceError(path, f"{at}.kept_k", raw["kept_k"], f"expected at most kv_rows={raw['kv_rows']}")
    for j, rows in enumerate(raw.get("kv_kept_k") or []):
        if isinstance(rows, int) and not 0 <= rows <= min(MAX_KEPT_ROWS, raw["kv_rows"]):
            raise TraceError(path, f"{at}.kv_kept_k[{j}]", rows, "expected a count in [0, kv_rows] or a list")
    for key in ("kept_v_idx", "kv_kept_k", "token_scores", "head_scores"):
        if key in raw and raw[key] is not None and not isinstance(raw[key], list):
            raise TraceError(path, f"{at}.{key}", raw[key], "expected a list")
    for key in ("token_scores", "head_scores"):
        if isinstance(raw.get(key), list) and not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) for v in raw[key]):
            raise TraceError(path, f"{at}.{key}", raw[key], "expected a list of numbers")
    if "causal" in raw and not isinstance(raw["causal"], bool):
        raise TraceError(path, f"{at}.causal", raw["causal"], "expected true or false")
    try:
        return make_step(**raw)
    except (TypeError, ValueError, OverflowError) as exc:
        raise TraceError(path, at, NO_VALUE, f"fields of the wrong kind ({exc})") from None


def _all_whole(value):
    if isinstance(value, list):
        return all(_all_whole(v) for v in value)
    return isinstance(value, int) and not isinstance(value, bool) and -MAX_POSITIONS <= value <= MAX_POSITIONS


# --------------------------------------------------------------------------
# Writing


def save_trace(trace: Trace, path: str | os.PathLike) -> str:
    """Validate and write a trace (format version 2); the file appears whole or not at all."""
    trace.source = os.fspath(path)
    validate(trace)
    ext = os.path.splitext(trace.source)[1].lower()
    folder = os.path.dirname(os.path.abspath(trace.source))
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".tmp-", suffix=ext)
    os.close(fd)
    try:
        if ext == ".npz":
            with open(tmp, "wb") as fh:
                np.savez_compressed(fh, **to_arrays(trace))
        elif ext in (".yaml", ".yml"):
            with open(tmp, "w", encoding="utf-8") as fh:
                yamlio.dump(_to_yaml_doc(trace), fh, default_flow_style=None, width=100)
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
    trace.file_version = FORMAT_VERSION
    return trace.source


def _rows_yaml(rows):
    """A contiguous 0..n-1 row set as the count n, else the positions."""
    n = len(rows)
    return n if rows[0] == 0 and rows[-1] == n - 1 else rows.tolist()


def _to_yaml_doc(trace):
    steps = []
    for s in trace.steps:
        d = {"layer": s.layer, "stage": s.stage, "head_dim": s.head_dim, "heads": s.heads.tolist(),
             "q_rows": s.q_rows, "kv_rows": s.kv_rows, "kept_k": _rows_yaml(s.kept_k),
             "kept_v": s.kept_v.tolist(), "lsb_rows": s.lsb_rows.tolist()}
        if s.kept_v_idx is not None:
            d["kept_v_idx"] = [a.tolist() for a in s.kept_v_idx]
        if s.token_scores is not None:
            d["token_scores"] = [float(x) for x in s.token_scores]
        if s.head_scores is not None:
            d["head_scores"] = [float(x) for x in s.head_scores]
        # version-2 fields only where they differ from their defaults
        if s.request:
            d["request"] = int(s.request)
        if not np.array_equal(s.kv_heads, s.heads):
            d["kv_heads"] = s.kv_heads.tolist()
        if s.causal:
            d["causal"] = True
        if s.window:
            d["window"] = int(s.window)
        if s.kv_kept_k is not None:
            d["kv_kept_k"] = [_rows_yaml(a) for a in s.kv_kept_k]
        if s.new_kv_rows:
            d["new_kv_rows"] = int(s.new_kv_rows)
        if s.out_rows:
            d["out_rows"] = int(s.out_rows)
        steps.append(d)
    header = dict(trace.header, version=FORMAT_VERSION)
    return {"header": header, "steps": steps}
