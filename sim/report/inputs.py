"""Report inputs: result documents and sweep folders, read and checked once.

A report compares *runs*: one result document each, from ``attnsim run
--json`` files or from the points of a sweep folder (``points.db``, see the
sweep store; ``points.jsonl`` in version-1 folders). Every run gets a label a reader can tell apart from the others.
Runs from different simulator versions, or of traces that share a name but
not a digest, are kept apart and labelled, never merged; :func:`label_runs`
returns the warnings to print.
"""

import json
import math
import os

from ..errors import InputError

REQUIRED = ("simulator", "arch", "trace", "cycles", "seconds", "units", "dram", "compute", "bounds")


class ReportError(InputError):
    """A report input (result document, sweep folder, option) is unusable."""


class Run:
    """One result document plus where it came from.

    ``point`` holds a sweep point's axis values (empty for a plain result
    file); ``intervals`` the per-unit intervals when a run was simulated with
    them at hand (the demo) or replayed for the timeline; ``phase_spread`` how far
    apart its cycles come over refresh phases, when that was measured (the demo,
    ``attnsim report --refresh-phases``: :mod:`sim.report.phases`; a sweep point run at several
    refresh phases brings its own): latencies closer than
    that are not told apart (:mod:`sim.report.verdict`).
    """

    def __init__(self, doc, origin, point=None, trace_path=None, intervals=None):
        self.doc = doc
        self.origin = origin
        self.point = dict(point or {})
        self.trace_path = trace_path
        self.intervals = intervals
        self.phase_spread = 0.0
        self.phase_range = None     # (fewest, most) cycles over refresh phases, when measured
        self.phase_mean_s = None    # and the mean latency over them, seconds
        self.phase_mean_pj = None   # and the mean energy over them, pJ
        ph = doc.get("refresh_phases")
        if isinstance(ph, dict) and ph.get("cycles"):   # a sweep point run at several (its spec's refresh_phases)
            cyc = ph["cycles"]
            lo, hi = min(cyc), max(cyc)
            self.phase_range, self.phase_spread = (lo, hi), (hi - lo) / lo if lo else 0.0
            self.phase_mean_s = ph.get("mean_seconds")
            self.phase_mean_pj = ph.get("mean_energy_pj")
        self.config_label = doc["arch"]["name"]
        self.trace_label = doc["trace"]["name"]

    @property
    def label(self):
        return f"{self.config_label} / {self.trace_label}"

    @property
    def version(self):
        return self.doc["simulator"]["version"]

    @property
    def digest(self):
        return self.doc["trace"]["digest"]

    @property
    def build(self):
        """The simulator build that made the document (its version for a document that predates builds)."""
        return self.doc["simulator"].get("build") or self.version

    @property
    def engine_settings(self):
        """``(grain_rows, issue_window, seed)``: the engine settings the run was simulated with."""
        eng = self.doc.get("engine") or {}
        cfg = self.doc["arch"]["config"]
        window = eng.get("issue_window", cfg.get("fetch", {}).get("issue_window", 0))
        return (eng.get("grain_rows", cfg.get("engine", {}).get("grain_rows")), window,
                eng.get("seed", cfg.get("engine", {}).get("seed")))

    def __repr__(self):
        return f"Run({self.label!r} from {self.origin})"


def _check_doc(doc, source, field="<root>"):
    if not isinstance(doc, dict):
        raise ReportError(source, field, doc, "expected a result document (a JSON object from attnsim run --json)")
    for key in REQUIRED:
        if key not in doc:
            raise ReportError(source, f"{field}.{key}" if field != "<root>" else key, None,
                              "missing: expected a result document from attnsim run --json")
    for key in ("name", "config"):
        if key not in doc["arch"]:
            raise ReportError(source, "arch." + key, None, "missing: expected a result document")
    for key in ("name", "digest"):
        if key not in doc["trace"]:
            raise ReportError(source, "trace." + key, None, "missing: expected a result document")
    for name, u in doc["units"].items():
        if not isinstance(u, dict) or "busy" not in u or "stalls" not in u:
            raise ReportError(source, f"units.{name}", u, "expected busy/starved/blocked/idle fractions and stalls")
    ph = doc.get("refresh_phases")
    if ph is not None:
        cyc = ph.get("cycles") if isinstance(ph, dict) else None
        if not isinstance(cyc, list) or not cyc or not all(
                isinstance(c, int) and not isinstance(c, bool) and c > 0 for c in cyc):
            raise ReportError(source, "refresh_phases.cycles", cyc,
                              "expected a list of the positive whole cycles of each refresh phase's run")
        for key in ("mean_cycles", "mean_seconds", "mean_energy_pj"):   # what the report ranks and draws
            v = ph.get(key)
            if key in ph and (isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v < math.inf):
                raise ReportError(source, "refresh_phases." + key, v,
                                  "expected a positive finite number: the mean over the refresh phases' runs")
    for key, fields in SAMPLED.items():
        if doc.get(key) is not None:
            _check_sampled(doc[key], source, key, fields)
    return doc


