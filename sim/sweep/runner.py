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

from ..arch import SHORT_RUN_INTERVALS
from ..run import AUTO_PHASES
from ..version import __version__
from . import objectives as obj
from .backends import TLSFiles, make_backend
from .plan import make_plan
from .pareto import Front
from .progress import Progress
from .spec import Spec, SweepError, load_spec
from .store import FORMAT, VERSION, Store

MAX_LOST = 3


class Task:
    """A planned point on its way through a backend."""

    __slots__ = ("point", "key", "args")

    def __init__(self, point):
        self.point = point
        self.key = point.key
        self.args = (point.config, point.trace_path, point.trace_digest) + \
            ((point.phases,) if point.phases != 1 or point.sampling else ()) + \
            ((point.sampling,) if point.sampling else ())


class SweepRun:
    """What one call of :func:`run_sweep` did; ``summary`` is the summary.json document."""

    def __init__(self, folder, plan, summary, executed, reused, skipped, lost, backend):
        self.folder = folder
        self.plan = plan
        self.summary = summary
        self.executed = executed     # simulations started and finished in this run
        self.reused = reused         # points already in the store
        self.skipped = skipped       # screened out
        self.lost = lost             # worker deaths seen (each retried or recorded)
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
    """Measured objective vectors of the current Pareto front, per trace (for screening).

    Fed the table row of each finished point. When a requested objective turns
    out to be missing (and falls back to others), the fronts are rebuilt from
    the store.
    """

    def __init__(self, requested, store):
        self.requested = requested
        self.store = store
        self.missing = {n for n in requested if store.any_missing(obj.OBJECTIVES[n].column)}
        self.used = self._used()
        self._rebuild()

    def _rebuild(self):
        cols = [obj.OBJECTIVES[n].column for n in self.used]
        self.front = collections.defaultdict(lambda: Front(len(self.used)))
        for trace in self.store.traces():
            for _key, vec in self.store.front(trace, cols):
                self.front[trace].add(vec)

    def add(self, trace, row):
        for name in self.requested:
            if row.get(obj.OBJECTIVES[name].column) is None:
                self.missing.add(name)
        used = self._used()
        if used != self.used:
            self.used = used
            self._rebuild()      # the store already holds this row
            return
        vec = obj.row_values(self.used, row)
        if vec is not None:
            self.front[trace].add(vec)

    def _used(self):
        out = []
        for name in self.requested:
            o = obj.OBJECTIVES[name]
            for n in (o.fallback if name in self.missing and o.fallback else (name,)):
                if n not in out:
                    out.append(n)
        return out


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
              quiet=False, backend=None, on_record=None, stream=None, security=None, plan=None):
    """Run the sweep ``spec`` (a path or a :class:`Spec`) into folder ``out``.

    ``backend`` may be given ready-made (it is not closed here then); otherwise
    it is made from ``jobs`` / ``cluster`` / ``workers`` (and ``security``,
    the TLS files of a ``tls://`` cluster). ``on_record(record)`` is called
    after each record reaches the store. ``plan``: the spec's plan, when the
    caller made it already.
    """
    if not isinstance(spec, Spec):
        spec = load_spec(spec)
    if screen and spec.sampling:
        raise SweepError(spec.source, "--screen", True,
                         "expected without the spec's sampling: a sampled point's estimate may come below its "
                         "closed-form bound by its reach, so screening could skip a point of the front")
    if cluster is not None:   # a bad address or TLS file fails here, before anything runs
        (security or TLSFiles()).validate(cluster)
    plan = plan if plan is not None else make_plan(spec)
    meta = {"format": FORMAT, "version": VERSION, "spec_digest": spec.digest(plan.trace_digests()),
            "spec": spec.data, "simulator_version": __version__, "simulator_build": plan.build}
    store = Store.open(out, meta, ((p.key, p.order) for p in plan.points), spec.axis_paths, force=force,
                       fixed_paths=list(spec.fixed))
    own_backend = backend is None
    executed = skipped = lost = 0
    try:
        reused = sum(1 for p in plan.points if p.key in store.keys)
        todo = [p for p in plan.points if p.key not in store.keys]
        progress = Progress(len(plan.points), already=reused, stream=stream, quiet=quiet)
        fronts = _Fronts(spec.objectives, store) if screen else None

        def put(record, point, measured=False):
            row = store.append(record, order=point.order)
            progress.update(ran=1, failed=record["status"] != "ok")
            if measured and fronts is not None and row is not None:
                fronts.add(point.trace, row)
            if on_record is not None:
                on_record(record)

        for p in [p for p in todo if p.config is None]:
            put(record_for(p, "error", p.error, None, plan.build), p)
        todo = [p for p in todo if p.config is not None]

        closed = {}
        if screen and todo:
            closed = _bounds(todo, plan)
            first = fronts.used[:1]
            todo.sort(key=lambda p: (obj.lower_bounds(first, closed[p.key], p.config)[0]
                                     if closed[p.key] else -math.inf, p.order))

        if todo and own_backend:
            backend = make_backend(jobs=jobs, cluster=cluster, workers=workers, security=security)
        if todo and hasattr(backend, "prepare"):
            wanted = {p.trace_digest for p in todo}
            backend.prepare([(path, digest) for _n, path, digest in plan.traces if digest in wanted])
        queue = collections.deque(todo)
        strikes = collections.Counter()
        wrong_build = collections.Counter()
        try:
            while queue or (backend is not None and backend.pending()):
                while queue and backend.pending() < backend.slots:
                    p = queue.popleft()
                    cfd = closed.get(p.key)
                    if screen and cfd is not None and fronts.front[p.trace].dominates(
                            obj.lower_bounds(fronts.used, cfd, p.config)):
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
                                                       f"this point ({payload})", None, plan.build), p)
                        continue
                    if build != plan.build:
                        # its result belongs to other code: keep the point missing, a rerun runs it
                        wrong_build[build] += 1
                        continue
                    executed += 1
                    if status == "ok":
                        put(record_for(p, "ok", None, payload, plan.build), p, measured=True)
                    else:
                        put(record_for(p, "error", payload, None, plan.build), p)
        finally:
            progress.close()
            if own_backend and backend is not None:
                backend.close()
        counts = {"planned": len(plan.points), "filtered_by_keep_if": plan.filtered,
                  "executed_this_run": executed, "reused": reused,
                  "skipped_by_screen": skipped, "worker_deaths": lost,
                  "records_set_aside": store.set_aside,
                  "refused_other_build": sum(wrong_build.values())}
        summary = summarize(plan, store, spec.objectives, counts, screened=screen)
        summary["notes"] += store.notes
        for b, n in wrong_build.items():
            summary["notes"].append(
                f"{n} result(s) came from workers running simulator build {b}, not {plan.build}; "
                "they were not stored (update the workers and rerun)")
        store.write_summary(summary)
        name = backend.name if backend is not None else "none (nothing to run)"
        return SweepRun(out, plan, summary, executed, reused, skipped, lost, name)
    finally:
        store.close()


