"""Energy model: what a run costs, dynamic and static, counted item by item.

Every item is a count times the energy of one, from a technology preset
(default: the 45 nm figures of Horowitz, ISSCC 2014, in
``presets/energy_horowitz45.yaml``; every value there names its origin).

Dynamic energy -- operations the run performed, and the clock:

* q.K MAC: a ``q_bits x k_msb_bits`` multiply plus an accumulate add of
  ``mac.accumulate_bits``; the LSB recompute multiplies ``q_bits x
  k_lsb_bits``; p.V multiplies ``score_bits x v_bits``. A multiply is looked
  up by the wider operand, at the nearest width the table has (ties go to
  the wider entry); the document names the entry used;
* softmax, per score element: one compare (running max), one exponential
  (``softmax.exp_multiplies`` multiplies and ``exp_adds`` adds at
  ``score_bits``), one add (running sum), one multiply (normalize);
* top-k: one compare per comparison the selector made;
* SRAM: accesses of the buffer's width. Reads are as wide as the array
  consumes a row (``dot.lanes`` elements of the buffer's plane), writes as
  wide as a DRAM burst. One access of ``W`` bits to a buffer of ``S`` KiB costs
  ``read_64b(S) x (f + (1 - f) x W / 64)``: ``read_64b`` by power-law
  interpolation between the table's sizes, ``f`` the preset's
  ``sram_access.fixed_share`` (decode and word line, not repeated per bit);
* DRAM: bytes moved x 8 x pJ per bit of the interface;
* clock and control: per busy cycle of each logic unit (dot arrays, softmax,
  top-k), ``clock.pj_per_mm2_busy_cycle`` x the unit's area proxy; an idle
  or waiting unit is taken to be clock-gated.

Static energy -- leakage: every unit's area proxy (``sim.costs.area``) times
the preset's leakage density (``leakage_mw_per_mm2``: logic or SRAM) times the
run's time. Nothing is power-gated, so a larger datapath leaks more for as
long as the run lasts: a bigger array that finishes sooner can win or lose.

Pure functions of the architecture, the counts and state shares in a result
document and the trace: no simpy here.
"""

from ..errors import ConfigError
from . import presets

UNIT_ORDER = ("dram", "dot", "dot_pv", "softmax", "topk", "query_buffer", "key_buffer", "value_buffer")


def config_of(arch):
    """The ``energy`` section of an Arch or a resolved config mapping."""
    d = arch if isinstance(arch, dict) else arch.to_dict()
    return d.get("energy") or {"preset": presets.DEFAULTS["energy"], "dram_interface": "auto",
                               "overrides": {}}


def resolve_table(arch_dict, source="<config>"):
    """The preset named by the config with its overrides applied (checked)."""
    cfg = config_of(arch_dict)
    table = presets.load_preset("energy", cfg["preset"], source, "energy.preset")
    return presets.apply_overrides("energy", table, cfg.get("overrides") or {}, source)


def dram_interface(arch_dict, table, source="<config>"):
    """``(name, why)``: which ``dram_pj_per_bit`` entry prices this memory."""
    cfg = config_of(arch_dict)
    choice = cfg.get("dram_interface", "auto")
    known = table["groups"]["dram_pj_per_bit"]
    if choice == "auto":
        bits = arch_dict["dram"]["bus_bits"]
        name = "hbm2" if bits >= 128 else "ddr4"
        why = f"auto: dram.bus_bits = {bits} ({'>= 128: a wide stacked-memory channel' if bits >= 128 else '< 128: a DDR-class channel'})"
        if name not in known:
            raise ConfigError(source, "energy.dram_interface", choice,
                              f"auto picks {name!r}, which the energy preset does not have; name one of "
                              + ", ".join(known))
        return name, why
    if choice not in known:
        from ..errors import closest
        raise ConfigError(source, "energy.dram_interface", choice,
                          "expected auto or one of " + ", ".join(known) + closest(choice, known))
    return choice, "set in the config"


