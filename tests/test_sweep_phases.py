"""Refresh phases as a sweep and a run take them: a sweep's ``refresh_phases`` (N, or
``auto`` for runs short for refresh) runs each point at N places in the DRAM refresh
schedule and ranks it by the means; ``attnsim run --refresh-phases`` does the same for one
run; the sweep summary and the run summary say how many refresh intervals a short run
lasts; a report of such results ranks them by the means.

The expected per-phase figures are simulated here directly with ``sim.simulate`` and the
``dram.refresh_phase`` override (not through the sweep's worker), and the figure the
sweep must rank by is their arithmetic mean, computed here. Refresh windows at a fixed
interval whose phase relative to the workload is arbitrary, so a design is judged by its
expected latency over the phase: common practice, no source.
"""

import contextlib
import csv
import io
import json
import os
import statistics

import pandas as pd
import pytest
import yaml

import sim
from sim.cli import main
from sim.formats import show
from sim.report.inputs import load_inputs
from sim.sweep import load_spec, point_key
from sim.sweep.spec import MAX_PHASES

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SERVER = os.path.join(ROOT, "arch_configs", "server.yaml")
TRACE = os.path.join(ROOT, "traces", "captured_short_moderate.npz")
PHASES = (0.0, 0.25, 0.5, 0.75)


def _spec(tmp_path, name="spec.yaml", **over):
    doc = {"name": "phases", "base": SERVER, "traces": [TRACE], "axes": {"dram.channels": [8, 16]},
           "objectives": ["cycles", "energy"], "refresh_phases": 4}
    doc.update(over)
    doc = {k: v for k, v in doc.items() if v is not None}
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


def _direct(overrides):
    arch = sim.load_arch(SERVER).with_overrides(overrides)
    return sim.simulate(arch, TRACE, keep_intervals=False).to_dict()


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """The two-point sweep run once through the command line: (folder, stdout)."""
    tmp = tmp_path_factory.mktemp("phases")
    out = str(tmp / "out")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["sweep", _spec(tmp), "--out", out, "--jobs", "1"]) == 0
    return out, buf.getvalue()


@pytest.fixture(scope="module")
def direct():
    """Each point's documents at the four phases, simulated directly."""
    return {c: [_direct({"dram.channels": c, "dram.refresh_phase": p}) for p in PHASES] for c in (8, 16)}


def test_the_table_ranks_by_the_means_and_the_record_keeps_each_run(swept, direct):
    out, _ = swept
    with sim.open_sweep(out) as s:
        frame = s.frame(columns=["config.dram.channels", "cycles", "seconds", "energy.total_pj",
                                 "refresh_phases.runs", "refresh_phases.spread"])
        records = {r["point"]["dram.channels"]: r for r in s.records()}
    rows = {int(r["config.dram.channels"]): r for _i, r in frame.iterrows()}
    for c, docs in direct.items():
        cyc = [d["cycles"] for d in docs]
        assert max(cyc) > 1.02 * min(cyc)     # the premise: the phase moves this trace's answer
        row = rows[c]
        assert row["cycles"] == round(statistics.fmean(cyc))
        assert row["seconds"] == pytest.approx(statistics.fmean(d["seconds"] for d in docs), rel=1e-9)
        assert row["energy.total_pj"] == pytest.approx(statistics.fmean(d["energy"]["total_pj"] for d in docs),
                                                       rel=1e-9)
        assert row["refresh_phases.runs"] == 4
        assert row["refresh_phases.spread"] == pytest.approx((max(cyc) - min(cyc)) / min(cyc), rel=1e-9)
        doc = records[c]["result"]
        assert doc["cycles"] == cyc[0]        # the document is the run as configured
        assert doc["refresh_phases"]["cycles"] == cyc
        assert doc["refresh_phases"]["offsets"] == list(PHASES)


