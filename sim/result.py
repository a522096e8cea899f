"""Result of one simulated run: the document ``attnsim run --json`` writes.

:func:`build_result` turns the engine's raw state (unit logs, channel pool,
buffers, counters) into a plain, JSON-ready mapping. :class:`Result` wraps it;
``Result.to_dict()`` is exactly the ``--json`` document. Nothing here runs the
simulation: data flows engine -> stats -> result.
"""

from __future__ import annotations

import copy
import json
import math
from collections import defaultdict
from itertools import chain
from operator import itemgetter

import numpy as np

from . import __version__
from .model.area import area_section
from .model.bounds import bounds_from_counts
from .model.energy import energy_section

UNIT_ORDER = ("dram", "fetch", "dot", "dot_pv", "softmax", "topk")


class Result:
    """One run's measurements. ``to_dict()`` gives the result document."""

    def __init__(self, doc: dict, intervals: dict | None = None):
        self._doc = doc
        self.intervals = intervals or {}

    def to_dict(self) -> dict:
        return copy.deepcopy(self._doc)

    def __getitem__(self, key: str):
        return self._doc[key]

    @property
    def cycles(self) -> int:
        return self._doc["cycles"]

    def to_json(self) -> str:
        return json.dumps(self._doc, indent=2, sort_keys=True) + "\n"

    def __repr__(self) -> str:
        d = self._doc
        arch = (d.get("arch") or {}).get("name")
        trace = (d.get("trace") or {}).get("name")
        return f"Result({arch!r} x {trace!r}: {d.get('cycles', 0):,} cycles, {d.get('seconds', 0.0) * 1e6:,.2f} us)"

    def _repr_html_(self) -> str:
        import html

        d = self._doc
        units = d.get("units") or {}
        rows = "".join(
            f"<tr><td>{html.escape(str(u))}</td>"
            + "".join(f"<td>{float(v.get(k, 0.0)):.1%}</td>" for k in ("busy", "starved", "blocked", "idle"))
            + "</tr>" for u, v in units.items() if isinstance(v, dict))
        dram = d.get("dram") or {}
        return (f"<div><b>{html.escape(repr(self))}</b><br>DRAM {float(dram.get('achieved_gbps', 0.0)):,.1f} of "
                f"{float(dram.get('peak_gbps', 0.0)):,.1f} GB/s"
                f"<table><tr><th>unit</th><th>busy</th><th>starved</th><th>blocked</th><th>idle</th></tr>"
                f"{rows}</table></div>")

    def to_frame(self):
        """A one-row pandas DataFrame: the figures and knobs under the sweep table's column names."""
        from .columns import result_frame

        return result_frame(self._doc)

    def unit_frame(self):
        """A pandas DataFrame with a row per unit: state fractions and ``stall.<cause>`` fractions."""
        from .columns import unit_frame

        return unit_frame(self._doc)


def _round(x, nd=12):
    """Floats to ``nd`` significant digits, so documents are stable and readable."""
    if isinstance(x, float):
        if math.isinf(x) or math.isnan(x):
            return None
        return float(f"{x:.{nd}g}")
    if isinstance(x, dict):
        return {k: _round(v, nd) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_round(v, nd) for v in x]
    if isinstance(x, np.generic):
        return _round(x.item(), nd)
    return x


