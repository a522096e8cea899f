"""Sensitivity: what to change, measured by simulating the change.

For a run of the report, the same trace is simulated again with each main
resource doubled and halved -- multipliers, memory bandwidth, key buffer,
value buffer, softmax lanes, top-k comparators, the fetch unit's issue
window -- and, when its head widths leave lanes idle, with ``dot.lanes``
matched to the head width; and, on a banked memory that refreshes, with the
memory controller's refresh policy switched (refresh postponed, up to 8 owed;
per-bank instead of all-bank refresh, where the memory standard has it): refresh
can weigh far more on a latency-bound run than its share of time. Such a run is
also simulated with refresh off (direction ``bound``): not a change to make,
but what refresh costs it, which its stall split counts as memory waits and no
refresh policy can beat. The speedup
of each (baseline cycles / variant cycles, the baseline simulated again by the
same build) and its energy ratio are what the table, the tornado chart and the
verdict's "measured best change" show. Nothing here is estimated. With the
report's ``--refresh-phases`` (and in the demo), a run short for refresh
(:func:`sim.arch.short_for_refresh`) has its baseline and each variant run at
the four refresh phases, and the speedups are ratios of the means: on such a
run one refresh window more or less can outweigh the change itself.

The reruns go through the sweep machinery: :func:`sim.sweep.worker.run_point`
on the serial, local-pool or Dask backends of :mod:`sim.sweep.backends`, so a
report's sensitivity runs wherever sweeps run, on the same plain inputs.

Which runs get it (``mode``): ``all``; ``front`` (each trace's latency/energy
Pareto runs); ``fastest`` (each trace's fastest run); both by the means over the
refresh phases where every run of the trace has them, as the verdicts rank; ``off``; ``auto`` -- all
runs when that takes at most ``limit`` extra simulations, none otherwise (the
report says how many it would take). An explicit mode over the limit is
refused with the count and the ways to cut it.
"""

import copy
import os
import time

from ..arch import SCHEMA, takes_refresh
from ..limits import lane_figures
from .inputs import ReportError, group_key
from .verdict import latency_key

MODES = ("auto", "all", "front", "fastest", "off")
DEFAULT_LIMIT = 240          # extra simulations a report may start without being asked for more
ISSUE_WINDOW_FROM_ZERO = 4   # "doubling" an issue window of 0 opens it to this many transactions


class Resource:
    """A main resource: its name, its knob, whether it is a whole number."""

    def __init__(self, name, path, whole):
        self.name = name
        self.path = path
        self.whole = whole


RESOURCES = (
    Resource("multipliers", "dot.multipliers", True),
    Resource("memory bandwidth", "dram.channel_gbps", False),
    Resource("key buffer", "buffers.key_kib", False),
    Resource("value buffer", "buffers.value_kib", False),
    Resource("softmax lanes", "softmax.lanes", True),
    Resource("top-k comparators", "topk.comparators", True),
    Resource("issue window", "fetch.issue_window", True),
)
LANES = "lanes = head width"


class Policy:
    """A memory-controller policy switched to another setting, not scaled."""

    def __init__(self, name, path, new, change, applies):
        self.name = name
        self.path = path
        self.new = new
        self.change = change          # how the change reads in a verdict
        self.applies = applies        # dram section -> whether the switch is a change to try


# the most refreshes a controller may owe (dram.refresh_postpone's largest value): the variant tried
MOST_OWED = SCHEMA["dram"]["refresh_postpone"].maximum
POLICIES = (
    Policy("refresh postponed", "dram.refresh_postpone", MOST_OWED, f"postponing refresh (up to {MOST_OWED} owed)",
           lambda d: takes_refresh(d) and d.refresh_postpone < MOST_OWED),
    # only a named standard's per-bank timings are the memory's own (a custom one would take defaults)
    Policy("per-bank refresh", "dram.refresh", "per_bank", "refreshing bank by bank instead of all at once",
           lambda d: takes_refresh(d) and d.refresh == "all_bank" and d.standard != "custom"),
)


REFRESH_OFF = "refresh off"
REFRESH_OFF_CHANGE = "turning refresh off (a bound, not a change to make: what refresh costs the run)"


