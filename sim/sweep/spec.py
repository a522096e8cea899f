"""Sweep spec: which datapaths to try on which traces, read from YAML.

A spec names a base architecture, the knobs to vary and the traces to run::

    name: buffers-vs-array
    base: ../mid.yaml                      # relative to this file
    traces: [../../traces/synth_decode.npz]
    fixed:                                 # overrides applied to every point
      engine.grain_rows: 512
    axes:                                  # cartesian product, in this order
      dot.multipliers: [256, 512, 1024]
      buffers.key_kib: {from: 32, to: 256, factor: 2}
      softmax.lanes: {from: 16, to: 48, step: 16}
    linked:                                # each group advances together (zipped)
      - dram.channels: [2, 4, 8]
        dram.channel_gbps: [51.2, 25.6, 12.8]
    keep_if:                               # every rule must hold (see constraints.py)
      - ge: [buffers.value_kib, {mul: [buffers.key_kib, 0.5]}]
    objectives: [cycles, energy, area]
    refresh_phases: 4                      # each point at 4 places in the refresh schedule

A spec for long traces may sample them (``attnsim run --sample-prefill`` /
``--sample-decode``, see :mod:`sim.trace.sample`)::

    sampling: {prefill: 256, decode: 8, warmup: 32}

Each point then runs the sampled part, and its row's cycles and seconds are the
whole trace's estimates (no other figure: the rest is the part's), so only
objectives of time or of the config alone may be asked for, a point runs at one
place in the refresh schedule, and screening is refused (an estimate may come
below its closed-form bound by its reach).

With ``refresh_phases`` N > 1, a point whose memory refreshes runs N times,
its refresh windows moved later by 0, 1/N, ... (N-1)/N of tREFI, and is ranked
by the means (cycles, seconds, energy): where a run starts in the refresh
schedule is not part of the design, and on a short trace one window more or
less can move the answer by more than the design change does. ``auto`` does
that at 4 phases for a point whose run proves short for refresh
(:func:`sim.arch.short_for_refresh`) and runs the others once.

Everything is checked here, once; errors are :class:`SweepError` lines that
name the file, the field, the value and what was expected.
"""

import copy
import hashlib
import json
import math
import os

from .. import arch as archmod
from ..errors import NO_VALUE, SweepError, closest
from ..yamlio import guess_kind, locate, read_mapping_doc, unknown_keys_error
from . import constraints as cons
from .objectives import OBJECTIVES

TOP_KEYS = ("name", "description", "base", "traces", "fixed", "axes", "linked", "keep_if",
            "objectives", "refresh_phases", "sampling")
SAMPLING_KEYS = ("prefill", "decode", "warmup")
# objectives a sampled point has: its estimate of time, and figures of the config alone
SAMPLED_OBJECTIVES = ("cycles", "area", "multipliers", "buffer_kib")
MAX_VALUES = 10000   # per axis; a range that long is a typo, not a plan
MAX_POINTS = 1_000_000
MAX_TRACES = 1000
MAX_LINKED = 100     # linked groups
MAX_PHASES = 16      # refresh_phases: places in the refresh schedule a point is run at