def _dram_states(pool, fetch_state, end):
    """Classify the pool's non-busy channel time by what the fetch unit was doing.

    A channel with nothing to move is starved for the same reason the fetch
    unit was not issuing (a full buffer, a dependency...). Averaged over
    channels, so fractions stay per unit and sum to 1.
    """
    n = pool.n
    iv = fetch_state.intervals
    m = len(iv)
    a = np.fromiter(map(itemgetter(0), iv), np.float64, m)
    b = np.fromiter(map(itemgetter(1), iv), np.float64, m)
    b_end = np.minimum(b, end)
    kept = np.flatnonzero(b_end > a)
    # after the fetch unit's last interval: nothing left to fetch
    t0 = np.append(a[kept], b[kept[-1]] if len(kept) else 0.0)
    t1 = np.maximum(np.append(b_end[kept], end), t0)
    # one code per distinct (state, cause) of the fetch unit, then its class here
    codes = defaultdict(lambda: len(codes))
    raw = np.fromiter(map(codes.__getitem__, zip(map(itemgetter(2), iv), map(itemgetter(3), iv))),
                      np.intp, m)[kept]
    classes = {}
    class_of = np.empty(len(codes), dtype=np.intp)
    for (state, cause), code in codes.items():
        key = (("idle", None) if state == "idle" else
               ("starved", "fetch_issue") if state == "busy" else ("starved", cause or "fetch"))
        class_of[code] = classes.setdefault(key, len(classes))
    keys = list(classes)
    busy_total = 0.0
    busy_in = np.zeros(len(t0))
    for busy in pool.busy_intervals:
        if not busy:
            continue
        arr = np.fromiter(chain.from_iterable(busy), np.float64, 2 * len(busy)).reshape(-1, 2)
        arr = np.clip(arr, 0, end)
        dur = arr[:, 1] - arr[:, 0]
        c = np.cumsum(dur)
        xs = arr.reshape(-1)
        ys = np.empty(len(xs))
        ys[0::2] = c - dur
        ys[1::2] = c
        busy_total += float(c[-1])
        busy_in += np.interp(t1, xs, ys) - np.interp(t0, xs, ys)
    free = np.maximum((t1 - t0) * n - busy_in, 0.0)
    # sums per class in time order (bincount adds in input order), classes in order of first use
    cls = class_of[raw]
    sums = np.bincount(cls, weights=free[:-1], minlength=len(keys)).tolist()
    labels, first = np.unique(cls, return_index=True)
    totals = {keys[k]: sums[k] for k in labels[np.argsort(first)].tolist()}
    totals[("idle", None)] = totals.get(("idle", None), 0.0) + float(free[-1])
    scale = n * end if end else 1.0
    frac = {"busy": busy_total / scale if end else 0.0, "starved": 0.0, "blocked": 0.0, "idle": 0.0}
    stalls = {}
    for (state, cause), t in totals.items():
        frac[state] += t / scale
        if state == "starved":
            stalls[cause] = stalls.get(cause, 0.0) + t / scale
    frac["stalls"] = dict(sorted(stalls.items(), key=lambda kv: -kv[1]))
    return frac


def build_result(stats):
    """Assemble the result document from a finished run's :class:`~sim.engine.stats.RunStats`."""
    arch, trace, prog, pool, states = stats.arch, stats.trace, stats.prog, stats.pool, stats.states
    buffers, fetch_stats, step_times, end = stats.buffers, stats.fetch_stats, stats.step_times, stats.end
    engine = stats.engine
    clock = arch.clock_ghz * 1e9
    cycles = int(math.ceil(end - 1e-9))
    seconds = cycles / clock
    units = {}
    for name, st in states.items():
        st.finish(end)
        units[name] = st.summary(end)
    units["dram"] = _dram_states(pool, states["fetch"], end)
    units = {k: units[k] for k in UNIT_ORDER if k in units}

    # per step / layer / stage cycles: a step lasts from the previous step's end to its own
    per_step = []
    prev = 0.0
    for t in step_times:
        per_step.append(t - prev)
        prev = t
    per_layer, per_stage = {}, {}
    for s, dur in zip(trace.steps, per_step):
        per_layer[str(s.layer)] = per_layer.get(str(s.layer), 0.0) + dur
        per_stage[s.stage] = per_stage.get(s.stage, 0.0) + dur

    c = prog.counts
    macs = c["macs_qk"] + c["macs_lsb"] + c["macs_pv"]
    compulsory = prog.compulsory_bytes
    macs_pv_by_dim = {}
    for s in trace.steps:
        macs_pv_by_dim[s.head_dim] = macs_pv_by_dim.get(s.head_dim, 0) + s.macs()[1]
    bounds = bounds_from_counts(arch, prog.macs_by_dim, macs_pv_by_dim, c["softmax_elements"],
                                c["topk_comparisons"], fetch_stats["bytes"], compulsory)
    dram = pool.report(end)
    dram.update({
        "compulsory_bytes": int(compulsory),
        "fetched_over_compulsory": fetch_stats["bytes"] / compulsory if compulsory else 1.0,
        "bytes_by_plane": {k[6:]: int(v) for k, v in fetch_stats.items() if k.startswith("bytes_")},
    })
    decode_steps = sum(1 for s in trace.steps if s.stage == "decode")
    layers = len({s.layer for s in trace.steps})
    doc = {
        "simulator": {"name": "attnsim", "version": __version__},
        "arch": {"name": arch.name, "source": str(arch.source), "config": arch.to_dict()},
        "trace": {"name": trace.name, "source": str(trace.source), "digest": trace.digest(),
                  "steps": len(trace.steps)},
        "engine": dict(engine),
        "cycles": cycles,
        "seconds": seconds,
        "per_stage_cycles": per_stage,
        "per_layer_cycles": per_layer,
        "per_step_cycles": per_step,
        "throughput": {
            "macs_per_cycle": macs / end if end else 0.0,
            "multiplier_utilization": macs / end / arch.dot.multipliers if end else 0.0,
            "decode_tokens_per_s": (decode_steps / layers) / per_stage["decode"] * clock
            if per_stage.get("decode") else None,
        },
        "units": units,
        "dram": dram,
        "fetch": {"transactions": fetch_stats["transactions"], "requests": fetch_stats["requests"]},
        "buffers": {name: b.report() for name, b in buffers.items()},
        "compute": {
            "macs": macs, "macs_qk": c["macs_qk"], "macs_lsb_recompute": c["macs_lsb"],
            "macs_pv": c["macs_pv"], "softmax_elements": c["softmax_elements"],
            "topk_comparisons": c["topk_comparisons"], "topk_layer_selections": c["topk_selections"],
            "value_selections": c["value_selections"],
        },
        "bounds": bounds,
        "verdict": _verdict(units, bounds, cycles),
    }
    doc["energy"] = energy_section(arch, doc, trace)
    doc["area"] = area_section(arch)
    intervals = {name: st.intervals for name, st in states.items()}
    intervals["dram"] = pool.busy_intervals
    return Result(_round(doc), intervals)


