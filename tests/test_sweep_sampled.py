"""Sampled sweeps: a spec's ``sampling`` runs every point as ``attnsim run --sample-prefill K
--sample-decode K2`` would, ranks points by the whole trace's estimated cycles, keeps the
sampled part's other figures out of the table, and refuses what a sampled point cannot give
(energy or traffic objectives, refresh phases, screening).

Sources: the expected figures are those of the same sampled runs made here with
``sim.trace.sample.sample_decode``, ``sim.simulate(..., sample_prefill=K)`` and
``sim.run.estimate_whole`` (not through the sweep's worker), and the whole runs of the same
points; the sampling's reach (at least 1 %, 2.2 % for decode sampled on fewer than 8 layers)
is what the sampling benches measured (README "Long decodes, sampled"). That a point's
figures must all be of the same run -- never the estimate beside the part's energy -- is
common practice, no source."""

import contextlib
import io
import json
import os

import pandas as pd
import pytest
import yaml

import sim
from sim.cli import main
from sim.errors import SweepError
from sim.run import estimate_whole
from sim.sweep import load_spec
from sim.sweep.plan import make_plan
from sim.trace.files import save_trace
from sim.trace.sample import sample_decode
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
POINTS = ({"dot.multipliers": 512}, {"dot.multipliers": 1024})


@pytest.fixture(scope="module")
def trace_path(tmp_path_factory):
    t = synth_trace(prompt_tokens=2048, decode_steps=48, layers=2, heads=16, kv_heads=4, head_dim=64,
                    causal=True, seed=5)
    p = tmp_path_factory.mktemp("tr") / "t.npz"
    save_trace(t, str(p))
    return str(p)


def _spec(tmp_path, trace, name="spec.yaml", **over):
    doc = {"name": "sampled", "base": MID, "traces": [trace], "axes": {"dot.multipliers": [512, 1024]},
           "objectives": ["cycles", "area"], "sampling": {"prefill": 4, "decode": 8}}
    doc.update(over)
    doc = {k: v for k, v in doc.items() if v is not None}
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


@pytest.fixture(scope="module")
def swept(tmp_path_factory, trace_path):
    tmp = tmp_path_factory.mktemp("sw")
    out = str(tmp / "out")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["sweep", _spec(tmp, trace_path), "--out", out, "--jobs", "1"]) == 0
    return out, buf.getvalue()


def _direct(trace_path, overrides):
    """The point's sampled run made here, outside the sweep."""
    arch = sim.load_arch(MID).with_overrides(overrides)
    part = sample_decode(sim.load_trace(trace_path), 8)
    doc = sim.simulate(arch, part.part, keep_intervals=False, sample_prefill=4).to_dict()
    doc["decode_sample"] = estimate_whole(doc, part)
    return doc


def test_points_are_the_sampled_runs_and_the_table_holds_their_estimates(swept, trace_path):
    out, text = swept
    df = sim.load_sweep(out)
    assert len(df) == 2
    with sim.open_sweep(out) as sw:
        for over in POINTS:
            row = df[df["config.dot.multipliers"] == over["dot.multipliers"]].iloc[0]
            doc = sw.record(row["key"])["result"]
            want = _direct(trace_path, over)
            assert doc["cycles"] == want["cycles"] and doc["decode_sample"] == want["decode_sample"]
            assert doc["prefill_sample"]["sampled_steps"] == 2
            assert row["cycles"] == want["decode_sample"]["cycles"]            # the estimate, not the part
            assert row["seconds"] == pytest.approx(want["decode_sample"]["seconds"], rel=1e-12)
            assert row["area.total_mm2"] == pytest.approx(want["area"]["total_mm2"])
            for col in ("energy.total_pj", "dram.bytes", "units.dot.busy", "bounds.roofline_cycles"):
                assert pd.isna(row[col]), col                                 # empty: the part's figure
    assert text.startswith("sweep sampled: 2 points")                     # the spec's own name
    assert "points sampled their traces (prefill 1 in 4, decode 1 in 8 after 32)" in text
    assert "cycles and seconds are the whole traces' estimates" in text


def test_estimates_rank_as_the_whole_runs_do(swept, trace_path):
    out, _text = swept
    df = sim.load_sweep(out).sort_values("cycles")
    whole = {o["dot.multipliers"]: sim.simulate(sim.load_arch(MID).with_overrides(o), trace_path,
                                                keep_intervals=False).to_dict()["cycles"] for o in POINTS}
    assert list(df["config.dot.multipliers"]) == sorted(whole, key=whole.get)
    for _i, row in df.iterrows():
        # 2 layers: the reach of decode sampled on fewer than 8 layers
        assert abs(row["cycles"] / whole[row["config.dot.multipliers"]] - 1) <= 0.022
    summary = json.load(open(os.path.join(out, "summary.json"), encoding="utf-8"))
    best = summary["best"][df["trace"].iloc[0]]["cycles"]
    assert best["value"] == df["cycles"].iloc[0]