class Spec:
    """A validated sweep spec.

    ``dims`` is the list of grid dimensions: each a list of dotted paths and
    the tuples of values they take together (an axis is a dimension of one
    path, a linked group one of several). ``data`` is the spec as plain data
    (ranges expanded), which is what ``digest`` hashes.
    """

    def __init__(self, source, name, description, base_path, base, traces, fixed, dims,
                 rules, objectives, data, phases=1, sampling=None):
        self.source = source
        self.name = name
        self.description = description
        self.base_path = base_path
        self.base = base                  # resolved Arch
        self.traces = traces              # [(path as written, resolved path)]
        self.fixed = fixed
        self.dims = dims
        self.rules = rules
        self.objectives = objectives
        self.data = data
        self.phases = phases              # refresh_phases: runs per point (1: as configured only), or "auto"
        self.sampling = sampling          # {prefill, decode, warmup} given, or None: every point whole

    @property
    def axis_paths(self):
        return [p for paths, _vals in self.dims for p in paths]

    @property
    def grid_size(self):
        return math.prod(len(vals) for _paths, vals in self.dims)

    def digest(self, trace_digests):
        """Identity of the sweep: the spec, the resolved base config and the traces' content."""
        doc = {"spec": self.data, "base": self.base.to_dict(), "traces": list(trace_digests)}
        text = json.dumps(doc, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()

    def with_phases(self, phases):
        """The same spec run at ``phases`` places in the refresh schedule (``--refresh-phases``)."""
        phases = _phases(phases, "--refresh-phases")
        _no_phases_sampled(phases, self.sampling, "--refresh-phases")
        data = {k: v for k, v in self.data.items() if k != "refresh_phases"}
        if phases != 1:
            data["refresh_phases"] = phases
        return Spec(self.source, self.name, self.description, self.base_path, self.base, self.traces, self.fixed,
                    self.dims, self.rules, self.objectives, data, phases, self.sampling)

    def with_sampling(self, sampling, source):
        """The same spec with its points sampled as ``sampling`` says (``{prefill, decode,
        warmup}``, as the spec's ``sampling``; from the command line, named ``source``)."""
        sampling = _sampling(sampling, source)
        _no_phases_sampled(self.phases, sampling, source)
        _sampled_objectives(self.objectives, sampling, source)
        data = {k: v for k, v in self.data.items() if k != "sampling"}
        data["sampling"] = dict(sampling)
        return Spec(self.source, self.name, self.description, self.base_path, self.base, self.traces, self.fixed,
                    self.dims, self.rules, self.objectives, data, self.phases, sampling)

    def __repr__(self):
        return f"Spec({self.name!r} from {self.source}, {self.grid_size} grid points)"


def load_spec(path):
    """Read and validate a sweep spec file."""
    path = os.fspath(path)
    doc = read_mapping_doc(path, SweepError, "expected a mapping with base, traces and axes", what="sweep spec")
    kind = guess_kind(doc.data)
    if kind not in (None, "a sweep spec"):
        raise SweepError(path, "<file>", NO_VALUE, f"this looks like {kind}, not a sweep spec")
    try:
        return validate_spec(doc.data, path)
    except SweepError as exc:
        raise locate(exc, doc) from None


def validate_spec(raw, source):
    """Check a spec mapping; relative paths are taken from ``source``'s folder."""
    here = os.path.dirname(os.path.abspath(source)) if source and os.path.exists(source) else os.getcwd()
    unknown = [(str(k), raw[k], closest(k, TOP_KEYS)) for k in raw if k not in TOP_KEYS]
    if unknown:
        raise unknown_keys_error(SweepError, source, unknown)
    name = raw.get("name", os.path.splitext(os.path.basename(source or "sweep"))[0])
    if not isinstance(name, str) or not name.strip() or len(name) > 200 or not name.isprintable():
        raise SweepError(source, "name", name, "expected a short line of text")
    description = raw.get("description", "")
    if not isinstance(description, str) or len(description) > 2000:
        raise SweepError(source, "description", description, "expected text (at most 2,000 characters)")

    base_written = raw.get("base")
    if not isinstance(base_written, str) or not base_written:
        raise SweepError(source, "base", base_written, "expected the path of an architecture config")
    base_path = os.path.normpath(os.path.join(here, base_written))
    if not os.path.exists(base_path):
        raise SweepError(source, "base", base_written, f"no such file (looked in {os.path.dirname(base_path)})")
    try:
        base = archmod.load_arch(base_path)
    except archmod.ConfigError as exc:
        if exc.source == base_path and exc.field == "<file>":
            raise SweepError(source, "base", base_written, exc.expected) from None
        raise

    traces = _traces(raw.get("traces"), source, here)
    fixed = _fixed(raw.get("fixed", {}), source)
    dims, dims_data = _dims(raw.get("axes", {}), raw.get("linked", []), source)
    taken = set(fixed)
    for paths, _vals in dims:
        for p in paths:
            if p in taken:
                raise SweepError(source, p, None, "set twice (in fixed, axes or linked); give each knob one place")
            taken.add(p)
    if not dims:
        raise SweepError(source, "axes", raw.get("axes"), "empty grid: expected at least one axis or linked group")
    rules = cons.parse_rules(raw.get("keep_if", []), source, "keep_if")
    objectives = _objectives(raw.get("objectives", ["cycles"]), source)
    phases = _phases(raw.get("refresh_phases", 1), source)
    sampling = _sampling(raw.get("sampling"), source)
    _no_phases_sampled(phases, sampling, source)
    _sampled_objectives(objectives, sampling, source)
    data = {
        "name": name, "description": description, "base": base_written,
        "traces": [w for w, _p in traces], "fixed": fixed, "dims": dims_data,
        "keep_if": copy.deepcopy(raw.get("keep_if", [])), "objectives": objectives,
    }
    if phases != 1:   # a spec without it keeps the identity it had before the key existed
        data["refresh_phases"] = phases
    if sampling:
        data["sampling"] = dict(sampling)
    return Spec(source, name, description, base_path, base, traces, fixed, dims, rules, objectives, data,
                phases, sampling)


def _sampling(value, source):
    """The spec's ``sampling`` mapping checked: None, or the keys given."""
    from ..trace.sample import MAX_EVERY, MAX_WARMUP

    if value is None:
        return None
    if not isinstance(value, dict) or not value:
        raise SweepError(source, "sampling", value,
                         "expected a mapping with prefill: K and/or decode: K (and warmup: N with decode)")
    unknown = [(f"sampling.{k}", value[k], closest(k, SAMPLING_KEYS)) for k in value if k not in SAMPLING_KEYS]
    if unknown:
        raise unknown_keys_error(SweepError, source, unknown)
    if "prefill" not in value and "decode" not in value:
        raise SweepError(source, "sampling", value, "expected prefill: K and/or decode: K")
    if "warmup" in value and "decode" not in value:
        raise SweepError(source, "sampling.warmup", value["warmup"], "expected only with sampling.decode")
    for key, lo, hi in (("prefill", 2, MAX_EVERY), ("decode", 2, MAX_EVERY), ("warmup", 0, MAX_WARMUP)):
        v = value.get(key, lo)
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            raise SweepError(source, f"sampling.{key}", v, f"expected a whole number from {lo} to {hi:,}")
    return {k: value[k] for k in SAMPLING_KEYS if k in value}


def _sampled_objectives(objectives, sampling, source):
    for i, objective in enumerate(objectives if sampling else ()):
        if objective not in SAMPLED_OBJECTIVES:
            raise SweepError(source, f"objectives[{i}]", objective,
                             f"expected one of {', '.join(SAMPLED_OBJECTIVES)} with sampling: a sampled point's "
                             "other figures are its simulated part's")


def _no_phases_sampled(phases, sampling, source):
    if sampling and phases != 1:
        raise SweepError(source, "refresh_phases", phases,
                         "expected 1 with sampling: each phase's run would be of the sampled part")


def _phases(value, source):
    if value == "auto":
        return value
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= MAX_PHASES:
        raise SweepError(source, "refresh_phases", value,
                         f"expected a whole number from 1 (as configured) to {MAX_PHASES}, or auto: the places "
                         "in the refresh schedule each point is run at")
    return value


def _traces(value, source, here):
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        raise SweepError(source, "traces", value, "expected a list of one or more trace paths")
    out, seen = [], set()
    if len(value) > MAX_TRACES:
        raise SweepError(source, "traces", len(value), f"expected at most {MAX_TRACES} traces")
    for i, t in enumerate(value):
        if not isinstance(t, str) or not t:
            raise SweepError(source, f"traces[{i}]", t, "expected the path of a trace (.npz or .yaml)")
        p = os.path.normpath(os.path.join(here, t))
        if not os.path.exists(p):
            raise SweepError(source, f"traces[{i}]", t, f"no such file (looked in {os.path.dirname(p)})")
        if not os.path.isfile(p):
            raise SweepError(source, f"traces[{i}]", t, "is a folder or device, expected a trace file")
        if p in seen:
            raise SweepError(source, f"traces[{i}]", t, "listed twice")
        seen.add(p)
        out.append((t, p))
    return out


def _knob(path, source, field):
    if not isinstance(path, str) or archmod.field_for(path) is None:
        raise SweepError(source, field, path, "no such config knob" + closest(path, archmod.knob_paths()))
    return archmod.field_for(path)


def _fixed(value, source):
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise SweepError(source, "fixed", value, "expected a mapping of dotted knob paths to values")
    for path, v in value.items():
        _knob(path, source, f"fixed.{path}")
        _scalar(v, source, f"fixed.{path}")
    return dict(value)


def _scalar(v, source, field):
    if isinstance(v, (dict, list)) or v is None:
        raise SweepError(source, field, v, "expected a single value (number, text or true/false)")
    if isinstance(v, float) and not math.isfinite(v):
        raise SweepError(source, field, v, "expected a finite number")
    if isinstance(v, int) and not isinstance(v, bool) and abs(v) > 2 ** 63:
        raise SweepError(source, field, v, "expected a number of at most 2**63 in size")
    if isinstance(v, str) and (len(v) > 1000 or not v.isprintable()):
        raise SweepError(source, field, v, "expected a short line of text")
    return v


def _dims(axes, linked, source):
    dims, data = [], []
    if axes is None:
        axes = {}
    if not isinstance(axes, dict):
        raise SweepError(source, "axes", axes, "expected a mapping of dotted knob paths to value lists or ranges")
    for path, spec in axes.items():
        field = f"axes.{path}"
        _knob(path, source, field)
        vals = values_of(spec, source, field)
        dims.append(([path], [(v,) for v in vals]))
        data.append({"paths": [path], "values": [[v] for v in vals]})
    if linked is None:
        linked = []
    if not isinstance(linked, list) or len(linked) > MAX_LINKED:
        raise SweepError(source, "linked", linked, f"expected a list of at most {MAX_LINKED} groups, each a "
                         "mapping of paths to value lists")
    for g, group in enumerate(linked):
        gfield = f"linked[{g}]"
        if not isinstance(group, dict) or not group:
            raise SweepError(source, gfield, group, "expected a mapping of dotted knob paths to value lists")
        paths, columns = [], []
        for path, spec in group.items():
            field = f"{gfield}.{path}"
            _knob(path, source, field)
            columns.append(values_of(spec, source, field, unique=False))
            paths.append(path)
        lengths = {len(c) for c in columns}
        if len(lengths) > 1:
            raise SweepError(source, gfield, {p: len(c) for p, c in zip(paths, columns)},
                             "expected value lists of one length (a linked group advances together)")
        rows = list(zip(*columns))
        if len(set(map(_hashable, rows))) != len(rows):
            raise SweepError(source, gfield, rows, "a combination of values repeats")
        dims.append((paths, rows))
        data.append({"paths": paths, "values": [list(r) for r in rows]})
    return dims, data


def _hashable(row):
    return json.dumps(row, sort_keys=True)


def values_of(spec, source, field, unique=True):
    """The values one axis takes: a list, or a ``{from, to, factor|step}`` range."""
    if isinstance(spec, list):
        if not spec:
            raise SweepError(source, field, spec, "empty grid: expected at least one value")
        if len(spec) > MAX_VALUES:
            raise SweepError(source, field, len(spec), f"expected at most {MAX_VALUES} values on one axis")
        vals = [_scalar(v, source, f"{field}[{i}]") for i, v in enumerate(spec)]
    elif isinstance(spec, dict):
        vals = _range(spec, source, field)
    else:
        vals = [_scalar(spec, source, field)]
    if len(vals) > MAX_VALUES:
        raise SweepError(source, field, len(vals), f"expected at most {MAX_VALUES} values on one axis")
    if unique and len(set(map(_hashable, vals))) != len(vals):
        raise SweepError(source, field, vals, "a value repeats")
    return vals


def _range(spec, source, field):
    keys = set(spec)
    allowed = {"from", "to", "factor", "step"}
    for k in keys - allowed:
        raise SweepError(source, f"{field}.{k}", spec[k], "unknown key" + closest(k, sorted(allowed)))
    if not {"from", "to"} <= keys or len(keys & {"factor", "step"}) != 1:
        raise SweepError(source, field, spec, "expected {from, to, factor} or {from, to, step}")
    nums = {}
    for k in sorted(keys):
        v = spec[k]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or abs(v) > 1e15 or \
                (isinstance(v, float) and not math.isfinite(v)):
            raise SweepError(source, f"{field}.{k}", v, "expected a finite number of at most 1e15 in size")
        nums[k] = v
    lo, hi = nums["from"], nums["to"]
    if hi < lo:
        raise SweepError(source, f"{field}.to", hi, f"expected at least from={lo}")
    whole = all(isinstance(v, int) for v in nums.values())
    out = []
    if "factor" in nums:
        f = nums["factor"]
        if f <= 1:
            raise SweepError(source, f"{field}.factor", f, "expected a number > 1")
        if lo <= 0:
            raise SweepError(source, f"{field}.from", lo, "expected a number > 0 for a factor range")
        ratio = math.log(hi / lo) / math.log(f)
        if not ratio < MAX_VALUES:
            raise SweepError(source, field, spec, f"expected at most {MAX_VALUES} values on one axis")
        n = int(math.floor(ratio + 1e-9)) + 1
        if n > MAX_VALUES:
            raise SweepError(source, field, spec, f"expected at most {MAX_VALUES} values on one axis")
        out = [lo * f ** i for i in range(n)]
    else:
        s = nums["step"]
        if s <= 0:
            raise SweepError(source, f"{field}.step", s, "expected a number > 0")
        steps = (hi - lo) / s
        if not steps < MAX_VALUES:
            raise SweepError(source, field, spec, f"expected at most {MAX_VALUES} values on one axis")
        n = int(math.floor(steps + 1e-9)) + 1
        if n > MAX_VALUES:
            raise SweepError(source, field, spec, f"expected at most {MAX_VALUES} values on one axis")
        out = [lo + s * i for i in range(n)]
    if whole:
        return [int(v) for v in out]
    # round away float noise (0.1 * 3) so values read as written and hash stably
    return [float(f"{v:.12g}") for v in out]


def _objectives(value, source):
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        raise SweepError(source, "objectives", value, f"expected a list drawn from {', '.join(OBJECTIVES)}")
    out = []
    for i, name in enumerate(value):
        if not isinstance(name, str) or name not in OBJECTIVES:
            raise SweepError(source, f"objectives[{i}]", name,
                             f"expected one of {', '.join(OBJECTIVES)}" + closest(name, OBJECTIVES))
        if name in out:
            raise SweepError(source, f"objectives[{i}]", name, "listed twice")
        out.append(name)
    return out
