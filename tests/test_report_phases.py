"""``attnsim report --refresh-phases``: each trace's leading runs simulated again later in the
DRAM refresh schedule, and a latency lead inside how far they move called a tie.

The expected ranges are simulated here directly with ``sim.simulate`` and the
``dram.refresh_phase`` override (not through the report's reruns), so the check
is that the report shows what those runs measure. Refresh windows at a fixed
interval whose phase relative to the workload is arbitrary: common practice, no
source.
"""

import csv
import json
import os
import re
import statistics

import pytest

import sim
from sim.cli import main
from sim.formats import show

TRACE = "traces/captured_short_moderate.npz"


def _cycles(cfg, phase):
    arch = sim.load_arch(f"arch_configs/{cfg}.yaml").with_overrides({"dram.refresh_phase": phase})
    return sim.simulate(arch, TRACE, keep_intervals=False).to_dict()["cycles"]


def test_report_measures_the_spread_and_ties_a_lead_inside_it(tmp_path, capsys):
    paths = []
    for cfg in ("server", "hbm2_stack", "edge"):
        p = str(tmp_path / f"{cfg}.json")
        assert main(["run", "--arch", f"arch_configs/{cfg}.yaml", "--trace", TRACE, "--json", p]) == 0
        paths.append(p)
    out = str(tmp_path / "rep")
    assert main(["report", *paths, "--out", out, "--refresh-phases", "--sensitivity", "off", "--no-replay",
                 "--jobs", "1"]) == 0
    md = open(os.path.join(out, "report.md")).read()
    seconds = {c: json.load(open(p))["seconds"] for c, p in zip(("server", "hbm2_stack", "edge"), paths)}
    leaders = sorted(seconds, key=seconds.get)[:2]
    spreads = []
    means = {}
    for cfg in ("server", "hbm2_stack", "edge"):
        found = re.search(rf"Refresh phase: {cfg} / captured_short_moderate takes ([\d,]+) to ([\d,]+) cycles", md)
        if cfg not in leaders:
            assert found is None            # only the two fastest are measured
            continue
        cyc = [_cycles(cfg, p) for p in (0.0, 0.25, 0.5, 0.75)]
        assert (int(found.group(1).replace(",", "")), int(found.group(2).replace(",", ""))) == (min(cyc), max(cyc))
        spreads.append((max(cyc) - min(cyc)) / min(cyc))
        doc = json.load(open(paths[("server", "hbm2_stack", "edge").index(cfg)]))
        # the arithmetic mean of the four runs, as latency (the two cards' clocks differ)
        means[cfg] = statistics.fmean(cyc) * doc["seconds"] / doc["cycles"]
    lead = seconds[leaders[1]] / seconds[leaders[0]] - 1
    assert lead < max(spreads)              # the premise: the lead is inside the measured spread
    assert f"tied within {max(spreads):.0%} (how far these runs move" in md
    order = sorted(means, key=means.get)
    assert ("on average over the refresh phases: "
            + ", ".join(f"{c} {show(means[c], 'latency')}" for c in order)) in md
    assert "fastest server" not in md and "fastest hbm2_stack" not in md


def test_without_the_option_nothing_is_rerun(tmp_path):
    p = str(tmp_path / "mid.json")
    assert main(["run", "--arch", "arch_configs/mid.yaml", "--trace", TRACE, "--json", p]) == 0
    out = str(tmp_path / "rep")
    assert main(["report", p, "--out", out, "--sensitivity", "off", "--no-replay"]) == 0
    assert "Refresh phase:" not in open(os.path.join(out, "report.md")).read()


def _mean_cycles(overrides):
    """Rounded mean of the run's cycles at the four phases, simulated directly."""
    arch = sim.load_arch("arch_configs/server.yaml")
    cyc = [sim.simulate(arch.with_overrides({**overrides, "dram.refresh_phase": p}), TRACE,
                        keep_intervals=False).to_dict()["cycles"] for p in (0.0, 0.25, 0.5, 0.75)]
    return round(statistics.fmean(cyc)), cyc


