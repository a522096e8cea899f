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

import numpy as np

from .version import __version__
from . import formats as fm
from .build import build_id
from .columns import UNIT_ORDER, result_frame, unit_frame
from .costs.area import area_section
from .costs.energy import energy_section
from .engine.program import COPIES, MIN_STRATA
from .engine.stats import StallSplit, busy_curve
from .limits import classify, cause_text, verdict_of
from .model.bounds import bounds_from_counts
from .model.dense import dense_macs


class IntervalLogs:
    """A run's interval logs as arrays (each unit's :meth:`~sim.engine.stats.UnitState.interval_arrays`,
    the pool's :meth:`~sim.engine.dram.ChannelPool.busy_arrays`), made into the lists of
    :attr:`Result.intervals` only when someone reads them (a long run logs millions)."""

    def __init__(self, states: dict, pool):
        self.units = {name: [np.array(a) if isinstance(a, np.ndarray) else a for a in st.interval_arrays()]
                      for name, st in states.items()}
        self.bus = [np.array(iv) for iv in pool.busy_arrays()]

    def lists(self) -> dict:
        out = {}
        for name, (t0, t1, code, keys) in self.units.items():
            out[name] = [[a, b, *keys[c]] for a, b, c in zip(t0.tolist(), t1.tolist(), code.tolist())]
        out["dram"] = [iv.tolist() for iv in self.bus]
        return out


class Result:
    """One run's measurements. ``to_dict()`` gives the result document."""

    def __init__(self, doc: dict, intervals: dict | IntervalLogs | None = None):
        self._doc = doc
        self._intervals: dict | IntervalLogs = intervals or {}

    @property
    def intervals(self) -> dict:
        """Per unit, the state intervals ``[[t0, t1, state, cause], ...]``; per DRAM channel,
        the data bus's busy ``[[begin, end], ...]`` (empty unless a timeline was kept)."""
        iv = self._intervals
        if isinstance(iv, IntervalLogs):
            iv = self._intervals = iv.lists()
        return iv

    @intervals.setter
    def intervals(self, value: dict | None) -> None:
        self._intervals = value or {}

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
        return result_frame(self._doc)

    def unit_frame(self):
        """A pandas DataFrame with a row per unit: state fractions and ``stall.<cause>`` fractions."""
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


