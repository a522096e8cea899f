"""The ``.npz`` encoding of a trace: steps stored column by column.

``n`` steps, ``H`` head-steps (active query heads summed over steps). Per-step
and per-head-step columns are plain arrays; variable-length parts are
concatenated with offsets (the segment of step ``i`` is
``values[off[i]:off[i + 1]]``).

Kept key positions live in one **row pool** (``kept_k``): each step's kept
rows are the slice ``kept_k[kept_k_lo[i]:kept_k_hi[i]]``, and slices may
overlap. A writer stores each run of rows that steps share once -- every step
of a long dense decode is a prefix of one ``0..n-1`` run, the decode steps of
one layer are prefixes of that layer's kept rows -- so a 128k-token context
over hundreds of steps costs one pool, on disk and again in memory after
reading (the reader hands out views of the pool). Per-KV-head kept rows
(``kv_kept_k``) are slices of the same pool.

Version 1 stored ``kept_k`` with ``kept_k_off`` (plain segments, no sharing)
and had no version-2 columns; it reads with their defaults.
"""

import json
import zipfile

import numpy as np

from ..errors import NO_VALUE, TraceError
from .format import FORMAT_VERSION, STAGES, Step, Trace, check_version

ZIP_MAGIC = b"PK"
MAX_ARRAY_BYTES = 2 << 30       # all arrays of one trace together, in memory
MAX_HEADER_BYTES = 16 << 20     # the JSON header member

# version-1 columns every file has; version 2 adds the rest of REQUIRED_V2
REQUIRED_V1 = ("layer", "stage", "head_dim", "q_rows", "kv_rows", "heads", "heads_off", "kept_k",
               "kept_k_off", "kept_v", "lsb_rows")
REQUIRED_V2 = ("layer", "stage", "head_dim", "q_rows", "kv_rows", "heads", "heads_off", "kept_k",
               "kept_k_lo", "kept_k_hi", "kept_v", "lsb_rows", "kv_heads", "request", "causal", "window",
               "new_kv_rows", "out_rows")
PER_STEP = ("stage", "head_dim", "q_rows", "kv_rows", "request", "causal", "window", "new_kv_rows",
            "out_rows", "kept_k_lo", "kept_k_hi")
PER_HEAD_STEP = ("kept_v", "lsb_rows", "head_scores", "kv_heads")
OPTIONAL = ("kept_v_idx", "kept_v_idx_off", "token_scores", "token_scores_off", "head_scores",
            "kv_kept_k_lo", "kv_kept_k_hi", "kv_kept_k_off")
KNOWN = frozenset(("header",) + REQUIRED_V1 + REQUIRED_V2 + OPTIONAL)
FLOAT_MEMBERS = ("token_scores", "head_scores")


# --------------------------------------------------------------------------
# Writing


def to_arrays(trace):
    """The named arrays of the version-2 ``.npz`` of a (validated) trace."""
    st = trace.steps
    pool = _RowPool()
    k_sets = [pool.add(s.kept_k) for s in st]
    kv_sets, kv_off = [], [0]
    for s in st:
        kv_sets.extend(pool.add(a) for a in (s.kv_kept_k or ()))
        kv_off.append(len(kv_sets))
    rows = pool.array()
    heads = [s.heads for s in st]
    vidx = []
    for s in st:
        for j in range(s.n_heads):
            vidx.append(s.kept_v_idx[j] if s.kept_v_idx is not None else np.zeros(0, np.int64))
    ts = [s.token_scores if s.token_scores is not None else np.zeros(0) for s in st]
    hs = [s.head_scores if s.head_scores is not None else np.full(s.n_heads, np.nan) for s in st]
    header = dict(trace.header, version=FORMAT_VERSION)
    arrays = {
        "header": np.frombuffer(json.dumps(header, sort_keys=True).encode("utf-8"), dtype=np.uint8),
        "layer": np.array([s.layer for s in st], np.int32),
        "stage": np.array([STAGES.index(s.stage) for s in st], np.int8),
        "head_dim": np.array([s.head_dim for s in st], np.int32),
        "q_rows": np.array([s.q_rows for s in st], np.int64),
        "kv_rows": np.array([s.kv_rows for s in st], np.int64),
        "request": np.array([s.request for s in st], np.int64),
        "causal": np.array([bool(s.causal) for s in st], np.int8),
        "window": np.array([s.window for s in st], np.int64),
        "new_kv_rows": np.array([s.new_kv_rows for s in st], np.int64),
        "out_rows": np.array([s.out_rows for s in st], np.int64),
        "heads": _cat(heads, np.int32), "heads_off": _offsets(heads),
        "kv_heads": _cat([s.kv_heads for s in st], np.int32),
        "kept_k": rows, "kept_k_lo": pool.lo[k_sets], "kept_k_hi": pool.hi[k_sets],
        "kept_v": _cat([s.kept_v for s in st], np.int64),
        "lsb_rows": _cat([s.lsb_rows for s in st], np.int64),
        "kept_v_idx": _cat(vidx, np.int64), "kept_v_idx_off": _offsets(vidx),
        "token_scores": _cat(ts, np.float32), "token_scores_off": _offsets(ts),
        "head_scores": _cat(hs, np.float32),
    }
    if kv_sets:
        arrays["kv_kept_k_lo"] = pool.lo[kv_sets]
        arrays["kv_kept_k_hi"] = pool.hi[kv_sets]
        arrays["kv_kept_k_off"] = np.array(kv_off, np.int64)
    return arrays


