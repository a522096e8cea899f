"""Closed-form bounds: how fast the datapath could possibly run this trace.

* compute: every unit at full throughput with nothing else in the way --
  dot MACs / sustained MACs per cycle (lane quantization included), softmax
  elements x passes / lanes, top-k comparisons / comparators; the slowest
  unit bounds the run;
* memory: the bytes the tiling rule must move / the pool's peak bytes per
  cycle (and the same for the compulsory bytes, every row once);
* roofline (Williams, Waterman and Patterson, CACM 52(4), 2009):
  the run takes at least max(compute, memory).

No simpy here: the same functions pre-screen sweep points without simulating.
"""

import math

from ..engine import dot as dotmod
from ..engine import softmax as smmod
from ..engine import topk as tkmod


def bounds_from_counts(arch, macs_by_dim, macs_pv_by_dim, softmax_elements, topk_comparisons,
                       fetched_bytes, compulsory_bytes):
    """Bounds from operation counts and bytes (cycles, floats)."""
    lanes = arch.dot.lanes
    if arch.dot.arrays == "shared":
        dot_cycles = sum(m / dotmod.macs_per_cycle(arch.dot.multipliers, lanes, d)
                         for d, m in macs_by_dim.items())
    else:
        half = arch.dot.multipliers // 2
        qk = sum((m - macs_pv_by_dim.get(d, 0)) / dotmod.macs_per_cycle(half, lanes, d)
                 for d, m in macs_by_dim.items())
        pv = sum(m / dotmod.macs_per_cycle(half, lanes, d) for d, m in macs_pv_by_dim.items())
        dot_cycles = max(qk, pv)
    sm_cycles = smmod.PASSES * softmax_elements / arch.softmax.lanes
    tk_cycles = topk_comparisons / arch.topk.comparators
    compute = max(dot_cycles, sm_cycles, tk_cycles)
    memory = fetched_bytes / arch.bytes_per_cycle
    compulsory = compulsory_bytes / arch.bytes_per_cycle
    units = {"dot": dot_cycles, "softmax": sm_cycles, "topk": tk_cycles}
    return {
        "compute_cycles": compute,
        "memory_cycles": memory,
        "compulsory_memory_cycles": compulsory,
        "roofline_cycles": max(compute, memory),
        "bound": "memory" if memory >= compute else "compute",
        "compute_unit": max(units, key=units.get),
        "unit_cycles": units,
        "operational_intensity_mac_per_byte": (sum(macs_by_dim.values()) / fetched_bytes
                                               if fetched_bytes else math.inf),
        "machine_balance_mac_per_byte": arch.machine_balance,
    }


def closed_form(arch, trace, grain_rows=None):
    """Bounds for ``trace`` on ``arch`` without simulating (for screening): the work of
    every step exactly (:meth:`sim.trace.step.Step.work`) and the bytes the tiling rule
    moves, each request in its own DRAM region as the engine places it."""
    from ..engine.addrmap import AddressMap
    from ..engine.plan import plan_step
    from ..engine.tiling import selects_next, step_traffic

    g = arch.engine.grain_rows if grain_rows is None else grain_rows
    steps = trace.steps
    dims = sorted({s.head_dim for s in steps})
    layers = max(s.layer for s in steps) + 1
    regions = layers * (max(s.request for s in steps) + 1)
    heads = max(max(int(s.heads.max()), int(s.kv_heads.max())) for s in steps) + 1
    max_rows = max(s.kv_rows for s in steps)
    amaps = {d: AddressMap(arch, regions, heads, max_rows, d) for d in dims}
    macs, macs_pv = {}, {}
    elements = 0
    comps = 0.0
    fetched = compulsory = 0
    nxt_of, later = {}, {}
    for i in range(len(steps) - 1, -1, -1):   # the next step of the same request
        nxt_of[i] = later.get(steps[i].request)
        later[steps[i].request] = i
    for i, step in enumerate(steps):
        d = step.head_dim
        layer = step.request * layers + step.layer
        plan = plan_step(arch, amaps[d], step, g, layer)
        f, c = step_traffic(arch, amaps[d], step, plan, layer)
        fetched += f
        compulsory += c
        w = step.work()
        macs[d] = macs.get(d, 0) + w.macs
        macs_pv[d] = macs_pv.get(d, 0) + w.pv_macs
        elements += w.softmax + w.lsb_softmax
        comps += sum(bp.value_comps for gp in plan for bp in gp.blocks)
        nxt = None if nxt_of[i] is None else steps[nxt_of[i]]
        if selects_next(step, nxt):
            # counted selections need the engine's generator; the expectation is no bound,
            # so only the part every selection must do (one look at each key) counts here
            if nxt.n_kept_k < step.n_kept_k:
                comps += step.n_kept_k - 1
            if nxt.n_heads < step.n_heads:
                comps += step.n_heads - 1
    out = bounds_from_counts(arch, macs, macs_pv, elements, comps, fetched, compulsory)
    out["fetched_bytes"] = fetched
    out["compulsory_bytes"] = compulsory
    out["macs"] = sum(macs.values())
    return out
