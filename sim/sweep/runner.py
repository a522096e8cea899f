"""Running a sweep: plan, skip what the store holds, run the rest, summarize.

Points are handed to a backend a few at a time (``backend.slots`` in flight),
and each one is written to the store the moment it finishes, so an
interrupted run keeps everything it finished and a rerun starts only the
missing points. A point whose simulation raises is recorded as an error; a
point whose worker process died is retried, and recorded as an error after
:data:`MAX_LOST` deaths. A result computed by a worker running another
simulator build is not stored (the point stays missing for a rerun).

With ``screen=True`` the points are taken in order of their closed-form lower
bound, and a point is skipped when a measured point of the same trace
dominates its lower-bound vector: whatever the run would measure is then
dominated as well, so no point of the Pareto front is ever skipped. Skipped
points are not recorded; a run without screening runs them.
"""

import collections
import math

from .. import __version__
from . import objectives as obj
from .backends import make_backend
from .plan import make_plan
from .progress import Progress
from .spec import Spec, load_spec
from .store import FORMAT, VERSION, Store

MAX_LOST = 3


class Task:
    """A planned point on its way through a backend."""

    __slots__ = ("point", "key", "args")

    def __init__(self, point):
        self.point = point
        self.key = point.key
        self.args = (point.config, point.trace_path, point.trace_digest)


class SweepRun:
    """What one call of :func:`run_sweep` did; ``summary`` is the summary.json document."""

    def __init__(self, folder, plan, summary, executed, reused, skipped, lost, repaired, backend):
        self.folder = folder
        self.plan = plan
        self.summary = summary
        self.executed = executed     # simulations started and finished in this run
        self.reused = reused         # points already in the store
        self.skipped = skipped       # screened out
        self.lost = lost             # worker deaths seen (each retried or recorded)
        self.repaired = repaired     # partial/broken store lines dropped on open
        self.backend = backend


def record_for(point, status, error, result, build):
    return {
        "key": point.key, "point": dict(point.point), "trace": point.trace,
        "trace_path": point.trace_path, "trace_digest": point.trace_digest,
        "simulator_version": __version__, "simulator_build": build,
        "status": status, "error": error, "config": point.config,
        **({"result": result} if status == "ok" else {}),
    }


class _Fronts:
    """Measured objective vectors of the current Pareto front, per trace (for screening)."""

    def __init__(self, requested):
        self.requested = requested
        self.results = []                          # [(trace, result, config)]
        self.missing = set()
        self.used = obj.resolve(requested, [])[0]
        self.front = collections.defaultdict(list)

    def add(self, trace, result, config):
        self.results.append((trace, result, config))
        for name in self.requested:
            if obj.OBJECTIVES[name].measure(result, config) is None:
                self.missing.add(name)
        used = self._used()
        if used != self.used:
            self.used = used
            self.front.clear()
            for t, r, c in self.results:
                self._insert(t, obj.values(used, r, c))
        else:
            self._insert(trace, obj.values(used, result, config))

    def _used(self):
        out = []
        for name in self.requested:
            o = obj.OBJECTIVES[name]
            for n in (o.fallback if name in self.missing and o.fallback else (name,)):
                if n not in out:
                    out.append(n)
        return out

    def _insert(self, trace, vec):
        if vec is None:
            return
        f = self.front[trace]
        if obj.dominated(vec, f):
            return
        keep = [v for v in f if not (all(a <= b for a, b in zip(vec, v)) and any(a < b for a, b in zip(vec, v)))]
        keep.append(vec)
        self.front[trace] = keep


def _bounds(points, plan):
    """Closed-form inputs per point: ``key -> closed_form dict`` (None where it fails)."""
    from ..arch import load_arch
    from ..model.bounds import closed_form
    from .worker import _trace

    out = {}
    for p in points:
        try:
            out[p.key] = closed_form(load_arch(p.config, source="sweep point"),
                                     _trace(p.trace_path, p.trace_digest))
        except Exception:  # no bound known: the point is simply never skipped
            out[p.key] = None
    return out