def test_a_short_runs_changes_are_compared_by_their_means(tmp_path):
    """server on the captured short trace lasts under one tREFI (3,900 ns; JESD235A, from
    memory): with --refresh-phases its baseline and each change run at the four phases and
    the speedup is the ratio of the means (arithmetic mean, computed here)."""
    p = str(tmp_path / "server.json")
    assert main(["run", "--arch", "arch_configs/server.yaml", "--trace", TRACE, "--json", p]) == 0
    out = str(tmp_path / "rep")
    assert main(["report", p, "--out", out, "--refresh-phases", "--no-replay", "--jobs", "1"]) == 0
    base, base_cyc = _mean_cycles({})
    assert max(base_cyc) > 1.05 * min(base_cyc)          # the premise: the phase moves this run
    wide, _ = _mean_cycles({"dram.channel_gbps": 64.0})
    rows = list(csv.DictReader(open(os.path.join(out, "data", "sensitivity.csv"), newline="")))
    row = next(r for r in rows if r["setting"] == "dram.channel_gbps 32 -> 64")
    assert int(row["cycles"]) == wide
    assert float(row["speedup"]) == pytest.approx(base / wide, rel=1e-12)
    md = open(os.path.join(out, "report.md")).read()
    assert f"| dram.channel_gbps 32 -> 64 | ok, means of 4 refresh phases | {base / wide:,.2f} |" in md
    assert f"compared by their means (the baseline's: {base:,} cycles)" in md
    assert "(means over 4 refresh phases)." in md


def test_only_a_run_short_for_refresh_is_repeated():
    from sim.report import sensitivity as S
    from sim.report.inputs import Run, label_runs

    def run_of(cfg, trace, **over):
        doc = sim.simulate(sim.load_arch(f"arch_configs/{cfg}.yaml").with_overrides(over), trace,
                           keep_intervals=False).to_dict()
        r = Run(doc, "x", trace_path=trace)
        label_runs([r])
        return r

    assert S.phases_for(run_of("server", TRACE), 4) == 4
    assert S.phases_for(run_of("server", TRACE), 1) == 1
    # 629,000 cycles at 1.2 GHz is about 134 refresh intervals of 3,900 ns: not repeated
    long_run = run_of("server", "traces/captured_log_moderate.npz")
    assert long_run.doc["cycles"] / (3900 * 1.2) > 100 and S.phases_for(long_run, 4) == 1
    assert S.phases_for(run_of("server", TRACE, **{"dram.model": "fixed-latency"}), 4) == 1


DEMO = "traces/demo_decode.yaml"
PAIR = ("server", "hbm2_stack")
PHASES = (0.0, 0.25, 0.5, 0.75)


def _at_phases(cfg, trace=DEMO):
    """The run's documents at the four phases, simulated directly (not through the report)."""
    arch = sim.load_arch(f"arch_configs/{cfg}.yaml")
    return [sim.simulate(arch.with_overrides({"dram.refresh_phase": p}), trace, keep_intervals=False).to_dict()
            for p in PHASES]


def _dominated(row, rows):
    """Pareto dominance by brute force: another run no worse on both axes and not the same point."""
    x, y = float(row[2]), float(row[3])
    return any(float(r[2]) <= x and float(r[3]) <= y and (float(r[2]), float(r[3])) != (x, y)
               for r in rows if r is not row)


def _pareto_of(paths):
    from sim.report import figures as F
    from sim.report.inputs import label_runs, load_inputs

    runs, _failed = load_inputs(paths)
    label_runs(runs)
    return F.pareto(runs), F.energy_area(runs), runs


@pytest.fixture(scope="module")
def phase_docs(tmp_path_factory):
    """``attnsim run --refresh-phases 4`` of each config of PAIR on the demo trace: {cfg: path}."""
    tmp = tmp_path_factory.mktemp("pareto")
    out = {}
    for cfg in PAIR:
        out[cfg] = str(tmp / f"{cfg}.json")
        assert main(["run", "--arch", f"arch_configs/{cfg}.yaml", "--trace", DEMO, "--refresh-phases", "4",
                     "--json", out[cfg], "--quiet"]) == 0
    return out