def test_the_summary_names_the_best_mean_and_its_range(swept, direct):
    out, stdout = swept
    means = {c: statistics.fmean(d["cycles"] for d in docs) for c, docs in direct.items()}
    best_c = min(means, key=means.get)
    summary = json.load(open(os.path.join(out, "summary.json")))
    best = summary["best"]["captured_short_moderate"]["cycles"]
    assert best["point"] == {"dram.channels": best_c}
    assert best["value"] == round(means[best_c])
    cyc = [d["cycles"] for d in direct[best_c]]
    assert best["phase_range"] == [min(cyc), max(cyc)]
    assert any("4 places in the refresh schedule" in n for n in summary["notes"])
    assert not any("refresh intervals" in n for n in summary["notes"])
    assert f"the mean of runs of {min(cyc):,} to {max(cyc):,} cycles at the refresh phases" in stdout


def test_a_report_of_the_sweep_holds_ties_against_the_measured_spread(swept, direct, tmp_path):
    out, _ = swept
    runs, failed = load_inputs([out])
    assert not failed
    for r in runs:
        cyc = [d["cycles"] for d in direct[r.point["dram.channels"]]]
        assert r.phase_range == (min(cyc), max(cyc))
        assert r.phase_spread == pytest.approx((max(cyc) - min(cyc)) / min(cyc))
    # the report ranks the group by the means, as the sweep did, and gives them
    rep = str(tmp_path / "rep")
    assert main(["report", out, "--out", rep, "--sensitivity", "off", "--no-replay"]) == 0
    md = open(os.path.join(rep, "report.md")).read()
    mean_s = {c: statistics.fmean(d["seconds"] for d in docs) for c, docs in direct.items()}
    order = sorted(mean_s, key=mean_s.get)
    assert ("on average over the refresh phases: "
            + ", ".join(f"server (dram.channels={c}) {show(mean_s[c], 'latency')}" for c in order)) in md
    # the comparison table gives the mean latency beside the run's own (exact in the CSV, in us)
    rows = {r["config"]: r for r in csv.DictReader(open(os.path.join(rep, "comparison.csv"), newline=""))}
    for c, docs in direct.items():
        want = statistics.fmean(d["seconds"] for d in docs) * 1e6
        assert float(rows[f"server (dram.channels={c})"]["latency_mean_us"]) == pytest.approx(want, rel=1e-9)
    assert "| mean over refresh phases (us) |" in md
    # and the latency figure draws the means too
    lat = {r["value"]: float(r["latency_us"]) for r in csv.DictReader(open(os.path.join(rep, "data", "latency.csv")))}
    for c, docs in direct.items():
        assert lat[str(c)] == pytest.approx(statistics.fmean(d["seconds"] for d in docs) * 1e6, rel=1e-9)


def test_a_memory_that_does_not_refresh_runs_once(tmp_path, monkeypatch):
    import sim.run

    calls = []
    real = sim.run.simulate

    def counting(arch, trace, **kw):
        calls.append(arch.dram.refresh_phase)
        return real(arch, trace, **kw)

    monkeypatch.setattr(sim.run, "simulate", counting)
    out = str(tmp_path / "out")
    spec = _spec(tmp_path, fixed={"dram.model": "fixed-latency"})
    assert main(["sweep", spec, "--out", out, "--jobs", "1", "--quiet"]) == 0
    assert len(calls) == 2                    # one run per point: no refresh, nothing to move
    with sim.open_sweep(out) as s:
        for r in s.records():
            assert "refresh_phases" not in r["result"]
        frame = s.frame(columns=["config.dram.channels", "cycles", "refresh_phases.runs"])
    for _i, row in frame.iterrows():
        want = _direct({"dram.channels": int(row["config.dram.channels"]), "dram.model": "fixed-latency"})
        assert row["cycles"] == want["cycles"]
        assert pd.isna(row["refresh_phases.runs"])


