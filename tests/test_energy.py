"""Energy model: counts x per-operation energy plus leakage, checked by hand.

Reference values: M. Horowitz, "Computing's energy problem (and what we can do
about it)", ISSCC 2014, 45 nm, 0.9 V: int8 add 0.03 pJ, int32 add 0.1 pJ,
fp16 add 0.4 pJ, int8 mult 0.2 pJ, fp16 mult 1.1 pJ, int32 mult 3.1 pJ;
64-bit SRAM read 8 KB 10 pJ, 32 KB 20 pJ, 1 MB 100 pJ; DRAM 64-bit access
1.3-2.6 nJ. They are written out here, not read from the preset, so a wrong
preset fails the test.

Leakage density, the clock share and the SRAM width rule have no published
table behind them: they are the preset's values marked "from memory" or
"assumption" there. The test reads those numbers from the preset file as plain
YAML (not through the model), and prices the area proxy by hand from the area
preset's per-item areas (themselves "from memory", Horowitz 2014 area column).
"""

import importlib.resources
import math

import pytest
import yaml

import sim
from sim.errors import ConfigError
from sim.costs import energy as E
from sim.costs import presets

# Horowitz, ISSCC 2014 (45 nm)
H_INT8_MULT, H_INT32_MULT, H_FP16_MULT = 0.2, 3.1, 1.1
H_INT8_ADD, H_INT32_ADD, H_FP16_ADD = 0.03, 0.1, 0.4
H_SRAM_8K, H_SRAM_32K, H_SRAM_1M = 10.0, 20.0, 100.0
H_DRAM_64B_MID_PJ = (1300.0 + 2600.0) / 2  # midpoint of 1.3-2.6 nJ per 64-bit access


def preset_values(name):
    """A bundled preset file as plain numbers, ``{group: {entry: value}}``."""
    text = importlib.resources.files("sim.costs.presets").joinpath(name).read_text()
    raw = yaml.safe_load(text)
    return {g: {k: e["value"] for k, e in v.items()} for g, v in raw.items() if isinstance(v, dict)}


TINY_TRACE = """\
header:
  format: attnsim-trace
  version: 1
  name: tiny_hand
  provenance: {method: hand}
  model: {layers: 1, heads: 2, head_dim: 64}
steps:
- layer: 0
  stage: decode
  head_dim: 64
  heads: [0, 1]
  q_rows: 1
  kv_rows: 4
  kept_k: 4
  kept_v: [4, 4]
  lsb_rows: [0, 0]
"""


def tiny_arch(**energy):
    """8-bit operands everywhere, buffers at table sizes: every price is a Horowitz entry."""
    return sim.load_arch({
        "name": "tiny", "clock_ghz": 1.0,
        "precision": {"q_bits": 8, "k_msb_bits": 8, "k_lsb_bits": 0, "v_bits": 8, "score_bits": 8},
        "buffers": {"query_kib": 8, "key_kib": 32, "value_kib": 8},
        "energy": {"dram_interface": "ddr3", **energy},
    })


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    p = tmp_path_factory.mktemp("tiny") / "tiny.yaml"
    p.write_text(TINY_TRACE)
    trace = sim.load_trace(str(p))
    arch = tiny_arch()
    return arch, trace, sim.simulate(arch, trace).to_dict()


