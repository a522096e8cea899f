"""What limits a run: one classification, read from its result document.

The comparison table, the written verdict, the terminal summary and the
roofline figure all read :func:`classify` (the result document stores its
output as ``verdict``), so they can never disagree. The classes:

* ``compute`` -- the dot-product array (``dot`` or ``dot_pv``) is what the run
  spends its time on; with head widths that leave lanes idle the verdict says
  so (``lanes.fill``);
* ``unit`` -- another named unit (the softmax unit, the top-k selector);
* ``memory_bandwidth`` -- waits on memory while DRAM delivers at least half its
  peak (or the memory bound is at least half the run);
* ``memory_latency`` -- waits on memory while DRAM delivers less than that:
  latency, queueing and the transfer time of single transactions, not the
  pool's throughput;
* ``dependency`` -- waits on a result: the previous layer, a softmax or top-k
  decision, the hand-over between two units taking turns;
* ``buffer`` -- waits for room: a full key, value or query buffer, the fetch
  unit's in-flight limit or reorder stage.

How: start from the critical unit, the busiest compute unit. Its time is
split into its busy share and its stall causes. A wait on another unit is
passed on to that unit in proportion to how that unit spent the run (busy:
that unit limits; its own waits: followed the same way, each unit once; a
wait back on a unit already followed is a dependency, named after what the
critical unit first waited on). The class with the
largest share of the critical unit's time is the limit. Memory waits are
bandwidth only under the rule above, which is checked by a property test.
"""

import math

ARRAYS = ("dot", "dot_pv")
COMPUTE_UNITS = ("dot", "dot_pv", "softmax", "topk")
MEMORY_CAUSES = ("memory_latency", "memory_queue", "memory_transfer", "memory_bandwidth", "reorder",
                 "fetch", "fetch_issue")
BANDWIDTH_SHARE = 0.5   # DRAM must deliver at least this share of its peak to be called the limit
CLOSE_SHARE = 0.05      # a runner-up this close to the limit's share is named with it (our choice)
LANE_FILL_NOTE = 0.95   # below this useful share of the lanes the verdict names the mismatch

CAUSE_TEXT = {
    "memory_latency": "DRAM access latency",
    "memory_queue": "queueing at the DRAM channels",
    "memory_transfer": "DRAM data transfer",
    "memory_bandwidth": "DRAM bandwidth",
    "reorder": "the reorder stage handing data over in order",
    "layer_dependency": "the previous layer's output",
    "topk": "the top-k selector",
    "softmax": "the softmax unit",
    "dot": "the dot-product array",
    "dot_pv": "the p.V array",
    "fetch": "the fetch unit issuing requests",
    "fetch_issue": "the fetch unit issuing requests",
    "key_buffer_full": "room in the key buffer",
    "value_buffer_full": "room in the value buffer",
    "query_buffer_full": "room in the query buffer",
    "inflight_limit": "the fetch unit's in-flight limit",
    "reorder_full": "room in the reorder stage",
    "softmax_input_full": "room in the softmax unit's input queue",
    "start": "the start of the run",
    "program": "program order",
}

UNIT_TEXT = {"dot": "the dot-product array", "dot_pv": "the p.V array", "softmax": "the softmax unit",
             "topk": "the top-k selector", "dram": "DRAM"}


def cause_text(cause):
    """A stall cause in words."""
    return CAUSE_TEXT.get(cause, (cause or "an unattributed cause").replace("_", " "))


def waited_unit(cause):
    """The compute unit a stall cause waits on, or None."""
    if cause in COMPUTE_UNITS:
        return cause
    if cause and cause.endswith("_input_full") and cause[:-len("_input_full")] in COMPUTE_UNITS:
        return cause[:-len("_input_full")]
    return None