# what a report reads of the sections of a sampled run (attnsim run --sample-prefill / --sample-decode):
# field -> its kind
_COUNT, _SHARE, _SECONDS = "count", "share", "seconds"
SAMPLED = {
    "prefill_sample": {"cycles": _COUNT, "seconds": _SECONDS, "every": _COUNT, "sampled_steps": _COUNT,
                       "query_blocks": _COUNT, "simulated_query_blocks": _COUNT},
    "decode_sample": {"cycles": _COUNT, "seconds": _SECONDS, "every": _COUNT, "warmup_tokens": _COUNT,
                      "decode_steps": _COUNT, "simulated_decode_steps": _COUNT},
}
_SPREADS = ("copy_spread", "half_sample_spread")   # present when measured
_WHOLE = ("whole_trace_name", "whole_trace_digest")  # decode_sample: the trace estimated (newer documents)


def _check_sampled(sec, source, key, fields):
    if not isinstance(sec, dict):
        raise ReportError(source, key, sec, "expected the whole trace's estimate that attnsim run writes (an object)")
    for name, kind in list(fields.items()) + [(s, _SHARE) for s in _SPREADS if s in sec]:
        v = sec.get(name)
        if isinstance(v, bool) or not isinstance(v, int if kind == _COUNT else (int, float)):
            ok = False
        elif kind == _COUNT:
            ok = v >= 0
        else:
            ok = 0 <= v < math.inf
        if not ok:
            what = {_COUNT: "a whole number >= 0", _SECONDS: "seconds, a finite number >= 0",
                    _SHARE: "a share, a finite number >= 0"}[kind]
            raise ReportError(source, f"{key}.{name}", v, f"expected {what}")
    for name in _WHOLE:
        if name in sec and (not isinstance(sec[name], str) or not sec[name]):
            raise ReportError(source, f"{key}.{name}", sec[name], "expected the whole trace's name and digest, text")


def _load_json(path):
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except FileNotFoundError:
        raise ReportError(path, "<file>", path, "file not found") from None
    except UnicodeDecodeError:
        raise ReportError(path, "<file>", path, "not a UTF-8 text file") from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise ReportError(path, f"line {exc.lineno}", text.splitlines()[exc.lineno - 1][:60]
                          if text.splitlines() else "", f"not valid JSON ({exc.msg}, column {exc.colno})") from None


def load_result_file(path):
    doc = _check_doc(_load_json(path), path)
    return Run(doc, path, trace_path=doc["trace"].get("source"))


def load_sweep(folder):
    """``(runs, failed)``: the finished points of a sweep folder, and its error points."""
    meta_path = os.path.join(folder, "sweep.json")
    pts_path = os.path.join(folder, "points.jsonl")
    meta = _load_json(meta_path) if os.path.exists(meta_path) else None
    if not isinstance(meta, dict) or meta.get("format") != "attnsim-sweep":
        raise ReportError(meta_path, "format", (meta or {}).get("format") if isinstance(meta, dict) else meta,
                          "expected a sweep folder (sweep.json with format: attnsim-sweep)")
    if os.path.exists(os.path.join(folder, "points.db")):
        return _load_store(folder)
    if not os.path.exists(pts_path):
        raise ReportError(pts_path, "<file>", pts_path, "file not found (a sweep folder holds points.db)")
    runs, failed = [], []   # a version-1 folder: JSON lines
    with open(pts_path, encoding="utf-8") as fh:
        for lineno, line in enumerate(fh, 1):
            if not line.strip():
                continue
            where = f"line {lineno}"
            try:
                rec = json.loads(line)
            except json.JSONDecodeError as exc:
                raise ReportError(pts_path, where, line.strip()[:60], f"not valid JSON ({exc.msg})") from None
            if not isinstance(rec, dict) or "status" not in rec or "point" not in rec:
                raise ReportError(pts_path, where, rec, "expected a sweep point record with point and status")
            if rec["status"] != "ok":
                failed.append({"origin": f"{pts_path}:{lineno}", "point": rec.get("point"),
                               "trace": rec.get("trace"), "error": rec.get("error")})
                continue
            doc = _check_doc(rec.get("result"), pts_path, f"{where}: result")
            run = Run(doc, f"{pts_path}:{lineno}", point=rec["point"],
                      trace_path=rec.get("trace_path") or doc["trace"].get("source"))
            runs.append(run)
    return runs, failed


def _load_store(folder):
    """``(runs, failed)`` from a sweep store, records decompressed one at a time."""
    from ..sweep.store import open_store

    db = os.path.join(folder, "points.db")
    runs, failed = [], []
    with open_store(folder) as st:
        for rec in st.records():
            origin = f"{db}#{rec['key'][:12]}"
            if rec["status"] != "ok":
                failed.append({"origin": origin, "point": rec.get("point"), "trace": rec.get("trace"),
                               "error": rec.get("error")})
                continue
            doc = _check_doc(rec.get("result"), db, f"{rec['key'][:12]}: result")
            runs.append(Run(doc, origin, point=rec["point"],
                            trace_path=rec.get("trace_path") or doc["trace"].get("source")))
    return runs, failed