def test_hand_computable_trace_equals_counts_times_horowitz(tiny_run):
    """2 heads x 1 query row x 4 keys x 64 wide; all values and keys kept.

    total = dynamic (operation counts x Horowitz 2014, SRAM by access width, DRAM per bit,
    clock per busy cycle and mm^2) + static (leakage density x area proxy x run time).
    """
    _arch, _trace, doc = tiny_run
    c = doc["compute"]
    macs_qk = 2 * 1 * 4 * 64
    macs_pv = 1 * (4 + 4) * 64
    elements = 2 * 1 * 4
    assert (c["macs_qk"], c["macs_pv"], c["macs_lsb_recompute"]) == (macs_qk, macs_pv, 0)
    assert c["softmax_elements"] == elements and c["topk_comparisons"] == 0
    # q.K and p.V: one 8-bit multiply and one 32-bit accumulate per MAC
    dot = (macs_qk + macs_pv) * (H_INT8_MULT + H_INT32_ADD)
    # softmax per element: compare (int8 add), 3 + 1 fp16 multiplies, 3 + 1 fp16 adds;
    # score_bits 8 is served by the nearest float entry, fp16
    softmax = elements * (H_INT8_ADD + 4 * H_FP16_MULT + 4 * H_FP16_ADD)
    # every row once, 64 B each (64 elements x 8 bits): Q 2 heads x 1 row, K and V 2 heads x 4 rows;
    # each buffer is written once and read once
    moved = {"query": 2 * 1 * 64, "key": 2 * 4 * 64, "value": 2 * 4 * 64}
    b = doc["buffers"]
    for k, n in moved.items():
        assert (b[k]["bytes_written"], b[k]["bytes_read"]) == (n, n)
    per_64b = {"query": H_SRAM_8K, "key": H_SRAM_32K, "value": H_SRAM_8K}
    ev = preset_values("energy_horowitz45.yaml")
    f = ev["sram_access"]["fixed_share"]           # assumption, named in the preset
    # reads: 64 lanes x 8 bits = 512-bit words; writes: one 64 B burst = 512 bits
    width = 512
    per_access = {k: v * (f + (1 - f) * width / 64) for k, v in per_64b.items()}
    sram = {k: 2 * moved[k] * 8 / width * per_access[k] for k in per_64b}
    assert doc["dram"]["bytes"] == sum(moved.values())
    dram = sum(moved.values()) * 8 * H_DRAM_64B_MID_PJ / 64
    # area proxy by hand (area preset, from memory): 512 int8 multipliers + int32 adders; 16 softmax lanes
    # of 4 fp16 multipliers, 4 fp16 adders and an int8 compare; 8 top-k int8 comparators; SRAM per KiB
    av = preset_values("area_proxy45.yaml")
    mm2 = {"dot": 512 * (av["multiplier_um2"]["int8"] + av["adder_um2"]["int32"]) / 1e6,
           "softmax": 16 * (4 * av["multiplier_um2"]["fp16"] + 4 * av["adder_um2"]["fp16"]
                            + av["adder_um2"]["int8"]) / 1e6,
           "topk": 8 * av["adder_um2"]["int8"] / 1e6}
    mm2.update({f"{k}_buffer": kib * av["sram"]["um2_per_kib"] / 1e6
                for k, kib in (("query", 8), ("key", 32), ("value", 8))})
    clk = ev["clock"]["pj_per_mm2_busy_cycle"]
    clock = {u: doc["units"][u]["busy"] * doc["cycles"] * clk * mm2[u] for u in ("dot", "softmax", "topk")}
    leak_w = {u: ev["leakage_mw_per_mm2"]["sram" if u.endswith("buffer") else "logic"] * a * 1e-3
              for u, a in mm2.items()}
    static = {u: w * doc["seconds"] * 1e12 for u, w in leak_w.items()}
    e = doc["energy"]
    assert e["dynamic_units_pj"]["dot"] == pytest.approx(dot + clock["dot"], rel=1e-9)
    assert e["dynamic_units_pj"]["softmax"] == pytest.approx(softmax + clock["softmax"], rel=1e-9)
    for k in per_64b:
        assert e["dynamic_units_pj"][f"{k}_buffer"] == pytest.approx(sram[k], rel=1e-9)
    assert e["units_pj"]["dram"] == pytest.approx(dram, rel=1e-9)
    for u, pj in static.items():
        assert e["static_units_pj"][u] == pytest.approx(pj, rel=1e-9)
    dynamic = dot + softmax + sum(sram.values()) + dram + sum(clock.values())
    assert e["dynamic_pj"] == pytest.approx(dynamic, rel=1e-9)
    assert e["static_pj"] == pytest.approx(sum(static.values()), rel=1e-9)
    assert e["total_pj"] == pytest.approx(dynamic + sum(static.values()), rel=1e-9)
    assert e["leakage_total_mw"] == pytest.approx(sum(leak_w.values()) * 1e3, rel=1e-9)
    assert e["static_power_w"] == pytest.approx(sum(leak_w.values()), rel=1e-9)


def test_total_is_sum_over_units_and_operations(tiny_run):
    _a, _t, doc = tiny_run
    e = doc["energy"]
    # the document keeps 12 significant digits, so sums of its rounded parts agree to ~1e-11
    assert e["total_pj"] == pytest.approx(sum(e["units_pj"].values()), rel=1e-10)
    assert e["total_pj"] == pytest.approx(sum(op["pj"] for op in e["operations"].values()), rel=1e-10)
    assert e["total_pj"] == pytest.approx(e["dynamic_pj"] + e["static_pj"], rel=1e-10)
    for op in e["operations"].values():
        assert op["pj"] == pytest.approx(op["count"] * op["pj_each"], rel=1e-10)
        assert op["kind"] in ("dynamic", "static")


@pytest.mark.parametrize("config,trace", [("mid", "traces/demo_prefill.yaml"),
                                          ("server", "traces/demo_decode.yaml")])