def test_the_pareto_figure_draws_the_means_over_refresh_phases(phase_docs):
    """Each point of a trace whose runs were all measured at the four phases is the arithmetic
    mean (common practice, no source) of the runs simulated here directly at those phases, in
    latency and in energy; the front (brute-force dominance) is of those values."""
    fig, split, _runs = _pareto_of(list(phase_docs.values()))
    rows = {r[1]: r for r in fig.rows}
    moved = 0
    for cfg in PAIR:
        docs = _at_phases(cfg)
        row = rows[f"{cfg} / demo_decode"]
        lat = statistics.fmean(d["seconds"] for d in docs) * 1e6
        energy = statistics.fmean(d["energy"]["total_pj"] for d in docs) / 1e6
        assert row[2] == pytest.approx(lat, rel=1e-9) and row[3] == pytest.approx(energy, rel=1e-9)
        assert row[7:] == [True, True]
        moved += abs(lat / (docs[0]["seconds"] * 1e6) - 1) > 0.05   # phase 0 is the run as configured
    assert moved                           # the premise: the means are not the runs as configured
    for row in fig.rows:
        assert row[5] == (not _dominated(row, fig.rows))
    ax_e = fig.fig.axes[0]
    assert ax_e.get_xlabel() == "mean latency over refresh phases (us)"
    assert ax_e.get_ylabel() == "mean energy per run over refresh phases (uJ)"
    assert "mean latency and mean energy over refresh phases" in fig.caption
    # the energy split exists for the run as configured only, and its caption says so
    assert "of the run as configured" in split.caption


def test_without_a_mean_energy_the_run_as_configured_is_drawn_and_said(phase_docs, tmp_path):
    """A document whose phase section has no mean energy: latency is still the mean over the
    phases (arithmetic mean of the direct runs; common practice, no source), energy the run's own."""
    paths = []
    for cfg, p in phase_docs.items():
        doc = json.load(open(p))
        del doc["refresh_phases"]["mean_energy_pj"]
        paths.append(str(tmp_path / f"{cfg}.json"))
        json.dump(doc, open(paths[-1], "w"))
    fig, _split, _runs = _pareto_of(paths)
    rows = {r[1]: r for r in fig.rows}
    for cfg in PAIR:
        docs = _at_phases(cfg)
        row = rows[f"{cfg} / demo_decode"]
        assert row[2] == pytest.approx(statistics.fmean(d["seconds"] for d in docs) * 1e6, rel=1e-9)
        assert row[3] == pytest.approx(docs[0]["energy"]["total_pj"] / 1e6, rel=1e-9)
        assert row[7:] == [True, False]
    assert fig.fig.axes[0].get_ylabel() == "energy per run (uJ)"
    assert "mean latency over refresh phases and its energy as configured" in fig.caption


def test_the_reports_own_phase_reruns_give_the_pareto_means(tmp_path):
    """``attnsim report --refresh-phases`` reruns both runs of a trace at the phases: the Pareto
    point is the arithmetic mean (common practice, no source) of the runs simulated directly."""
    from sim.report import figures as F
    from sim.report import phases
    from sim.report.inputs import Run, label_runs

    runs = [Run(sim.simulate(f"arch_configs/{cfg}.yaml", DEMO, keep_intervals=False).to_dict(), "t",
                trace_path=DEMO) for cfg in PAIR]
    label_runs(runs)
    phases.measure(runs, jobs=1)
    rows = {r[1]: r for r in F.pareto(runs).rows}
    for cfg in PAIR:
        docs = _at_phases(cfg)
        row = rows[f"{cfg} / demo_decode"]
        assert row[2] == pytest.approx(statistics.fmean(d["seconds"] for d in docs) * 1e6, rel=1e-9)
        assert row[3] == pytest.approx(statistics.fmean(d["energy"]["total_pj"] for d in docs) / 1e6, rel=1e-9)


@pytest.fixture(scope="module")
def plain_doc():
    return sim.simulate("arch_configs/server.yaml", DEMO, keep_intervals=False).to_dict()