def _refresh_off(run, dram):
    """The run without refresh (the refresh time of its mode set to 0), where its memory refreshes."""
    if not takes_refresh(dram):
        return []
    path = "dram.t_rfc_ns" if dram.refresh == "all_bank" else "dram.t_rfc_pb_ns"
    return [Variant(run, REFRESH_OFF, "bound", path, getattr(dram, path.rpartition(".")[2]), 0.0,
                    change=REFRESH_OFF_CHANGE)]


class Variant:
    """One rerun of one run: ``overrides`` on its recorded config, or why it cannot be made."""

    def __init__(self, run, resource, direction, path=None, old=None, new=None, error=None, change=None):
        self.run = run
        self.resource = resource      # a Resource name, LANES, or "baseline"
        self.direction = direction    # "x2", "/2", "match", "switch", "bound" or "as recorded"
        self._change = change         # the change in words, for a switched policy
        self.path = path
        self.old = old
        self.new = new
        self.error = error            # a reason when the variant is not a valid datapath
        self.config = None
        self.outcome = None           # (cycles, seconds, energy_pj, cycles as configured) once measured
        self.phases = 1               # refresh phases it is run at (means over them: measure's ``phases``)

    @property
    def setting(self):
        if not self.path:
            return "as recorded"
        return f"{self.path} {_num(self.old)} -> {_num(self.new)}" if self.new is not None else \
            f"{self.path} {_num(self.old)}"

    @property
    def change(self):
        if self.direction == "match":
            return "lanes matched to the head width"
        if self.direction in ("switch", "bound"):
            return self._change
        verb = "doubling" if self.direction == "x2" else "halving"
        return f"{verb} the {self.resource}"


def _num(v):
    return f"{v:g}" if isinstance(v, float) else str(v)


def _config_of(run):
    """The run's recorded config with the engine settings it was simulated with."""
    cfg = copy.deepcopy(run.doc["arch"]["config"])
    grain, _window, seed = run.engine_settings
    cfg.setdefault("engine", {})
    if grain is not None:
        cfg["engine"]["grain_rows"] = grain
    if seed is not None:
        cfg["engine"]["seed"] = seed
    return cfg


def _get(cfg, path):
    node = cfg
    for part in path.split("."):
        node = node[part]
    return node


def _policy_variants(run, base):
    """The refresh policies ``run``'s memory could switch to, and refresh off (:func:`_refresh_off`)."""
    from ..arch import load_arch
    from ..errors import InputError

    try:   # loaded, a result written before a policy knob existed has its default
        dram = load_arch(base, source="sensitivity").dram
    except InputError:
        return []    # no longer a valid datapath: the resource variants say why
    return [Variant(run, pol.name, "switch", pol.path, getattr(dram, pol.path.rpartition(".")[2]), pol.new,
                    change=pol.change) for pol in POLICIES if pol.applies(dram)] + _refresh_off(run, dram)


def plan_variants(run):
    """The variants of ``run`` (baseline first); invalid ones carry their reason."""
    from ..arch import load_arch
    from ..errors import InputError

    base = _config_of(run)
    out = [Variant(run, "baseline", "as recorded")]
    out[0].config = base
    for res in RESOURCES:
        old = _get(base, res.path)
        for direction in ("x2", "/2"):
            if direction == "x2":
                new = old * 2 if old else (ISSUE_WINDOW_FROM_ZERO if res.path == "fetch.issue_window" else None)
            else:
                new = old // 2 if res.whole else old / 2
                if new == old:
                    new = None
            out.append(Variant(run, res.name, direction, res.path, old, new,
                               error=None if new is not None else f"{res.path} is {_num(old)}: nothing to halve"))
    lanes = lane_figures(run.doc)
    if lanes and lanes["mismatch"]:
        by_dim = run.doc["compute"]["macs_by_head_dim"]
        width = int(max(by_dim, key=by_dim.get))
        out.append(Variant(run, LANES, "match", "dot.lanes", lanes["lanes"], width))
    out += _policy_variants(run, base)
    for v in out[1:]:
        if v.error:
            continue
        cfg = copy.deepcopy(base)
        section, _, key = v.path.rpartition(".")
        cfg[section][key] = v.new
        try:
            load_arch(cfg, source="sensitivity")
        except InputError as exc:
            v.error = f"not a valid datapath: {exc.field} = {exc.value!r}: {exc.expected}"
            continue
        v.config = cfg
    # a policy the memory does not have is not a change to suggest
    return [v for v in out if not (v.direction in ("switch", "bound") and v.config is None)]