def test_bundled_runs_sum_and_power(config, trace):
    doc = sim.simulate(f"arch_configs/{config}.yaml", trace).to_dict()
    e = doc["energy"]
    assert e["total_pj"] > 0 and e["static_pj"] > 0 and e["dynamic_pj"] > 0
    assert e["total_pj"] == pytest.approx(sum(e["units_pj"].values()), rel=1e-9)
    assert e["average_power_w"] == pytest.approx(e["total_pj"] * 1e-12 / doc["seconds"], rel=1e-9)
    w = e["work"]
    assert e["pj_per_token"] == pytest.approx(e["total_pj"] / w["tokens"], rel=1e-9)
    assert e["pj_per_query_row"] == pytest.approx(e["total_pj"] / w["query_rows"], rel=1e-9)
    if config == "server":  # separate arrays: p.V energy is charged to dot_pv
        o = e["operations"]
        assert e["dynamic_units_pj"]["dot_pv"] == pytest.approx(
            o["pv_multiply"]["pj"] + o["pv_accumulate"]["pj"] + o["dot_pv_clock"]["pj"], rel=1e-10)
        assert e["static_units_pj"]["dot_pv"] == pytest.approx(o["dot_pv_leakage"]["pj"], rel=1e-10)


def test_default_precision_picks_nearest_entries(tiny_run):
    """q 8 x k_msb 4 -> int8; p 16 x v 8 -> int16 (derived entry, int8 x (16/8)^2)."""
    doc = sim.simulate("arch_configs/mid.yaml", "traces/demo_decode.yaml").to_dict()
    ops = doc["energy"]["operations"]
    assert ops["qk_multiply"]["entry"] == "multiply_pj.int8"
    assert ops["qk_multiply"]["pj_each"] == H_INT8_MULT
    assert ops["pv_multiply"]["entry"] == "multiply_pj.int16"
    assert ops["pv_multiply"]["pj_each"] == pytest.approx(H_INT8_MULT * (16 / 8) ** 2)
    assert ops["qk_accumulate"]["pj_each"] == H_INT32_ADD


def test_nearest_width_rule():
    g = {"int8": {"value": 1}, "int32": {"value": 2}, "fp16": {"value": 3}}
    assert presets.nearest_width(g, "int", 4)[0] == "int8"
    assert presets.nearest_width(g, "int", 19)[0] == "int8"
    assert presets.nearest_width(g, "int", 20)[0] == "int32"   # tie: 12 bits either way -> the wider
    assert presets.nearest_width(g, "int", 64)[0] == "int32"
    assert presets.nearest_width(g, "fp", 8)[0] == "fp16"
    assert presets.nearest_width({"int8": {"value": 1}}, "fp", 16) == (None, None)


def test_sram_between_and_beyond_table_sizes():
    """Power law through the neighbours: 16 KiB between 8 (10 pJ) and 32 KiB (20 pJ) is sqrt(10 x 20)."""
    g = {8: {"value": H_SRAM_8K}, 32: {"value": H_SRAM_32K}, 1024: {"value": H_SRAM_1M}}
    assert presets.sram_per_access(g, 32)[0] == H_SRAM_32K
    assert presets.sram_per_access(g, 16)[0] == pytest.approx(math.sqrt(H_SRAM_8K * H_SRAM_32K))
    p = math.log(H_SRAM_1M / H_SRAM_32K) / math.log(1024 / 32)
    assert presets.sram_per_access(g, 256)[0] == pytest.approx(H_SRAM_32K * 8 ** p)
    assert presets.sram_per_access(g, 4)[0] == pytest.approx(H_SRAM_8K * 0.5 ** 0.5)  # continued below
    lo, hi = presets.sram_per_access(g, 9)[0], presets.sram_per_access(g, 31)[0]
    assert H_SRAM_8K < lo < hi < H_SRAM_32K


def test_preset_names_its_source_and_every_origin():
    t = presets.load_preset("energy", "horowitz45")
    assert "Horowitz" in t["source"] and "ISSCC 2014" in t["source"]
    for g in t["groups"].values():
        for e in g.values():
            assert e["origin"]
    m = t["groups"]["multiply_pj"]
    assert (m["int8"]["value"], m["int32"]["value"], m["fp16"]["value"]) == (H_INT8_MULT, H_INT32_MULT, H_FP16_MULT)
    assert t["groups"]["add_pj"]["int8"]["value"] == H_INT8_ADD
    derived = [e["origin"] for g in t["groups"].values() for e in g.values() if e["origin"] != "Horowitz 2014"]
    assert all(o.startswith(("derived", "from memory", "assumption", "common practice")) for o in derived)