def _dram_states(pool, fetch_state, end, folded=None):
    """Classify the pool's non-busy channel time by what the fetch unit was doing.

    A channel with nothing to move is starved for the same reason the fetch
    unit was not issuing (a full buffer, a dependency...). Averaged over
    channels, so fractions stay per unit and sum to 1. ``folded``: the part
    summed during the run (:class:`~sim.engine.stats.BusyFold`); the fetch
    intervals still logged are summed here, in the same blocks.
    """
    n = pool.n
    a, b, raw_all, fetch_keys = fetch_state.interval_arrays()
    split = folded.split if folded is not None else StallSplit(n)
    # each channel's busy time as a cumulative curve: busy cycles before any instant
    busy_total = folded.total if folded is not None else 0.0
    curves = []
    for busy in pool.busy_arrays():
        if not len(busy):
            continue
        xs, ys = busy_curve(np.clip(busy, 0, end))
        curves.append((xs, ys))
        busy_total += float(ys[-1])
    split.add_log(a, b, raw_all, fetch_keys, end, folded.busy_within if folded is not None else None, curves)
    # after the fetch unit's last interval: nothing left to fetch
    totals = split.totals()
    last_end = split.last_end
    tail = split.free_in(np.array([last_end]), np.array([max(end, last_end)]), None, curves)
    totals[("idle", None)] = totals.get(("idle", None), 0.0) + float(tail[0])
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
    units["dram"] = _dram_states(pool, states["fetch"], end, stats.folded)
    units = {k: units[k] for k in UNIT_ORDER if k in units}

    # per step / layer / stage cycles: what a step added to the run, from the latest end of the
    # steps listed before it to its own (none if it ended earlier: requests decoded together
    # overlap); the last also carries the run's tail (writes still reaching memory), so they
    # sum to the run's cycles
    per_step = []
    prev = 0.0
    for t in step_times:
        per_step.append(t - prev if t > prev else 0.0)
        prev = max(prev, t)
    last_step_end = prev
    if per_step:
        per_step[-1] += end - last_step_end
    per_layer, per_stage = {}, {}
    for s, dur in zip(trace.steps, per_step):
        per_layer[str(s.layer)] = per_layer.get(str(s.layer), 0.0) + dur
        per_stage[s.stage] = per_stage.get(s.stage, 0.0) + dur

    c = prog.counts
    macs = c["macs_qk"] + c["macs_lsb"] + c["macs_pv"]
    compulsory = prog.compulsory_bytes
    bounds = bounds_from_counts(arch, prog.macs_by_dim, prog.macs_pv_by_dim, c["softmax_elements"],
                                c["topk_comparisons"], fetch_stats["bytes"], compulsory)
    dram = pool.report(end)
    dram.update({
        "compulsory_bytes": int(compulsory),
        "fetched_over_compulsory": fetch_stats["bytes"] / compulsory if compulsory else 1.0,
        "bytes_by_plane": {k[6:]: int(v) for k, v in fetch_stats.items() if k.startswith("bytes_")},
    })
    decode_steps = sum(1 for s in trace.steps if s.stage == "decode")
    layers = len({s.layer for s in trace.steps})
    dense = dense_macs(trace)
    if prog.block_sample:   # the part's share of the dense work: the share of the work it made
        whole = sum(sum(st.macs()) for st in trace.steps)
        dense = dense * macs / whole if whole else 0
    planes = dram["bytes_by_plane"]
    p = arch.precision
    doc = {
        "simulator": {"name": "attnsim", "version": __version__, "build": build_id()},
        "arch": {"name": arch.name, "source": str(arch.source), "config": arch.to_dict()},
        "trace": {"name": _trace_name(trace, prog),
                  "source": str(trace.source), "digest": trace.digest(),
                  "steps": len(trace.steps), "head_dims": sorted({s.head_dim for s in trace.steps})},
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
            # 1 MAC = 2 operations (common practice)
            "ops_per_s": 2 * macs / seconds if seconds else 0.0,
            "dense_equivalent_ops_per_s": 2 * dense / seconds if seconds else 0.0,
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
            "macs_by_head_dim": {str(d): int(m) for d, m in sorted(prog.macs_by_dim.items())},
            "dense_macs": dense,
            "executed_over_dense": macs / dense if dense else None,
        },
        "bounds": bounds,
    }
    # writes still reaching memory after the last step ended: part of the run, no step's work
    dram["write_tail_cycles"] = end - last_step_end if step_times else 0.0
    # bits fetched per key element: the MSB plane always, the LSB plane where it was refetched
    dram["effective_key_bits"] = (p.k_msb_bits * (planes["K"] + planes.get("KL", 0)) / planes["K"]
                                  if planes.get("K") else None)
    if "sample_prefill" in engine:
        doc["prefill_sample"] = _block_estimate(prog, step_times, end, engine["sample_prefill"], seconds / cycles
                                                if cycles else 0.0, cycles)
    doc["verdict"] = classify(doc)
    doc["energy"] = energy_section(arch, doc, trace, prog.made_rows)
    doc["area"] = area_section(arch)
    intervals = IntervalLogs(states, pool) if stats.timeline else None
    return Result(_round(doc), intervals)


def _trace_name(trace, prog):
    """The trace's name, ``-sampled`` added for a run that made only part of its prefill
    blocks (it is not the trace's run); a decode-sampled part's name has it already."""
    if not prog.block_sample or trace.name.endswith("-sampled"):
        return trace.name
    return f"{trace.name}-sampled"[:200]


