"""A report with sampled runs among its inputs ranks each trace's runs by the whole trace's
latency (a whole run's own, a sampled run's estimate) and says which leads it cannot tell apart.

Sources: the expected orders, ratios and standings are worked out here from the documents'
own numbers (estimate over the fastest estimate, a lead told apart when larger than both
runs' reach). The reaches are what the sampling benches measured (`bench/prefill_conclusions.py`,
`bench/sample_conclusions.py`, README "Long prompts, sampled"): estimates whose checks agreed
within 1 % came within 1 % of their whole runs; decode sampled on fewer than 8 layers came up to
2.2 % off; prefill sampled with separate q.K and p.V arrays up to 33 %. That a sampling setting
must not decide which design is faster is the brief's rule (common practice, no source)."""

import copy
import csv
import json
import re

import pytest

from sim.cli import main
from sim.trace.files import save_trace
from sim.trace.synth import synth_trace


@pytest.fixture(scope="module")
def docs(tmp_path_factory):
    """Whole and prefill-sampled runs of one causal prompt on mid and edge, as files."""
    d = tmp_path_factory.mktemp("est")
    trace = synth_trace(prompt_tokens=2048, decode_steps=2, layers=1, heads=16, kv_heads=4, head_dim=64,
                        causal=True, seed=3)
    path = d / "t.npz"
    save_trace(trace, str(path))
    out = {}
    for arch in ("mid", "edge"):
        for tag, extra in (("whole", []), ("sampled", ["--sample-prefill", "4"])):
            f = d / f"{arch}-{tag}.json"
            assert main(["run", "--arch", arch, "--trace", str(path), "--json", str(f), "--quiet"] + extra) == 0
            out[arch, tag] = f
    return d, out