def check_config(arch_dict, source="<config>"):
    """Validate the energy section against its preset; called when a config loads."""
    table = resolve_table(arch_dict, source)
    dram_interface(arch_dict, table, source)
    p = arch_dict["precision"]
    g, fmt = table["groups"], {k: e["value"] for k, e in table["groups"]["format"].items()}
    need = [("multiply_pj", fmt["mac"], max(p["q_bits"], p["k_msb_bits"])),
            ("add_pj", fmt["mac"], g["mac"]["accumulate_bits"]["value"]),
            ("multiply_pj", fmt["softmax"], p["score_bits"]),
            ("add_pj", fmt["softmax"], p["score_bits"]),
            ("add_pj", fmt["compare"], p["score_bits"])]
    for group, f, bits in need:
        if presets.nearest_width(g[group], f, bits)[0] is None:
            raise ConfigError(source, f"energy.overrides.{group}", None,
                              f"the energy preset has no {f} entry in {group} (needed for {bits}-bit operands)")
    return table


def _op(ops, name, unit, count, group, fmt, bits, table, what):
    entry, e = presets.nearest_width(table["groups"][group], fmt, bits)
    ops[name] = {"unit": unit, "kind": "dynamic", "count": count, "pj_each": float(e["value"]), "entry": f"{group}.{entry}",
                 "operand_bits": bits, "origin": e["origin"], "what": what,
                 "pj": count * float(e["value"])}


PLANE_BITS = {"query": "q_bits", "key": "k_msb_bits", "value": "v_bits"}
LOGIC_UNITS = ("dot", "dot_pv", "softmax", "topk")


def access_bits(arch_dict, buffer):
    """``{"read": W, "write": W}``: bits one access to ``buffer`` moves.

    Reads feed the dot array one row of ``dot.lanes`` elements at a time (of
    the buffer's plane: q, the key MSB plane, v); writes land a DRAM burst.
    """
    bits = arch_dict["precision"][PLANE_BITS[buffer]]
    return {"read": arch_dict["dot"]["lanes"] * bits, "write": arch_dict["dram"]["burst_bytes"] * 8}


def operation_energy(arch_dict, counts, table):
    """Per-operation energy: ``{name: {unit, count, pj_each, entry, origin, pj}}``.

    ``counts``: ``macs_qk``, ``macs_lsb_recompute``, ``macs_pv``,
    ``softmax_elements``, ``topk_comparisons``, ``dram_bytes`` and
    ``buffers: {name: {bytes_read, bytes_written}}``.
    """
    p = arch_dict["precision"]
    g = table["groups"]
    fmt = {k: e["value"] for k, e in g["format"].items()}
    acc = int(g["mac"]["accumulate_bits"]["value"])
    pv_unit = "dot_pv" if arch_dict["dot"]["arrays"] == "separate" else "dot"
    ops = {}
    mac_kinds = (("qk", "dot", counts["macs_qk"], max(p["q_bits"], p["k_msb_bits"]),
                  f"q.K: {p['q_bits']}-bit q x {p['k_msb_bits']}-bit key MSB plane"),
                 ("lsb", "dot", counts["macs_lsb_recompute"], max(p["q_bits"], p["k_lsb_bits"]),
                  f"LSB recompute: {p['q_bits']}-bit q x {p['k_lsb_bits']}-bit key LSB plane"),
                 ("pv", pv_unit, counts["macs_pv"], max(p["score_bits"], p["v_bits"]),
                  f"p.V: {p['score_bits']}-bit probability x {p['v_bits']}-bit value"))
    for kind, unit, n, bits, what in mac_kinds:
        _op(ops, f"{kind}_multiply", unit, n, "multiply_pj", fmt["mac"], bits, table, what)
        _op(ops, f"{kind}_accumulate", unit, n, "add_pj", fmt["mac"], acc, table,
            f"{acc}-bit accumulate of each {kind} product")
    sb = p["score_bits"]
    n_sm = counts["softmax_elements"]
    _op(ops, "softmax_max_compare", "softmax", n_sm, "add_pj", fmt["compare"], sb, table,
        "running maximum, one compare per score element")
    sm = g["softmax"]
    k_mul, k_add = float(sm["exp_multiplies"]["value"]), float(sm["exp_adds"]["value"])
    _op(ops, "softmax_exp_multiply", "softmax", n_sm * k_mul, "multiply_pj", fmt["softmax"], sb, table,
        f"exponential: {k_mul:g} multiplies per element")
    _op(ops, "softmax_exp_add", "softmax", n_sm * k_add, "add_pj", fmt["softmax"], sb, table,
        f"exponential: {k_add:g} adds per element")
    _op(ops, "softmax_sum", "softmax", n_sm, "add_pj", fmt["softmax"], sb, table, "running sum")
    _op(ops, "softmax_normalize", "softmax", n_sm, "multiply_pj", fmt["softmax"], sb, table,
        "normalize: multiply by the reciprocal of the sum")
    _op(ops, "topk_compare", "topk", counts["topk_comparisons"], "add_pj", fmt["compare"], sb, table,
        "one compare per selector comparison")
    wf = float(g["sram"]["write_factor"]["value"])
    fixed = float(g["sram_access"]["fixed_share"]["value"])
    for name, b in counts["buffers"].items():
        kib = float(arch_dict["buffers"][f"{name}_kib"])
        pj64, how = presets.sram_per_access(g["sram_read_64b_pj"], kib)
        unit = f"{name}_buffer"
        widths = access_bits(arch_dict, name)
        for mode, nbytes, factor in (("read", b["bytes_read"], 1.0), ("write", b["bytes_written"], wf)):
            w = widths[mode]
            each = pj64 * (fixed + (1.0 - fixed) * w / 64.0) * factor
            n = nbytes * 8.0 / w
            ops[f"{name}_buffer_{mode}"] = {
                "unit": unit, "kind": "dynamic", "count": n, "pj_each": each, "entry": "sram_read_64b_pj",
                "operand_bits": w,
                "origin": f"{how}; {w}-bit access = 64-bit x ({fixed:g} + {1 - fixed:g} x {w}/64)"
                          + ("" if mode == "read" else f"; x sram.write_factor {wf:g}"),
                "what": f"{w}-bit {mode}s of the {kib:g} KiB {name} buffer", "pj": n * each}
    iface, why = dram_interface(arch_dict, table)
    e = g["dram_pj_per_bit"][iface]
    bits = counts["dram_bytes"] * 8
    ops["dram_transfer"] = {"unit": "dram", "kind": "dynamic", "count": bits, "pj_each": float(e["value"]),
                            "entry": f"dram_pj_per_bit.{iface}", "operand_bits": 1,
                            "origin": f"{e['origin']}; interface {why}", "what": "bits moved to or from DRAM",
                            "pj": bits * float(e["value"])}
    return ops