def _block_estimate(prog, step_times, end, every, per_cycle, simulated):
    """The whole trace's cycles and seconds estimated from a run that made the middle query
    block of each stratum of about ``every`` blocks of its long prefill steps, twice
    (``engine.sample_prefill``):
    the ``prefill_sample`` section. The run's time is split as ``per_step_cycles`` splits it,
    with each made block's end (its last p.V) as a mark of its own before its step's end: a
    block's share is what it added to the run. Each copy's share stands for its stratum,
    weighed by the stratum's query rows over its own (their mean does, in the estimate); the
    rest (other steps, a step's time after its last block, the write tail) counts once. The
    copies give an estimate each, and so do two half-samples of strata; half of each pair's
    distance over the estimate is its spread.
    ``per_step_cycles`` is the estimate split by step as the document's own list splits the
    run (the tail with the last step), for a decode sample's estimate to weigh
    (:func:`sim.run.estimate_whole`)."""
    rest = 0.0
    part = [[0.0, 0.0] for _ in range(COPIES)]   # [copy][half]: weight x share
    stands = [0.0, 0.0]   # query rows stood for, in made blocks' rows
    blocks = 0
    per_step = []
    prev = 0.0
    for s, t_end in enumerate(step_times):
        mine = 0.0
        for (weight, half, k, size), due in zip(prog.block_sample.get(s, ()), prog.block_dues.get(s, ())):
            share = weight * max(due.at - prev, 0.0)
            part[k][half] += share
            mine += share / COPIES
            if k == 0:
                stands[half] += weight
                blocks += size
            prev = max(prev, due.at)
        rest += max(t_end - prev, 0.0)
        per_step.append(mine + max(t_end - prev, 0.0))
        prev = max(prev, t_end)
    rest += max(end - prev, 0.0)
    if per_step:
        per_step[-1] += max(end - prev, 0.0)
    by_copy = [rest + sum(p) for p in part]
    cycles = sum(by_copy) / COPIES
    out = {"every": every, "sampled_steps": len(prog.block_sample), "query_blocks": blocks,
           "simulated_query_blocks": sum(len(v) for v in prog.block_sample.values()),
           "simulated_cycles": simulated, "cycles": round(cycles), "seconds": round(cycles) * per_cycle,
           "copy_cycles": [round(c) for c in by_copy],
           "copy_spread": (max(by_copy) - min(by_copy)) / 2 / cycles if cycles else 0.0,
           "per_step_cycles": per_step}
    if stands[0] and stands[1]:
        halves = [rest + sum(p[h] for p in part) / COPIES * (stands[0] + stands[1]) / stands[h] for h in (0, 1)]
        out["half_cycles"] = [round(c) for c in halves]
        out["half_sample_spread"] = abs(halves[0] - halves[1]) / 2 / cycles if cycles else 0.0
    return out


def engine_text(doc):
    """The settings a run was simulated with, in one phrase (build, grain, issue window, seed)."""
    sim_ = doc["simulator"]
    eng = doc.get("engine", {})
    window = doc["arch"]["config"].get("fetch", {}).get("issue_window", 0)
    return (f"attnsim {sim_.get('build') or sim_['version']}, grain {eng.get('grain_rows', '?')} rows, "
            f"issue window {window}, seed {eng.get('seed', '?')}"
            + (f", prefill blocks sampled about 1 in {eng['sample_prefill']}" if eng.get("sample_prefill") else ""))


def limit_sentence(doc):
    """What limits the run, in one line, from the classification."""
    v = verdict_of(doc)
    u = doc["units"]
    crit = v["critical_unit"]
    text = f"{v['label']}: {fm.pct(v['share'])} of the time of {crit}, the busiest compute unit"
    if v["limit"] in ("compute", "unit"):
        text = f"{v['label']}: {v['resource']} busy {fm.pct(u[v['resource']]['busy'])} of the run"
    elif v["limit"] in ("memory_bandwidth", "memory_latency"):
        text += f", DRAM at {fm.pct(v['dram_share_of_peak'])} of its peak"
    lanes = v.get("lanes")
    if lanes and v["limit"] == "compute":
        useful = lanes["utilization"].get(v["resource"], 0.0)
        text += f"; useful MACs {fm.pct(useful)} of its multipliers x cycles"
        if lanes["mismatch"]:
            text += (f" (head width {', '.join(map(str, lanes['head_dims']))} on {lanes['lanes']} lanes: "
                     f"{fm.pct(lanes['fill'])} of the lanes busy in a pass)")
    return text


