"""The sweep's output folder: a result store that loses nothing and scales to a million points.

Files:

* ``sweep.json`` -- which sweep this folder holds (format, version, spec
  digest, the spec as plain data, simulator version);
* ``points.db`` -- an SQLite database (the standard library's ``sqlite3``),
  the truth. Table ``points`` has one row per finished point: its key, plan
  order, trace, status and error, the config knobs the sweep sets and the
  design's main knobs (``config.<path>``), the ``derived.*`` quantities of
  ``keep_if``, and the run's figures (:mod:`sim.columns`). Table ``documents``
  holds each point's whole record (config, result document...) as JSON
  compressed with zlib against a preset dictionary (the first finished
  record), read only when asked for. Each point is committed in its own
  transaction (write-ahead log, synchronous): a run killed at any moment
  leaves every committed point and nothing half-written;
* ``points.csv`` -- the table as CSV, the same columns; appended as points
  finish and rewritten from the database when it does not match;
* ``summary.json`` -- best points and Pareto front, written whole at the end;
* ``sweep.lock`` -- held while a run writes, so two runs never share a folder.

Records whose key is not part of the sweep being run (another simulator
build, or ``--force`` with another spec) are moved to table ``set_aside`` on
open. Reads go through :class:`StoreReader`, which streams rows in chunks, so
reading a front or a filtered table takes memory for the answer, not for the
whole store. A version-1 folder (``points.jsonl``) is converted on open.
"""

import contextlib
import csv
import fcntl
import functools
import io
import json
import os
import pathlib
import sqlite3
import zlib

from ..arch import MAIN_KNOBS, knob_paths
from ..columns import UNIT_ORDER, _at_parts, figure_columns, figure_row

FORMAT = "attnsim-sweep"
VERSION = 2
SCHEMA = 1                      # layout of points.db

SWEEP_FILE = "sweep.json"
DB_FILE = "points.db"
CSV_FILE = "points.csv"
SUMMARY_FILE = "summary.json"
LOCK_FILE = "sweep.lock"
V1_POINTS = "points.jsonl"      # version 1 folders; renamed after conversion
V1_CONVERTED = "points.v1.jsonl"
V1_STALE = "points.stale.jsonl"

CHUNK = 8192                    # rows per fetch when streaming
ZLEVEL = 6
SQL_TYPE = {"int": "INTEGER", "float": "REAL", "text": "TEXT", "any": ""}
IDENTITY = (("plan_order", "int"), ("trace", "text"), ("status", "text"), ("error", "text"))
DERIVED_COLUMNS = ("derived.buffer_kib", "derived.peak_gbps", "derived.peak_gmacs", "derived.bytes_per_cycle")
OPS = ("==", "!=", "<", "<=", ">", ">=", "in", "not in")
SET_ASIDE_REASON = "not part of this sweep when reopened (other simulator build, or --force)"


def _err(source, field, value, expected):
    from .spec import SweepError
    return SweepError(source, field, value, expected)


def dumps(record):
    """The canonical one-line JSON of a record (floats round-trip exactly)."""
    return json.dumps(record, sort_keys=True, separators=(",", ":"), allow_nan=False)


def quote(name):
    """A column name as an SQL identifier."""
    return '"' + name.replace('"', '""') + '"'


def write_whole(path, text):
    """Replace ``path`` with ``text`` through a temp file and rename."""
    tmp = f"{path}.tmp.{os.getpid()}"
    with open(tmp, "w", encoding="utf-8", newline="") as fh:
        if isinstance(text, str):
            fh.write(text)
        else:
            for piece in text:
                fh.write(piece)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    _sync_dir(os.path.dirname(path))


def _sync_dir(folder):
    try:
        dfd = os.open(folder or ".", os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass


def append_line(path, text):
    """Append one full line with one ``write`` on an ``O_APPEND`` descriptor."""
    data = (text + "\n").encode("utf-8")
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view):]
    finally:
        os.close(fd)


def read_records(path):
    """``(records, dropped_lines)`` from a version-1 JSON-lines file; partial or broken lines are dropped."""
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


# The table ------------------------------------------------------------------