def work_of(trace, made_rows=None):
    """Query rows (per head) and tokens the trace processes, the per-row / per-token denominators.
    ``made_rows``: step index -> the query rows a run made of it, where it made only some
    (a run sampling prefill blocks), so the figures are the simulated part's."""
    made_rows = made_rows or {}
    q = [made_rows.get(i, s.q_rows) for i, s in enumerate(trace.steps)]
    rows = sum(r * s.n_heads for r, s in zip(q, trace.steps))
    layers = sorted({s.layer for s in trace.steps})
    first = layers[0] if layers else 0
    prefill = sum(r for r, s in zip(q, trace.steps) if s.stage == "prefill" and s.layer == first)
    decode = sum(1 for s in trace.steps if s.stage == "decode" and s.layer == first)
    return {"query_rows": int(rows), "tokens": int(prefill + decode),
            "prefill_tokens": int(prefill), "decode_tokens": int(decode)}


def counts_from_document(doc):
    """The operation counts :func:`operation_energy` needs, read from a result document."""
    c = doc["compute"]
    return {"macs_qk": c["macs_qk"], "macs_lsb_recompute": c["macs_lsb_recompute"], "macs_pv": c["macs_pv"],
            "softmax_elements": c["softmax_elements"], "topk_comparisons": c["topk_comparisons"],
            "dram_bytes": doc["dram"]["bytes"],
            "buffers": {k: {"bytes_read": v["bytes_read"], "bytes_written": v["bytes_written"]}
                        for k, v in doc["buffers"].items()}}


