"""Sensitivity in a report: each main resource doubled and halved, refresh policies switched,
refresh turned off (what refresh costs), measured by simulating the change.

The expected speedups are computed here by simulating the changed config
directly with ``sim.simulate`` (not through the report's planning), so the
check is that the report shows what a run of the change measures.
"""

import csv
import json
import os

import pytest

import sim
from sim.cli import main
from sim.report import sensitivity as S
from sim.report.inputs import Run, label_runs
from sim.trace.files import save_trace
from sim.trace.synth import synth_trace


def read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def lane_report(tmp_path_factory):
    """Head width 32 on hbm2_stack's 128 lanes: a report with sensitivity on the one run."""
    d = tmp_path_factory.mktemp("lanes")
    trace = synth_trace(prompt_tokens=256, decode_steps=0, layers=2, heads=6, head_dim=32, seed=5,
                        name="narrow_heads")
    tpath = str(d / "narrow.npz")
    save_trace(trace, tpath)
    js = str(d / "run.json")
    assert main(["run", "--arch", "arch_configs/hbm2_stack.yaml", "--trace", tpath, "--json", js]) == 0
    out = str(d / "rep")
    assert main(["report", js, "--out", out, "--sensitivity", "all", "--jobs", "1", "--no-replay"]) == 0
    return out, json.load(open(js)), tpath


def test_lane_match_gain_is_the_measured_one(lane_report):
    out, doc, tpath = lane_report
    rows = read_csv(os.path.join(out, "data", "sensitivity.csv"))
    lane = next(r for r in rows if r["resource"] == S.LANES)
    assert lane["setting"] == "dot.lanes 128 -> 32" and lane["status"] == "ok"
    # the same change, simulated here directly
    arch = sim.load_arch("arch_configs/hbm2_stack.yaml")
    matched = sim.simulate(arch.with_overrides({"dot.lanes": 32}), tpath, keep_intervals=False).to_dict()
    assert int(lane["cycles"]) == matched["cycles"]
    assert float(lane["speedup"]) == pytest.approx(doc["cycles"] / matched["cycles"], rel=1e-12)
    assert float(lane["speedup"]) > 1.5   # 32 of 128 lanes busy before: most of the array's time was idle lanes
    doubled = sim.simulate(arch.with_overrides({"dot.multipliers": 2 * arch.dot.multipliers}), tpath,
                           keep_intervals=False).to_dict()
    mult = next(r for r in rows if r["resource"] == "multipliers" and r["direction"] == "x2")
    assert int(mult["cycles"]) == doubled["cycles"]
    # the verdict names the change that bought most, with the measured number
    md = open(os.path.join(out, "report.md")).read()
    best = max((r for r in rows if r["speedup"] and r["direction"] != "bound"), key=lambda r: float(r["speedup"]))
    assert f"{best['setting']}) makes it {float(best['speedup']):,.2f}x faster" in md
    assert "lane under-use" in md
    # the Markdown table shows every measured speedup to its digits
    for r in rows:
        if r["speedup"]:
            assert f"| {r['setting']} | ok | {float(r['speedup']):,.2f} |" in md
    man = json.load(open(os.path.join(out, "manifest.json")))
    assert "sensitivity" in man["figures"]


def test_every_resource_doubled_and_halved_or_said_why(lane_report):
    out, doc, _t = lane_report
    rows = read_csv(os.path.join(out, "data", "sensitivity.csv"))
    got = {(r["resource"], r["direction"]) for r in rows}
    for res in S.RESOURCES:
        assert (res.name, "x2") in got and (res.name, "/2") in got
    # the issue window is halved and doubled like any other resource
    win = {r["direction"]: r for r in rows if r["resource"] == "issue window"}
    w = doc["arch"]["config"]["fetch"]["issue_window"]
    assert w > 1
    assert win["/2"]["setting"] == f"fetch.issue_window {w} -> {w // 2}"
    assert win["x2"]["setting"] == f"fetch.issue_window {w} -> {w * 2}"


def test_refresh_policies_switched_are_the_measured_ones(lane_report):
    """hbm2_stack refreshes all banks of a channel at once, on schedule: the report also
    measures refresh postponed (up to 8 owed) and per-bank refresh (which HBM2 has, JEDEC
    JESD235A; from memory), each equal to a run of that config simulated here."""
    out, doc, tpath = lane_report
    rows = {r["resource"]: r for r in read_csv(os.path.join(out, "data", "sensitivity.csv"))
            if r["direction"] == "switch"}
    assert rows["refresh postponed"]["setting"] == "dram.refresh_postpone 0 -> 8"
    assert rows["per-bank refresh"]["setting"] == "dram.refresh all_bank -> per_bank"
    arch = sim.load_arch("arch_configs/hbm2_stack.yaml")
    for name, over in (("refresh postponed", {"dram.refresh_postpone": 8}),
                       ("per-bank refresh", {"dram.refresh": "per_bank"})):
        direct = sim.simulate(arch.with_overrides(over), tpath, keep_intervals=False).to_dict()
        assert rows[name]["status"] == "ok" and int(rows[name]["cycles"]) == direct["cycles"]
        assert float(rows[name]["speedup"]) == pytest.approx(doc["cycles"] / direct["cycles"], rel=1e-12)