def load_inputs(paths):
    """``(runs, failed)`` from result files and sweep folders, in the order given."""
    if not paths:
        raise ReportError("attnsim report", "RESULTS", paths, "expected result JSON files or sweep folders")
    runs, failed = [], []
    for p in paths:
        if os.path.isdir(p):
            r, f = load_sweep(p)
            runs += r
            failed += f
        else:
            runs.append(load_result_file(p))
    if not runs:
        raise ReportError(paths[0], "points", 0, "no finished (status ok) runs in the inputs")
    return runs, failed


def _point_text(point):
    return ", ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}" for k, v in sorted(point.items()))


ENGINE_NAMES = ("grain", "issue window", "seed")
ENGINE_AXES = ("engine.grain_rows", "fetch.issue_window", "engine.seed")


def engine_tag(run, which=(0, 1, 2)):
    """``grain 256, seed 1``: the run's engine settings named by index (sweep axes left out)."""
    vals = run.engine_settings
    return ", ".join(f"{ENGINE_NAMES[i]} {vals[i]}" for i in which if ENGINE_AXES[i] not in run.point)


def label_runs(runs, trace_of=None, config_tag=None):
    """Give every run distinct config and trace labels; return the warnings.

    ``trace_of(doc)``: ``(name, digest)`` of the trace a run is of (default: the document's
    trace); ``config_tag(doc)`` adds ``[tag]`` to its config label where it returns text.

    * a trace name seen with several digests: each digest is labelled
      ``name#<first 8 hex>`` and counts as a different trace;
    * several simulator versions: every config label gets ``[vX]``; several
      builds of one version: ``[build HASH]``;
    * sweep points: the config label names the point's axis values;
    * runs of one config and trace made with different engine settings
      (grain, issue window, seed) are never merged under one name: each gets
      ``[grain 256, ...]`` naming the settings that differ;
    * any remaining duplicates get ``(2)``, ``(3)``... and a warning.
    """
    warnings = []
    digests = {}
    trace_of = trace_of or (lambda doc: (doc["trace"]["name"], doc["trace"]["digest"]))
    for r in runs:
        name, digest = trace_of(r.doc)
        digests.setdefault(name, set()).add(digest)
    for name, ds in sorted(digests.items()):
        if len(ds) > 1:
            warnings.append(f"trace {name!r} appears with {len(ds)} different digests "
                            f"({', '.join(sorted(d[:8] for d in ds))}): kept apart as {name}#<digest>")
    versions = sorted({r.version for r in runs})
    if len(versions) > 1:
        warnings.append(f"results from {len(versions)} simulator versions ({', '.join(versions)}): "
                        "labelled [vX] and never compared as one group")
    builds = {}
    for r in runs:
        builds.setdefault(r.version, set()).add(r.build)
    for v, bs in sorted(builds.items()):
        if len(bs) > 1:
            warnings.append(f"results from {len(bs)} builds of attnsim {v} ({', '.join(sorted(bs))}): "
                            "labelled [build ...] and never compared as one group")
    for r in runs:
        name, digest = trace_of(r.doc)
        r.trace_label = f"{name}#{digest[:8]}" if len(digests[name]) > 1 else name
        cfg = r.doc["arch"]["name"]
        if r.point:
            cfg = f"{cfg} ({_point_text(r.point)})"
        tag = config_tag(r.doc) if config_tag else ""
        if tag:
            cfg = f"{cfg} [{tag}]"
        if len(versions) > 1:
            cfg = f"{cfg} [v{r.version}]"
        if len(builds[r.version]) > 1:
            cfg = f"{cfg} [build {r.build.partition('+')[2] or r.build}]"
        r.config_label = cfg
    same = {}
    for r in runs:
        same.setdefault(r.label, []).append(r)
    for label, rr in same.items():
        settings = {r.engine_settings for r in rr}
        if len(settings) < 2:
            continue
        differ = [i for i in range(3) if len({s[i] for s in settings}) > 1]
        for r in rr:
            r.config_label = f"{r.config_label} [{engine_tag(r, differ)}]"
        warnings.append(f"{label}: {len(rr)} runs made with different engine settings "
                        f"({', '.join(ENGINE_NAMES[i] for i in differ)}): labelled apart, not merged")
    seen = {}
    for r in runs:
        n = seen.get(r.label, 0) + 1
        seen[r.label] = n
        if n > 1:
            r.config_label = f"{r.config_label} ({n})"
    dups = sorted(k for k, n in seen.items() if n > 1)
    if dups:
        warnings.append(f"{len(dups)} config/trace pairs appear more than once (numbered (2), (3)...): "
                        + "; ".join(dups[:5]))
    return warnings


def group_key(run):
    """Runs comparable with each other: same trace content, simulator build and engine settings.

    Engine settings a sweep varies as an axis do not split a group (the axis
    is what the sweep compares).
    """
    return (run.trace_label, run.build, engine_tag(run))
