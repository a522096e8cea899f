"""Area proxy: item counts of the config x per-item areas of the preset.

The per-item areas are the preset's (from memory, see its origins); the test
recomputes the proxy by hand from the config and the preset file read as
plain YAML, so the model's counting rules are what is checked.
"""

import importlib.resources

import pytest
import yaml

import sim
from sim.errors import ConfigError


def preset():
    text = importlib.resources.files("sim.costs.presets").joinpath("area_proxy45.yaml").read_text()
    raw = yaml.safe_load(text)
    return {g: {k: e["value"] for k, e in v.items()} for g, v in raw.items() if isinstance(v, dict)}


def test_shared_array_by_hand():
    """mid: 1024 multipliers sized for the widest operand (16-bit probability), 32-bit accumulators."""
    a = sim.load_arch("arch_configs/mid.yaml")
    from sim.costs.area import area_section
    area = area_section(a)
    p = preset()
    d = a.to_dict()
    m = d["dot"]["multipliers"]
    dot = m * (p["multiplier_um2"]["int16"] + p["adder_um2"]["int32"]) / 1e6
    lanes = d["softmax"]["lanes"]
    sm = lanes * (4 * p["multiplier_um2"]["fp16"] + 4 * p["adder_um2"]["fp16"] + p["adder_um2"]["int16"]) / 1e6
    tk = d["topk"]["comparators"] * p["adder_um2"]["int16"] / 1e6
    bufs = {n: d["buffers"][f"{n}_kib"] * p["sram"]["um2_per_kib"] / 1e6 for n in ("query", "key", "value")}
    u = area["units_mm2"]
    assert u["dot"] == pytest.approx(dot)
    assert u["softmax"] == pytest.approx(sm)
    assert u["topk"] == pytest.approx(tk)
    for n, v in bufs.items():
        assert u[f"{n}_buffer"] == pytest.approx(v)
    assert area["total_mm2"] == pytest.approx(dot + sm + tk + sum(bufs.values()))
    assert area["total_mm2"] == pytest.approx(sum(u.values()), rel=1e-12)
    assert area["proxy"] is True and "PROXY" in area["model"]


def test_separate_arrays_split_by_operand_width():
    """server: half the multipliers see q.K (8-bit), half p.V (16-bit)."""
    from sim.costs.area import area_section
    a = sim.load_arch("arch_configs/server.yaml")
    p = preset()
    half = a.dot.multipliers // 2
    u = area_section(a)["units_mm2"]
    assert u["dot"] == pytest.approx(half * (p["multiplier_um2"]["int8"] + p["adder_um2"]["int32"]) / 1e6)
    assert u["dot_pv"] == pytest.approx(half * (p["multiplier_um2"]["int16"] + p["adder_um2"]["int32"]) / 1e6)


def test_in_the_result_document_and_overridable():
    base = sim.load_arch("arch_configs/edge.yaml")
    doc = sim.simulate(base, "traces/demo_decode.yaml").to_dict()
    assert doc["area"]["total_mm2"] > 0
    p = preset()
    cheap = base.with_overrides({"area.overrides": {"sram.um2_per_kib": p["sram"]["um2_per_kib"] / 2}})
    from sim.costs.area import area_section
    a2 = area_section(cheap)
    kib = sum(base.to_dict()["buffers"][f"{n}_kib"] for n in ("query", "key", "value"))
    assert doc["area"]["total_mm2"] - a2["total_mm2"] == pytest.approx(kib * p["sram"]["um2_per_kib"] / 2 / 1e6)
    assert a2["items"]["key_buffer"][0]["origin"].startswith("override")


def test_more_multipliers_more_area():
    from sim.costs.area import area_section
    a = sim.load_arch("arch_configs/mid.yaml")
    b = a.with_overrides({"dot.multipliers": 2 * a.dot.multipliers})
    assert area_section(b)["units_mm2"]["dot"] == pytest.approx(2 * area_section(a)["units_mm2"]["dot"])


@pytest.mark.parametrize("section,expect", [
    ({"preset": "proxy"}, "did you mean 'proxy45'"),
    ({"overrides": {"multiplier_um2.int": 1.0}}, "int<BITS>"),
    ({"overrides": {"sram.um2_per_kb": 1.0}}, "did you mean 'um2_per_kib'"),
])
def test_bad_area_config(section, expect):
    with pytest.raises(ConfigError) as ei:
        sim.load_arch({"area": section})
    assert expect in str(ei.value)