def replayable(run):
    """None, or why ``run`` cannot be simulated again (its trace is not at hand)."""
    path = run.trace_path
    if not path or not os.path.exists(path):
        return f"its trace ({path}) is not at hand"
    return None


def select(runs, mode):
    """The runs ``mode`` asks sensitivity for."""
    if mode in ("all", "auto"):
        return list(runs)
    if mode == "off":
        return []
    groups = {}
    for r in runs:
        groups.setdefault(group_key(r), []).append(r)
    out = []
    for rr in groups.values():
        if mode == "fastest":
            out.append(min(rr, key=latency_key(rr)[0]))
        else:
            from .figures import front_runs
            out += front_runs(rr)
    return [r for r in runs if r in out]


def extra_runs(runs, phases=1):
    """Simulations sensitivity would start for ``runs`` (valid variants and baselines, each at
    :func:`phases_for` refresh phases)."""
    total = 0
    for r in runs:
        if not replayable(r):
            n = phases_for(r, phases)
            total += sum(1 if v.direction == "bound" else n for v in plan_variants(r) if v.config is not None)
    return total


def choose(runs, mode, limit, phases=1):
    """``(selected runs, note or None)``; refuses an explicit mode over ``limit`` (simulations counted
    at ``phases`` refresh phases for a run short for refresh, see :func:`measure`)."""
    if mode not in MODES:
        raise ReportError("--sensitivity", "sensitivity", mode, "expected one of " + ", ".join(MODES))
    if limit < 0:
        raise ReportError("--sensitivity-limit", "sensitivity_limit", limit, "expected a whole number >= 0")
    picked = select(runs, mode)
    n = extra_runs(picked, phases)
    if n <= limit:
        return picked, None
    ways = []
    for alt in ("front", "fastest"):
        if alt != mode:
            rr = select(runs, alt)
            if len(rr) < len(picked):
                ways.append(f"--sensitivity {alt} ({len(rr)} runs, {extra_runs(rr, phases)} extra simulations)")
    ways.append(f"--sensitivity-limit {n}")
    text = (f"sensitivity for {len(picked)} runs takes {n} extra simulations, more than the limit of {limit}; "
            f"limit it with {' or '.join(ways)}")
    if mode == "auto":
        return [], f"Sensitivity not measured: {text} (or --sensitivity off to silence this)."
    raise ReportError("--sensitivity", "sensitivity", mode, text)


class _Task:
    """A variant on its way through a sweep backend (``key`` and ``args`` are what backends read)."""

    __slots__ = ("key", "args", "variant")

    def __init__(self, key, variant):
        self.key = key
        self.variant = variant
        run = variant.run
        self.args = (variant.config, run.trace_path, run.digest) + ((variant.phases,) if variant.phases > 1 else ())


def phases_for(run, phases):
    """Refresh phases ``run``'s reruns take: ``phases`` where the run is short for refresh
    (:func:`sim.arch.short_for_refresh`: where it starts in the refresh schedule can decide a
    comparison, and a short run costs little to repeat), else 1."""
    if phases <= 1:
        return 1
    from ..arch import load_arch, short_for_refresh
    from ..errors import InputError

    try:
        arch = load_arch(_config_of(run), source="sensitivity")
    except InputError:
        return 1
    return phases if short_for_refresh(arch, run.doc["cycles"]) else 1