def run_sweep(spec, out, jobs=None, cluster=None, workers=None, screen=False, force=False,
              quiet=False, backend=None, on_record=None, stream=None):
    """Run the sweep ``spec`` (a path or a :class:`Spec`) into folder ``out``.

    ``backend`` may be given ready-made (it is not closed here then); otherwise
    it is made from ``jobs`` / ``cluster`` / ``workers``. ``on_record(record)``
    is called after each record reaches the store.
    """
    if not isinstance(spec, Spec):
        spec = load_spec(spec)
    plan = make_plan(spec)
    meta = {"format": FORMAT, "version": VERSION, "spec_digest": spec.digest(plan.trace_digests()),
            "spec": spec.data, "simulator_version": __version__, "simulator_build": plan.build}
    store = Store.open(out, meta, plan.keys, spec.axis_paths, force=force)
    own_backend = backend is None
    executed = skipped = lost = 0
    try:
        reused = sum(1 for p in plan.points if p.key in store.records)
        todo = [p for p in plan.points if p.key not in store.records]
        progress = Progress(len(plan.points), already=reused, stream=stream, quiet=quiet)

        def put(record):
            store.append(record)
            progress.update(ran=1, failed=record["status"] != "ok")
            if on_record is not None:
                on_record(record)

        for p in [p for p in todo if p.config is None]:
            put(record_for(p, "error", p.error, None, plan.build))
        todo = [p for p in todo if p.config is not None]

        fronts = _Fronts(spec.objectives)
        for rec in store.records.values():
            if rec["status"] == "ok":
                fronts.add(rec["trace"], rec["result"], rec["config"])
        closed = {}
        if screen and todo:
            closed = _bounds(todo, plan)
            first = fronts.used[:1]
            todo.sort(key=lambda p: (obj.lower_bounds(first, closed[p.key], p.config)[0]
                                     if closed[p.key] else -math.inf, p.order))

        if todo and own_backend:
            backend = make_backend(jobs=jobs, cluster=cluster, workers=workers)
        queue = collections.deque(todo)
        strikes = collections.Counter()
        wrong_build = collections.Counter()
        try:
            while queue or (backend is not None and backend.pending()):
                while queue and backend.pending() < backend.slots:
                    p = queue.popleft()
                    cfd = closed.get(p.key)
                    if screen and cfd is not None and obj.dominated(
                            obj.lower_bounds(fronts.used, cfd, p.config), fronts.front[p.trace]):
                        skipped += 1
                        progress.update(skipped=1)
                        continue
                    backend.submit(Task(p))
                if not backend.pending():
                    break
                for task, (status, payload, build) in backend.wait():
                    p = task.point
                    if status == "lost":
                        lost += 1
                        strikes[p.key] += 1
                        if strikes[p.key] < MAX_LOST:
                            queue.appendleft(p)
                        else:
                            put(record_for(p, "error", f"worker process died {MAX_LOST} times running "
                                                       f"this point ({payload})", None, plan.build))
                        continue
                    if build != plan.build:
                        # its result belongs to other code: keep the point missing, a rerun runs it
                        wrong_build[build] += 1
                        continue
                    executed += 1
                    if status == "ok":
                        put(record_for(p, "ok", None, payload, plan.build))
                        fronts.add(p.trace, payload, p.config)
                    else:
                        put(record_for(p, "error", payload, None, plan.build))
        finally:
            progress.close()
            if own_backend and backend is not None:
                backend.close()
        store.rewrite_csv()
        counts = {"planned": len(plan.points), "filtered_by_keep_if": plan.filtered,
                  "executed_this_run": executed, "reused": reused,
                  "skipped_by_screen": skipped, "worker_deaths": lost,
                  "store_lines_repaired": store.repaired, "records_set_aside": store.set_aside,
                  "refused_other_build": sum(wrong_build.values())}
        summary = summarize(plan, store.records, spec.objectives, counts, screened=screen)
        for b, n in wrong_build.items():
            summary["notes"].append(
                f"{n} result(s) came from workers running simulator build {b}, not {plan.build}; "
                "they were not stored (update the workers and rerun)")
        store.write_summary(summary)
        name = backend.name if backend is not None else "none (nothing to run)"
        return SweepRun(out, plan, summary, executed, reused, skipped, lost, store.repaired, name)
    finally:
        store.close()


