"""Plan: the spec's grid expanded into the points a sweep must finish.

Each grid point (one value tuple per dimension) is applied to the base config
over the ``fixed`` overrides, filtered by the ``keep_if`` rules, validated,
and paired with every trace. A planned point's key hashes what its result
depends on: the resolved config, the trace digest and the simulator build. A
point whose config does not validate stays in the plan, carrying its error,
so the store records why it has no result.
"""

import copy
import hashlib
import itertools
import json

from ..arch import _set_path, load_arch
from ..errors import ConfigError
from ..trace.files import load_trace
from . import constraints as cons
from .spec import MAX_POINTS, SweepError
from .worker import build_id


class PlannedPoint:
    """One (config, trace) pair to run."""

    __slots__ = ("key", "point", "trace", "trace_path", "trace_digest", "config", "error", "order", "phases",
                 "sampling")

    def __init__(self, key, point, trace, trace_path, trace_digest, config, error, order, phases=1, sampling=None):
        self.key = key
        self.point = point                # {dotted path: value} of the axes
        self.trace = trace                # trace name
        self.trace_path = trace_path
        self.trace_digest = trace_digest
        self.config = config              # resolved config dict, or None when invalid
        self.error = error                # one-line config error, or None
        self.order = order
        self.phases = phases              # places in the refresh schedule it runs at (spec refresh_phases)
        self.sampling = sampling          # the spec's sampling, or None (run whole)

    def __repr__(self):
        return f"PlannedPoint({self.trace}, {self.point})"


class Plan:
    """All points of a spec, in grid order (trace-major), plus what was filtered."""

    def __init__(self, spec, points, filtered, traces, build):
        self.spec = spec
        self.points = points
        self.filtered = filtered          # grid points removed by keep_if
        self.traces = traces              # [(name, path, digest)]
        self.build = build

    @property
    def keys(self):
        return [p.key for p in self.points]

    def trace_digests(self):
        return [d for _n, _p, d in self.traces]


def point_key(config, trace_digest, build, phases=1, sampling=None):
    what = {"config": config, "trace_digest": trace_digest, "simulator": build}
    if phases != 1:   # one run only keeps the key it had before refresh phases existed
        what["refresh_phases"] = phases
    if sampling:
        what["sampling"] = sampling
    text = json.dumps(what, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _error_key(base, overrides, trace_digest, build):
    text = json.dumps({"base": base, "overrides": overrides, "trace_digest": trace_digest,
                       "simulator": build, "invalid": True}, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def make_plan(spec):
    """Expand ``spec`` into a :class:`Plan`; input errors are raised here, before anything runs."""
    if spec.grid_size > MAX_POINTS:
        raise SweepError(spec.source, "axes", spec.grid_size, f"expected at most {MAX_POINTS:,} grid points")
    build = build_id()
    traces = []
    names = {}
    for i, (written, path) in enumerate(spec.traces):
        tr = load_trace(path)
        if tr.name in names:
            raise SweepError(spec.source, f"traces[{i}]", written,
                             f"has the same trace name {tr.name!r} as {names[tr.name]}; names must differ")
        names[tr.name] = written
        if spec.sampling and "decode" in spec.sampling:   # a trace with nothing to leave out is refused now
            from ..trace.sample import sample_decode

            sample_decode(tr, spec.sampling["decode"], spec.sampling.get("warmup"), source=spec.source,
                          fields=("sampling.decode", "sampling.warmup"))
        traces.append((tr.name, path, tr.digest()))
    base = spec.base.to_dict()
    grid = []
    filtered = 0
    first_error = None
    for combo in itertools.product(*(vals for _paths, vals in spec.dims)):
        point = {}
        for (paths, _vals), tup in zip(spec.dims, combo):
            point.update(zip(paths, tup))
        raw = copy.deepcopy(base)
        overrides = {**spec.fixed, **point}
        for path, value in overrides.items():
            _set_path(raw, path, value, spec.source)
        if not cons.keeps(spec.rules, raw, spec.source, point):
            filtered += 1
            continue
        try:
            config = load_arch(raw, source=spec.base_path).to_dict()
            error = None
        except ConfigError as exc:
            config, error = None, f"ConfigError: {exc}"
            first_error = first_error or exc
        grid.append((point, overrides, config, error))
    if not grid:
        raise SweepError(spec.source, "keep_if", spec.data["keep_if"],
                         f"removes every one of the {spec.grid_size} grid points; nothing to run")
    if first_error is not None and all(g[2] is None for g in grid):
        raise SweepError(spec.source, "axes", first_error.value,
                         f"no grid point is a valid config; the first: {first_error}")
    points, seen = [], set()
    order = 0
    for name, path, digest in traces:
        for point, overrides, config, error in grid:
            if config is not None:
                key = point_key(config, digest, build, spec.phases, spec.sampling)
            else:
                key = _error_key(base, overrides, digest, build)
            if key in seen:   # two grid points resolve to one config (e.g. 32 and 32.0)
                continue
            seen.add(key)
            points.append(PlannedPoint(key, point, name, path, digest, config, error, order, spec.phases,
                                       spec.sampling))
            order += 1
    return Plan(spec, points, filtered, traces, build)