def summarize(plan, store, requested, counts, screened=False):
    """The summary.json document: best point per trace per objective, and the Pareto front.

    Read from the store's table (streamed), so it costs memory for the fronts,
    not for the points. The store holds exactly the plan's points.
    """
    status = store.status_counts()
    n_ok = sum(n for (_t, s), n in status.items() if s == "ok")
    errors = sum(n for (_t, s), n in status.items() if s != "ok")
    used, notes = obj.resolve_by(requested, n_ok > 0,
                                 lambda name: store.any_missing(obj.OBJECTIVES[name].column))
    cols = [obj.OBJECTIVES[n].column for n in used]
    best, front = {}, {}
    for name, _path, _digest in plan.traces:
        best[name] = {}
        for o, col in zip(used, cols):
            hit = store.best(name, col)
            if hit is not None:
                best[name][o] = {"key": hit[0], "value": float(hit[1])}
        front[name] = store.front(name, cols)
    wanted = {b["key"] for per in best.values() for b in per.values()}
    wanted |= {k for f in front.values() for k, _v in f}
    points = {p.key: p.point for p in plan.points if p.key in wanted}
    for per in best.values():
        for b in per.values():
            b["point"] = points[b["key"]]
    phase_notes = _phase_ranges(plan.spec.phases, store, best) + _short_run_notes(plan.spec.phases, store, best)
    if plan.spec.sampling:
        phase_notes.append(_sampling_note(plan.spec.sampling))
        phase_notes += _flagged_best_notes(store, best)
    return {
        "format": "attnsim-sweep-summary", "version": 1,
        "sweep": plan.spec.name, "simulator_version": __version__, "simulator_build": plan.build,
        "objectives": {"requested": list(requested), "used": used, "notes": notes,
                       "direction": "minimize"},
        "counts": {**counts, "ok": n_ok, "error": errors,
                   "finished": n_ok + errors,
                   "missing": len(plan.points) - n_ok - errors - counts.get("skipped_by_screen", 0)},
        "screened": bool(screened),
        "notes": phase_notes,
        "best": best,
        "pareto": {t: [k for k, _v in f] for t, f in front.items()},
        "pareto_points": {t: [{"key": k, "point": points[k], "objectives": dict(zip(used, v))} for k, v in f]
                          for t, f in front.items()},
    }