def _refresh_text(d):
    """A run measured at several refresh phases: its range and mean over them. Else, for a run
    short for refresh (:func:`sim.arch.short_for_refresh`): how many refresh intervals it lasts,
    and that where it starts in the refresh schedule can move it."""
    from .arch import load_arch, refresh_intervals, short_for_refresh
    from .errors import InputError

    ph = d.get("refresh_phases")
    if ph:   # measured at several phases (attnsim run --refresh-phases, a sweep's refresh_phases)
        lo, hi = min(ph["cycles"]), max(ph["cycles"])
        return (f"{lo:,} to {hi:,} cycles over {ph['runs']} places in the refresh schedule "
                f"({fm.show(ph['spread'], 'share')} apart); mean {fm.show(ph['mean_cycles'], 'cycles')} = "
                f"{fm.show(ph['mean_seconds'], 'latency')}")
    try:
        arch = load_arch(d["arch"]["config"], source="result document")
    except (InputError, KeyError, TypeError):
        return ""
    if not short_for_refresh(arch, d["cycles"]):
        return ""
    return (f"the run lasts {refresh_intervals(arch, d['cycles']):.1f} refresh intervals (tREFI "
            f"{arch.dram.t_refi_ns:,g} ns): a run this short can move with where it starts in the refresh "
            "schedule (dram.refresh_phase); attnsim report --refresh-phases measures by how much")


SAMPLE_NOISY = 0.01   # half-sample spread above which a sampled estimate is called too noisy to rank by


# the softmax unit's busy share of the run, over the busiest array's, from which it paces a
# prefill-sampled run (see :func:`softmax_paces`)
SOFTMAX_PACES = 0.9
# the largest such error with both checks under 1 % (bench/prefill_conclusions.py --paced --cases 100
# --seed 1, the flag off: 19 of 96 comparisons had such a run more than 1 % off)
SOFTMAX_PACED_OFF = 0.061


def softmax_paces(doc):
    """Whether the softmax unit keeps up with the dot array only just, or not at all, in a run:
    busy at least :data:`SOFTMAX_PACES` of the busiest array's share. A prefill-sampled
    run's estimate then came high with both its checks within 1 % (one layer of 32 query
    heads on 8 K/V heads of width 64, causal prompt, mid with the array's and the softmax's
    work per block equal: +2.2 % at K 4 on a 2k prompt, +4.3 % at K 16 on 8k; with the
    softmax 6 % slower than the array: +4.9 % at K 8 on 2k, copies 0.4 % apart); with the
    softmax 6 to 10 % faster the copies came as far apart as the error. Over 96 drawn
    comparisons near that pace (``bench/prefill_conclusions.py --paced``) none had a run off by
    more than 1 % left unflagged with this flag, 19 without it (up to 6.1 %)."""
    units = doc["units"]
    array = max(units.get(u, {}).get("busy", 0.0) for u in ("dot", "dot_pv"))
    return array > 0 and units.get("softmax", {}).get("busy", 0.0) >= SOFTMAX_PACES * array


def prefill_sample_noisy(doc):
    """Whether a prefill-sampled run's estimate is not to rank designs by: its copies' or its
    half-samples' estimates more than :data:`SAMPLE_NOISY` either side, a datapath with a
    q.K and a p.V array of their own, where a block's time depends on the ones before it
    (``bench/prefill_conclusions.py``: up to 33 % off, 2.3 % with both spreads under 1 %),
    or a run the softmax unit paces (:func:`softmax_paces`)."""
    ps = doc["prefill_sample"]
    separate = doc["arch"]["config"]["dot"]["arrays"] == "separate"
    return (separate or softmax_paces(doc)
            or max(ps.get("copy_spread", 0.0), ps.get("half_sample_spread", 0.0)) > SAMPLE_NOISY)