def config_paths(axis_paths=(), fixed_paths=()):
    """Knobs the table keeps: the design's main knobs, the query buffer and every knob the spec sets."""
    wanted = set(MAIN_KNOBS) | {"buffers.query_kib"} | set(axis_paths) | set(fixed_paths)
    known = knob_paths()
    return [p for p in known if p in wanted] + sorted(p for p in wanted if p not in known)


def table_columns(paths):
    """``[(column, kind)]`` of table ``points`` after ``key``, for a sweep keeping knobs ``paths``."""
    return (list(IDENTITY) + [(f"config.{p}", "any") for p in paths]
            + [(d, "float") for d in DERIVED_COLUMNS] + figure_columns(UNIT_ORDER))


def record_row(record, columns, order=None):
    """Values of ``columns`` (after ``key``) for one record, in order."""
    config = record.get("config")
    result = record.get("result") if record.get("status") == "ok" else None
    figures = figure_row(result or {}, UNIT_ORDER)
    return [get(record, config, figures, order) for get in _getters(tuple(map(tuple, columns)))]


@functools.lru_cache(maxsize=8)
def _getters(columns):
    """One function per column: (record, config, figures, order) -> value."""
    from .constraints import DERIVED

    def knob(path):
        parts = path.split(".")

        def get(rec, config, _f, _o):
            v = _at_parts(config, parts) if isinstance(config, dict) else None
            return (rec.get("point") or {}).get(path) if v is None else v
        return get

    def derived(fn):
        def get(_r, config, _f, _o):
            try:
                return float(fn(config)) if config else None
            except (KeyError, TypeError, ValueError, ZeroDivisionError):
                return None
        return get

    out = []
    for name, _kind in columns:
        if name == "plan_order":
            out.append(lambda _r, _c, _f, order: order)
        elif name in ("trace", "status", "error"):
            out.append(lambda rec, _c, _f, _o, name=name: rec.get(name))
        elif name.startswith("config."):
            out.append(knob(name[len("config."):]))
        elif name.startswith("derived."):
            out.append(derived(DERIVED[name][1]) if name in DERIVED else (lambda *_a: None))
        else:
            out.append(lambda _r, _c, figures, _o, name=name: figures.get(name))
    return out


def _filter_sql(filters, names):
    """``(where_sql, params)`` for ``[(column, op, value)]`` (all must hold)."""
    parts, params = [], []
    for f in filters or ():
        if not isinstance(f, (list, tuple)) or len(f) != 3:
            raise ValueError(f"a filter is (column, op, value); got {f!r}")
        col, op, value = f
        if col not in names:
            from ..errors import closest
            raise KeyError(f"no column {col!r} in the store" + closest(col, names))
        if op not in OPS:
            raise ValueError(f"filter op {op!r}: expected one of {', '.join(OPS)}")
        if op in ("in", "not in"):
            vals = list(value)
            parts.append(f"{quote(col)} {op.upper()} ({', '.join('?' * len(vals))})" if vals
                         else ("0" if op == "in" else "1"))
            params += vals
        elif value is None:
            if op not in ("==", "!="):
                raise ValueError(f"filter {f!r}: only == and != compare with None")
            parts.append(f"{quote(col)} IS {'NOT ' if op == '!=' else ''}NULL")
        else:
            parts.append(f"{quote(col)} {'=' if op == '==' else op} ?")
            params.append(value)
    return (" WHERE " + " AND ".join(parts)) if parts else "", params


class Codec:
    """Compresses records against the store's preset dictionaries and decompresses them."""

    def __init__(self, conn):
        self.conn = conn
        self._dicts = {}
        self.current = None   # (id, bytes) used for new records

    def dictionary(self, did):
        if did not in self._dicts:
            row = self.conn.execute("SELECT body FROM dictionaries WHERE id = ?", (did,)).fetchone()
            self._dicts[did] = bytes(row[0])
        return self._dicts[did]

    def decode(self, did, body):
        d = zlib.decompressobj(zdict=self.dictionary(did)) if did is not None else zlib.decompressobj()
        return json.loads(d.decompress(body) + d.flush())

    def encode(self, text):
        data = text.encode("utf-8")
        if self.current is None:
            c = zlib.compressobj(ZLEVEL)
            return None, c.compress(data) + c.flush()
        did, zd = self.current
        c = zlib.compressobj(ZLEVEL, zdict=zd)
        return did, c.compress(data) + c.flush()