def _verdict(units, bounds, cycles):
    """Which unit limits the run and what held it back most, from the measurements.

    ``largest_stall`` is the busiest unit's own largest stall (what to fix to
    speed it up); ``worst_stall`` the largest stall of any unit.
    """
    busiest = max(units, key=lambda k: units[k]["busy"])
    own = units[busiest]["stalls"]
    cause = max(own, key=own.get) if own else None
    worst_unit, worst_cause, worst = None, None, 0.0
    for name, u in units.items():
        for c, f in u["stalls"].items():
            if f > worst:
                worst_unit, worst_cause, worst = name, c, f
    return {
        "busiest_unit": busiest,
        "busiest_utilization": units[busiest]["busy"],
        "bound": bounds["bound"],
        "roofline_fraction": bounds["roofline_cycles"] / cycles if cycles else 0.0,
        "largest_stall": {"unit": busiest, "cause": cause, "fraction": own.get(cause, 0.0) if cause else 0.0},
        "worst_stall": {"unit": worst_unit, "cause": worst_cause, "fraction": worst},
    }


def format_summary(result):
    """A readable multi-line summary for the terminal."""
    d = result.to_dict() if isinstance(result, Result) else result
    lines = []
    lines.append(f"arch {d['arch']['name']}  x  trace {d['trace']['name']}  "
                 f"(attnsim {d['simulator']['version']}, grain {d['engine']['grain_rows']} rows)")
    lines.append(f"  cycles {d['cycles']:,}   time {d['seconds'] * 1e6:,.2f} us   "
                 + "   ".join(f"{k} {v:,.0f}" for k, v in d["per_stage_cycles"].items()))
    b = d["bounds"]
    lines.append(f"  bounds: compute {b['compute_cycles']:,.0f}  memory {b['memory_cycles']:,.0f}  "
                 f"-> {b['bound']}-bound; run is at {d['verdict']['roofline_fraction']:.0%} of the roofline")
    dr = d["dram"]
    lines.append(f"  memory: {dr['bytes'] / 1e6:,.3f} MB fetched ({dr['fetched_over_compulsory']:.2f}x compulsory), "
                 f"{dr['achieved_gbps']:,.1f} of {dr['peak_gbps']:,.1f} GB/s")
    lines.append(f"  compute: {d['compute']['macs']:,} MACs, "
                 f"{d['throughput']['multiplier_utilization']:.0%} of multiplier peak")
    lines.append("  unit        busy  starved  blocked   idle   top stalls")
    for name, u in d["units"].items():
        top = ", ".join(f"{c} {f:.0%}" for c, f in list(u["stalls"].items())[:3] if f >= 0.005)
        lines.append(f"  {name:<9} {u['busy']:6.1%} {u['starved']:8.1%} {u['blocked']:8.1%} "
                     f"{u['idle']:6.1%}   {top}")
    v = d["verdict"]
    ls = v["largest_stall"]
    lines.append(f"  verdict: busiest unit {v['busiest_unit']} ({v['busiest_utilization']:.0%} busy); "
                 + (f"its largest stall: {ls['cause']} ({ls['fraction']:.0%} of the run)"
                    if ls["cause"] else "it never stalls"))
    return "\n".join(lines)