def test_a_report_of_the_folder_ranks_the_estimates(swept, tmp_path):
    out, _text = swept
    assert main(["report", out, "--out", str(tmp_path / "rep"), "--quiet"]) == 0
    man = json.load(open(tmp_path / "rep" / "manifest.json", encoding="utf-8"))
    assert man["ranked_by"] == "whole-trace estimates" and len(man["runs"]) == 2


def test_sampled_and_whole_points_never_share_a_key(tmp_path, trace_path):
    sampled = make_plan(load_spec(_spec(tmp_path, trace_path)))
    whole = make_plan(load_spec(_spec(tmp_path, trace_path, name="w.yaml", sampling=None)))
    other = make_plan(load_spec(_spec(tmp_path, trace_path, name="o.yaml", sampling={"prefill": 8})))
    assert not set(sampled.keys) & set(whole.keys) and not set(sampled.keys) & set(other.keys)


@pytest.mark.parametrize("over,field,says", [
    ({"sampling": {"prefill": 1}}, "sampling.prefill", "from 2 to 4,096"),
    ({"sampling": {"decode": "8"}}, "sampling.decode", "whole number"),
    ({"sampling": {"prefill": 4, "warmup": 8}}, "sampling.warmup", "only with sampling.decode"),
    ({"sampling": {"prefil": 4}}, "sampling.prefil", "unknown key"),
    ({"sampling": {}}, "sampling", "expected a mapping"),
    ({"sampling": 8}, "sampling", "expected a mapping"),
    ({"refresh_phases": 4}, "refresh_phases", "expected 1 with sampling"),
    ({"objectives": ["cycles", "energy"]}, "objectives[1]", "other figures are its simulated part's"),
])
def test_bad_sampling_is_refused_naming_the_field(tmp_path, trace_path, over, field, says):
    with pytest.raises(SweepError) as e:
        load_spec(_spec(tmp_path, trace_path, **over))
    msg = str(e.value)
    assert "spec.yaml" in msg and field in msg and says in msg


def test_a_trace_with_no_decode_to_leave_out_is_refused_before_anything_runs(tmp_path):
    t = synth_trace(prompt_tokens=256, decode_steps=8, layers=1, heads=4, head_dim=64, seed=0)
    p = tmp_path / "short.npz"
    save_trace(t, str(p))
    with pytest.raises(Exception) as e:
        make_plan(load_spec(_spec(tmp_path, str(p))))
    assert "sampling.decode" in str(e.value) and "nothing would be left out" in str(e.value)


def test_screening_and_refresh_phases_are_refused_with_sampling(tmp_path, trace_path, capsys):
    spec = _spec(tmp_path, trace_path)
    assert main(["sweep", spec, "--out", str(tmp_path / "a"), "--screen", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "--screen" in err and "expected without the spec's sampling" in err
    assert main(["sweep", spec, "--out", str(tmp_path / "b"), "--refresh-phases", "4", "--quiet"]) == 2
    assert "expected 1 with sampling" in capsys.readouterr().err


def test_the_summary_says_when_the_best_points_estimate_is_flagged(swept):
    # two layers of decode sampled: below the 8 layers from which decode estimates held within 1 %
    out, text = swept
    summary = json.load(open(os.path.join(out, "summary.json"), encoding="utf-8"))
    note = next(n for n in summary["notes"] if "the best point's estimate is not one to rank by" in n)
    assert "decode was sampled on fewer than 8 layers" in note and note in text


def test_the_command_line_samples_a_spec_as_its_sampling_key_does(tmp_path, trace_path, capsys):
    whole_spec = _spec(tmp_path, trace_path, name="w.yaml", sampling=None)
    out = tmp_path / "cli"
    assert main(["sweep", whole_spec, "--out", str(out), "--jobs", "1", "--quiet", "--sample-prefill", "4",
                 "--sample-decode", "8"]) == 0
    sampled = make_plan(load_spec(_spec(tmp_path, trace_path)))
    assert set(sim.load_sweep(str(out))["key"]) == set(sampled.keys)
    assert main(["sweep", whole_spec, "--out", str(tmp_path / "x"), "--sample-warmup", "8", "--quiet"]) == 2
    assert "--sample-warmup" in capsys.readouterr().err
    energy = _spec(tmp_path, trace_path, name="e.yaml", sampling=None, objectives=["cycles", "energy"])
    assert main(["sweep", energy, "--out", str(tmp_path / "y"), "--sample-prefill", "4", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "--sample-prefill" in err and "objectives[1]" in err


def test_a_report_of_a_sampled_folder_lists_its_failed_points(tmp_path, trace_path):
    spec = _spec(tmp_path, trace_path, axes={"dot.multipliers": [1024, 1000]})   # 1000: not a multiple of the lanes
    out = tmp_path / "out"
    assert main(["sweep", spec, "--out", str(out), "--jobs", "1", "--quiet"]) == 1   # a failed point
    assert main(["report", str(out), "--out", str(tmp_path / "rep"), "--quiet"]) == 0
    text = (tmp_path / "rep" / "report.md").read_text()
    assert "1 runs, 1 of them sampled" in text and ", 1 failed points" in text
    assert "## Failed points" in text and "multiple of dot.lanes" in text