def _sampling_note(sampling):
    """What a sampled sweep's cycles are, and where its leads are told apart."""
    from ..trace.sample import DEFAULT_WARMUP

    how = ", ".join([f"prefill 1 in {sampling['prefill']}"] * ("prefill" in sampling)
                    + [f"decode 1 in {sampling['decode']} after {sampling.get('warmup', DEFAULT_WARMUP)}"]
                    * ("decode" in sampling))
    return (f"points sampled their traces ({how}): cycles and seconds are the whole traces' estimates, and the "
            "table holds no other figure of them but the area proxy (the rest is the simulated parts'); an "
            "estimate's reach is 1 % or more, so attnsim report on this folder ranks them and says which leads "
            "are told apart; compare close points by whole runs")


def _flagged_best_notes(store, best):
    """A sampled sweep: a note for each trace whose best point by cycles has an estimate its own
    run summary flags (not one to rank by, :mod:`sim.result`)."""
    from ..result import SAMPLE_FEW_LAYERS, SAMPLE_NOISY, prefill_sample_noisy

    out = []
    for trace, per in best.items():
        b = per.get("cycles")
        doc = ((store.record(b["key"]) if b else None) or {}).get("result") or {}
        ps, ds = doc.get("prefill_sample"), doc.get("decode_sample")
        why = []
        if ps and ps.get("sampled_steps") and prefill_sample_noisy(doc):
            why.append("its prefill sample is flagged (its checks apart, two arrays, or the softmax pacing the array)")
        if ds and ds.get("half_sample_spread", 0.0) > SAMPLE_NOISY:
            why.append(f"its decode half-samples came {ds['half_sample_spread']:.1%} either side")
        if ds and len(doc.get("per_layer_cycles") or ()) < SAMPLE_FEW_LAYERS:
            why.append(f"its decode was sampled on fewer than {SAMPLE_FEW_LAYERS} layers")
        if why:
            out.append(f"trace {trace}: the best point's estimate is not one to rank by -- {'; '.join(why)}; "
                       "attnsim report on this folder lists which points it cannot tell apart")
    return out


