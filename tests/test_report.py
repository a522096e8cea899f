"""attnsim report: numbers shown equal the result documents, bad input, headless rendering.

The HTML check renders the report in headless Chromium (Debian package
``chromium``), networking disabled, takes a screenshot and reads back how many
embedded figures the browser decoded.
"""

import csv
import json
import os
import re
import shutil
import subprocess
import tempfile

import numpy as np
import pytest

import sim
from sim.cli import main
from sim.report.timeline import read_timeline

CONFIGS = ("edge", "mid")
TRACES = ("traces/demo_prefill.yaml", "traces/demo_decode.yaml")


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    d = tmp_path_factory.mktemp("results")
    paths = []
    for t in TRACES:
        for c in CONFIGS:
            out = d / f"{c}_{os.path.basename(t)[:-5]}.json"
            assert main(["run", "--arch", f"arch_configs/{c}.yaml", "--trace", t, "--json", str(out)]) == 0
            paths.append(str(out))
    return paths


@pytest.fixture(scope="module")
def report(results, tmp_path_factory):
    out = str(tmp_path_factory.mktemp("rep") / "r1")
    assert main(["report", *results, "--out", out]) == 0
    docs = [json.load(open(p)) for p in results]
    return out, {(d["arch"]["name"], d["trace"]["name"]): d for d in docs}


# the test's own map from comparison columns to the result document (scale to the shown unit)
def _crit_busy(d):
    v = d["verdict"]
    return d["units"][v["resource"] if v["limit"] in ("compute", "unit") else v["critical_unit"]]["busy"] * 100


EXPECT = {
    "cycles": lambda d: d["cycles"],
    "latency_us": lambda d: d["seconds"] * 1e6,
    "roofline_pct": lambda d: d["bounds"]["roofline_cycles"] / d["cycles"] * 100,
    "dram_mb": lambda d: d["dram"]["bytes"] / 1e6,
    "dram_gbps": lambda d: d["dram"]["achieved_gbps"],
    "dram_peak_pct": lambda d: d["dram"]["achieved_gbps"] / d["dram"]["peak_gbps"] * 100,
    "macs": lambda d: d["compute"]["macs"],
    "energy_uj": lambda d: d["energy"]["total_pj"] / 1e6,
    "static_energy_pct": lambda d: d["energy"]["static_pj"] / d["energy"]["total_pj"] * 100,
    "power_w": lambda d: d["energy"]["average_power_w"],
    "nj_per_token": lambda d: d["energy"]["pj_per_token"] / 1e3,
    "area_mm2": lambda d: d["area"]["total_mm2"],
    "critical_busy_pct": _crit_busy,
    # useful MACs / (multipliers x cycles) of the shared array (both configs here share one array)
    "useful_macs_pct": lambda d: d["compute"]["macs"] / (d["arch"]["config"]["dot"]["multipliers"]
                                                       * d["cycles"]) * 100,
}
HEADERS = {"cycles": "cycles", "latency (us)": "latency_us", "of roofline (%)": "roofline_pct",
           "DRAM (MB)": "dram_mb", "DRAM (GB/s)": "dram_gbps", "of DRAM peak (%)": "dram_peak_pct", "MACs": "macs",
           "energy (uJ)": "energy_uj", "static energy (%)": "static_energy_pct", "avg power (W)": "power_w",
           "energy / token (nJ/token)": "nj_per_token", "area proxy (mm^2)": "area_mm2",
           "its busy (%)": "critical_busy_pct", "useful MACs (%)": "useful_macs_pct"}


def read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_comparison_csv_equals_documents(report):
    out, docs = report
    rows = read_csv(os.path.join(out, "comparison.csv"))
    assert len(rows) == len(docs)
    for row in rows:
        d = docs[(row["config"], row["trace"])]
        for key, f in EXPECT.items():
            assert float(row[key]) == pytest.approx(f(d), rel=1e-9), key
        assert row["bound"] == d["bounds"]["bound"]
        assert row["limit"] == d["verdict"]["label"]
        assert row["trace_digest"] == d["trace"]["digest"]
        assert row["simulator_build"] == d["simulator"]["build"]
        assert (int(row["grain_rows"]), int(row["issue_window"]), int(row["seed"])) == (
            d["engine"]["grain_rows"], d["arch"]["config"]["fetch"]["issue_window"], d["engine"]["seed"])