def clock_and_leakage(arch_dict, units_mm2, busy_cycles, cycles, table):
    """Clock/control (dynamic) and leakage (static) items per unit, like :func:`operation_energy`'s.

    ``units_mm2``: the area proxy per unit; ``busy_cycles``: busy cycles per
    logic unit; ``cycles``: the run's length. Leakage is priced per cycle:
    ``mW / clock_ghz`` pJ per cycle (1 mW for 1 ns is 1 pJ).
    """
    g = table["groups"]
    clk = g["clock"]["pj_per_mm2_busy_cycle"]
    leak = g["leakage_mw_per_mm2"]
    ghz = float(arch_dict["clock_ghz"])
    ops = {}
    for unit, mm2 in units_mm2.items():
        if unit in LOGIC_UNITS:
            each = float(clk["value"]) * mm2
            n = float(busy_cycles.get(unit, 0.0))
            ops[f"{unit}_clock"] = {
                "unit": unit, "kind": "dynamic", "count": n, "pj_each": each, "entry": "clock.pj_per_mm2_busy_cycle",
                "operand_bits": None, "origin": clk["origin"],
                "what": f"clock and control per busy cycle of {mm2:.4g} mm^2 of logic", "pj": n * each}
        kind = "sram" if unit.endswith("_buffer") else "logic"
        mw = float(leak[kind]["value"]) * mm2
        each = mw / ghz
        ops[f"{unit}_leakage"] = {
            "unit": unit, "kind": "static", "count": float(cycles), "pj_each": each,
            "entry": f"leakage_mw_per_mm2.{kind}", "operand_bits": None, "origin": leak[kind]["origin"],
            "what": f"leakage of {mm2:.4g} mm^2 of {kind} ({mw:.4g} mW) per cycle of the run", "pj": cycles * each,
            "mw": mw}
    return ops


def energy_section(arch, doc, trace, made_rows=None):
    """The result document's ``energy`` section for a finished run.

    Reads the document's counts, ``cycles``, ``seconds`` and the units' busy
    shares; the area proxy is computed from the config. ``made_rows``: see :func:`work_of`.
    """
    from .area import area_section

    d = arch if isinstance(arch, dict) else arch.to_dict()
    table = resolve_table(d, getattr(arch, "source", "<config>"))
    ops = operation_energy(d, counts_from_document(doc), table)
    cycles = doc["cycles"]
    busy = {u: doc["units"][u]["busy"] * cycles for u in LOGIC_UNITS if u in doc["units"]}
    ops.update(clock_and_leakage(d, area_section(arch)["units_mm2"], busy, cycles, table))
    per_kind = {"dynamic": {}, "static": {}}
    for op in ops.values():
        k = per_kind[op["kind"]]
        k[op["unit"]] = k.get(op["unit"], 0.0) + op["pj"]
    units = {u: per_kind["dynamic"].get(u, 0.0) + per_kind["static"].get(u, 0.0)
             for u in UNIT_ORDER if u in per_kind["dynamic"] or u in per_kind["static"]}
    dynamic = sum(per_kind["dynamic"].values())
    static = sum(per_kind["static"].values())
    total = sum(units.values())
    work = work_of(trace, made_rows)
    secs = doc["seconds"]
    leak_mw = {op["unit"]: op["mw"] for op in ops.values() if op["kind"] == "static"}
    return {
        "model": "a proxy: dynamic = counted operations x per-operation energy + clock and control per busy "
                 "cycle and mm^2 of logic; static = leakage density x area proxy x run time",
        "preset": {"name": table["name"], "source": table["source"], "file": table["file"]},
        "total_pj": total,
        "dynamic_pj": dynamic,
        "static_pj": static,
        "units_pj": units,
        "dynamic_units_pj": {u: per_kind["dynamic"][u] for u in UNIT_ORDER if u in per_kind["dynamic"]},
        "static_units_pj": {u: per_kind["static"][u] for u in UNIT_ORDER if u in per_kind["static"]},
        "leakage_mw": leak_mw,
        "leakage_total_mw": sum(leak_mw.values()),
        "operations": ops,
        "average_power_w": total * 1e-12 / secs if secs else None,
        "dynamic_power_w": dynamic * 1e-12 / secs if secs else None,
        "static_power_w": static * 1e-12 / secs if secs else None,
        "pj_per_query_row": total / work["query_rows"] if work["query_rows"] else None,
        "pj_per_token": total / work["tokens"] if work["tokens"] else None,
        "work": work,
        "not_counted": "on-chip wires outside the SRAM figures, the fetch unit's own logic beyond the clock and "
                       "control share, DRAM background and refresh power, the memory PHY; no power gating",
    }