class StoreReader:
    """A sweep folder opened for reading; rows and records are streamed in chunks.

    Use :func:`open_store`. ``names`` are the table's columns (``key`` first),
    the same as the CSV's and :func:`sim.load_sweep`'s.
    """

    def __init__(self, folder, conn, meta):
        self.folder = folder
        self.meta = meta
        self.conn = conn
        self.codec = Codec(conn)
        info = dict(conn.execute("SELECT name, value FROM info"))
        self.columns = [tuple(c) for c in json.loads(info["columns"])]
        self.names = ["key"] + [n for n, _k in self.columns]
        self.kinds = {"key": "text", **dict(self.columns)}

    def path(self, name):
        return os.path.join(self.folder, name)

    @property
    def axis_paths(self):
        return list(self.meta.get("axis_paths") or [])

    @contextlib.contextmanager
    def snapshot(self):
        """Reads inside see one state of the store, even while a run appends to it."""
        if self.conn.in_transaction:
            yield
            return
        self.conn.execute("BEGIN")
        try:
            yield
        finally:
            self.conn.execute("COMMIT")

    def count(self, filters=None):
        where, params = _filter_sql(filters, self.names)
        return self.conn.execute(f"SELECT COUNT(*) FROM points{where}", params).fetchone()[0]

    def rows(self, names=None, filters=None, order_by=None, chunk=CHUNK):
        """Yield lists of row tuples (``names`` columns, store order unless ``order_by``)."""
        names = list(self.names if names is None else names)
        for n in names + list(order_by or ()):
            if n not in self.names and n != "id":
                from ..errors import closest
                raise KeyError(f"no column {n!r} in the store" + closest(n, self.names))
        where, params = _filter_sql(filters, self.names)
        order = ", ".join(quote(n) for n in (order_by or ("id",)))
        cur = self.conn.execute(f"SELECT {', '.join(quote(n) for n in names)} FROM points{where} "
                                f"ORDER BY {order}", params)
        while True:
            block = cur.fetchmany(chunk)
            if not block:
                return
            yield block

    def records(self, filters=None, chunk=256):
        """Yield whole records (decompressed one at a time), in store order."""
        where, params = _filter_sql(filters, self.names)
        cur = self.conn.execute("SELECT d.dictionary, d.body FROM points JOIN documents d ON d.id = points.id"
                                f"{where} ORDER BY points.id", params)
        while True:
            block = cur.fetchmany(chunk)
            if not block:
                return
            for did, body in block:
                yield self.codec.decode(did, body)

    def record(self, key):
        """The whole record of point ``key`` (KeyError when absent)."""
        row = self.conn.execute("SELECT d.dictionary, d.body FROM points JOIN documents d ON d.id = points.id "
                                "WHERE points.key = ?", (key,)).fetchone()
        if row is None:
            raise KeyError(key)
        return self.codec.decode(*row)

    def traces(self):
        return [t for (t,) in self.conn.execute("SELECT DISTINCT trace FROM points ORDER BY trace")]

    def status_counts(self):
        """``{(trace, status): n}``."""
        return {(t, s): n for t, s, n in self.conn.execute(
            "SELECT trace, status, COUNT(*) FROM points GROUP BY trace, status")}

    def any_missing(self, column):
        """True when some finished (ok) point has no value in ``column``."""
        return self.conn.execute(f"SELECT EXISTS(SELECT 1 FROM points WHERE status = 'ok' AND "
                                 f"{quote(column)} IS NULL)").fetchone()[0] == 1

    def best(self, trace, column):
        """``(key, value)`` of the ok point of ``trace`` with the smallest ``column`` (first in plan order)."""
        return self.conn.execute(
            f"SELECT key, {quote(column)} FROM points WHERE status = 'ok' AND trace = ? AND "
            f"{quote(column)} IS NOT NULL ORDER BY {quote(column)}, plan_order, id LIMIT 1", (trace,)).fetchone()

    def front(self, trace, columns, chunk=65536):
        """``[(key, values)]`` of the Pareto front of ``trace``'s ok points over ``columns`` (minimized).

        Streams the points in lexicographic order through
        :class:`sim.sweep.pareto.FrontScan`: memory holds a chunk and the front.
        The front comes sorted by its values, ties in plan order.
        """
        import numpy as np

        from .pareto import FrontScan

        cols = [quote(c) for c in columns]
        notnull = " AND ".join(f"{c} IS NOT NULL" for c in cols)
        cur = self.conn.execute(f"SELECT id, {', '.join(cols)} FROM points WHERE status = 'ok' AND trace = ? "
                                f"AND {notnull} ORDER BY {', '.join(cols)}, plan_order, id", (trace,))
        scan = FrontScan(len(columns))
        on = []
        while True:
            block = cur.fetchmany(chunk)
            if not block:
                break
            arr = np.array(block, dtype=np.float64)
            mask = scan.take(arr[:, 1:])
            on += [(int(r[0]), tuple(float(v) for v in r[1:])) for r in arr[mask]]
        keys = {}
        for i in range(0, len(on), 500):
            ids = [i_ for i_, _v in on[i:i + 500]]
            keys.update(self.conn.execute(f"SELECT id, key FROM points WHERE id IN ({', '.join('?' * len(ids))})",
                                          ids))
        return [(keys[i], v) for i, v in on]

    def write_csv(self, path):
        """Write the whole table as CSV (streamed), through a temp file and rename."""
        def text():
            yield _csv_text([self.names])
            for block in self.rows():
                yield _csv_text([[_cell(v) for v in r] for r in block])
        write_whole(path, text())

    def close(self):
        if self.conn is not None:
            self.conn.close()
            self.conn = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _cell(v):
    if isinstance(v, float):
        return repr(v)
    return "" if v is None else v