def test_refresh_policies_the_memory_lacks_are_not_offered():
    """DDR4 refreshes all banks at once (JEDEC JESD79-4; from memory): mid gets no per-bank
    variant, only postponement, nor does a custom memory; with refresh off, or already
    postponing 8, neither."""
    def switched(arch):
        doc = sim.simulate(arch, "traces/demo_decode.yaml", keep_intervals=False).to_dict()
        run = Run(doc, "x", trace_path="traces/demo_decode.yaml")
        label_runs([run])
        return {v.resource for v in S.plan_variants(run) if v.direction == "switch"}

    mid = sim.load_arch("arch_configs/mid.yaml")
    assert switched(mid) == {"refresh postponed"}
    # a custom memory's per-bank timings would be the defaults, not its own: not offered
    custom = sim.load_arch({"dram": {"channels": 2}, "fetch": {"request_bytes": 64}})
    assert custom.dram.standard == "custom" and switched(custom) == {"refresh postponed"}
    assert switched(mid.with_overrides({"dram.t_rfc_ns": 0.0})) == set()
    assert switched(mid.with_overrides({"dram.refresh_postpone": 8})) == set()


def _bounds(arch):
    doc = sim.simulate(arch, "traces/demo_decode.yaml", keep_intervals=False).to_dict()
    run = Run(doc, "x", trace_path="traces/demo_decode.yaml")
    label_runs([run])
    return [v.setting for v in S.plan_variants(run) if v.direction == "bound"]


def test_refresh_off_is_offered_where_the_memory_refreshes():
    """Refresh off is the refresh time of the memory's own mode set to 0: tRFC for all-bank
    refresh, tRFCpb for per-bank (JEDEC JESD235A names both; from memory); none where nothing
    refreshes (refresh already off, or the fixed-latency model, which has no banks)."""
    mid = sim.load_arch("arch_configs/mid.yaml")
    assert _bounds(mid) == [f"dram.t_rfc_ns {mid.dram.t_rfc_ns:g} -> 0"]
    hbm = sim.load_arch("arch_configs/hbm2_stack.yaml").with_overrides({"dram.refresh": "per_bank"})
    assert _bounds(hbm) == [f"dram.t_rfc_pb_ns {hbm.dram.t_rfc_pb_ns:g} -> 0"]
    assert _bounds(mid.with_overrides({"dram.t_rfc_ns": 0.0})) == []
    assert _bounds(mid.with_overrides({"dram.model": "fixed-latency"})) == []


@pytest.fixture(scope="module")
def refresh_report(tmp_path_factory):
    """The bundled synthetic decode on server: 16 HBM2 channels refreshing all banks in turn."""
    d = tmp_path_factory.mktemp("refresh")
    js = str(d / "run.json")
    assert main(["run", "--arch", "arch_configs/server.yaml", "--trace", "traces/synth_decode.npz",
                 "--json", js]) == 0
    out = str(d / "rep")
    assert main(["report", js, "--out", out, "--sensitivity", "all", "--jobs", "1", "--no-replay"]) == 0
    return out, json.load(open(js))


def test_refresh_cost_is_the_measured_rerun_and_not_a_change_to_make(refresh_report):
    out, doc = refresh_report
    rows = read_csv(os.path.join(out, "data", "sensitivity.csv"))
    off = [r for r in rows if r["direction"] == "bound"]
    assert len(off) == 1 and off[0]["resource"] == S.REFRESH_OFF and off[0]["status"] == "ok"
    assert off[0]["setting"] == "dram.t_rfc_ns 260 -> 0"
    # the same config without refresh, simulated here directly
    direct = sim.simulate(sim.load_arch("arch_configs/server.yaml").with_overrides({"dram.t_rfc_ns": 0.0}),
                          "traces/synth_decode.npz", keep_intervals=False).to_dict()
    assert int(off[0]["cycles"]) == direct["cycles"]
    speedup = doc["cycles"] / direct["cycles"]
    assert float(off[0]["speedup"]) == pytest.approx(speedup, rel=1e-12)
    assert speedup > 1.5          # the premise: refresh weighs on this decode far beyond its share of time
    md = open(os.path.join(out, "report.md")).read()
    assert f"Refresh costs it {speedup:,.2f}x: with refresh off it takes {direct['cycles']:,} cycles" in md
    # the best change named is one that can be made, and refresh off is larger than any of them
    changes = [r for r in rows if r["speedup"] and r["direction"] != "bound"]
    best = max(changes, key=lambda r: float(r["speedup"]))
    assert "Measured best change: " in md and f"({best['setting']}) makes it" in md
    assert "Measured best change: turning refresh off" not in md
    assert all(float(r["speedup"]) < speedup for r in changes)