def parse_markdown_table(text, first_header):
    lines = text.splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith(f"| {first_header} |"))
    header = [c.strip() for c in lines[start].strip("|").split("|")]
    rows = []
    for ln in lines[start + 2:]:
        if not ln.startswith("|"):
            break
        rows.append(dict(zip(header, [c.strip() for c in ln.strip("|").split("|")])))
    return rows


def test_markdown_numbers_equal_documents(report):
    """Each shown number equals the document's value to the digits shown."""
    out, docs = report
    rows = parse_markdown_table(open(os.path.join(out, "report.md")).read(), "config")
    assert len(rows) == len(docs)
    for row in rows:
        d = docs[(row["config"], row["trace"])]
        for header, key in HEADERS.items():
            shown = row[header].replace(",", "")
            digits = len(shown.split(".")[1]) if "." in shown else 0
            assert abs(float(shown) - EXPECT[key](d)) <= 0.5 * 10 ** -digits + 1e-12, (header, shown)
        assert row["roofline bound"] == d["bounds"]["bound"]
        assert row["limited by"] == d["verdict"]["label"]


def test_figure_data_equals_documents(report):
    out, docs = report
    by_label = {f"{a} / {t}": d for (a, t), d in docs.items()}
    for row in read_csv(os.path.join(out, "data", "stalls.csv")):
        u = by_label[row["run"]]["units"][row["unit"]]
        want = u["stalls"][row["state"][6:]] if row["state"].startswith("stall:") else u[row["state"]]
        assert float(row["fraction"]) == want
    for row in read_csv(os.path.join(out, "data", "utilization.csv")):
        d = by_label[row["run"]]
        assert float(row["busy"]) == d["units"][row["unit"]]["busy"]
        if row["unit"] == "dot":   # both configs here share one array: useful MACs / (multipliers x cycles)
            want = d["compute"]["macs"] / (d["arch"]["config"]["dot"]["multipliers"] * d["cycles"])
            assert float(row["useful_macs"]) == pytest.approx(want, rel=1e-9)
    for row in read_csv(os.path.join(out, "data", "roofline.csv")):
        d = by_label[row["run"]]
        peak = d["arch"]["config"]["dot"]["multipliers"] * d["arch"]["config"]["clock_ghz"]
        oi = d["bounds"]["operational_intensity_mac_per_byte"]
        assert float(row["achieved_gmac_per_s"]) == pytest.approx(d["compute"]["macs"] / d["seconds"] / 1e9)
        # Williams et al., CACM 2009: attainable = min(peak compute, bandwidth x intensity)
        assert float(row["attainable_gmac_per_s"]) == pytest.approx(min(peak, d["dram"]["peak_gbps"] * oi))
        assert float(row["achieved_gmac_per_s"]) <= float(row["attainable_gmac_per_s"]) * (1 + 1e-9)
        # the point sits at the table's "of roofline" below its own ceiling, labelled with the table's limit
        assert float(row["of_roofline"]) == pytest.approx(d["bounds"]["roofline_cycles"] / d["cycles"], rel=1e-6)
        assert row["limit"] == d["verdict"]["label"]
    pareto = read_csv(os.path.join(out, "data", "pareto.csv"))
    for row in pareto:
        d = by_label[row["run"]]
        assert float(row["latency_us"]) == pytest.approx(d["seconds"] * 1e6, rel=1e-12)
        assert float(row["energy_uj"]) == pytest.approx(d["energy"]["total_pj"] / 1e6, rel=1e-12)
        assert float(row["area_mm2"]) == d["area"]["total_mm2"]
    # the front by brute force: a run is on it unless another run of its trace is no worse on both
    for row in pareto:
        same = [r for r in pareto if r["trace"] == row["trace"] and r is not row]
        dominated = any(float(r["latency_us"]) <= float(row["latency_us"]) and
                        float(r["energy_uj"]) <= float(row["energy_uj"]) and
                        (float(r["latency_us"]), float(r["energy_uj"])) !=
                        (float(row["latency_us"]), float(row["energy_uj"])) for r in same)
        assert (row["front_energy"] == "True") == (not dominated)
    by_config = {a: d for (a, _t), d in docs.items()}
    for row in read_csv(os.path.join(out, "data", "energy_area.csv")):
        if row["quantity"] == "energy_uj":
            want = by_label[row["run_or_config"]]["energy"]["units_pj"][row["unit"]] / 1e6
            assert float(row["value"]) == pytest.approx(want, rel=1e-12)
        else:
            assert float(row["value"]) == by_config[row["run_or_config"]]["area"]["units_mm2"][row["unit"]]
    # the sensitivity table: each speedup is the baseline rerun's cycles over the variant's
    sens = read_csv(os.path.join(out, "data", "sensitivity.csv"))
    assert sens
    for row in sens:
        if row["status"] == "ok":
            d = by_label[row["run"]]
            assert float(row["speedup"]) == pytest.approx(d["cycles"] / int(row["cycles"]), rel=1e-12)