def cause_class(cause):
    """``(kind, resource)`` of a stall cause that is not a wait on a unit."""
    if cause in MEMORY_CAUSES:
        return "memory", cause
    if cause and (cause.endswith("_buffer_full") or cause in ("inflight_limit", "reorder_full")):
        return "buffer", cause
    return "dependency", cause or "unattributed"


def _active(u):
    """Share of the run a unit was not idle (busy or waiting)."""
    return u["busy"] + sum(u["stalls"].values())


def blame(units, start):
    """``{(kind, resource): share}`` of ``start``'s time, waits on units followed (see the module doc)."""
    out = {}

    def add(key, w):
        if w > 0:
            out[key] = out.get(key, 0.0) + w

    def walk(name, weight, seen, origin):
        u = units[name]
        kind = "compute" if name in ARRAYS else "unit"
        add((kind, name), weight * u["busy"])
        for cause, f in u["stalls"].items():
            w = weight * f
            target = waited_unit(cause)
            via = origin or cause
            if target is None:
                k, res = cause_class(cause)
                add((k, via if k == "dependency" else res), w)
            elif target in seen or target not in units or _active(units[target]) <= 0:
                add(("dependency", via), w)
            else:
                walk(target, w / _active(units[target]), seen | {target}, via)

    walk(start, 1.0, {start}, None)
    return out


def lane_figures(doc):
    """Lane fill and useful-MAC utilization of the dot array(s), or None for an old document.

    ``fill``: the share of the array's lanes doing useful work while it is
    busy (a head width that is not a multiple of ``dot.lanes`` leaves lanes
    idle in its last pass), weighted by busy time. ``utilization``: useful
    MACs / (multipliers x cycles), per array.
    """
    by_dim = doc.get("compute", {}).get("macs_by_head_dim")
    cfg = doc["arch"]["config"]["dot"]
    if not by_dim:
        return None
    lanes = cfg["lanes"]
    busy_time = 0.0
    for d, m in by_dim.items():
        d = int(d)
        busy_time += m * math.ceil(d / lanes) * lanes / d
    total = sum(by_dim.values())
    c, cycles = doc["compute"], doc["cycles"]
    if cfg["arrays"] == "separate":
        half = cfg["multipliers"] // 2
        util = {"dot": (c["macs_qk"] + c["macs_lsb_recompute"]) / (half * cycles) if cycles else 0.0,
                "dot_pv": c["macs_pv"] / ((cfg["multipliers"] - half) * cycles) if cycles else 0.0}
    else:
        util = {"dot": c["macs"] / (cfg["multipliers"] * cycles) if cycles else 0.0}
    dims = sorted(int(d) for d in by_dim)
    fill = total / busy_time if busy_time else 1.0
    return {"lanes": lanes, "head_dims": dims, "fill": fill, "utilization": util,
            "mismatch": fill < LANE_FILL_NOTE}