def test_a_refresh_cost_inside_the_tie_margin_is_not_said():
    from sim.report.verdict import refresh_cost_text
    row = {"direction": "bound", "speedup": 1.005, "cycles": 1000}
    assert refresh_cost_text([row]) == ""
    assert refresh_cost_text([{**row, "speedup": 1.2}]).startswith("Refresh costs it 1.20x")


def test_issue_window_of_zero_opens_to_a_stated_window():
    """An issue window of 0 cannot be halved; doubled it opens to a stated window."""
    arch = sim.load_arch("arch_configs/edge.yaml").with_overrides({"fetch.issue_window": 0})
    doc = sim.simulate(arch, "traces/demo_decode.yaml", keep_intervals=False).to_dict()
    run = Run(doc, "x", trace_path="traces/demo_decode.yaml")
    label_runs([run])
    var = {v.direction: v for v in S.plan_variants(run) if v.resource == "issue window"}
    assert var["/2"].config is None and "nothing to halve" in var["/2"].error
    assert var["x2"].setting == f"fetch.issue_window 0 -> {S.ISSUE_WINDOW_FROM_ZERO}"


def test_invalid_variant_is_named_not_run():
    """Halving the multipliers below one row of lanes is not a datapath: the reason is kept."""
    doc = sim.simulate(sim.load_arch("arch_configs/edge.yaml").with_overrides({"dot.multipliers": 32}),
                       "traces/demo_decode.yaml", keep_intervals=False).to_dict()
    run = Run(doc, "x", trace_path="traces/demo_decode.yaml")
    label_runs([run])
    half = next(v for v in S.plan_variants(run) if v.resource == "multipliers" and v.direction == "/2")
    assert half.config is None and "dot.lanes" in half.error


def test_too_large_request_is_refused_with_the_count(tmp_path, capsys):
    paths = []
    for c in ("edge", "mid", "server"):
        p = str(tmp_path / f"{c}.json")
        assert main(["run", "--arch", f"arch_configs/{c}.yaml", "--trace", "traces/demo_decode.yaml",
                     "--json", p]) == 0
        paths.append(p)
    capsys.readouterr()
    runs = [Run(json.load(open(p)), p, trace_path="traces/demo_decode.yaml") for p in paths]
    label_runs(runs)
    n = S.extra_runs(runs)
    assert main(["report", *paths, "--out", str(tmp_path / "o"), "--sensitivity", "all",
                 "--sensitivity-limit", "20", "--no-replay"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert f"{n} extra simulations" in err and "--sensitivity fastest" in err and f"--sensitivity-limit {n}" in err
    assert not os.path.exists(tmp_path / "o")
    # auto over the limit: no reruns, the report and the terminal say why
    assert main(["report", *paths, "--out", str(tmp_path / "a"), "--sensitivity-limit", "20",
                 "--no-replay"]) == 0
    err = capsys.readouterr().err
    assert "Sensitivity not measured" in err and f"{n} extra simulations" in err
    assert "Sensitivity not measured" in open(tmp_path / "a" / "report.md").read()
    assert "sensitivity" not in json.load(open(tmp_path / "a" / "manifest.json"))["figures"]


def test_runs_on_dask_like_locally():
    """The reruns go through the sweep backends: a local Dask cluster gives the same rows."""
    pytest.importorskip("distributed")
    from sim.sweep.backends import DaskBackend

    doc = sim.simulate("arch_configs/mid.yaml", "traces/demo_decode.yaml", keep_intervals=False).to_dict()

    def rows(backend=None, jobs=None):
        run = Run(doc, "x", trace_path="traces/demo_decode.yaml")
        label_runs([run])
        table, _notes = S.measure([run], backend=backend, jobs=jobs)
        return table[id(run)]

    local = rows(jobs=1)
    backend = DaskBackend(workers=1)
    try:
        remote = rows(backend=backend)
    finally:
        backend.close()
    assert remote == local