@pytest.mark.parametrize("key", ["mean_seconds", "mean_cycles", "mean_energy_pj"])
@pytest.mark.parametrize("bad", ["x", -1, 0, True, None, float("inf")])
def test_a_bad_phase_mean_is_one_line_naming_it(plain_doc, tmp_path, capsys, key, bad):
    """The section's means as ``sim.run.refresh_phase_runs`` writes them are positive finite
    numbers; anything else is refused in one line naming the file, the field and the value."""
    doc = dict(plain_doc, refresh_phases={"cycles": [plain_doc["cycles"]] * 4, "mean_cycles": plain_doc["cycles"],
                                          "mean_seconds": plain_doc["seconds"],
                                          "mean_energy_pj": plain_doc["energy"]["total_pj"], key: bad})
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(doc))
    code = main(["report", str(p), "--out", str(tmp_path / "rep"), "--sensitivity", "off", "--no-replay"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    assert str(p) in err[0] and f"refresh_phases.{key}" in err[0] and "expected a positive finite number" in err[0]
    assert repr(bad) in err[0] or str(bad) in err[0] or json.dumps(bad) in err[0]


def test_good_phase_means_are_read(plain_doc, tmp_path):
    """The counterpart: the same section with its means as written is read, means and all."""
    from sim.report.inputs import load_result_file

    doc = dict(plain_doc, refresh_phases={"cycles": [plain_doc["cycles"]] * 4, "mean_cycles": plain_doc["cycles"],
                                          "mean_seconds": plain_doc["seconds"],
                                          "mean_energy_pj": plain_doc["energy"]["total_pj"]})
    p = tmp_path / "good.json"
    p.write_text(json.dumps(doc))
    run = load_result_file(str(p))
    assert (run.phase_mean_s, run.phase_mean_pj) == (plain_doc["seconds"], plain_doc["energy"]["total_pj"])


@pytest.fixture(scope="module")
def flipped(tmp_path_factory):
    """``attnsim run --refresh-phases 4`` on the demo trace of server as configured and of server
    with half its channel bandwidth started half a tREFI later ("narrow"): on their own figures
    narrow is faster and takes less energy, over the four phases server. {label: path}."""
    tmp = tmp_path_factory.mktemp("flipped")
    out = {}
    for name, sets in (("server", []),
                       ("narrow", ["--set", "dram.channel_gbps=16", "--set", "dram.refresh_phase=0.5"])):
        p = str(tmp / f"{name}.json")
        assert main(["run", "--arch", "arch_configs/server.yaml", "--trace", DEMO, *sets, "--refresh-phases", "4",
                     "--json", p, "--quiet"]) == 0
        doc = json.load(open(p))
        doc["arch"]["name"] = name          # a label to tell the two apart
        json.dump(doc, open(p, "w"))
        out[f"{name} / demo_decode"] = p
    return out


def _flipped_runs(flipped, drop=None):
    """The runs of ``flipped``; ``drop``: the label of a run whose refresh-phase section is removed.
    Returns (runs, own, mean): {label: (seconds, pJ)} of the runs as configured and over the phases."""
    from sim.report.inputs import Run, label_runs

    runs, own, mean = [], {}, {}
    for label, p in flipped.items():
        doc = json.load(open(p))
        own[label] = (doc["seconds"], doc["energy"]["total_pj"])
        mean[label] = (doc["refresh_phases"]["mean_seconds"], doc["refresh_phases"]["mean_energy_pj"])
        if label == drop:
            del doc["refresh_phases"]
        runs.append(Run(doc, p, trace_path=DEMO))
    label_runs(runs)
    # the premise: the means order the two runs the other way round from their own figures, on both axes
    for i in (0, 1):
        assert min(own, key=lambda k: own[k][i]) != min(mean, key=lambda k: mean[k][i])
    return runs, own, mean


@pytest.mark.parametrize("drop", [None, "server / demo_decode"])
def test_least_energy_is_by_the_means_where_every_run_has_one(flipped, drop):
    """The least energy of a group is its least mean energy over the refresh phases when every
    run has one (arithmetic mean, as the documents hold it; common practice, no source), else
    its least energy as configured: picked here by ``min`` over the documents' numbers."""
    from sim.report.verdict import group_summary

    runs, own, mean = _flipped_runs(flipped, drop)
    by = own if drop else mean
    low = min(by, key=lambda k: by[k][1])
    other = next(k for k in by if k != low)
    words = "" if drop else " on average over the refresh phases"
    assert (f"least energy{words} {low.split(' / ')[0]} ({show(by[low][1], 'energy')}, "
            f"{show(by[other][1] / by[low][1], 'speedup')} less than {other.split(' / ')[0]})") in group_summary(runs)


def _front_by_brute_force(by):
    """The labels of ``by`` ({label: (seconds, pJ)}) no other label is at least as good on both."""
    return {k for k, v in by.items()
            if not any(w != v and w[0] <= v[0] and w[1] <= v[1] for j, w in by.items() if j != k)}


@pytest.mark.parametrize("drop", [None, "server / demo_decode"])
def test_the_runs_picked_for_figures_verdicts_and_sensitivity_follow_the_means(flipped, drop, monkeypatch,
                                                                              tmp_path):
    """With many runs the per-run figures, the full verdicts and ``--sensitivity front`` take
    each trace's latency/energy Pareto runs, and ``--sensitivity fastest`` its fastest: by the
    means over the refresh phases where every run has them (arithmetic mean, as the documents
    hold it; common practice, no source), else by the runs as configured. Expected: brute-force
    dominance and ``min`` over the documents' numbers."""
    from sim.report import build, verdict
    from sim.report import sensitivity as S

    runs, own, mean = _flipped_runs(flipped, drop)
    by = own if drop else mean
    front = _front_by_brute_force(by)
    assert len(front) == 1                  # the premise: one run beats the other on both
    monkeypatch.setattr(build, "MAX_FIGURE_RUNS", 1)      # two runs are then "many"
    picked, note = build.figure_runs(runs)
    assert {r.label for r in picked} == front and note
    monkeypatch.setattr(verdict, "FULL_VERDICTS", 1)      # and one full verdict: the front's
    build.build_report(runs, str(tmp_path / "rep"))
    md = open(tmp_path / "rep" / "report.md").read()
    (other,) = set(by) - front
    assert f"- **{front.copy().pop()}**: " in md and f"- **{other}**: " not in md and f"- {other}: " in md
    assert {r.label for r in S.select(runs, "front")} == front
    assert [r.label for r in S.select(runs, "fastest")] == [min(by, key=lambda k: by[k][0])]


@pytest.mark.parametrize("drop", [None, "server / demo_decode"])
def test_the_runs_rerun_at_the_phases_are_the_fastest_by_the_means(flipped, drop):
    """``--refresh-phases`` reruns the runs the verdicts compare: a trace's fastest by the means
    over the refresh phases where every run has them (arithmetic mean, as the documents hold
    it; common practice, no source), else as configured. Expected: ``min`` over the documents."""
    from sim.report import phases

    runs, own, mean = _flipped_runs(flipped, drop)
    by = own if drop else mean
    assert [r.label for r in phases.leaders(runs, n=1)] == [min(by, key=lambda k: by[k][0])]


@pytest.mark.parametrize("drop", [None, "server / demo_decode"])
def test_the_verdicts_are_in_the_order_of_the_means(flipped, drop):
    """A group's verdicts come fastest first: by the means over the refresh phases where every
    run has one (arithmetic mean, as the documents hold it; common practice, no source), else by
    the runs as configured. Expected: ``sorted`` over the documents' numbers."""
    from sim.report.inputs import group_key
    from sim.report.verdict import grouped_verdicts

    runs, own, mean = _flipped_runs(flipped, drop)
    by = own if drop else mean
    ((title, _summary, verdicts, rest),) = grouped_verdicts({group_key(runs[0]): runs})
    assert [r.label for r, _v in verdicts] == sorted(by, key=lambda k: by[k][0]) and not rest
    assert title.endswith("sorted by latency)" if drop else "sorted by latency on average over the refresh phases)")


def test_a_runs_short_line_gives_its_means_beside_its_own_figures(flipped):
    """A run listed outside the full verdicts shows the means its group may be ranked by beside
    its own latency and energy (the documents' numbers, through the report's formats)."""
    from sim.report.verdict import short_line

    runs, own, mean = _flipped_runs(flipped)
    for r in runs:
        line = short_line(r)
        assert line.startswith(f"{show(own[r.label][0], 'latency')} (mean over refresh phases "
                               f"{show(mean[r.label][0], 'latency')}), ")
        assert line.endswith(f"{show(own[r.label][1], 'energy')} (mean {show(mean[r.label][1], 'energy')})")
    runs, _own, _mean = _flipped_runs(flipped, drop="server / demo_decode")
    assert "mean" not in short_line(next(r for r in runs if r.label == "server / demo_decode"))
