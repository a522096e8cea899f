"""The sweep's output folder: a result store that loses nothing.

Files:

* ``sweep.json`` -- which sweep this folder holds (format, version, spec
  digest, the spec as plain data, simulator version);
* ``points.jsonl`` -- one JSON object per finished point, appended as each
  point finishes: the whole line in one ``os.write`` on an ``O_APPEND``
  descriptor, then ``fsync``. A run killed mid-write leaves at most a partial
  last line; it is ignored, and the file repaired, when the folder is opened
  again. This file is the truth; the others are rebuilt from it;
* ``points.csv`` -- the same points as a flat table (for pandas), appended
  likewise and rewritten whole (temp file and rename) on open;
* ``summary.json`` -- best points and Pareto front, written whole at the end;
* ``points.stale.jsonl`` -- records set aside on open because their key is not
  part of this sweep any more (another simulator build, or ``--force``);
* ``sweep.lock`` -- held while a run writes, so two runs never share a folder.
"""

import csv
import fcntl
import io
import json
import os

FORMAT = "attnsim-sweep"
VERSION = 1
METRIC_COLUMNS = ("cycles", "seconds", "dram.bytes", "dram.achieved_gbps", "compute.macs",
                  "energy.total_pj", "area.total_mm2")

SWEEP_FILE = "sweep.json"
POINTS_FILE = "points.jsonl"
CSV_FILE = "points.csv"
SUMMARY_FILE = "summary.json"
STALE_FILE = "points.stale.jsonl"
LOCK_FILE = "sweep.lock"


def _err(source, field, value, expected):
    from .spec import SweepError
    return SweepError(source, field, value, expected)


def dumps(record):
    """The canonical one-line JSON of a record (floats round-trip exactly)."""
    return json.dumps(record, sort_keys=True, separators=(",", ":"), allow_nan=False)


def append_line(path, text):
    """Append one full line atomically enough to survive SIGKILL: one write, then fsync."""
    data = (text + "\n").encode("utf-8")
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        view = memoryview(data)
        while view:  # a regular file takes the whole buffer; loop only for safety
            n = os.write(fd, view)
            view = view[n:]
        os.fsync(fd)
    finally:
        os.close(fd)