def _rows(folder):
    with open(folder / "comparison.csv", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_sampled_and_whole_runs_ranked_together_by_the_whole_traces_latency(docs, tmp_path):
    d, files = docs
    rep = tmp_path / "rep"
    assert main(["report"] + [str(f) for f in files.values()] + ["--out", str(rep), "--quiet"]) == 0
    loaded = {k: json.loads(f.read_text()) for k, f in files.items()}
    assert all(doc["prefill_sample"]["sampled_steps"] == 1 for k, doc in loaded.items() if k[1] == "sampled")
    rows = _rows(rep)
    # one trace: the sampled runs' documents name it with "-sampled", their digest is the whole's
    assert {r["trace"] for r in rows} == {loaded["mid", "whole"]["trace"]["name"]}
    expect = {str(files[k]): (doc["prefill_sample"]["cycles"] if k[1] == "sampled" else doc["cycles"],
                              doc["cycles"]) for k, doc in loaded.items()}
    for r in rows:
        assert (int(r["whole_cycles"]), int(r["simulated_cycles"])) == expect[r["origin"]]
    secs = [float(r["whole_seconds"]) for r in rows]
    assert secs == sorted(secs)
    fastest = secs[0]
    for r in rows[1:]:
        assert float(r["slower_than_fastest"]) == pytest.approx(float(r["whole_seconds"]) / fastest, rel=1e-12)
    # each sampled estimate is within its reach of its own whole run (here: 1 %, its checks agree)
    for arch in ("mid", "edge"):
        est, whole = (int(next(r["whole_cycles"] for r in rows if r["origin"] == str(files[arch, t])))
                      for t in ("sampled", "whole"))
        assert abs(est / whole - 1) <= 0.01
    text = (rep / "report.md").read_text()
    assert "ranks each trace's runs by the whole trace's latency alone" in text
    assert "stalls" not in text.split("## Whole-trace latency")[1].split("## Notes")[0].lower()
    man = json.loads((rep / "manifest.json").read_text())
    assert man["ranked_by"] == "whole-trace estimates"
    assert set(man["files"]) == {"figures/estimated_latency.png", "data/estimated_latency.csv", "comparison.csv",
                                 "report.md", "report.html", "manifest.json"}
    html = (rep / "report.html").read_text()
    assert html.count("data:image/png;base64,") == 1 and "id='comparison'" in html


def _variant(doc, cycles, copy_spread=0.002, half=0.002, arrays=None, name=None):
    """``doc`` as a prefill-sampled run estimating ``cycles`` (spreads as given)."""
    d = copy.deepcopy(doc)
    clock = d["seconds"] / d["cycles"]
    d["prefill_sample"] = {"cycles": cycles, "seconds": cycles * clock, "every": 8, "sampled_steps": 1,
                           "query_blocks": 256, "simulated_query_blocks": 64, "copy_spread": copy_spread,
                           "half_sample_spread": half}
    d["trace"]["name"] += "-sampled"
    if arrays:
        d["arch"]["config"]["dot"]["arrays"] = arrays
    if name:
        d["arch"]["name"] = name
    return d


def _report(tmp_path, docs_in, *extra):
    paths = []
    for i, doc in enumerate(docs_in):
        p = tmp_path / f"in{i}.json"
        p.write_text(json.dumps(doc))
        paths.append(str(p))
    rep = tmp_path / "rep"
    code = main(["report"] + paths + ["--out", str(rep), "--quiet"] + list(extra))
    return code, rep


@pytest.mark.parametrize("lead,spread,apart", [
    (0.008, 0.002, False),   # inside the 1 % every sampled estimate keeps
    (0.015, 0.002, True),
    (0.015, 0.03, False),    # its own checks came 3 % apart: a 1.5 % lead is inside them
    (0.04, 0.03, True),
])
def test_a_lead_inside_either_runs_reach_is_not_told_apart(docs, tmp_path, lead, spread, apart):
    base = json.loads(docs[1]["mid", "whole"].read_text())
    c = base["cycles"]
    a = _variant(base, c, name="fast")
    b = _variant(base, round(c * (1 + lead)), copy_spread=spread, name="slow")
    code, rep = _report(tmp_path, [b, a])
    assert code == 0
    rows = _rows(rep)
    assert [r["run"].split(" ")[0] for r in rows] == ["fast", "slow"]
    assert rows[1]["told_apart"] == str(apart)
    assert float(rows[1]["reach"]) == max(0.01, spread)
    text = (rep / "report.md").read_text()
    assert ("Not told apart from it: slow" in text) is not apart


def test_separate_arrays_prefill_estimate_is_listed_not_ranked(docs, tmp_path):
    base = json.loads(docs[1]["mid", "whole"].read_text())
    c = base["cycles"]
    a = _variant(base, round(c * 0.5), arrays="separate", name="split")   # would be fastest by far
    b = _variant(base, c, name="shared")
    code, rep = _report(tmp_path, [a, b])
    assert code == 0
    rows = _rows(rep)
    assert [(r["run"].split(" ")[0], r["ranked"]) for r in rows] == [("shared", "True"), ("split", "False")]
    assert rows[1]["slower_than_fastest"] == ""
    text = (rep / "report.md").read_text()
    assert "Fastest: shared" in text and "Not ranked: split" in text and "33 % off" in text
    alone = tmp_path / "alone"
    alone.mkdir()
    code, rep2 = _report(alone, [a])
    assert code == 0 and "No run of this trace can be ranked" in (rep2 / "report.md").read_text()


@pytest.mark.parametrize("field,value", [("cycles", "many"), ("seconds", -1.0), ("copy_spread", True),
                                         ("every", 2.5)])
def test_a_bad_estimate_section_is_refused_naming_file_and_field(docs, tmp_path, capsys, field, value):
    d = _variant(json.loads(docs[1]["mid", "whole"].read_text()), 1000)
    d["prefill_sample"][field] = value
    code, _rep = _report(tmp_path, [d])
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "in0.json" in err and f"prefill_sample.{field}" in err
    assert "expected" in err


@pytest.mark.parametrize("extra,option", [(["--refresh-phases"], "--refresh-phases"),
                                          (["--sensitivity", "all"], "--sensitivity"),
                                          (["--sensitivity", "fastest"], "--sensitivity")])
def test_what_a_report_of_sampled_runs_does_not_do_is_refused(docs, tmp_path, capsys, extra, option):
    code, rep = _report(tmp_path, [json.loads(docs[1]["mid", "sampled"].read_text())], *extra)
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and option in err and "expected without sampled runs" in err
    assert not rep.exists()


def test_whole_runs_alone_still_get_the_full_report(docs, tmp_path):
    _d, files = docs
    rep = tmp_path / "rep"
    assert main(["report", str(files["mid", "whole"]), str(files["edge", "whole"]), "--out", str(rep),
                 "--sensitivity", "off", "--no-replay", "--quiet"]) == 0
    assert "ranked_by" not in json.loads((rep / "manifest.json").read_text())
    assert "## Verdicts" in (rep / "report.md").read_text()


def test_a_whole_run_at_several_refresh_phases_is_ranked_by_its_mean(docs, tmp_path):
    base = json.loads(docs[1]["mid", "whole"].read_text())
    c, clock = base["cycles"], base["seconds"] / base["cycles"]
    whole = copy.deepcopy(base)
    whole["arch"]["name"] = "phased"
    cycles = [c, round(c * 1.06)]                       # its mean, 3 % above c, is what a full report ranks by
    mean = round(sum(cycles) / 2)
    whole["refresh_phases"] = {"runs": 2, "offsets": [0.0, 0.5], "cycles": cycles, "mean_cycles": mean,
                               "mean_seconds": mean * clock, "spread": 0.06}
    sampled = _variant(base, round(c * 1.02), name="sampled")
    code, rep = _report(tmp_path, [whole, sampled])
    assert code == 0
    rows = _rows(rep)
    assert [r["run"].split(" ")[0] for r in rows] == ["sampled", "phased"]
    assert int(rows[1]["whole_cycles"]) == mean and float(rows[1]["reach"]) == pytest.approx(0.06, rel=1e-5)
    assert rows[1]["told_apart"] == "False"             # a 1 % lead inside the 6 % phase spread


def test_a_prefill_estimate_the_softmax_paces_is_listed_not_ranked(docs, tmp_path):
    base = json.loads(docs[1]["mid", "whole"].read_text())
    c = base["cycles"]
    paced = _variant(base, round(c * 0.8), name="paced")
    paced["units"]["softmax"]["busy"] = paced["units"]["dot"]["busy"]     # the softmax keeps pace only just
    code, rep = _report(tmp_path, [paced, _variant(base, c, name="clear")])
    assert code == 0
    rows = _rows(rep)
    assert [(r["run"].split(" ")[0], r["ranked"]) for r in rows] == [("clear", "True"), ("paced", "False")]
    assert "softmax unit paces the array" in rows[1]["caveats"]


def test_the_estimates_report_renders_in_headless_chromium(docs, tmp_path):
    """Its one figure loads offline and the table is on the page (a browser's own reading)."""
    from test_report import run_chromium

    _d, files = docs
    rep = tmp_path / "rep"
    assert main(["report", str(files["mid", "sampled"]), str(files["edge", "whole"]), "--out", str(rep),
                 "--quiet"]) == 0
    page = "file://" + str(rep / "report.html")
    dom = run_chromium("--virtual-time-budget=10000", "--dump-dom", page).stdout
    body = re.search(r"<body[^>]*>", dom).group(0)
    assert re.search(r'data-figures-expected="(\d+)"', body).group(1) == "1"
    assert re.search(r'data-figures-loaded="(\d+)"', body).group(1) == "1"
    assert 'id="comparison"' in dom and 'id="fig-estimated_latency"' in dom
    assert "http://" not in (rep / "report.html").read_text()


def test_whole_runs_closer_than_the_reports_tie_margin_are_not_told_apart(docs, tmp_path):
    # the margin under which any report calls two latencies tied (sim.report.verdict.TIE, 1 %)
    base = json.loads(docs[1]["mid", "whole"].read_text())
    near = copy.deepcopy(base)
    near["arch"]["name"] = "near"
    near["cycles"], near["seconds"] = round(base["cycles"] * 1.005), base["seconds"] * 1.005
    far = copy.deepcopy(base)
    far["arch"]["name"] = "far"
    far["cycles"], far["seconds"] = round(base["cycles"] * 1.02), base["seconds"] * 1.02
    code, rep = _report(tmp_path, [far, near, _variant(base, base["cycles"], name="sampled")])
    assert code == 0
    rows = {r["run"].split(" ")[0]: r for r in _rows(rep)}
    assert rows["near"]["told_apart"] == "False" and rows["far"]["told_apart"] == "True"
    assert float(rows["near"]["reach"]) == 0.01