def test_verdicts_name_the_measured_limit(report):
    """Each verdict states the numbers of the classification the table shows, grouped by trace."""
    out, docs = report
    text = open(os.path.join(out, "report.md")).read()
    verdicts = dict(re.findall(r"^- \*\*(.+?)\*\*: (.+)$", text, re.M))
    assert len(verdicts) == len(docs)
    texts = set()
    for (a, t), d in docs.items():
        v = verdicts[f"{a} / {t}"]
        cl = d["verdict"]
        if cl["limit"] in ("compute", "unit"):
            assert f"{cl['resource']} is busy {d['units'][cl['resource']]['busy']:.0%}" in v
        else:
            assert f"{cl['critical_unit']}, the busiest compute unit, waits" in v and f"{cl['share']:.0%}" in v
        texts.add(re.sub(r"[\d.,]+", "#", v))
    assert len(texts) > 1  # written from the data: not one sentence with numbers swapped
    # grouped per trace, each group sorted by latency
    sections = re.split(r"^### ", text.split("## Verdicts")[1].split("\n## ")[0], flags=re.M)[1:]
    assert len(sections) == len({t for _a, t in docs})
    for sec in sections:
        labels = re.findall(r"^- \*\*(.+?)\*\*", sec, re.M)
        secs = [docs[tuple(lbl.split(" / "))]["seconds"] for lbl in labels]
        assert secs == sorted(secs)


def test_limits_and_sources_stated(report):
    out, _ = report
    md = open(os.path.join(out, "report.md")).read()
    assert "## Limits of this model" in md and "cycle-approximate" in md and "proxy" in md
    assert "Horowitz" in md


def test_timeline_replayed_for_first_run(report):
    out, docs = report
    man = json.load(open(os.path.join(out, "manifest.json")))
    assert "timeline" in man["figures"] and "bandwidth" in man["figures"]
    rows = read_csv(os.path.join(out, "data", "timeline.csv"))
    first = docs[("edge", "demo_prefill")]
    us = first["cycles"] / (first["arch"]["config"]["clock_ghz"] * 1e3)
    # each unit's intervals tile the run: they sum to its length
    for unit in ("fetch", "dot", "softmax", "topk"):
        total = sum(float(r["t1_us"]) - float(r["t0_us"]) for r in rows if r["lane"] == unit)
        assert total == pytest.approx(us, rel=1e-3)


def test_existing_folder_refused_without_force(report, results, capsys):
    out, _ = report
    assert main(["report", results[0], "--out", out]) == 2
    err = capsys.readouterr().err
    assert "--force" in err and len(err.strip().splitlines()) == 1
    assert main(["report", results[0], "--out", out, "--force", "--no-replay"]) == 0
    man = json.load(open(os.path.join(out, "manifest.json")))
    assert len(man["runs"]) == 1 and "timeline" not in man["figures"]
    assert not os.path.exists(os.path.join(out, "data", "timeline.csv"))  # the old report's files are gone
    assert main(["report", *results, "--out", out, "--force"]) == 0  # leave it as the fixture made it