def write_whole(path, text):
    """Replace ``path`` with ``text`` through a temp file and rename."""
    tmp = f"{path}.tmp.{os.getpid()}"
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    try:
        dfd = os.open(os.path.dirname(path) or ".", os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass


def read_records(path):
    """``(records, dropped_lines)`` from a JSON-lines file; partial or broken lines are dropped."""
    if not os.path.exists(path):
        return [], 0
    with open(path, "rb") as fh:
        data = fh.read()
    lines = data.split(b"\n")
    tail = lines.pop()  # b"" when the file ends with a newline; else a partial line
    dropped = 1 if tail.strip() else 0
    out = []
    for line in lines:
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except ValueError:
            dropped += 1
            continue
        if not isinstance(rec, dict) or "key" not in rec or "status" not in rec:
            dropped += 1
            continue
        out.append(rec)
    return out, dropped


def csv_value(result, dotted):
    node = result
    for k in dotted.split("."):
        if not isinstance(node, dict) or k not in node:
            return ""
        node = node[k]
    if isinstance(node, float):
        return repr(node)
    return "" if node is None else node


class Store:
    """An opened output folder. Use :meth:`open`; call :meth:`close` when done."""

    def __init__(self, folder, axis_paths, lock_fd):
        self.folder = folder
        self.axis_paths = list(axis_paths)
        self._lock_fd = lock_fd
        self.records = {}          # key -> record, in file order
        self.repaired = 0          # partial / broken lines dropped on open
        self.set_aside = 0         # records moved to points.stale.jsonl on open

    def path(self, name):
        return os.path.join(self.folder, name)

    @classmethod
    def open(cls, folder, meta, plan_keys, axis_paths, force=False):
        """Open (or create) ``folder`` for the sweep described by ``meta``.

        ``meta`` is the ``sweep.json`` document; a folder holding a sweep with
        another ``spec_digest`` is refused unless ``force``. Records whose key
        is in ``plan_keys`` are kept (first one per key); others are set aside.
        """
        if os.path.exists(folder) and not os.path.isdir(folder):
            raise _err(folder, "--out", folder, "expected a folder, found a file")
        os.makedirs(folder, exist_ok=True)
        lock_fd = os.open(os.path.join(folder, LOCK_FILE), os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(lock_fd)
            raise _err(folder, "--out", folder, "another sweep run is writing to this folder") from None
        store = cls(folder, axis_paths, lock_fd)
        try:
            store._claim(meta, force)
            store._load(set(plan_keys))
        except BaseException:
            store.close()
            raise
        return store

    def _claim(self, meta, force):
        sp = self.path(SWEEP_FILE)
        if os.path.exists(sp):
            try:
                with open(sp, encoding="utf-8") as fh:
                    old = json.load(fh)
            except ValueError:
                old = None
            if not isinstance(old, dict) or old.get("format") != FORMAT:
                if not force:
                    raise _err(sp, "format", None if not isinstance(old, dict) else old.get("format"),
                               f"expected a {FORMAT} folder; pass --force to reuse it")
            elif old.get("spec_digest") != meta["spec_digest"] and not force:
                name = (old.get("spec") or {}).get("name")
                raise _err(sp, "spec_digest", old.get("spec_digest", "")[:12],
                           f"this folder holds another sweep ({name!r}, spec or base config or traces "
                           f"differ from {meta['spec']['name']!r}); pass --force to replace it or "
                           "choose another --out")
        else:
            ours = {POINTS_FILE, CSV_FILE, SUMMARY_FILE, STALE_FILE, LOCK_FILE}
            foreign = [n for n in os.listdir(self.folder) if n not in ours and not n.startswith(".")]
            if (foreign or os.path.exists(self.path(POINTS_FILE))) and not force:
                shown = sorted(foreign)[:3] or [POINTS_FILE]
                raise _err(self.folder, "--out", self.folder,
                           f"folder is not empty and holds no {SWEEP_FILE} (found {', '.join(shown)}); "
                           "pass --force to use it anyway")
        write_whole(sp, json.dumps(meta, indent=2, sort_keys=True) + "\n")

    def _load(self, plan_keys):
        pp = self.path(POINTS_FILE)
        recs, self.repaired = read_records(pp)
        stale = []
        for rec in recs:
            if rec["key"] in plan_keys and rec["key"] not in self.records:
                self.records[rec["key"]] = rec
            elif rec["key"] not in plan_keys:
                stale.append(rec)
        duplicates = len(recs) - len(self.records) - len(stale)
        if stale:
            for rec in stale:
                append_line(self.path(STALE_FILE), dumps(rec))
            self.set_aside = len(stale)
        if self.repaired or stale or duplicates:
            write_whole(pp, "".join(dumps(r) + "\n" for r in self.records.values()))
        self.rewrite_csv()

    # CSV ------------------------------------------------------------------
    def header(self):
        return ["key", "trace", "status", *self.axis_paths, *METRIC_COLUMNS, "bound"]

    def _row(self, rec):
        res = rec.get("result") or {}
        point = rec.get("point", {})
        row = [rec["key"], rec.get("trace", ""), rec["status"]]
        row += [point.get(p, "") for p in self.axis_paths]
        row += [csv_value(res, c) for c in METRIC_COLUMNS]
        row.append(csv_value(res, "bounds.bound"))
        return row

    @staticmethod
    def _csv_text(rows):
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerows(rows)
        return buf.getvalue()

    def rewrite_csv(self):
        rows = [self.header()] + [self._row(r) for r in self.records.values()]
        write_whole(self.path(CSV_FILE), self._csv_text(rows))

    # Writing ----------------------------------------------------------------
    def append(self, record):
        """Record one finished point: JSON line first (the truth), then its CSV row."""
        if record["key"] in self.records:
            return False
        append_line(self.path(POINTS_FILE), dumps(record))
        self.records[record["key"]] = record
        append_line(self.path(CSV_FILE), self._csv_text([self._row(record)]).rstrip("\n"))
        return True

    def write_summary(self, summary):
        write_whole(self.path(SUMMARY_FILE), json.dumps(summary, indent=2, sort_keys=True) + "\n")

    def close(self):
        if self._lock_fd is not None:
            try:
                fcntl.flock(self._lock_fd, fcntl.LOCK_UN)
            finally:
                os.close(self._lock_fd)
                self._lock_fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