def _short_run_notes(phases, store, best):
    """Without ``refresh_phases``: a note for each trace whose best run (fewest cycles) is short
    for refresh (:func:`sim.arch.short_for_refresh`), saying how many refresh intervals it lasts."""
    if phases != 1:
        return []
    from ..arch import load_arch, refresh_intervals, short_for_refresh

    out = []
    for trace, per in best.items():
        b = per.get("cycles")
        rec = store.record(b["key"]) if b else None
        if not rec or not rec.get("config"):
            continue
        arch = load_arch(rec["config"], source="sweep point")
        if short_for_refresh(arch, b["value"]):
            intervals = refresh_intervals(arch, b["value"])
            out.append(f"trace {trace}: its fastest run lasts {intervals:.1f} refresh intervals (tREFI "
                       f"{arch.dram.t_refi_ns:g} ns); on so few, one refresh window more or less can decide a "
                       "ranking: refresh_phases: auto in the spec (or --refresh-phases auto) ranks such runs by "
                       "the means over where the windows fall")
    return out


def _phase_ranges(phases, store, best):
    """With ``refresh_phases``: each best cycles point's fewest and most cycles over its phases
    (``phase_range``), and the note saying what the ranked figures are."""
    if phases == 1:
        return []
    for per in best.values():
        b = per.get("cycles")
        rec = store.record(b["key"]) if b else None
        ph = ((rec or {}).get("result") or {}).get("refresh_phases")
        if ph:
            b["phase_range"] = [min(ph["cycles"]), max(ph["cycles"])]
    if phases == "auto":
        return [f"points whose run lasted {SHORT_RUN_INTERVALS} refresh intervals or fewer ran at {AUTO_PHASES} "
                f"places in the refresh schedule (the windows moved later by 0, 1/{AUTO_PHASES} ... "
                f"{AUTO_PHASES - 1}/{AUTO_PHASES} of tREFI), and their cycles, seconds and energy are the means "
                "over those runs; the others ran once"]
    return [f"points whose memory refreshes ran at {phases} places in the refresh schedule (the windows "
            f"moved later by 0, 1/{phases} ... {phases - 1}/{phases} of tREFI); cycles, seconds and energy "
            "are the means over those runs"]


def format_run(run):
    """Readable end-of-sweep report for the terminal."""
    s = run.summary
    c = s["counts"]
    lines = [f"sweep {s['sweep']}: {c['planned']} points ({len(run.plan.traces)} trace(s)) in {run.folder}"
             f" -- backend {run.backend}",
             f"  ran {c['executed_this_run']}, already stored {c['reused']}, failed {c['error']}, "
             f"screened out {c['skipped_by_screen']}, removed by keep_if {c['filtered_by_keep_if']}"
             + (f", missing {c['missing']}" if c["missing"] else "")]
    if c["records_set_aside"]:
        lines.append(f"  set aside {c['records_set_aside']} record(s) of another build or spec "
                     "(table set_aside of points.db)")
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
            lines.append(f"    best {name:<12} {_objective_text(name, b['value']):>18}   {_point(b['point'], axes)}   "
                         f"[{b['key'][:12]}]")
            if "phase_range" in b:
                lo, hi = b["phase_range"]
                lines.append(f"{'':22}the mean of runs of {lo:,} to {hi:,} cycles at the refresh phases")
        pts = s["pareto_points"][trace]
        lines.append(f"    Pareto front: {len(pts)} point(s)")
        for d in pts[:20]:
            vals = "  ".join(f"{k} {_objective_text(k, v)}" for k, v in d["objectives"].items())
            lines.append(f"      {vals}   {_point(d['point'], axes)}")
        if len(pts) > 20:
            lines.append(f"      ... {len(pts) - 20} more in summary.json")
    return "\n".join(lines)


# objective -> the quantity every output shows it as (sim.formats)
_SHOWN = {"cycles": "cycles", "energy": "energy", "area": "area", "dram_bytes": "bytes"}


def _objective_text(name, v):
    from ..formats import number, show
    return show(v, _SHOWN[name]) if name in _SHOWN else number(v)


def _point(point, axes):
    return " ".join(f"{p}={point[p]}" for p in axes if p in point)