def _csv_text(rows):
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    return buf.getvalue()


def read_meta(folder):
    """The folder's ``sweep.json`` (a SweepError when it is not a sweep folder)."""
    sp = os.path.join(folder, SWEEP_FILE)
    try:
        with open(sp, encoding="utf-8") as fh:
            meta = json.load(fh)
    except FileNotFoundError:
        raise _err(sp, "<file>", sp, "file not found: expected a sweep folder (attnsim sweep --out)") from None
    except (ValueError, UnicodeDecodeError):
        raise _err(sp, "<file>", sp, "not valid JSON: expected a sweep folder's sweep.json") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise _err(sp, "format", meta.get("format") if isinstance(meta, dict) else None,
                   f"expected {FORMAT!r}: not a sweep folder")
    return meta


def open_store(folder):
    """Open sweep folder ``folder`` read-only (while a run writes to it, too)."""
    meta = read_meta(folder)
    db = os.path.join(folder, DB_FILE)
    if meta.get("version") == 1 or not os.path.exists(db):
        raise _err(os.path.join(folder, SWEEP_FILE), "version", meta.get("version"),
                   f"a version-1 sweep folder (points.jsonl); run the same `attnsim sweep SPEC --out "
                   f"{folder}` once to convert it to {DB_FILE} (finished points are not simulated again)")
    conn = sqlite3.connect(pathlib.Path(db).resolve().as_uri() + "?mode=ro", uri=True,
                           isolation_level=None, check_same_thread=False)
    try:
        return StoreReader(folder, conn, meta)
    except sqlite3.DatabaseError as exc:
        conn.close()
        raise _err(db, "<file>", db, f"not a readable sweep database ({exc})") from None


