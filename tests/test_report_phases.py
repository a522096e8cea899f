"""``attnsim report --refresh-phases``: each trace's leading runs simulated again later in the
DRAM refresh schedule, and a latency lead inside how far they move called a tie.

The expected ranges are simulated here directly with ``sim.simulate`` and the
``dram.refresh_phase`` override (not through the report's reruns), so the check
is that the report shows what those runs measure. Refresh windows at a fixed
interval whose phase relative to the workload is arbitrary: common practice, no
source.
"""

import json
import os
import re

import sim
from sim.cli import main

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
    for cfg in ("server", "hbm2_stack", "edge"):
        found = re.search(rf"Refresh phase: {cfg} / captured_short_moderate takes ([\d,]+) to ([\d,]+) cycles", md)
        if cfg not in leaders:
            assert found is None            # only the two fastest are measured
            continue
        cyc = [_cycles(cfg, p) for p in (0.0, 0.25, 0.5, 0.75)]
        assert (int(found.group(1).replace(",", "")), int(found.group(2).replace(",", ""))) == (min(cyc), max(cyc))
        spreads.append((max(cyc) - min(cyc)) / min(cyc))
    lead = seconds[leaders[1]] / seconds[leaders[0]] - 1
    assert lead < max(spreads)              # the premise: the lead is inside the measured spread
    assert f"tied within {max(spreads):.0%} (how far these runs move" in md
    assert "fastest server" not in md and "fastest hbm2_stack" not in md


def test_without_the_option_nothing_is_rerun(tmp_path):
    p = str(tmp_path / "mid.json")
    assert main(["run", "--arch", "arch_configs/mid.yaml", "--trace", TRACE, "--json", p]) == 0
    out = str(tmp_path / "rep")
    assert main(["report", p, "--out", out, "--sensitivity", "off", "--no-replay"]) == 0
    assert "Refresh phase:" not in open(os.path.join(out, "report.md")).read()