# layers below which a sampled estimate is not to rank by: the 1024 + 256 synthetic decode on server
# (bench/llm_replay.py's shape) came 1.4 to 2.2 % off at 1 to 4 layers with half-samples within 0.6 %,
# 0.6 % at 8 layers, 0.3 % at 12 and 24
SAMPLE_FEW_LAYERS = 8
SAMPLE_FEW_LAYERS_OFF = 0.022   # the largest of those errors


def _sample_text(d):
    """A run of a decode-sampled part: what it simulated and the whole trace's estimate."""
    ds = d.get("decode_sample")
    if not ds:
        return ""
    text = (f"one decode token in {ds['every']} after each request's first {ds['warmup_tokens']} "
            f"({ds['simulated_decode_steps']:,} of {ds['decode_steps']:,} decode steps simulated): the whole "
            f"trace estimated at {fm.show(ds['cycles'], 'cycles')} = {fm.show(ds['seconds'], 'latency')}")
    if "half_sample_spread" in ds:
        text += f", its two half-samples {fm.show(ds['half_sample_spread'], 'share')} either side"
        if ds["half_sample_spread"] > SAMPLE_NOISY:
            text += (" (the tokens' times vary too much for the sample: runs closer than that cannot be told "
                     "apart; a longer --sample-warmup, a smaller K or the whole trace)")
    layers = len(d["per_layer_cycles"])
    if layers < SAMPLE_FEW_LAYERS:
        text += (f"; on {layers} layer{'s' if layers > 1 else ''} such estimates have come up to "
                 f"{SAMPLE_FEW_LAYERS_OFF * 100:.1f} % off the "
                 f"whole run where half-samples agreed (measured below {SAMPLE_FEW_LAYERS} layers), so compare "
                 "close designs by whole runs")
    return text + "; every other figure here is the simulated part's"


def _prefill_sample_text(d):
    """A run that sampled the query blocks of long prefill steps: what it made and the whole
    trace's estimate."""
    ps = d.get("prefill_sample")
    if not ps:
        return ""
    if not ps["sampled_steps"]:
        return (f"no prefill step had {MIN_STRATA} strata of {ps['every']} query blocks a head group "
                "with its K/V streamed, so nothing was left out: the run is the whole trace's")
    steps = ps["sampled_steps"]
    text = (f"the middle query block of each stratum of about {ps['every']}, twice, in {steps:,} prefill "
            f"step{'s' if steps > 1 else ''} ({ps['simulated_query_blocks']:,} blocks made for "
            f"{ps['query_blocks']:,}): {'the decode-sampled part' if d.get('decode_sample') else 'the whole trace'}"
            f" estimated at {fm.show(ps['cycles'], 'cycles')} = "
            f"{fm.show(ps['seconds'], 'latency')}, its copies {fm.show(ps['copy_spread'], 'share')} and its "
            f"half-samples {fm.show(ps.get('half_sample_spread', 0.0), 'share')} either side")
    if d["arch"]["config"]["dot"]["arrays"] == "separate":
        text += (" (with a q.K and a p.V array of their own a block's time depends on the blocks before it: "
                 "such estimates have come up to 33 % off, 2.3 % with both spreads under 1 %, so compare "
                 "designs by whole runs)")
    elif softmax_paces(d):
        text += (f" (the softmax unit paces the array here, busy {fm.show(d['units']['softmax']['busy'], 'share')} "
                 "of the part: then a made block's time depends on the blocks around it, and such estimates "
                 f"have come up to {SOFTMAX_PACED_OFF * 100:.1f} % high with both spreads under 1 %, so compare "
                 "designs by whole runs)")
    elif prefill_sample_noisy(d):
        text += (" (the blocks' times depend on their order or vary too much for the sample: runs closer "
                 "than that cannot be told apart; a smaller K or the whole trace)")
    return text + "; every other figure here is the simulated part's"