def classify(doc):
    """The ``verdict`` section of a result document: what limits the run, and the figures behind it."""
    units = doc["units"]
    compute = [u for u in COMPUTE_UNITS if u in units]
    critical = max(compute, key=lambda u: units[u]["busy"])
    shares = blame(units, critical)
    groups = {}
    for (kind, res), w in shares.items():
        key = (kind, res) if kind in ("compute", "unit") else (kind, None)
        g = groups.setdefault(key, {"share": 0.0, "top": None, "top_share": -1.0})
        g["share"] += w
        if w > g["top_share"]:
            g["top"], g["top_share"] = res, w
    ranked_groups = sorted(groups.items(), key=lambda kv: kv[1]["share"], reverse=True)
    (kind, res), g = ranked_groups[0]
    resource = res if res is not None else g["top"]
    cycles = doc["cycles"]
    dram = doc["dram"]
    achieved = dram["achieved_gbps"] / dram["peak_gbps"] if dram.get("peak_gbps") else 0.0
    b = doc["bounds"]
    mem_bound = b["memory_cycles"] / cycles if cycles else 0.0
    memory_kind = "memory_bandwidth" if max(achieved, mem_bound) >= BANDWIDTH_SHARE else "memory_latency"
    if kind == "memory":
        kind = memory_kind
    close = None
    if len(ranked_groups) > 1 and g["share"] - ranked_groups[1][1]["share"] <= CLOSE_SHARE:
        (k2, r2), g2 = ranked_groups[1]
        k2 = memory_kind if k2 == "memory" else k2
        r2 = r2 if r2 is not None else g2["top"]
        close = {"limit": k2, "resource": r2, "label": label(k2, r2), "share": g2["share"]}
    if kind == "compute" and resource == critical:
        # the other array about as busy (separate arrays; q.K and p.V of a causal prompt are
        # the same work) limits the run as much, though no stall of this one points at it
        other = next((u for u in ARRAYS if u != critical and u in units), None)
        busy = units[other]["busy"] if other else -1.0
        if g["share"] - busy <= CLOSE_SHARE and (close is None or busy > close["share"]):
            close = {"limit": "compute", "resource": other, "label": label("compute", other), "share": busy}
    lanes = lane_figures(doc)
    busiest = max(units, key=lambda k: units[k]["busy"])
    ranked = sorted(((w, k) for k, w in shares.items()), reverse=True)
    own = units[busiest]["stalls"]
    own_cause = max(own, key=own.get) if own else None
    worst = max(((n, c, f) for n, u in units.items() for c, f in u["stalls"].items()), key=lambda t: t[2],
                default=(None, None, 0.0))
    return {
        "limit": kind,
        "resource": resource,
        "label": label(kind, resource) + (f" (close: {close['label']})" if close else ""),
        "share": g["share"],
        # the runner-up when it is within CLOSE_SHARE of the limit: the two limit the run about
        # equally, and a small change of either (or of a simulation setting) can swap them
        "close_to": close,
        "critical_unit": critical,
        "critical_busy": units[critical]["busy"],
        "shares": [{"kind": k[0], "resource": k[1], "share": w} for w, k in ranked],
        "dram_share_of_peak": achieved,
        "memory_bound_share": mem_bound,
        "bound": b["bound"],
        "roofline_fraction": b["roofline_cycles"] / cycles if cycles else 0.0,
        "lanes": lanes,
        "lane_underuse": bool(lanes and lanes["mismatch"] and kind == "compute"),
        # the raw figures earlier documents held (the busiest unit and its own largest stall; the
        # largest stall of any unit); the limit above is what every output reads
        "busiest_unit": busiest,
        "busiest_utilization": units[busiest]["busy"],
        "largest_stall": {"unit": busiest, "cause": own_cause, "fraction": own.get(own_cause, 0.0) if own_cause
                          else 0.0},
        "worst_stall": {"unit": worst[0], "cause": worst[1], "fraction": worst[2]},
    }


def label(kind, resource):
    """Short text of a limit for tables: ``compute (dot)``, ``memory bandwidth``, ``buffer (key)``."""
    if kind == "compute":
        return f"compute ({resource})"
    if kind == "unit":
        return {"softmax": "softmax unit", "topk": "top-k selector"}.get(resource, f"unit {resource}")
    if kind == "memory_bandwidth":
        return "memory bandwidth"
    if kind == "memory_latency":
        return "memory latency"
    if kind == "buffer":
        short = {"inflight_limit": "in-flight limit", "reorder_full": "reorder stage"}
        return f"buffer ({short.get(resource, resource.replace('_buffer_full', ' buffer'))})"
    short = {"layer_dependency": "previous layer", "softmax": "softmax result", "topk": "top-k result",
             "dot": "array result", "dot_pv": "p.V result"}
    return f"dependency ({short.get(resource, (resource or 'other').replace('_', ' '))})"


def verdict_of(doc):
    """The document's classification; computed here for a document that predates it."""
    v = doc.get("verdict")
    if isinstance(v, dict) and "limit" in v:
        return v
    return classify(doc)