def _cat(parts, dt):
    return np.concatenate(parts).astype(dt) if parts else np.zeros(0, dt)


def _offsets(parts):
    return np.concatenate([[0], np.cumsum([len(p) for p in parts])]).astype(np.int64)


class _RowPool:
    """Row sets laid end to end, each storage run written once.

    A row set that is a contiguous int64 view of a larger array (as synth and
    the reader make them) is placed by where it sits in that array, so every
    set viewing the same array shares one stretch of the pool.
    """

    def __init__(self):
        self._owners = {}   # id(owner) -> [owner, first used, end used]
        self._sets = []     # (owner id, start, stop) per added set, in owner coordinates

    def add(self, rows):
        rows = np.asarray(rows)
        owner, start = rows.base, None
        if (isinstance(owner, np.ndarray) and owner.ndim == 1 and owner.dtype == np.int64
                and owner.flags.c_contiguous and rows.dtype == np.int64 and rows.ndim == 1
                and rows.flags.c_contiguous):
            gap = rows.__array_interface__["data"][0] - owner.__array_interface__["data"][0]
            if gap % 8 == 0 and 0 <= gap // 8 <= len(owner) - len(rows):
                start = gap // 8
        if start is None:
            owner, start = np.ascontiguousarray(rows, dtype=np.int64), 0
        entry = self._owners.setdefault(id(owner), [owner, start, start + len(rows)])
        entry[1] = min(entry[1], start)
        entry[2] = max(entry[2], start + len(rows))
        self._sets.append((id(owner), start, start + len(rows)))
        return len(self._sets) - 1  # its slice of the pool is known after array()

    def array(self):
        """The pool; afterwards ``lo[i]:hi[i]`` is the slice of the i-th added set."""
        base, pos = {}, 0
        parts = []
        for key, (owner, first, end) in self._owners.items():
            base[key] = pos - first
            parts.append(owner[first:end])
            pos += end - first
        self.lo = np.array([base[k] + a for k, a, _ in self._sets], np.int64)
        self.hi = np.array([base[k] + b for k, _, b in self._sets], np.int64)
        return _cat(parts, np.int64)


# --------------------------------------------------------------------------
# Reading


