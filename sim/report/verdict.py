"""The written verdict: what limits a config on a workload, in a few sentences.

Read from the stall data, not filled into a fixed sentence: which unit does
the most work and whether it is saturated, what the unit that limits the run
waited on most, how the run sits against its roofline bound, how it compares
with the other configs on the same trace, and where its energy goes. Each
sentence is written only when the data supports it.
"""

CAUSE_TEXT = {
    "memory_latency": "DRAM access latency",
    "memory_queue": "queueing at the DRAM channels",
    "memory_transfer": "DRAM data transfer (bandwidth)",
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
    "start": "the start of the run",
}

LEVER = {
    "dot": "more multipliers (dot.multipliers)",
    "dot_pv": "more multipliers (dot.multipliers)",
    "dram": "more memory bandwidth (dram.channels, dram.channel_gbps)",
    "softmax": "more softmax lanes (softmax.lanes)",
    "topk": "more comparators (topk.comparators)",
    "fetch": "more requests in flight (fetch.inflight)",
}

MEMORY = {"memory_latency", "memory_queue", "memory_transfer", "memory_bandwidth", "reorder"}
BACKPRESSURE_SUFFIX = ("_full", "_limit")


def cause_text(cause):
    return CAUSE_TEXT.get(cause, (cause or "an unattributed cause").replace("_", " "))


def _pct(x):
    return f"{x:.0%}"


def largest_stall(unit):
    if not unit["stalls"]:
        return None, 0.0
    cause = max(unit["stalls"], key=unit["stalls"].get)
    return cause, unit["stalls"][cause]


def limiting_unit(doc):
    """The unit with the highest busy fraction (the one doing the most work)."""
    units = doc["units"]
    return max(units, key=lambda k: units[k]["busy"])


def write_verdict(run, peers=()):
    """A short paragraph for ``run``; ``peers`` are comparable runs (same trace, version)."""
    d = run.doc
    units = d["units"]
    lim = limiting_unit(d)
    busy = units[lim]["busy"]
    out = []
    if busy >= 0.85:
        out.append(f"{lim} is the bottleneck: busy {_pct(busy)} of the run, so {LEVER.get(lim, 'a faster ' + lim)} "
                   "is what would shorten it.")
    elif busy >= 0.5:
        out.append(f"{lim} carries the run ({_pct(busy)} busy) without being saturated.")
    else:
        out.append(f"No unit is saturated: the busiest, {lim}, is busy only {_pct(busy)} of the run, "
                   "so waiting, not throughput, sets the latency.")
    cause, frac = largest_stall(units[lim])
    if cause and frac >= 0.01:
        state = "blocked" if units[lim].get("blocked", 0.0) >= frac - 1e-9 and frac > 0 \
            and units[lim].get("starved", 0.0) < frac - 1e-9 else "starved"
        why = f"{lim} is {state} {_pct(frac)} of the run, most of it waiting on {cause_text(cause)}"
        if cause in MEMORY:
            why += "; the memory system, not the arithmetic, holds it back"
        elif cause.endswith(BACKPRESSURE_SUFFIX):
            why += "; a larger buffer or limit would let the memory run further ahead"
        elif cause == "layer_dependency":
            why += "; layers follow each other, so this is latency that more hardware alone does not remove"
        out.append(why + ".")
    # the largest stall anywhere, when another unit waits far more
    worst = max(((n, *largest_stall(u)) for n, u in units.items()), key=lambda t: t[2])
    # waiting on an upstream unit is structural; memory waits and back-pressure are worth naming
    if worst[0] != lim and worst[1] and worst[2] >= max(0.25, frac + 0.15) \
            and (worst[1] in MEMORY or worst[1].endswith(BACKPRESSURE_SUFFIX)):
        out.append(f"The largest stall of any unit is {worst[0]} waiting on {cause_text(worst[1])} "
                   f"({_pct(worst[2])} of the run).")
    b = d["bounds"]
    rf = b["roofline_cycles"] / d["cycles"] if d["cycles"] else 0.0
    if rf >= 0.8:
        out.append(f"It runs at {_pct(rf)} of its {b['bound']}-bound roofline: little is left to win "
                   f"without raising the {b['bound']} peak.")
    elif rf >= 0.4:
        out.append(f"It reaches {_pct(rf)} of its {b['bound']}-bound roofline.")
    else:
        out.append(f"It is far from its {b['bound']}-bound roofline ({_pct(rf)}): dependencies, latency "
                   "and pipeline fill cost more than raw "
                   + ("bandwidth." if b["bound"] == "memory" else "compute."))
    if b["bound"] == "compute" and lim == "dram" or b["bound"] == "memory" and lim in ("dot", "dot_pv"):
        out.append(f"Note that the closed-form bound says {b['bound']}-bound while {lim} is the busiest "
                   "unit in the simulation.")
    peers = [p for p in peers if p is not run]
    if peers:
        allr = [run] + peers
        best = min(allr, key=lambda r: r.doc["seconds"])
        if best is run:
            second = min(peers, key=lambda r: r.doc["seconds"])
            out.append(f"Fastest of the {len(allr)} configs on {run.trace_label}, "
                       f"{second.doc['seconds'] / d['seconds']:.2f}x ahead of {second.config_label}.")
        else:
            out.append(f"{d['seconds'] / best.doc['seconds']:.2f}x the latency of the fastest config on "
                       f"{run.trace_label} ({best.config_label}).")
        if all("energy" in r.doc for r in allr):
            low = min(allr, key=lambda r: r.doc["energy"]["total_pj"])
            if low is not run and low.doc["energy"]["total_pj"] > 0:
                out.append(f"It spends {d['energy']['total_pj'] / low.doc['energy']['total_pj']:.2f}x the energy "
                           f"of the most frugal ({low.config_label}).")
            elif low is run:
                out.append("It uses the least energy of them.")
    e = d.get("energy")
    if e and e["total_pj"] > 0:
        top = max(e["units_pj"], key=e["units_pj"].get)
        share = e["units_pj"][top] / e["total_pj"]
        if share >= 0.5:
            what = "DRAM traffic" if top == "dram" else top.replace("_", " ")
            out.append(f"{what[0].upper() + what[1:]} is {_pct(share)} of its energy.")
    return " ".join(out)