def summarize(plan, records, requested, counts, screened=False):
    """The summary.json document: best point per trace per objective, and the Pareto front."""
    ok = [(p, records[p.key]) for p in plan.points if p.key in records and records[p.key]["status"] == "ok"]
    errors = sum(1 for p in plan.points if p.key in records and records[p.key]["status"] != "ok")
    used, notes = obj.resolve(requested, [(r["result"], r["config"]) for _p, r in ok])
    best, front, detail = {}, {}, {}
    for name, _path, _digest in plan.traces:
        rows = [(p, r) for p, r in ok if p.trace == name]
        vecs = [obj.values(used, r["result"], r["config"]) for _p, r in rows]
        best[name] = {}
        for i, o in enumerate(used):
            cand = [(v[i], p.order, p, r) for (p, r), v in zip(rows, vecs) if v is not None]
            if cand:
                value, _order, p, _r = min(cand, key=lambda c: (c[0], c[1]))
                best[name][o] = {"key": p.key, "value": value, "point": p.point}
        good = [(p, v) for (p, _r), v in zip(rows, vecs) if v is not None]
        mask = obj.pareto_mask([v for _p, v in good]) if good else []
        on = [(p, v) for (p, v), m in zip(good, mask) if m]
        on.sort(key=lambda pv: (pv[1], pv[0].order))
        front[name] = [p.key for p, _v in on]
        detail[name] = [{"key": p.key, "point": p.point, "objectives": dict(zip(used, v))} for p, v in on]
    return {
        "format": "attnsim-sweep-summary", "version": 1,
        "sweep": plan.spec.name, "simulator_version": __version__, "simulator_build": plan.build,
        "objectives": {"requested": list(requested), "used": used, "notes": notes,
                       "direction": "minimize"},
        "counts": {**counts, "ok": len(ok), "error": errors,
                   "finished": len(ok) + errors,
                   "missing": len(plan.points) - len(ok) - errors - counts.get("skipped_by_screen", 0)},
        "screened": bool(screened),
        "notes": [],
        "best": best,
        "pareto": front,
        "pareto_points": detail,
    }


def format_run(run):
    """Readable end-of-sweep report for the terminal."""
    s = run.summary
    c = s["counts"]
    lines = [f"sweep {s['sweep']}: {c['planned']} points ({len(run.plan.traces)} trace(s)) in {run.folder}"
             f" -- backend {run.backend}",
             f"  ran {c['executed_this_run']}, already stored {c['reused']}, failed {c['error']}, "
             f"screened out {c['skipped_by_screen']}, removed by keep_if {c['filtered_by_keep_if']}"
             + (f", missing {c['missing']}" if c["missing"] else "")]
    if c["store_lines_repaired"]:
        lines.append(f"  repaired the store: dropped {c['store_lines_repaired']} partial line(s)")
    if c["records_set_aside"]:
        lines.append(f"  set aside {c['records_set_aside']} record(s) of another build in points.stale.jsonl")
    o = s["objectives"]
    lines.append(f"  objectives (minimized): {', '.join(o['used'])}")
    for n in o["notes"]:
        lines.append(f"    note: {n}")
    for n in s["notes"]:
        lines.append(f"  note: {n}")
    axes = run.plan.spec.axis_paths
    for trace, per in s["best"].items():
        lines.append(f"  trace {trace}:")
        for name, b in per.items():
            lines.append(f"    best {name:<12} {b['value']:>16,.6g}   {_point(b['point'], axes)}   [{b['key'][:12]}]")
        pts = s["pareto_points"][trace]
        lines.append(f"    Pareto front: {len(pts)} point(s)")
        for d in pts[:20]:
            vals = "  ".join(f"{k} {v:,.6g}" for k, v in d["objectives"].items())
            lines.append(f"      {vals}   {_point(d['point'], axes)}")
        if len(pts) > 20:
            lines.append(f"      ... {len(pts) - 20} more in summary.json")
    return "\n".join(lines)


def _point(point, axes):
    return " ".join(f"{p}={point[p]}" for p in axes if p in point)