def test_without_it_a_short_trace_gets_a_note_saying_how_short(tmp_path, direct):
    """The best run's cycles over tREFI (3,900 ns on server's HBM2, JESD235A; from memory) at the
    card's 1.2 GHz clock: under one interval here."""
    out = str(tmp_path / "out")
    assert main(["sweep", _spec(tmp_path, refresh_phases=None), "--out", out, "--jobs", "1", "--quiet"]) == 0
    notes = json.load(open(os.path.join(out, "summary.json")))["notes"]
    fastest = min(docs[0]["cycles"] for docs in direct.values())
    arch = sim.load_arch(SERVER)
    assert (arch.dram.t_refi_ns, arch.clock_ghz) == (3900.0, 1.2)
    want = f"trace captured_short_moderate: its fastest run lasts {fastest / (3900 * 1.2):.1f} refresh intervals"
    assert any(n.startswith(want) and "refresh_phases: auto" in n for n in notes), notes
    # nothing refreshes on the fixed-latency model: no note
    out2 = str(tmp_path / "out2")
    spec = _spec(tmp_path, "fixed.yaml", refresh_phases=None, fixed={"dram.model": "fixed-latency"})
    assert main(["sweep", spec, "--out", out2, "--jobs", "1", "--quiet"]) == 0
    assert not any("refresh intervals" in n for n in json.load(open(os.path.join(out2, "summary.json")))["notes"])