def read_npz(path):
    """Read a version-1 or version-2 ``.npz`` trace (not yet validated).

    The member list and every array's declared dtype and shape are checked
    before any array is inflated, so an unknown member, an object array or a
    member that would inflate past :data:`MAX_ARRAY_BYTES` is refused by name.
    """
    arrays = _read_members(path)
    if "header" not in arrays:
        raise TraceError(path, "header", None, "missing JSON header array")
    try:
        header = json.loads(arrays.pop("header").tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise TraceError(path, "header", "...", f"not valid JSON ({exc})") from None
    if not isinstance(header, dict):
        raise TraceError(path, "header", header, "expected a JSON object")
    version = check_version(path, header)
    a = arrays
    for key in (REQUIRED_V1 if version == 1 else REQUIRED_V2):
        if key not in a:
            raise TraceError(path, key, None, f"missing array in the .npz (format version {version})")
    if version == 1:
        _upgrade_v1(a)
    _check_layout(path, a)
    return Trace(header, _steps(a), path, version)


def _read_members(path):
    """``{name: array}`` of the archive, each member checked from its .npy header first."""
    try:
        zf = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
        raise TraceError(path, "<file>", NO_VALUE, f"cannot read as a zip archive ({exc})") from None
    with zf:
        plan, total = [], 0
        infos = zf.infolist()
        if len(infos) > 4 * len(KNOWN):
            raise TraceError(path, "<file>", len(infos), f"expected at most {len(KNOWN)} members")
        names = set()
        for info in infos:
            member = info.filename
            if info.is_dir() or not member.endswith(".npy"):
                raise TraceError(path, member, NO_VALUE, "unexpected member of an .npz trace (only the "
                                 "trace's .npy arrays belong there)")
            name = member[:-4]
            if name not in KNOWN:
                raise TraceError(path, member, NO_VALUE, "unknown array in an .npz trace")
            if name in names:
                raise TraceError(path, member, NO_VALUE, "member appears twice in the archive")
            names.add(name)
            dtype, shape, header_len = _npy_header(path, zf, info)
            if dtype.hasobject or dtype.kind not in "iufb":
                raise TraceError(path, name, str(dtype), "expected a plain-array member (numbers, no objects)")
            if len(shape) != 1:
                raise TraceError(path, name, shape, "expected a one-dimensional array")
            need = int(shape[0]) * dtype.itemsize
            if info.file_size != header_len + need:
                raise TraceError(path, name, info.file_size, f"member size does not match its header "
                                 f"({shape[0]:,} x {dtype.itemsize} bytes after {header_len} header bytes)")
            if name == "header" and need > MAX_HEADER_BYTES:
                raise TraceError(path, name, need, f"expected a JSON header of at most {MAX_HEADER_BYTES:,} bytes")
            total += need
            if total > MAX_ARRAY_BYTES:
                raise TraceError(path, name, f"{shape[0]:,} x {dtype}",
                                 f"the arrays would take more than {MAX_ARRAY_BYTES / 2**30:g} GiB in memory; "
                                 "refused before inflating them")
            plan.append((name, info))
        arrays = {}
        for name, info in plan:
            try:
                with zf.open(info) as fh:
                    arrays[name] = np.lib.format.read_array(fh, allow_pickle=False)
            except (ValueError, OSError, EOFError, zipfile.BadZipFile, RuntimeError) as exc:
                raise TraceError(path, name, NO_VALUE, f"cannot read the array ({exc})") from None
    return arrays


def _npy_header(path, zf, info):
    """``(dtype, shape, header bytes)`` of one member, read without inflating its data."""
    try:
        with zf.open(info) as fh:
            version = np.lib.format.read_magic(fh)
            if version == (1, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
            elif version in ((2, 0), (3, 0)):
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
            else:
                raise ValueError(f"unknown .npy version {version}")
            header_len = fh.tell()
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, RuntimeError, SyntaxError) as exc:
        raise TraceError(path, info.filename, NO_VALUE, f"not a plain .npy array ({exc})") from None
    return dtype, shape, header_len


def _upgrade_v1(a):
    """Version-1 columns as version 2: segments become pool slices, new columns their defaults."""
    off = a.pop("kept_k_off")
    a["kept_k_lo"], a["kept_k_hi"] = off[:-1], off[1:]
    n = len(a["layer"])
    for key in ("request", "causal", "window", "new_kv_rows", "out_rows"):
        a[key] = np.zeros(n, np.int64)
    a["kv_heads"] = a["heads"]


def _check_layout(path, a):
    """Array kinds, lengths, values and offsets agree, so slicing and the engine cannot go wrong."""
    from .format import MAX_POSITIONS

    for key, arr in a.items():
        if arr.ndim != 1:
            raise TraceError(path, key, arr.shape, "expected a one-dimensional array")
        want = "f" if key in FLOAT_MEMBERS else "iu"
        if arr.dtype.kind not in want and not (want == "f" and arr.dtype.kind in "iu"):
            raise TraceError(path, key, str(arr.dtype),
                             "expected " + ("numbers" if want == "f" else "whole numbers"))
        if want == "iu" and arr.size and (arr.dtype == np.uint64 and int(arr.max()) > MAX_POSITIONS
                                          or int(arr.min()) < -MAX_POSITIONS or int(arr.max()) > MAX_POSITIONS):
            bad = arr[(arr.astype(np.float64) > MAX_POSITIONS) | (arr.astype(np.float64) < -MAX_POSITIONS)]
            raise TraceError(path, key, bad[:4].tolist(), f"expected values within +-{MAX_POSITIONS:,}")
    n = len(a["layer"])
    for key in PER_STEP:
        if len(a[key]) != n:
            raise TraceError(path, key, len(a[key]), f"expected {n} entries (one per step, as layer)")
    pool = len(a["kept_k"])
    lo, hi = a["kept_k_lo"], a["kept_k_hi"]
    if np.any(lo < 0) or np.any(hi < lo) or np.any(hi > pool):
        raise TraceError(path, "kept_k_lo", lo[:8].tolist(),
                         f"expected slices 0 <= kept_k_lo <= kept_k_hi <= len(kept_k)={pool}")

    def offsets(key, count, values):
        off = a[key]
        if len(off) != count + 1:
            raise TraceError(path, key, len(off), f"expected {count + 1} offsets")
        if off[0] != 0 or np.any(np.diff(off) < 0) or off[-1] != len(a[values]):
            raise TraceError(path, key, off[:8].tolist(),
                             f"expected rising offsets from 0 to len({values})={len(a[values])}")

    offsets("heads_off", n, "heads")
    total_heads = len(a["heads"])
    for key in PER_HEAD_STEP:
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
    kv = [k for k in ("kv_kept_k_lo", "kv_kept_k_hi", "kv_kept_k_off") if k in a]
    if kv and len(kv) != 3:
        missing = sorted({"kv_kept_k_lo", "kv_kept_k_hi", "kv_kept_k_off"} - set(kv))[0]
        raise TraceError(path, missing, None, "missing array in the .npz (the kv_kept_k arrays go together)")
    if kv:
        offsets("kv_kept_k_off", n, "kv_kept_k_lo")
        klo, khi = a["kv_kept_k_lo"], a["kv_kept_k_hi"]
        if len(khi) != len(klo) or np.any(klo < 0) or np.any(khi < klo) or np.any(khi > pool):
            raise TraceError(path, "kv_kept_k_lo", klo[:8].tolist(),
                             f"expected slices 0 <= kv_kept_k_lo <= kv_kept_k_hi <= len(kept_k)={pool}")


def _steps(a):
    n = len(a["layer"])
    pool = a["kept_k"].astype(np.int64, copy=False)
    pool.flags.writeable = False  # steps share slices of it
    ho = a["heads_off"]
    lo, hi = a["kept_k_lo"], a["kept_k_hi"]
    heads = a["heads"].astype(np.int64)
    kv_heads = a["kv_heads"].astype(np.int64)
    kept_v = a["kept_v"].astype(np.int64)
    lsb = a["lsb_rows"].astype(np.int64)
    vio = a.get("kept_v_idx_off")
    vidx = a["kept_v_idx"].astype(np.int64) if vio is not None else None
    tso = a.get("token_scores_off")
    hsc = a["head_scores"].astype(np.float64) if "head_scores" in a else None
    kvo = a.get("kv_kept_k_off")
    steps = []
    for i in range(n):
        h0, h1 = int(ho[i]), int(ho[i + 1])
        kv_idx = None
        if vio is not None and vio[h1] > vio[h0]:
            kv_idx = [vidx[int(vio[j]):int(vio[j + 1])] for j in range(h0, h1)]
        ts = None
        if tso is not None and tso[i + 1] > tso[i]:
            ts = a["token_scores"][int(tso[i]):int(tso[i + 1])].astype(np.float64)
        hs = None
        if hsc is not None:
            seg = hsc[h0:h1]
            if not np.all(np.isnan(seg)):
                hs = seg.copy()
        kv_kept = None
        if kvo is not None and kvo[i + 1] > kvo[i]:
            kv_kept = [pool[int(a["kv_kept_k_lo"][j]):int(a["kv_kept_k_hi"][j])]
                       for j in range(int(kvo[i]), int(kvo[i + 1]))]
        code = int(a["stage"][i])
        stage = STAGES[code] if 0 <= code < len(STAGES) else f"<code {code}>"
        causal = int(a["causal"][i])
        steps.append(Step(int(a["layer"][i]), stage, int(a["head_dim"][i]), heads[h0:h1].copy(),
                          int(a["q_rows"][i]), int(a["kv_rows"][i]), pool[int(lo[i]):int(hi[i])],
                          kept_v[h0:h1].copy(), lsb[h0:h1].copy(), kv_idx, ts, hs,
                          int(a["request"][i]), kv_heads[h0:h1].copy(),
                          bool(causal) if causal in (0, 1) else causal, int(a["window"][i]),
                          kv_kept, int(a["new_kv_rows"][i]), int(a["out_rows"][i])))
    return steps
