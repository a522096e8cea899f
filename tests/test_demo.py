"""attnsim demo: every bundled trace on every bundled datapath, a table and a report.

Checks the demo's own promises: it picks the captured traces when they are
bundled, every (datapath, trace) pair ran, the terminal table and the report
show the same runs, and the report folder is complete.
"""

import glob
import json
import os

import pytest

from sim import demo
from sim.cli import build_parser
from sim.report.phases import PHASES


PHASE_LINES = []   # the demo's refresh-phase lines, filled by the fixture


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = str(tmp_path_factory.mktemp("demo") / "demo")
    lines = []
    runs, failed, out_dir, secs = demo.run_demo(out_dir=out, echo=lines.append, phase_notes=PHASE_LINES)
    return runs, failed, out_dir, lines


def test_every_pair_ran(demo_run):
    runs, failed, _out, lines = demo_run
    assert failed == []
    kind, traces = demo.pick_traces(demo.repo_root())
    if glob.glob(os.path.join(demo.repo_root(), "traces", "captured_*.npz")):
        assert kind == "captured"
    pairs = {(r.doc["arch"]["name"], r.doc["trace"]["name"]) for r in runs}
    assert pairs == {(c, t) for c in demo.CONFIGS for t, _p in traces}
    assert f"{len(pairs)} runs" in lines[0]


def test_terminal_table_matches_runs(demo_run):
    runs, _f, _o, _l = demo_run
    table = demo.terminal_table(runs).splitlines()
    body = [ln for ln in table[2:] if ln.strip()]
    assert len(body) == len(runs)
    for r in runs:
        row = next(ln for ln in body if ln.split()[:2] == [r.trace_label, r.config_label])
        assert f"{r.doc['cycles']:,}" in row.split()
        # latency as every output shows it (sim.formats): 4 significant digits, in us
        lat = r.doc["seconds"] * 1e6
        shown = next(c for c in row.split()[2:] if "," in c or "." in c)
        assert float(shown.replace(",", "")) == pytest.approx(lat, rel=5e-4)
        assert r.doc["verdict"]["label"] in row


def test_report_written_and_complete(demo_run):
    runs, _f, out, _l = demo_run
    man = json.load(open(os.path.join(out, "manifest.json")))
    assert len(man["runs"]) == len(runs)
    for rel in man["files"]:
        assert os.path.getsize(os.path.join(out, rel)) > 0
    assert {"stalls", "utilization", "roofline", "latency", "pareto", "bandwidth", "timeline"} <= set(man["figures"])
    # a second demo overwrites its own output; a foreign folder is refused
    foreign = os.path.join(os.path.dirname(out), "foreign")
    os.makedirs(foreign)
    open(os.path.join(foreign, "notes.txt"), "w").write("mine")
    from sim.report.inputs import ReportError
    with pytest.raises(ReportError):
        demo.run_demo(out_dir=foreign, configs=("mid",), echo=lambda *_: None)


def test_demo_takes_no_arguments():
    args = build_parser().parse_args(["demo"])
    assert args.handler.__name__ == "_cmd_demo"


def test_refresh_phase_spread_is_the_runs_own(demo_run):
    """Per trace, the demo says how far its two fastest datapaths move with where the run
    starts in the refresh schedule: the range is that run's cycles and the same run
    simulated again at the other phases (here, on its own), and the run carries it."""
    import re

    import sim

    runs, _f, out, _l = demo_run
    kind, traces = demo.pick_traces(demo.repo_root())
    parsed = [re.match(r"(\S+) on (\S+): ([\d,]+) to ([\d,]+) cycles", ln).groups() for ln in PHASE_LINES]
    for name, _p in traces:
        mine = sorted((r for r in runs if r.doc["trace"]["name"] == name), key=lambda r: r.doc["seconds"])
        assert [c for n, c, _lo, _hi in parsed if n == name] == [r.config_label for r in mine[:2]]
    name, cfg, lo, hi = parsed[-1]
    run = next(r for r in runs if (r.doc["trace"]["name"], r.config_label) == (name, cfg))
    arch = sim.load_arch(os.path.join(demo.repo_root(), "arch_configs", f"{cfg}.yaml"))
    trace = sim.load_trace(dict(traces)[name]) if dict(traces)[name] else demo._synth(name)
    cycles = [run.doc["cycles"]] + [sim.simulate(arch.with_overrides({"dram.refresh_phase": p}), trace,
                                                 keep_intervals=False).to_dict()["cycles"]
                                    for p in PHASES]
    lo, hi = int(lo.replace(",", "")), int(hi.replace(",", ""))
    assert (lo, hi) == (min(cycles), max(cycles))
    assert run.phase_spread == (hi - lo) / lo
    # and the mean latency over the four runs (arithmetic mean of cycles over the clock)
    from sim.formats import show
    mean_s = sum(cycles) / len(cycles) / (arch.clock_ghz * 1e9)
    assert PHASE_LINES[-1].endswith(f", mean {show(mean_s, 'latency')}")
    assert PHASE_LINES[-1] in open(os.path.join(out, "report.md")).read()
