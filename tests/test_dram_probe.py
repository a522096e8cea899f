"""``attnsim dram probe``: what it prints, its random-access and read/write-mix curves, and
the report figure drawn from its CSV. Behaviour checks of our own (common practice, no
source) except where a check names its rule."""

import csv
import json
import os

import pytest

import sim
from sim.cli import main
from sim.engine import probe

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
PRESETS = os.path.join(ROOT, "arch_configs", "memory")


def run_cli(capsys, *args):
    rc = main(list(args))
    out, err = capsys.readouterr()
    return rc, out, err


def test_probe_prints_the_stride_and_what_each_pattern_moves(capsys):
    """The default stride is one DRAM row x banks x channels (every request a new row of one
    bank); the line says so with the numbers, and names the scattered size and the mix."""
    path = os.path.join(PRESETS, "gddr6.yaml")
    d = sim.load_arch(path).dram
    rc, out, _ = run_cli(capsys, "dram", "probe", path, "--loads", "0.3", "--requests", "200",
                         "--write-share", "0.25")
    assert rc == 0
    stride = d.row_bytes * d.banks * d.channels
    assert f"strided: each request {stride:,} B after the last" in out
    assert f"{d.row_bytes:,} B row x {d.banks} banks x {d.channels} channels" in out
    assert "scattered: 64 B reads at random addresses" in out
    assert "25% of them writes" in out
    assert "at most, of the peak: sequential" in out and "of peak" in out
    rc, out, _ = run_cli(capsys, "dram", "probe", path, "--loads", "0.3", "--requests", "200",
                         "--patterns", "strided", "--stride", "4096")
    assert "strided: each request 4,096 B after the last (--stride)" in out


@pytest.mark.parametrize("share", ["1.5", "-0.1", "x"])
def test_bad_write_share_is_one_line(capsys, share):
    rc, _, err = run_cli(capsys, "dram", "probe", os.path.join(PRESETS, "hbm3.yaml"), "--write-share", share)
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and "--write-share" in err


def test_mixed_with_no_writes_is_the_random_curve_and_writes_cost_throughput():
    """The mix draws the same requests as the random pattern: with no writes it is the same
    curve point; at half writes the saturated channel delivers less (turnarounds, tWR)."""
    arch = sim.load_arch(os.path.join(PRESETS, "ddr4_3200.yaml")).with_overrides({"fetch.request_bytes": 256})
    rnd = probe.probe_point(arch, "random", 0.95, requests=1500)
    none = probe.probe_point(arch, "mixed", 0.95, requests=1500, write_share=0.0)
    half = probe.probe_point(arch, "mixed", 0.95, requests=1500, write_share=0.5)
    for k in ("delivered_gbps", "mean_latency_ns", "row_hit_rate"):
        assert none[k] == rnd[k]
    assert half["write_share"] == 0.5 and none["write_share"] == 0.0
    assert half["delivered_gbps"] < rnd["delivered_gbps"]


def test_scattered_reads_saturate_under_the_activation_bound():
    """Fully random 64-byte reads on one DDR4-3200 channel saturate at most at four activates
    per tFAW (JEDEC JESD79-4: at most four activates in any tFAW window), 64 bytes each, and
    well below the sequential curve."""
    arch = sim.load_arch(os.path.join(PRESETS, "ddr4_3200.yaml"))
    d = arch.dram
    scat = probe.probe_point(arch, "scattered", 0.95, requests=3000)
    seq = probe.probe_point(arch, "sequential", 0.95, requests=3000)
    assert scat["saturated"] and scat["row_hit_rate"] < 0.01
    assert scat["delivered_gbps"] <= 4 * 64 / d.t_faw_ns * (1 + 1e-9)
    assert scat["delivered_gbps"] < 0.6 * seq["delivered_gbps"]
    assert scat["efficiency"] == pytest.approx(scat["delivered_gbps"] / arch.peak_gbps)


def test_json_curve_names_stride_and_write_share(tmp_path, capsys):
    out = tmp_path / "curve.json"
    rc, _, _ = run_cli(capsys, "dram", "probe", os.path.join(PRESETS, "lpddr5x.yaml"), "--loads", "0.4",
                       "--requests", "200", "--patterns", "mixed", "--write-share", "0.3", "--json", str(out))
    assert rc == 0
    doc = json.loads(out.read_text())
    a = sim.load_arch(os.path.join(PRESETS, "lpddr5x.yaml"))
    assert doc["stride"] == a.dram.row_bytes * a.dram.banks * a.dram.channels
    assert doc["write_share"] == 0.3 and doc["rows"][0]["write_share"] == 0.3


def test_report_draws_the_probe_csv(tmp_path, capsys):
    """A probe CSV given to attnsim report becomes a figure with its data file; a CSV that is
    not a probe curve is refused in one line."""
    curve = tmp_path / "hbm3_probe.csv"
    rc, _, _ = run_cli(capsys, "dram", "probe", os.path.join(PRESETS, "hbm3.yaml"), "--loads", "0.3,0.9",
                       "--requests", "300", "--csv", str(curve), "--set", "dram.channels=2")
    assert rc == 0
    res = tmp_path / "run.json"
    rc, _, _ = run_cli(capsys, "run", "--arch", os.path.join(ROOT, "arch_configs", "mid.yaml"), "--trace",
                       os.path.join(ROOT, "traces", "demo_decode.yaml"), "--json", str(res))
    assert rc == 0
    out = tmp_path / "rep"
    rc, _, err = run_cli(capsys, "report", str(res), str(curve), "--out", str(out), "--sensitivity", "off",
                         "--no-replay")
    assert rc == 0, err
    assert (out / "figures" / "memory_probe.png").stat().st_size > 1000
    rows = list(csv.DictReader((out / "data" / "memory_probe.csv").open()))
    assert {r["pattern"] for r in rows} == set(probe.PATTERNS) and len(rows) == 2 * len(probe.PATTERNS)
    assert "memory_probe" in json.loads((out / "manifest.json").read_text())["figures"]
    bad = tmp_path / "other.csv"
    bad.write_text("a,b\n1,2\n")
    rc, _, err = run_cli(capsys, "report", str(res), str(bad), "--out", str(tmp_path / "rep2"),
                         "--sensitivity", "off", "--no-replay")
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and "other.csv" in err and "dram probe" in err