def test_the_command_line_option_replaces_the_spec_key(tmp_path, swept, capsys):
    out = str(tmp_path / "out")
    spec = _spec(tmp_path, refresh_phases=None)
    assert main(["sweep", spec, "--out", out, "--jobs", "1", "--quiet", "--refresh-phases", "4"]) == 0
    with sim.open_sweep(out) as a, sim.open_sweep(swept[0]) as b:
        cols = ["config.dram.channels", "cycles", "energy.total_pj", "refresh_phases.spread"]
        fa = a.frame(columns=cols).sort_values("config.dram.channels").reset_index(drop=True)
        fb = b.frame(columns=cols).sort_values("config.dram.channels").reset_index(drop=True)
    assert fa.equals(fb)
    capsys.readouterr()
    code = main(["sweep", spec, "--out", str(tmp_path / "o2"), "--refresh-phases", str(MAX_PHASES + 1)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "--refresh-phases" in err[0] and f"[1, {MAX_PHASES}]" in err[0], err


def test_a_run_summary_says_how_many_refresh_intervals_a_short_run_lasts(direct):
    """The same count for one run in the terminal summary: cycles over tREFI at the clock."""
    from sim.result import format_summary

    doc = direct[16][0]                      # server as bundled (16 channels), phase 0
    line = next(ln for ln in format_summary(doc).splitlines() if ln.strip().startswith("refresh "))
    assert f"the run lasts {doc['cycles'] / (3900 * 1.2):.1f} refresh intervals (tREFI 3,900 ns)" in line
    fixed = _direct({"dram.model": "fixed-latency"})
    assert not any(ln.strip().startswith("refresh ") for ln in format_summary(fixed).splitlines())
    long_doc = sim.simulate(sim.load_arch(SERVER), os.path.join(ROOT, "traces", "captured_log_moderate.npz"),
                            keep_intervals=False).to_dict()
    assert long_doc["cycles"] > 20 * 3900 * 1.2
    assert not any(ln.strip().startswith("refresh ") for ln in format_summary(long_doc).splitlines())


def test_one_run_at_the_phases_from_the_command_line(tmp_path, direct, capsys):
    out = str(tmp_path / "run.json")
    assert main(["run", "--arch", SERVER, "--trace", TRACE, "--refresh-phases", "4", "--json", out]) == 0
    stdout = capsys.readouterr().out
    doc = json.load(open(out))
    cyc = [d["cycles"] for d in direct[16]]          # server as bundled, simulated directly
    assert doc["cycles"] == cyc[0] and doc["refresh_phases"]["cycles"] == cyc
    mean = round(statistics.fmean(cyc))
    assert doc["refresh_phases"]["mean_cycles"] == mean
    assert f"{min(cyc):,} to {max(cyc):,} cycles over 4 places in the refresh schedule" in stdout
    runs, _failed = load_inputs([out])
    assert runs[0].phase_mean_s == pytest.approx(statistics.fmean(d["seconds"] for d in direct[16]), rel=1e-9)
    assert runs[0].phase_range == (min(cyc), max(cyc))
    # nothing refreshes on the fixed-latency model: one run, no section
    fixed = str(tmp_path / "fixed.json")
    assert main(["run", "--arch", SERVER, "--trace", TRACE, "--set", "dram.model=fixed-latency",
                 "--refresh-phases", "4", "--json", fixed, "--quiet"]) == 0
    assert "refresh_phases" not in json.load(open(fixed))
    capsys.readouterr()
    assert main(["run", "--arch", SERVER, "--trace", TRACE, "--refresh-phases", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--refresh-phases" in err[0], err


def test_auto_repeats_only_the_points_whose_run_is_short(tmp_path, direct):
    """auto: four phases where a run lasts 20 tREFI or fewer (server's 3,900 ns at 1.2 GHz), one
    run where it lasts more (the long captured trace: over 100 intervals)."""
    long_trace = os.path.join(ROOT, "traces", "captured_log_moderate.npz")
    out = str(tmp_path / "out")
    spec = _spec(tmp_path, traces=[TRACE, long_trace], axes={"dram.channels": [16]}, refresh_phases="auto")
    assert main(["sweep", spec, "--out", out, "--jobs", "1", "--quiet"]) == 0
    with sim.open_sweep(out) as s:
        recs = {r["trace"]: r["result"] for r in s.records()}
    short, long_doc = recs["captured_short_moderate"], recs["captured_log_moderate"]
    assert short["refresh_phases"]["cycles"] == [d["cycles"] for d in direct[16]]
    assert long_doc["cycles"] > 100 * 3900 * 1.2 and "refresh_phases" not in long_doc
    notes = json.load(open(os.path.join(out, "summary.json")))["notes"]
    assert any("20 refresh intervals or fewer ran at 4 places" in n for n in notes), notes
    config = sim.load_arch(SERVER).to_dict()
    assert len({point_key(config, "d", "b", p) for p in (1, 4, "auto")}) == 3
    # the command line takes it too, and nothing else that is not a count
    assert main(["sweep", _spec(tmp_path, "one.yaml", refresh_phases=None), "--out", str(tmp_path / "o2"),
                 "--jobs", "1", "--quiet", "--refresh-phases", "auto"]) == 0
    assert main(["sweep", spec, "--out", str(tmp_path / "o3"), "--refresh-phases", "often"]) == 2


def test_without_it_points_keep_their_keys_and_the_spec_its_identity(tmp_path):
    config = sim.load_arch(SERVER).to_dict()
    assert point_key(config, "d", "b") == point_key(config, "d", "b", 1) != point_key(config, "d", "b", 4)
    one = load_spec(_spec(tmp_path, "one.yaml", refresh_phases=1))
    none = load_spec(_spec(tmp_path, "none.yaml", refresh_phases=None))
    four = load_spec(_spec(tmp_path, "four.yaml"))
    assert one.data == none.data and "refresh_phases" not in none.data
    assert four.data["refresh_phases"] == 4 and four.phases == 4 and none.phases == 1


@pytest.mark.parametrize("bad", [0, 17, 2.5, True, "4", "Auto", [4]])
def test_a_bad_count_is_one_line_naming_it(tmp_path, capsys, bad):
    spec = _spec(tmp_path, refresh_phases=bad)
    code = main(["sweep", spec, "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    assert spec in err[0] and "refresh_phases" in err[0] and "expected a whole number from 1" in err[0]
    assert repr(bad) in err[0] or str(bad) in err[0]


def test_a_result_with_a_bad_phase_section_is_refused(tmp_path, capsys):
    doc = _direct({})
    doc["refresh_phases"] = {"cycles": ["many"]}
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(doc))
    code = main(["report", str(p), "--out", str(tmp_path / "rep"), "--sensitivity", "off", "--no-replay"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    assert str(p) in err[0] and "refresh_phases.cycles" in err[0] and "expected a list" in err[0]
