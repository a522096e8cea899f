"""Bad DRAM knobs give one line naming the field; presets load; the probe refuses
offered loads above the pool's peak. (Input rules: our own; no outside source.)"""

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


@pytest.mark.parametrize("name", ["hbm2", "hbm2_pseudo", "ddr4_3200"])
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
    assert len(lines) == 1 + 3 * 2
    # latency grows with load on every pattern (common practice, no source)
    import csv
    rows = list(csv.DictReader(out.open()))
    for p in ("sequential", "strided", "random"):
        lo, hi = [float(r["mean_latency_ns"]) for r in rows if r["pattern"] == p]
        assert hi > lo
