"""Bad DRAM knobs give one line naming the field; presets load; the probe refuses
offered loads above the pool's peak. (Input rules: our own; no outside source,
except where a check names the JEDEC rule it enforces.)"""

import os

import pytest

import sim
from sim.cli import main
from sim.errors import ConfigError

HERE = os.path.dirname(os.path.abspath(__file__))
PRESETS = os.path.join(os.path.dirname(HERE), "arch_configs", "memory")


def bad(dram, field, words):
    with pytest.raises(ConfigError) as exc:
        sim.load_arch({"dram": dram})
    assert exc.value.field == field
    msg = str(exc.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg
    return msg


def test_impossible_timings_and_geometry():
    bad({"t_ras_ns": 10.0, "t_rcd_ns": 14.0}, "dram.t_ras_ns", ["t_rcd_ns"])
    bad({"burst_bytes": 4096, "row_bytes": 2048, "interleave_bytes": 4096}, "dram.burst_bytes", ["row_bytes"])
    bad({"banks": 0}, "dram.banks", [">= 1"])
    bad({"bank_groups": 3}, "dram.bank_groups", ["divisor"])
    bad({"t_rfc_ns": 5000.0}, "dram.t_rfc_ns", ["t_refi_ns"])
    bad({"burst_bytes": 24, "interleave_bytes": 96}, "dram.burst_bytes", ["beats"])
    bad({"t_cl_ns": -1.0}, "dram.t_cl_ns", ["> 0"])
    bad({"page_policy": "opn"}, "dram.page_policy", ["open"])


def test_address_maps_that_collide_or_leave_bits_unused():
    # 8 channels -> 3 channel bits; 16 banks in 4 groups -> 2 + 2; 2 KiB / 64 B -> 5 column bits
    bad({"address_bits": "row,bank:2,column:5,channel:4,group:2"}, "dram.address_bits", ["collide"])
    bad({"address_bits": "row,bank:1,column:5,channel:3,group:2"}, "dram.address_bits", ["unused"])
    bad({"address_bits": "row,bank,column,channel,grup"}, "dram.address_bits", ["group"])
    bad({"address_bits": "row,bank,column,column,channel,group"}, "dram.address_bits", ["twice"])
    bad({"address_bits": "row,bank,column,group,channel"}, "dram.interleave_bytes", ["64"])
    bad({"channels": 6}, "dram.channels", ["power of two"])
    # fine as the fixed-latency model, which maps channels round robin
    sim.load_arch({"dram": {"channels": 6, "model": "fixed-latency"}})


def test_explicit_map_equal_to_auto_is_accepted():
    a = sim.load_arch({"dram": {"address_bits": "row,bank,column:5,channel:3,group:2",
                                "interleave_bytes": 256}})
    from sim.arch import address_slices
    auto = address_slices(sim.load_arch({"dram": {}}).to_dict()["dram"])
    assert address_slices(a.to_dict()["dram"]) == auto


PRESET_NAMES = ["hbm2", "hbm2_pseudo", "ddr4_3200", "hbm3", "hbm3e", "lpddr5x", "gddr6"]


@pytest.mark.parametrize("name", PRESET_NAMES)
def test_presets_load_and_round_trip(name):
    a = sim.load_arch(os.path.join(PRESETS, f"{name}.yaml"))
    assert sim.load_arch(a.to_dict()).to_dict() == a.to_dict()


def test_probe_refuses_loads_above_peak(capsys):
    rc = main(["dram", "probe", os.path.join(PRESETS, "hbm2.yaml"), "--loads", "0.5,1.2"])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and "1.2" in err and "peak" in err


def test_probe_writes_a_curve(tmp_path, capsys):
    out = tmp_path / "curve.csv"
    rc = main(["dram", "probe", os.path.join(PRESETS, "ddr4_3200.yaml"), "--loads", "0.2,0.9",
               "--requests", "300", "--csv", str(out)])
    assert rc == 0
    lines = out.read_text().splitlines()
    assert lines[0].startswith("pattern,offered_fraction")
    assert len(lines) == 1 + 5 * 2
    # latency grows with load on every pattern (common practice, no source)
    import csv
    rows = list(csv.DictReader(out.open()))
    for p in ("sequential", "strided", "random", "scattered", "mixed"):
        lo, hi = [float(r["mean_latency_ns"]) for r in rows if r["pattern"] == p]
        assert hi > lo


def test_preset_rates_are_the_standards_channels_times_width_times_pin_rate():
    """Per-channel peak = bus width x data rate per pin / 8, as the standards state it:
    HBM3 JEDEC JESD238 (32-bit pseudo-channel, 6.4 Gb/s, 32 per stack = 819.2 GB/s),
    LPDDR5X JEDEC JESD209-5B (16-bit channel, 8533 MT/s, about 17 GB/s), GDDR6 JEDEC
    JESD250 (two 16-bit channels per device at 16 Gb/s = 64 GB/s per device). HBM3E-class:
    9.6 Gb/s per pin, a vendor-extended grade (from memory)."""
    cases = {"hbm3": (32, 32, 6.4), "hbm3e": (32, 32, 9.6), "lpddr5x": (4, 16, 8.533),
             "gddr6": (2, 16, 16.0)}
    for name, (channels, bits, gbps_per_pin) in cases.items():
        a = sim.load_arch(os.path.join(PRESETS, f"{name}.yaml"))
        assert a.dram.channels == channels and a.dram.bus_bits == bits, name
        assert a.dram.channel_gbps == pytest.approx(bits * gbps_per_pin / 8, rel=1e-4), name
    assert sim.load_arch(os.path.join(PRESETS, "hbm3.yaml")).peak_gbps == pytest.approx(819.2)
    assert sim.load_arch(os.path.join(PRESETS, "gddr6.yaml")).peak_gbps == pytest.approx(64.0)


@pytest.mark.parametrize("name", PRESET_NAMES)
def test_every_preset_value_names_its_source(name):
    """Each dram value of a preset carries a comment saying where it comes from (the model
    choice and the automatic address map are settings of ours, not values)."""
    path = os.path.join(PRESETS, f"{name}.yaml")
    in_dram = False
    for line in open(path, encoding="utf-8"):
        if line.startswith("dram:"):
            in_dram = True
            continue
        if (in_dram and line.startswith("  ") and ":" in line
                and line.strip() not in ("address_bits: auto", "model: banked")):
            assert "#" in line, f"{name}: {line.strip()} has no source"


def preset_file(tmp_path, name, **dram):
    """A copy of a preset with some dram keys replaced (None: removed)."""
    import yaml
    with open(os.path.join(PRESETS, f"{name}.yaml"), encoding="utf-8") as fh:
        raw = yaml.safe_load(fh)
    if "extends" in raw:
        raw["extends"] = os.path.join(PRESETS, raw["extends"])
    for k, v in dram.items():
        if v is None:
            raw["dram"].pop(k, None)
        else:
            raw["dram"][k] = v
    out = tmp_path / f"{name}_bad.yaml"
    out.write_text(yaml.safe_dump(raw))
    return str(out)


BAD_PRESETS = [
    # JEDEC defines tRAS as at least tRCD (a row opens before it may close)
    ("gddr6", {"t_ras_ns": 10.0}, "dram.t_ras_ns", "10.0"),
    # four activates at tRRD_S spacing span 4 x tRRD_S: a shorter tFAW contradicts tRRD_S
    ("hbm3", {"t_faw_ns": 8.0}, "dram.t_faw_ns", "8.0"),
    # JEDEC tRC >= tRAS + tRP
    ("lpddr5x", {"t_rc_ns": 50.0}, "dram.t_rc_ns", "50.0"),
    # a refresh mode the standard does not have: DDR4 refreshes all banks only
    ("ddr4_3200", {"refresh": "per_bank"}, "dram.refresh", "per_bank"),
    # same-bank refresh is DDR5's; HBM3 has per-bank refresh
    ("hbm3", {"refresh": "same_bank"}, "dram.refresh", "same_bank"),
    # a timing the mode needs, missing: per-bank refresh needs its command interval
    ("gddr6", {"t_refi_pb_ns": None}, "dram.t_refi_pb_ns", "None"),
    # and the activation window, in every mode of a named standard
    ("lpddr5x", {"t_faw_ns": None}, "dram.t_faw_ns", "None"),
    ("hbm3e", {"t_rrd_l_ns": 1.0}, "dram.t_rrd_l_ns", "1.0"),
    ("gddr6", {"t_refi_pb_ns": 100.0}, "dram.t_refi_pb_ns", "100.0"),
    ("hbm2", {"write_low": 0.9}, "dram.write_low", "0.9"),
]


@pytest.mark.parametrize("name,dram,field,shown", BAD_PRESETS)
def test_bad_preset_is_one_line_naming_file_field_value_and_expectation(tmp_path, capsys, name, dram,
                                                                         field, shown):
    path = preset_file(tmp_path, name, **dram)
    with pytest.raises(ConfigError) as exc:
        sim.load_arch(path)
    assert exc.value.field == field
    rc = main(["arch", "check", path])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1
    assert path in err and field in err and shown in err
    assert "expected" in err or "missing" in err


def test_a_custom_memory_may_leave_timings_to_the_defaults():
    """Only a config that names its standard must give every timing; custom takes defaults."""
    a = sim.load_arch({"dram": {"refresh": "same_bank", "t_refi_pb_ns": 3900.0 / 4}})
    assert a.dram.standard == "custom" and a.dram.refresh == "same_bank"
    with pytest.raises(ConfigError) as exc:
        sim.load_arch({"dram": {"standard": "hbm3"}})
    assert exc.value.field.startswith("dram.t_") and "missing" in str(exc.value)