def format_summary(result):
    """A readable multi-line summary for the terminal (every number through :mod:`sim.formats`)."""
    d = result.to_dict() if isinstance(result, Result) else result
    v = verdict_of(d)
    show = fm.show
    lines = [f"arch {d['arch']['name']}  x  trace {d['trace']['name']}  ({engine_text(d)})"]
    stages = ", ".join(f"{k} {show(c, 'cycles')}" for k, c in d["per_stage_cycles"].items())
    lines.append(f"  time      {show(d['seconds'], 'latency')} = {show(d['cycles'], 'cycles')}"
                 + (f"  ({stages})" if stages else ""))
    for sample in (_sample_text(d), _prefill_sample_text(d)):
        if sample:
            lines.append(f"  sampled   {sample}")
    lines.append(f"  limit     {limit_sentence(d)}")
    refresh = _refresh_text(d)
    if refresh:
        lines.append(f"  refresh   {refresh}")
    b = d["bounds"]
    lines.append(f"  roofline  closed-form bound: {b['bound']} ({show(b['compute_cycles'], 'cycles')} compute, "
                 f"{show(b['memory_cycles'], 'cycles')} memory); the run reaches "
                 f"{show(v['roofline_fraction'], 'share')} of it")
    dr = d["dram"]
    written = dr.get("write_bytes") or 0
    lines.append(f"  memory    {show(dr['bytes'] - written, 'bytes')} fetched ({show(dr['fetched_over_compulsory'], 'speedup')} "
                 f"compulsory) in {show(d['fetch']['requests'], 'requests')}, "
                 + (f"{show(written, 'bytes')} written, " if written else "")
                 + (f"the last {show(dr['write_tail_cycles'], 'cycles')} only writes, "
                    if dr.get("write_tail_cycles") else "")
                 + f"{fm.value(dr['achieved_gbps'], 'bandwidth')} of {show(dr['peak_gbps'], 'bandwidth')}"
                 + (f"; {show(dr['effective_key_bits'], 'bits')} per key element"
                    if dr.get("effective_key_bits") else "")
                 # a postponing controller can end the run owing refreshes its time leaves out
                 + (f"; {dr['refreshes_owed_at_end']:,} refreshes still owed at the end"
                    if dr.get("refreshes_owed_at_end") else ""))
    t, c = d["throughput"], d["compute"]
    lines.append(f"  compute   {show(c['macs'], 'macs')}: {show(t.get('ops_per_s'), 'ops_rate')} executed, "
                 f"{show(t.get('dense_equivalent_ops_per_s'), 'ops_rate')} dense-equivalent"
                 + (f" ({show(c['executed_over_dense'], 'share')} of the dense work executed)"
                    if c.get("executed_over_dense") is not None else ""))
    e = d.get("energy")
    if e:
        per_token = f", {show(e['pj_per_token'], 'energy_per_token')}" if e.get("pj_per_token") else ""
        lines.append(f"  energy    {show(e['total_pj'], 'energy')} (dynamic {show(e.get('dynamic_pj'), 'energy')}, "
                     f"static {show(e.get('static_pj'), 'energy')}), {show(e['average_power_w'], 'power')} "
                     f"average{per_token}; area proxy {show(d['area']['total_mm2'], 'area')}")
    lines.append("  unit        busy  starved  blocked   idle   top stalls")
    for name, u in d["units"].items():
        top = ", ".join(f"{c} {fm.pct(f)}" for c, f in list(u["stalls"].items())[:3] if f >= 0.005)
        lines.append(f"  {name:<9} {fm.value(u['busy'], 'share'):>5}% {fm.value(u['starved'], 'share'):>7}% "
                     f"{fm.value(u['blocked'], 'share'):>7}% {fm.value(u['idle'], 'share'):>5}%   {top}")
    own = [s for s in v["shares"] if s["kind"] not in ("compute", "unit")][:1]
    if own:
        lines.append(f"  largest wait of {v['critical_unit']}: {cause_text(own[0]['resource'])} "
                     f"({fm.pct(own[0]['share'])} of its time)")
    return "\n".join(lines)