def test_override_changes_energy_linearly(tiny_run):
    arch, trace, doc = tiny_run
    twice = tiny_arch(overrides={"dram_pj_per_bit.ddr3": 2 * H_DRAM_64B_MID_PJ / 64})
    d2 = sim.simulate(twice, trace).to_dict()
    assert d2["energy"]["units_pj"]["dram"] == pytest.approx(2 * doc["energy"]["units_pj"]["dram"], rel=1e-9)
    assert d2["energy"]["units_pj"]["dot"] == pytest.approx(doc["energy"]["units_pj"]["dot"], rel=1e-12)
    # leakage is linear in its density, and only static energy moves
    leaky = tiny_arch(overrides={"leakage_mw_per_mm2.logic": 0.0, "leakage_mw_per_mm2.sram": 0.0})
    d3 = sim.simulate(leaky, trace).to_dict()["energy"]
    assert d3["static_pj"] == 0 and d3["dynamic_pj"] == pytest.approx(doc["energy"]["dynamic_pj"], rel=1e-12)
    assert d2["energy"]["operations"]["dram_transfer"]["origin"].startswith("override")


def test_auto_interface_follows_bus_width():
    a = sim.load_arch({"dram": {"bus_bits": 64}})
    assert E.dram_interface(a.to_dict(), E.resolve_table(a.to_dict()))[0] == "ddr4"
    b = sim.load_arch({"dram": {"bus_bits": 128}})
    assert E.dram_interface(b.to_dict(), E.resolve_table(b.to_dict()))[0] == "hbm2"


@pytest.mark.parametrize("section,expect", [
    ({"preset": "horowitz"}, "energy.preset"),
    ({"dram_interface": "hbm3"}, "energy.dram_interface"),
    ({"overrides": {"multiply_pj.int8x": 1.0}}, "energy.overrides.multiply_pj.int8x"),
    ({"overrides": {"sram.write_factr": 1.0}}, "did you mean 'write_factor'"),
    ({"overrides": {"add_pj.int8": -1}}, "expected a number of pJ >= 0"),
    ({"overrides": {"softmx.exp_adds": 2}}, "did you mean 'softmax'"),
])
def test_bad_energy_config_is_an_input_error(section, expect):
    with pytest.raises(ConfigError) as ei:
        sim.load_arch({"energy": section}, source="cfg.yaml")
    assert expect in str(ei.value) and str(ei.value).startswith("cfg.yaml: ")


def test_preset_file_errors_name_the_file_and_field(tmp_path):
    p = tmp_path / "mine.yaml"
    p.write_text("name: mine\nsource: ours\nmultiply_pj:\n  int8: {value: 0.2}\n")
    with pytest.raises(ConfigError) as ei:
        sim.load_arch({"energy": {"preset": str(p)}})
    assert str(p) in str(ei.value) and "multiply_pj.int8" in str(ei.value)


def test_energy_section_round_trips():
    a = sim.load_arch("arch_configs/edge.yaml").with_overrides({"energy.overrides": {"add_pj.int32": 0.2}})
    assert sim.load_arch(a.to_dict()).to_dict() == a.to_dict()


def test_wider_sram_access_is_cheaper_per_byte():
    """Same bytes, wider reads (more lanes): fewer accesses, each dearer, less energy per byte."""
    d = sim.load_arch("arch_configs/mid.yaml").to_dict()
    table = E.resolve_table(d)
    counts = {"macs_qk": 0, "macs_lsb_recompute": 0, "macs_pv": 0, "softmax_elements": 0, "topk_comparisons": 0,
              "dram_bytes": 0, "buffers": {"key": {"bytes_read": 1 << 20, "bytes_written": 0}}}
    narrow = E.operation_energy({**d, "dot": {**d["dot"], "lanes": 16}}, counts, table)["key_buffer_read"]
    wide = E.operation_energy({**d, "dot": {**d["dot"], "lanes": 128}}, counts, table)["key_buffer_read"]
    assert wide["operand_bits"] == 8 * narrow["operand_bits"]
    assert wide["count"] * 8 == pytest.approx(narrow["count"])
    assert wide["pj_each"] > narrow["pj_each"] and wide["pj"] < narrow["pj"]


def test_energy_differs_between_multiplier_counts_on_the_bundled_sweep():
    """The bundled decode sweep at one buffer setting: every multiplier count gives its own energy,
    and a larger array leaks more per second (its static power is higher)."""
    from sim.sweep import load_spec, make_plan

    plan = make_plan(load_spec("arch_configs/sweeps/decode_array_vs_buffers.yaml"))
    first = plan.points[0]
    others = {k: v for k, v in first.point.items() if k != "dot.multipliers"}
    pts = [p for p in plan.points if p.trace == first.trace
           and all(p.point[k] == v for k, v in others.items())]
    assert len(pts) >= 3
    energy, static_w = {}, {}
    for p in pts:
        e = sim.simulate(p.config, p.trace_path, keep_intervals=False).to_dict()["energy"]
        energy[p.point["dot.multipliers"]] = e["total_pj"]
        static_w[p.point["dot.multipliers"]] = e["static_power_w"]
    assert len(set(energy.values())) == len(energy), energy
    ms = sorted(static_w)
    assert all(static_w[a] < static_w[b] for a, b in zip(ms, ms[1:]))
