"""Area proxy: the datapath's arithmetic and SRAM, priced per item.

A PROXY for comparing candidate datapaths with each other, not a layout
estimate. It counts what the config instantiates and multiplies by a
per-item area from a technology preset (default ``presets/area_proxy45.yaml``,
45 nm; every value there names its origin):

* dot array: ``dot.multipliers`` x (one multiplier wide enough for the widest
  operand it sees + one ``mac.accumulate_bits`` adder). A shared array sees
  q.K and p.V operands; with ``dot.arrays: separate`` each half sees its own;
* softmax: ``softmax.lanes`` x (multipliers, adders and comparators per lane);
* top-k: ``topk.comparators`` comparators (an adder of ``score_bits``);
* buffers: KiB x area per KiB.

Left out: wiring, control, the fetch unit and its reorder stage, clocking,
the memory PHY. Widths are looked up like the energy model does: the nearest
entry of the number format, ties to the wider one.
"""

from ..errors import ConfigError
from . import presets

UNIT_ORDER = ("dot", "dot_pv", "softmax", "topk", "query_buffer", "key_buffer", "value_buffer")


def config_of(arch):
    d = arch if isinstance(arch, dict) else arch.to_dict()
    return d.get("area") or {"preset": presets.DEFAULTS["area"], "overrides": {}}


def resolve_table(arch_dict, source="<config>"):
    cfg = config_of(arch_dict)
    table = presets.load_preset("area", cfg["preset"], source, "area.preset")
    return presets.apply_overrides("area", table, cfg.get("overrides") or {}, source)


def _item(table, group, fmt, bits, source):
    entry, e = presets.nearest_width(table["groups"][group], fmt, bits)
    if entry is None:
        raise ConfigError(source, f"area.overrides.{group}", None,
                          f"the area preset has no {fmt} entry in {group} (needed for {bits}-bit operands)")
    return entry, float(e["value"]), e["origin"]


def area_items(arch_dict, table, source="<config>"):
    """``{unit: [{item, count, um2_each, entry, origin, um2}, ...]}``."""
    p, g = arch_dict["precision"], table["groups"]
    fmt = {k: e["value"] for k, e in g["format"].items()}
    acc = int(g["mac"]["accumulate_bits"]["value"])
    out = {}

    def add(unit, item, count, group, f, bits):
        entry, each, origin = _item(table, group, f, bits, source)
        out.setdefault(unit, []).append({"item": item, "count": count, "um2_each": each,
                                         "entry": f"{group}.{entry}", "operand_bits": bits,
                                         "origin": origin, "um2": count * each})

    m = arch_dict["dot"]["multipliers"]
    qk_bits = max(p["q_bits"], p["k_msb_bits"], p["k_lsb_bits"])
    pv_bits = max(p["score_bits"], p["v_bits"])
    if arch_dict["dot"]["arrays"] == "separate":
        arrays = (("dot", m // 2, qk_bits), ("dot_pv", m - m // 2, pv_bits))
    else:
        arrays = (("dot", m, max(qk_bits, pv_bits)),)
    for unit, n, bits in arrays:
        add(unit, f"{bits}-bit multiplier", n, "multiplier_um2", fmt["mac"], bits)
        add(unit, f"{acc}-bit accumulator adder", n, "adder_um2", fmt["mac"], acc)
    lanes, sb, sm = arch_dict["softmax"]["lanes"], p["score_bits"], g["softmax"]
    add("softmax", "lane multiplier", lanes * sm["multipliers_per_lane"]["value"], "multiplier_um2",
        fmt["softmax"], sb)
    add("softmax", "lane adder", lanes * sm["adders_per_lane"]["value"], "adder_um2", fmt["softmax"], sb)
    add("softmax", "lane comparator", lanes * sm["comparators_per_lane"]["value"], "adder_um2",
        fmt["compare"], sb)
    add("topk", "comparator", arch_dict["topk"]["comparators"], "adder_um2", fmt["compare"], sb)
    per_kib = g["sram"]["um2_per_kib"]
    for name in ("query", "key", "value"):
        kib = float(arch_dict["buffers"][f"{name}_kib"])
        out[f"{name}_buffer"] = [{"item": "SRAM KiB", "count": kib, "um2_each": float(per_kib["value"]),
                                  "entry": "sram.um2_per_kib", "operand_bits": None,
                                  "origin": per_kib["origin"], "um2": kib * float(per_kib["value"])}]
    return out


def check_config(arch_dict, source="<config>"):
    """Validate the area section against its preset; called when a config loads."""
    table = resolve_table(arch_dict, source)
    area_items(arch_dict, table, source)
    return table


def area_section(arch):
    """The result document's ``area`` section (depends on the config only)."""
    d = arch if isinstance(arch, dict) else arch.to_dict()
    source = getattr(arch, "source", "<config>")
    table = resolve_table(d, source)
    items = area_items(d, table, source)
    units = {u: sum(i["um2"] for i in items[u]) / 1e6 for u in UNIT_ORDER if u in items}
    return {
        "proxy": True,
        "model": "area PROXY: arithmetic units and SRAM bits x per-item area; not a layout estimate",
        "preset": {"name": table["name"], "source": table["source"], "file": table["file"]},
        "total_mm2": sum(units.values()),
        "units_mm2": units,
        "items": items,
        "not_counted": "wiring, control, fetch unit and reorder stage, clocking, memory PHY",
    }