class Store(StoreReader):
    """An output folder opened for writing. Use :meth:`open`; call :meth:`close` when done."""

    def __init__(self, folder, conn, meta, lock_fd):
        self._lock_fd = lock_fd
        super().__init__(folder, conn, meta)
        self.keys = {k for (k,) in conn.execute("SELECT key FROM points")}
        last = conn.execute("SELECT id, body FROM dictionaries ORDER BY id DESC LIMIT 1").fetchone()
        if last is not None:
            self.codec.current = (last[0], bytes(last[1]))
        self.set_aside = 0         # records moved to table set_aside on open
        self.notes = []            # what opening did (conversion of a version-1 folder)
        self._csv_rows = None

    @classmethod
    def open(cls, folder, meta, plan, axis_paths=(), force=False, fixed_paths=()):
        """Open (or create) ``folder`` for the sweep described by ``meta``.

        ``meta`` is the ``sweep.json`` document; a folder holding a sweep with
        another ``spec_digest`` is refused unless ``force``. ``plan`` gives the
        sweep's points as ``(key, plan order)`` pairs: stored records of those
        keys are kept (the first one per key) and get that order; others are
        set aside. The table keeps the knobs ``axis_paths`` and ``fixed_paths``
        set, besides the main ones.
        """
        if os.path.exists(folder) and not os.path.isdir(folder):
            raise _err(folder, "--out", folder, "expected a folder, found a file")
        os.makedirs(folder, exist_ok=True)
        old = _claim(folder, meta, force)  # a refused folder gets no lock file
        lock_fd = os.open(os.path.join(folder, LOCK_FILE), os.O_RDWR | os.O_CREAT, 0o644)
        try:
            # a POSIX lock: forked pool workers do not inherit it, so a killed run frees it at once
            fcntl.lockf(lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(lock_fd)
            raise _err(folder, "--out", folder, "another sweep run is writing to this folder") from None
        conn = None
        try:
            meta = {**meta, "axis_paths": list(axis_paths)}
            conn = _connect(os.path.join(folder, DB_FILE))
            columns = table_columns(config_paths(axis_paths, fixed_paths))
            _ensure_schema(conn, columns)
            store = cls(folder, conn, meta, lock_fd)
        except BaseException:
            if conn is not None:
                conn.close()
            fcntl.lockf(lock_fd, fcntl.LOCK_UN)
            os.close(lock_fd)
            raise
        try:
            if old is not None and old.get("version") == 1:
                store._convert_v1()
            store._set_aside(plan)
            if [tuple(c) for c in store.columns] != columns:
                store._rebuild(columns)
            write_whole(store.path(SWEEP_FILE), json.dumps(meta, indent=2, sort_keys=True) + "\n")
            store._check_csv()
        except BaseException:
            store.close()
            raise
        return store

    # Opening ------------------------------------------------------------------
    def _convert_v1(self):
        src = self.path(V1_POINTS)
        recs, dropped = read_records(src)
        added = self.append_many(recs, csv=False)
        if os.path.exists(src):
            os.replace(src, self.path(V1_CONVERTED))
        self.notes.append(f"converted a version-1 folder: {sum(1 for r in added if r is not None)} record(s) "
                          f"from {V1_POINTS} into {DB_FILE} (kept as {V1_CONVERTED})"
                          + (f", {dropped} partial line(s) dropped" if dropped else ""))

    def _set_aside(self, plan):
        """Move records of keys not in the plan to table ``set_aside``; refresh plan orders."""
        if not self.keys:
            return
        c = self.conn
        c.execute("CREATE TEMP TABLE IF NOT EXISTS plan(key TEXT PRIMARY KEY, ord INTEGER) WITHOUT ROWID")
        c.execute("DELETE FROM temp.plan")
        c.execute("BEGIN")
        c.executemany("INSERT OR IGNORE INTO temp.plan VALUES (?, ?)", plan)
        c.execute("COMMIT")
        gone = "SELECT id FROM points WHERE key NOT IN (SELECT key FROM temp.plan)"
        c.execute("BEGIN IMMEDIATE")
        try:
            n = c.execute(f"SELECT COUNT(*) FROM ({gone})").fetchone()[0]
            if n:
                c.execute("INSERT INTO set_aside(key, reason, dictionary, body) "
                          "SELECT p.key, ?, d.dictionary, d.body FROM points p JOIN documents d ON d.id = p.id "
                          "WHERE p.key NOT IN (SELECT key FROM temp.plan)", (SET_ASIDE_REASON,))
                c.execute(f"DELETE FROM documents WHERE id IN ({gone})")
                c.execute(f"DELETE FROM points WHERE id IN ({gone})")
            c.execute("UPDATE points SET plan_order = (SELECT ord FROM temp.plan WHERE plan.key = points.key) "
                      "WHERE plan_order IS NOT (SELECT ord FROM temp.plan WHERE plan.key = points.key)")
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise
        c.execute("DROP TABLE temp.plan")
        if n:
            self.set_aside = n
            self.keys = {k for (k,) in c.execute("SELECT key FROM points")}

    def _rebuild(self, columns):
        """Recompute table ``points`` with ``columns`` from the stored records (other knobs or figures)."""
        c = self.conn
        c.execute("BEGIN IMMEDIATE")
        try:
            c.execute(_create_points("points_new", columns))
            src = c.execute("SELECT p.id, p.key, p.plan_order, d.dictionary, d.body FROM points p "
                            "JOIN documents d ON d.id = p.id ORDER BY p.id")
            ins = _insert_sql("points_new", ["id", "key"] + [n for n, _k in columns])
            while True:
                block = src.fetchmany(1024)
                if not block:
                    break
                c.executemany(ins, [[i, key] + record_row(self.codec.decode(did, body), columns, order)
                                    for i, key, order, did, body in block])
            c.execute("DROP TABLE points")
            c.execute("ALTER TABLE points_new RENAME TO points")
            c.execute("INSERT OR REPLACE INTO info VALUES ('columns', ?)", (json.dumps(columns),))
            c.execute("COMMIT")
        except BaseException:
            c.execute("ROLLBACK")
            raise
        self.columns = [tuple(x) for x in columns]
        self.names = ["key"] + [n for n, _k in columns]
        self.kinds = {"key": "text", **dict(columns)}

    def _check_csv(self):
        """Keep ``points.csv`` equal to the table: rewrite it when its header or row count differs."""
        path = self.path(CSV_FILE)
        n = self.conn.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        header = _csv_text([self.names])
        ok = False
        if os.path.exists(path):
            with open(path, "rb") as fh:
                ok = fh.readline().decode("utf-8", "replace") == header
                lines, last = 0, b"\n"
                while ok:
                    piece = fh.read(1 << 20)
                    if not piece:
                        break
                    lines += piece.count(b"\n")
                    last = piece[-1:]
            ok = ok and lines == n and last == b"\n"
        if not ok:
            self.write_csv(path)

    # Writing ------------------------------------------------------------------
    def append(self, record, order=None):
        """Record one finished point; returns its table row as a dict (None when the key is stored)."""
        return self.append_many([record], [order])[0]

    def append_many(self, records, orders=None, csv=True):
        """Record points in one transaction; returns their rows (None for keys already stored)."""
        out, fresh = [], []
        names = [n for n, _k in self.columns]
        ins_p = _insert_sql("points", ["key"] + names)
        ins_d = "INSERT INTO documents(id, dictionary, body) VALUES (?, ?, ?)"
        c = self.conn
        codec_before = self.codec.current
        c.execute("BEGIN IMMEDIATE")
        try:
            for i, rec in enumerate(records):
                key = rec["key"]
                if key in self.keys:
                    out.append(None)
                    continue
                if self.codec.current is None and rec.get("status") == "ok":
                    self._new_dictionary(rec)
                vals = record_row(rec, self.columns, orders[i] if orders else None)
                cur = c.execute(ins_p, [key] + vals)
                c.execute(ins_d, (cur.lastrowid, *self.codec.encode(dumps(rec))))
                self.keys.add(key)
                row = dict(zip(names, vals), key=key)
                out.append(row)
                fresh.append([key] + vals)
            c.execute("COMMIT")
        except BaseException:
            if c.in_transaction:
                c.execute("ROLLBACK")
            self.codec.current = codec_before
            for r in out:
                if r is not None:
                    self.keys.discard(r["key"])
            raise
        if csv and fresh:
            append_line(self.path(CSV_FILE), _csv_text([[_cell(v) for v in r] for r in fresh]).rstrip("\n"))
        return out

    def _new_dictionary(self, rec):
        zd = dumps(rec).encode("utf-8")[-32768:]   # zlib looks back 32 KiB
        cur = self.conn.execute("INSERT INTO dictionaries(body) VALUES (?)", (zd,))
        self.codec.current = (cur.lastrowid, zd)
        self.codec._dicts[cur.lastrowid] = zd

    def write_summary(self, summary):
        write_whole(self.path(SUMMARY_FILE), json.dumps(summary, indent=2, sort_keys=True) + "\n")

    def close(self):
        if self.conn is not None:
            try:   # leave one self-contained file behind (no -wal / -shm) when nobody else reads
                self.conn.execute("PRAGMA journal_mode=DELETE")
            except sqlite3.Error:
                pass
        super().close()
        if self._lock_fd is not None:
            try:
                fcntl.lockf(self._lock_fd, fcntl.LOCK_UN)
            finally:
                os.close(self._lock_fd)
                self._lock_fd = None


def _connect(path):
    conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=FULL")     # a committed point survives power loss too
    return conn


def _create_points(name, columns):
    cols = ", ".join(f"{quote(n)} {SQL_TYPE[k]}".rstrip() for n, k in columns)
    return f"CREATE TABLE {name}(id INTEGER PRIMARY KEY, key TEXT NOT NULL UNIQUE, {cols})"


def _insert_sql(table, names):
    return f"INSERT INTO {table}({', '.join(quote(n) for n in names)}) VALUES ({', '.join('?' * len(names))})"


def _ensure_schema(conn, columns):
    if conn.execute("SELECT name FROM sqlite_master WHERE name = 'info'").fetchone():
        schema = conn.execute("SELECT value FROM info WHERE name = 'schema'").fetchone()
        if schema is None or int(schema[0]) != SCHEMA:
            raise _err(DB_FILE, "info.schema", schema and schema[0], f"expected store layout {SCHEMA}")
        return
    conn.execute("BEGIN IMMEDIATE")
    conn.execute("CREATE TABLE info(name TEXT PRIMARY KEY, value TEXT)")
    conn.execute("CREATE TABLE dictionaries(id INTEGER PRIMARY KEY, body BLOB NOT NULL)")
    conn.execute(_create_points("points", columns))
    conn.execute("CREATE TABLE documents(id INTEGER PRIMARY KEY, dictionary INTEGER, body BLOB NOT NULL)")
    conn.execute("CREATE TABLE set_aside(id INTEGER PRIMARY KEY, key TEXT, reason TEXT, dictionary INTEGER, "
                 "body BLOB NOT NULL)")
    conn.executemany("INSERT INTO info VALUES (?, ?)", [("schema", str(SCHEMA)), ("columns", json.dumps(columns))])
    conn.execute("COMMIT")


def _claim(folder, meta, force):
    """Check the folder may hold this sweep; return the old ``sweep.json`` (None when new)."""
    sp = os.path.join(folder, SWEEP_FILE)
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
            return None
        if old.get("spec_digest") != meta["spec_digest"] and not force:
            name = (old.get("spec") or {}).get("name")
            raise _err(sp, "spec_digest", old.get("spec_digest", "")[:12],
                       f"this folder holds another sweep ({name!r}, spec or base config or traces "
                       f"differ from {meta['spec']['name']!r}); pass --force to replace it or "
                       "choose another --out")
        return old
    ours = {DB_FILE, DB_FILE + "-wal", DB_FILE + "-shm", DB_FILE + "-journal", CSV_FILE, SUMMARY_FILE,
            LOCK_FILE, V1_POINTS, V1_STALE}
    foreign = [n for n in os.listdir(folder) if n not in ours and not n.startswith(".")]
    stored = [n for n in (DB_FILE, V1_POINTS) if os.path.exists(os.path.join(folder, n))]
    if (foreign or stored) and not force:
        shown = sorted(foreign)[:3] or stored
        raise _err(folder, "--out", folder,
                   f"folder is not empty and holds no {SWEEP_FILE} (found {', '.join(shown)}); "
                   "pass --force to use it anyway")
    return None