def measure(runs, backend=None, jobs=None, cluster=None, workers=None, echo=None, plan=None,
            what="sensitivity", phases=1):
    """Simulate every valid variant of ``runs``; return ``{id(run): [row, ...]}`` and notes.

    A row: ``resource, direction, change, setting, path, old, new, status,
    cycles, seconds, energy_pj, speedup, energy_ratio, error, phases``. ``plan``: what
    variants a run gets (default :func:`plan_variants`; the refresh phases use
    :func:`sim.report.phases.plan_phases`), ``what`` names them in notes. ``phases`` > 1: the
    baseline and variants of a run short for refresh (:func:`phases_for`) are each run at that
    many refresh phases (:func:`sim.sweep.worker.run_point`) and compared by their means.
    """
    from ..build import build_id
    from ..sweep.backends import make_backend

    notes = []
    plans = {}
    for r in runs:
        why = replayable(r)
        if why:
            notes.append(f"No {what} for {r.label}: {why}.")
            continue
        plans[id(r)] = (plan or plan_variants)(r)
        n = phases_for(r, phases)
        for v in plans[id(r)]:
            v.phases = 1 if v.direction == "bound" else n   # without refresh every phase is the same run
    todo = [v for vs in plans.values() for v in vs if v.config is not None]
    if not todo:
        return {}, notes
    own = backend is None
    if own:
        backend = make_backend(jobs=jobs if jobs is not None else (1 if len(todo) < 4 else None),
                               cluster=cluster, workers=workers)
    if echo:
        echo(f"{what}: {sum(v.phases for v in todo)} simulations for {len(plans)} run"
             f"{'s' if len(plans) > 1 else ''} on {backend.name}")
    t0 = time.perf_counter()
    mine = build_id()
    queue = list(enumerate(todo))
    try:
        while queue or backend.pending():
            while queue and backend.pending() < backend.slots:
                i, v = queue.pop(0)
                backend.submit(_Task(f"sens-{i}", v))
            for task, (status, payload, build) in backend.wait():
                v = task.variant
                if status != "ok":
                    v.error = payload
                elif build != mine:
                    v.error = f"simulated by build {build}, not {mine}"
                else:
                    v.outcome = _outcome(payload)
    finally:
        if own:
            backend.close()
    if echo:
        echo(f"{what}: done in {time.perf_counter() - t0:.1f} s")
    out = {}
    for key, vs in plans.items():
        base = vs[0]
        run = base.run
        if base.outcome is None:
            notes.append(f"No {what} for {run.label}: its baseline rerun failed ({base.error}).")
            continue
        if base.outcome[3] != run.doc["cycles"]:
            notes.append(f"{what.capitalize()} of {run.label} is measured against a rerun of {base.outcome[3]:,} "
                         f"cycles (the document says {run.doc['cycles']:,}: another build made it).")
        if base.phases > 1:
            notes.append(f"{what.capitalize()} of {run.label}: a run of {run.doc['cycles']:,} cycles is short for "
                         f"refresh, so its rerun and each change were run at {base.phases} places in the refresh "
                         f"schedule and are compared by their means (the baseline's: {base.outcome[0]:,} cycles).")
        out[key] = [_row(v, base) for v in vs[1:]]
    return out, notes


def _outcome(doc):
    """(cycles, seconds, energy_pj, cycles as configured) of a rerun: the means over its refresh
    phases when it was run at several (its ``refresh_phases`` section), else its own."""
    energy = doc.get("energy", {}).get("total_pj")
    ph = doc.get("refresh_phases")
    if ph:
        return ph["mean_cycles"], ph["mean_seconds"], ph.get("mean_energy_pj", energy), doc["cycles"]
    return doc["cycles"], doc["seconds"], energy, doc["cycles"]


def _row(v, base):
    row = {"resource": v.resource, "direction": v.direction, "change": v.change, "setting": v.setting,
           "path": v.path, "old": v.old, "new": v.new, "status": "ok" if v.outcome else "not run",
           "cycles": None, "seconds": None, "energy_pj": None, "speedup": None, "energy_ratio": None,
           # the comparison's refresh phases (refresh off runs once: without refresh each phase is that run)
           "error": v.error, "phases": base.phases}
    if v.outcome:
        cycles, seconds, energy, _configured = v.outcome
        row.update(cycles=cycles, seconds=seconds, energy_pj=energy, speedup=base.outcome[0] / cycles,
                   energy_ratio=energy / base.outcome[2] if energy and base.outcome[2] else None, error=None)
    return row