def test_unparsable_document_names_file_and_line(tmp_path, results, capsys):
    bad = tmp_path / "bad.json"
    text = open(results[0]).read().splitlines()
    text[5] = text[5] + " oops"
    bad.write_text("\n".join(text))
    assert main(["report", str(bad), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert str(bad) in err and "line 6" in err
    notdoc = tmp_path / "list.json"
    notdoc.write_text(json.dumps({"cycles": 3}))
    assert main(["report", str(notdoc), "--out", str(tmp_path / "o")]) == 2
    assert "simulator" in capsys.readouterr().err


def test_mixed_versions_and_digests_warned_and_labelled(tmp_path, results, capsys):
    a, b = json.load(open(results[0])), json.load(open(results[1]))
    b["simulator"]["version"] = "0.0.9"
    c = json.load(open(results[0]))
    c["trace"]["digest"] = "f" * 64
    c["arch"]["name"] = "edge_copy"
    paths = []
    for i, d in enumerate((a, b, c)):
        p = tmp_path / f"{i}.json"
        p.write_text(json.dumps(d))
        paths.append(str(p))
    out = str(tmp_path / "mixed")
    assert main(["report", *paths, "--out", out, "--no-replay"]) == 0
    err = capsys.readouterr().err
    assert "simulator versions" in err and "different digests" in err
    rows = read_csv(os.path.join(out, "comparison.csv"))
    labels = {r["run"] for r in rows}
    assert len(labels) == 3
    assert any("[v0.0.9]" in r["config"] for r in rows)
    assert any(r["trace"].startswith("demo_prefill#") for r in rows)
    md = open(os.path.join(out, "report.md")).read()
    assert "## Warnings" in md


def test_sweep_folder_input(tmp_path, capsys):
    """A folder laid out as the sweep store contract says, with one failed point."""
    folder = tmp_path / "sw"
    folder.mkdir()
    (folder / "sweep.json").write_text(json.dumps({"format": "attnsim-sweep", "version": 1, "spec_digest": "x",
                                                   "spec": {}, "simulator_version": sim.__version__}))
    base = sim.load_arch("arch_configs/mid.yaml")
    recs = []
    for t in TRACES:
        trace = sim.load_trace(t)
        for m in (256, 512, 1024):
            arch = base.with_overrides({"dot.multipliers": m})
            doc = sim.simulate(arch, trace).to_dict()
            recs.append({"key": f"k{m}{t}", "point": {"dot.multipliers": m}, "trace": trace.name, "trace_path": t,
                         "trace_digest": trace.digest(), "simulator_version": sim.__version__, "status": "ok",
                         "error": None, "config": arch.to_dict(), "result": doc})
    recs.append({"key": "bad", "point": {"dot.multipliers": 8}, "trace": "demo_decode", "status": "error",
                 "error": "ConfigError: dot.lanes too wide", "config": None})
    (folder / "points.jsonl").write_text("".join(json.dumps(r) + "\n" for r in recs))
    out = str(tmp_path / "swrep")
    assert main(["report", str(folder), "--out", out]) == 0
    lat = read_csv(os.path.join(out, "data", "latency.csv"))
    assert {r["axis"] for r in lat} == {"dot.multipliers"}
    for r in lat:
        rec = next(x for x in recs if x["status"] == "ok" and x["point"]["dot.multipliers"] == int(r["value"])
                   and x["trace"] == r["trace"])
        assert float(r["latency_us"]) == pytest.approx(rec["result"]["seconds"] * 1e6, rel=1e-12)
    md = open(os.path.join(out, "report.md")).read()
    assert "## Failed points" in md and "dot.lanes too wide" in md
    # a broken line is named
    with open(folder / "points.jsonl", "a") as fh:
        fh.write('{"key": "half\n')
    assert main(["report", str(folder), "--out", str(tmp_path / "o2")]) == 2
    err = capsys.readouterr().err
    assert "points.jsonl" in err and f"line {len(recs) + 1}" in err


def test_timeline_file_from_run_is_used(tmp_path, capsys):
    js, tl = tmp_path / "r.json", tmp_path / "tl.json"
    assert main(["run", "--arch", "arch_configs/mid.yaml", "--trace", "traces/demo_decode.yaml", "--json", str(js),
                 "--timeline", str(tl)]) == 0
    doc = json.load(open(js))
    data = json.load(open(tl))
    # Trace Event Format: complete events carry ts/dur in microseconds; tracks are named by metadata events
    xs = [e for e in data["traceEvents"] if e["ph"] == "X"]
    assert xs and all(e["dur"] >= 0 and e["ts"] >= 0 for e in xs)
    names = {e["args"]["name"] for e in data["traceEvents"] if e["ph"] == "M" and e["name"] == "thread_name"}
    assert {"fetch", "dot", "softmax", "topk"} <= names
    run_us = doc["cycles"] / (doc["arch"]["config"]["clock_ghz"] * 1e3)
    info, ivs = read_timeline(str(tl))
    assert info["cycles"] == doc["cycles"]
    for unit in ("fetch", "dot", "softmax", "topk"):
        assert sum(b - a for a, b, _s, _c in ivs[unit]) == pytest.approx(doc["cycles"], rel=1e-3)
        assert sum(e["dur"] for e in xs if e["tid"] < 100 and e["name"].split(":")[0] in
                   ("busy", "starved", "blocked", "idle") and names) > 0
    busy_dot = sum(b - a for a, b, s, _c in ivs["dot"] if s == "busy")
    assert busy_dot / doc["cycles"] == pytest.approx(doc["units"]["dot"]["busy"], abs=1e-3)
    assert run_us > 0
    out = str(tmp_path / "rep")
    assert main(["report", str(js), "--out", out, "--timeline", str(tl)]) == 0
    assert "timeline" in json.load(open(os.path.join(out, "manifest.json")))["figures"]
    other = tmp_path / "o.json"
    d2 = dict(doc)
    d2["cycles"] = doc["cycles"] + 1
    other.write_text(json.dumps(d2))
    assert main(["report", str(other), "--out", str(tmp_path / "rep2"), "--timeline", str(tl)]) == 2
    assert "otherData" in capsys.readouterr().err


def chromium():
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    assert exe, "chromium is not installed (CI: apt-get install -y chromium)"
    return exe


def run_chromium(*args):
    """Headless Chromium with a fresh profile and every network path closed."""
    with tempfile.TemporaryDirectory() as profile:
        cmd = [chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
               f"--user-data-dir={profile}", "--proxy-server=127.0.0.1:9",
               "--host-resolver-rules=MAP * ~NOTFOUND", *args]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


def test_html_renders_in_headless_chromium(report, tmp_path):
    out, _ = report
    page = "file://" + os.path.abspath(os.path.join(out, "report.html"))
    html = open(os.path.join(out, "report.html")).read()
    man = json.load(open(os.path.join(out, "manifest.json")))
    assert html.count("src='data:image/png;base64,") == len(man["figures"]) >= 7
    assert "http://" not in html and "https://" not in html  # nothing to fetch: opens offline
    shot = tmp_path / "shot.png"
    r = run_chromium("--window-size=1280,4000", "--hide-scrollbars", f"--screenshot={shot}", page)
    assert shot.exists(), r.stderr[-2000:]
    from matplotlib.image import imread
    img = imread(str(shot))[..., :3]
    assert img.shape[0] >= 1000 and img.shape[1] >= 1000
    nonwhite = (img < 0.9).any(axis=2).mean()
    assert nonwhite > 0.05 and float(np.std(img)) > 0.05  # text, tables and figures, not a blank page
    dom = run_chromium("--virtual-time-budget=10000", "--dump-dom", page).stdout
    body = re.search(r"<body[^>]*>", dom).group(0)
    expected = int(re.search(r'data-figures-expected="(\d+)"', body).group(1))
    loaded = int(re.search(r'data-figures-loaded="(\d+)"', body).group(1))
    assert expected == len(man["figures"]) and loaded == expected
    for name in man["figures"]:
        assert f'id="fig-{name}"' in dom


def test_ties_are_ties():
    """Key buffers of 64, 128 and 256 KiB give the same cycles on this decode trace: no "fastest" among them."""
    from sim.report.inputs import Run, group_key, label_runs
    from sim.report.verdict import group_summary, write_verdict

    base = sim.load_arch("arch_configs/mid.yaml")
    runs = []
    for point in ({"buffers.key_kib": 64}, {"buffers.key_kib": 128}, {"buffers.key_kib": 256},
                  {"dot.multipliers": 256}):
        doc = sim.simulate(base.with_overrides(point), TRACES[1], keep_intervals=False).to_dict()
        runs.append(Run(doc, "t", point=point))
    label_runs(runs)
    assert len({group_key(r) for r in runs}) == 1
    lat = sorted(r.doc["seconds"] for r in runs)
    tied = [r for r in runs if r.doc["seconds"] <= lat[0] * 1.01]
    assert len(tied) >= 2   # the premise: measured ties
    summary = group_summary(runs)
    assert summary.startswith("tied within 1% for fastest: ")
    for r in tied:
        assert r.config_label in summary.split(";")[0]
        v = write_verdict(r, runs)
        assert "Fastest" not in v and "Tied within 1% for fastest with" in v
    # energy: a strict winner only beyond 1 %
    e = sorted(r.doc["energy"]["total_pj"] for r in runs)
    if e[1] > e[0] * 1.01:
        assert "least energy " in summary and "tied within 1% for least energy" not in summary
    else:
        assert "tied within 1% for least energy" in summary


def test_a_lead_inside_the_refresh_phase_spread_is_a_tie():
    """Two datapaths on a short captured trace: the faster one leads by a few per cent at
    refresh phase 0. Once the runs carry their measured spread over refresh phases (larger
    than that lead), neither is named fastest; without it, the lead stands (the 1 % rule)."""
    from sim.report.inputs import Run, label_runs
    from sim.report.verdict import group_summary, write_verdict

    trace = sim.load_trace("traces/captured_short_moderate.npz")
    runs, spreads = [], []
    for name in ("server", "hbm2_stack"):
        arch = sim.load_arch(f"arch_configs/{name}.yaml")
        runs.append(Run(sim.simulate(arch, trace, keep_intervals=False).to_dict(), "t"))
        cyc = [sim.simulate(arch.with_overrides({"dram.refresh_phase": p}), trace,
                            keep_intervals=False).to_dict()["cycles"] for p in (0.0, 0.25, 0.5, 0.75)]
        spreads.append((max(cyc) - min(cyc)) / min(cyc))
    label_runs(runs)
    fast, slow = sorted(r.doc["seconds"] for r in runs)
    lead = slow / fast - 1
    assert 0.01 < lead < max(spreads)     # the premise: a lead inside the measured spread
    assert group_summary(runs).startswith("fastest ")
    for r, s in zip(runs, spreads):
        r.phase_spread = s
    summary = group_summary(runs)
    assert summary.startswith(f"tied within {max(spreads):.0%} (how far these runs move")
    for r in runs:
        assert "Tied within" in write_verdict(r, runs) and "Fastest" not in write_verdict(r, runs)


def test_a_measured_gain_inside_the_refresh_phase_spread_is_said_to_be():
    """A latency-bound run on a short captured trace: 25 % more memory bandwidth measures a
    gain that the run's own refresh-phase spread, measured here too, is larger than. The
    verdict names the change and says the gain is inside the spread; without a measured
    spread it names the gain alone. The report's sensitivity table marks that row, not the
    one of doubled bandwidth, which measures a gain beyond the spread."""
    from sim.report.verdict import TIE, sensitivity_text

    trace = "traces/captured_short_moderate.npz"
    arch = sim.load_arch("arch_configs/server.yaml")
    base = sim.simulate(arch, trace, keep_intervals=False).to_dict()["cycles"]
    new = arch.dram.channel_gbps * 1.25
    faster = sim.simulate(arch.with_overrides({"dram.channel_gbps": new}), trace, keep_intervals=False).to_dict()
    cyc = [sim.simulate(arch.with_overrides({"dram.refresh_phase": p}), trace,
                        keep_intervals=False).to_dict()["cycles"] for p in (0.0, 0.25, 0.5, 0.75)]
    spread = (max(cyc) - min(cyc)) / min(cyc)
    row = {"change": "more memory bandwidth", "setting": f"dram.channel_gbps {arch.dram.channel_gbps:g} -> {new:g}",
           "speedup": base / faster["cycles"], "energy_ratio": None}
    assert 1 + TIE < row["speedup"] <= 1 + spread      # the premise, as measured
    assert f"inside the {spread:.0%} this run moves" in sensitivity_text([row], spread)
    assert "inside the" not in sensitivity_text([row]) and "Measured best change" in sensitivity_text([row])
    # the report's sensitivity table marks the row the same way
    from sim.report.build import sensitivity_rows
    from sim.report.inputs import Run, label_runs

    run = Run(faster, "t")
    label_runs([run])
    twice = sim.simulate(arch.with_overrides({"dram.channel_gbps": 2 * arch.dram.channel_gbps}), trace,
                         keep_intervals=False).to_dict()
    doubled = dict(row, speedup=base / twice["cycles"], setting="dram.channel_gbps doubled")
    assert doubled["speedup"] > 1 + spread              # measured outside the spread
    sens = [dict(r, status="ok", error=None) for r in (row, doubled)]
    status = [cells[3] for cells in sensitivity_rows([(run, sens)])[1]]
    assert status == ["ok", "ok"]
    run.phase_spread = spread
    status = [cells[3] for cells in sensitivity_rows([(run, sens)])[1]]
    assert status == [f"ok, inside the {spread:.0%} refresh-phase spread", "ok"]


def test_engine_settings_are_labelled_not_merged(tmp_path, capsys):
    """One config and trace simulated at two grains and two seeds: four labels, a warning, the settings listed."""
    paths = []
    for grain, seed in ((1024, 0), (256, 0), (1024, 1), (1024, 0)):
        p = tmp_path / f"g{grain}s{seed}_{len(paths)}.json"
        assert main(["run", "--arch", "arch_configs/mid.yaml", "--trace", TRACES[1], "--grain-rows", str(grain),
                     "--seed", str(seed), "--json", str(p)]) == 0
        paths.append(str(p))
    capsys.readouterr()
    out = str(tmp_path / "rep")
    assert main(["report", *paths, "--out", out, "--no-replay", "--sensitivity", "off"]) == 0
    err = capsys.readouterr().err
    assert "different engine settings" in err
    rows = read_csv(os.path.join(out, "comparison.csv"))
    labels = [r["config"] for r in rows]
    assert len(set(labels)) == 4            # the exact duplicate is numbered, the others named by setting
    assert any("grain 256" in lb for lb in labels) and any("seed 1" in lb for lb in labels)
    md = open(os.path.join(out, "report.md")).read()
    runs_section = md.split("## Runs")[1]
    for p, r in zip(paths, rows):
        d = json.load(open(p))
        line = next(ln for ln in runs_section.splitlines() if ln.startswith(f"- {r['run']}: "))
        assert (f"attnsim {d['simulator']['build']}, grain {d['engine']['grain_rows']} rows, "
                f"issue window {d['arch']['config']['fetch']['issue_window']}, seed {d['engine']['seed']}") in line


def test_large_group_full_verdicts_for_the_best_and_a_sorted_list_for_the_rest(tmp_path):
    """16 configs on one trace: at most FULL_VERDICTS full verdicts (its Pareto runs and the fastest), the
    others one line each, every list sorted by latency."""
    from sim.report.build import build_report
    from sim.report.inputs import Run
    from sim.report.verdict import FULL_VERDICTS

    base = sim.load_arch("arch_configs/mid.yaml")
    runs = []
    for m in (128, 256, 512, 1024):
        for k in (16, 32, 64, 128):
            point = {"dot.multipliers": m, "buffers.key_kib": k}
            doc = sim.simulate(base.with_overrides(point), TRACES[1], keep_intervals=False).to_dict()
            runs.append(Run(doc, "sweep", point=point))
    out = str(tmp_path / "big")
    build_report(runs, out)
    md = open(os.path.join(out, "report.md")).read()
    section = md.split("## Verdicts")[1].split("\n## ")[0]
    full = re.findall(r"^- \*\*(.+?)\*\*: ", section, re.M)
    rest = re.findall(r"^- (.+?) / demo_decode: ([\d.,]+) us", section, re.M)
    assert len(full) <= FULL_VERDICTS and len(full) + len(rest) == len(runs)
    by_label = {r.label: r.doc["seconds"] for r in runs}
    full_secs = [by_label[lbl] for lbl in full]
    rest_secs = [by_label[f"{cfg} / demo_decode"] for cfg, _us in rest]
    assert full_secs == sorted(full_secs) and rest_secs == sorted(rest_secs)
    fastest = min(by_label.values())
    assert any(s == fastest for s in full_secs)
