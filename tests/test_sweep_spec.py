"""Sweep specs: grid expansion, ranges, linked groups, keep_if rules, and the
issue's bad inputs (one line, exit 2).

Expected grids are computed independently with ``itertools.product`` and
plain arithmetic (standard library, outside the code under test); geometric
and arithmetic ranges are the textbook sequences a*r**i and a + i*d.
"""

import itertools
import os
import socket

import pytest
import yaml

from sim.cli import main
from sim.sweep import SweepError, load_spec, make_plan, run_sweep
from sim.trace.files import save_trace
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")


@pytest.fixture(scope="module")
def trace_path(tmp_path_factory):
    p = tmp_path_factory.mktemp("tr") / "tiny.npz"
    save_trace(synth_trace(prompt_tokens=64, decode_steps=2, layers=2, heads=2, head_dim=64,
                           token_keep=0.75, seed=3), str(p))
    return str(p)


def write_spec(tmp_path, trace_path, **over):
    doc = {"name": "t", "base": MID, "traces": [trace_path],
           "axes": {"dot.multipliers": [256, 512]}, "objectives": ["cycles"]}
    doc.update(over)
    doc = {k: v for k, v in doc.items() if v is not None}
    p = tmp_path / "spec.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


def one_line(capsys, argv):
    code = main(argv)
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2, (code, out, err)
    assert len(lines) == 1 and lines[0].startswith("attnsim: error: "), err
    assert "Traceback" not in err
    return lines[0]


# Grid expansion ---------------------------------------------------------------

def test_grid_is_cartesian_product_with_linked_groups_zipped(tmp_path, trace_path):
    spec = write_spec(tmp_path, trace_path,
                      axes={"dot.multipliers": [256, 512, 1024], "buffers.key_kib": {"from": 16, "to": 64, "factor": 2}},
                      linked=[{"dram.channels": [2, 4], "dram.channel_gbps": [51.2, 25.6]}])
    plan = make_plan(load_spec(spec))
    want = [{"dot.multipliers": m, "buffers.key_kib": k, "dram.channels": c, "dram.channel_gbps": g}
            for m, k, (c, g) in itertools.product([256, 512, 1024], [16, 32, 64], [(2, 51.2), (4, 25.6)])]
    assert [p.point for p in plan.points] == want
    for p in plan.points:  # the resolved config carries the point's values
        assert p.config["dot"]["multipliers"] == p.point["dot.multipliers"]
        assert p.config["dram"]["channel_gbps"] == p.point["dram.channel_gbps"]
    assert len({p.key for p in plan.points}) == len(plan.points)


@pytest.mark.parametrize("rng, want", [
    ({"from": 32, "to": 512, "factor": 2}, [32 * 2 ** i for i in range(5)]),
    ({"from": 32, "to": 500, "factor": 2}, [32, 64, 128, 256]),
    ({"from": 16, "to": 64, "step": 16}, [16, 32, 48, 64]),
    ({"from": 0.5, "to": 1.5, "step": 0.25}, [0.5 + 0.25 * i for i in range(5)]),
    ({"from": 0.1, "to": 0.3, "step": 0.1}, [0.1, 0.2, 0.3]),
])
def test_ranges(tmp_path, trace_path, rng, want):
    path = "buffers.key_kib" if rng.get("factor") or rng["from"] >= 16 else "clock_ghz"
    spec = load_spec(write_spec(tmp_path, trace_path, axes={path: rng}))
    assert [v for (v,) in spec.dims[0][1]] == want


def test_keep_if_rules_filter_points(tmp_path, trace_path):
    spec = write_spec(tmp_path, trace_path,
                      axes={"buffers.key_kib": [16, 32, 64, 128], "buffers.value_kib": [16, 32, 64]},
                      keep_if=[{"ge": ["buffers.value_kib", {"mul": ["buffers.key_kib", 0.5]}]},
                               {"any": [{"le": ["derived.buffer_kib", 150]},
                                        {"eq": ["dram.scheduler", {"literal": "row_hits_first"}]}]}])
    plan = make_plan(load_spec(spec))
    q = load_spec(spec).base.buffers.query_kib
    want = [(k, v) for k, v in itertools.product([16, 32, 64, 128], [16, 32, 64])
            if v >= k / 2 and q + k + v <= 150]
    assert [(p.point["buffers.key_kib"], p.point["buffers.value_kib"]) for p in plan.points] == want
    assert plan.filtered == 12 - len(want)


def test_spec_digest_tracks_spec_base_and_trace(tmp_path, trace_path):
    a = load_spec(write_spec(tmp_path, trace_path))
    pa = make_plan(a)
    d1 = a.digest(pa.trace_digests())
    assert d1 == load_spec(write_spec(tmp_path, trace_path)).digest(pa.trace_digests())
    b = load_spec(write_spec(tmp_path, trace_path, axes={"dot.multipliers": [256, 1024]}))
    assert b.digest(pa.trace_digests()) != d1
    assert a.digest(["0" * 64]) != d1


def test_bundled_specs_load_and_plan():
    folder = os.path.join(ROOT, "arch_configs", "sweeps")
    names = sorted(n for n in os.listdir(folder) if n.endswith(".yaml"))
    assert names
    for n in names:
        plan = make_plan(load_spec(os.path.join(folder, n)))
        assert plan.points and all(p.config is not None for p in plan.points), n


# Bad input ----------------------------------------------------------------------

@pytest.mark.parametrize("over, field, words", [
    ({"axes": {"dot.multiplier": [256]}}, "axes.dot.multiplier", "did you mean 'dot.multipliers'"),
    ({"axes": {"buffers.kee_kib": [16]}}, "axes.buffers.kee_kib", "did you mean 'buffers.key_kib'"),
    ({"axes": {"dot.multipliers": []}}, "axes.dot.multipliers", "empty grid"),
    ({"axes": {}}, "axes", "empty grid"),
    ({"axes": {"dot.multipliers": {"from": 512, "to": 256, "factor": 2}}}, "axes.dot.multipliers.to", "at least"),
    ({"axes": {"dot.multipliers": {"from": 256, "to": 512, "factor": 1}}}, "factor", "> 1"),
    ({"axes": {"dot.multipliers": {"from": 256, "to": 512, "fatcor": 2}}}, "fatcor", "did you mean 'factor'"),
    ({"axes": {"dot.multipliers": [256, 256]}}, "axes.dot.multipliers", "repeats"),
    ({"linked": [{"dram.channels": [2, 4], "dram.channel_gbps": [25.6]}]}, "linked[0]", "one length"),
    ({"keep_if": [{"lte": ["dot.multipliers", 4]}]}, "keep_if[0].lte", "unknown rule"),
    ({"keep_if": [{"le": ["dot.multiplers", 4]}]}, "keep_if[0].le[0]", "did you mean 'dot.multipliers'"),
    ({"keep_if": [{"le": ["dot.multipliers", {"times": [2, 3]}]}]}, "times", "unknown operation"),
    ({"keep_if": [{"le": ["dot.multipliers", 100]}]}, "keep_if", "removes every one of the 2 grid points"),
    ({"objectives": ["cycles", "power"]}, "objectives[1]", "expected one of"),
    ({"fixed": {"dot.multipliers": 512}}, "dot.multipliers", "set twice"),
    ({"axis": {"dot.multipliers": [256]}}, "axis", "did you mean 'axes'"),
    ({"traces": ["nope.npz"]}, "traces[0]", "no such file"),
])
def test_bad_specs_are_one_line_exit_2(tmp_path, trace_path, capsys, over, field, words):
    spec = write_spec(tmp_path, trace_path, **over)
    line = one_line(capsys, ["sweep", spec, "--out", str(tmp_path / "out")])
    assert spec in line and field in line and words in line, line
    with pytest.raises(SweepError):
        make_plan(load_spec(spec))


def test_no_valid_config_at_all_is_refused(tmp_path, trace_path, capsys):
    # dot.multipliers must be a multiple of dot.lanes (64 in mid.yaml)
    spec = write_spec(tmp_path, trace_path, axes={"dot.multipliers": [100, 200]})
    line = one_line(capsys, ["sweep", spec, "--out", str(tmp_path / "out")])
    assert "no grid point is a valid config" in line and "dot.lanes" in line


def _free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def test_unreachable_scheduler_is_one_line(tmp_path, trace_path, capsys):
    pytest.importorskip("distributed")
    spec = write_spec(tmp_path, trace_path)
    addr = f"tcp://127.0.0.1:{_free_port()}"
    line = one_line(capsys, ["sweep", spec, "--out", str(tmp_path / "out"), "--cluster", addr])
    assert addr in line and "no Dask scheduler" in line, line


def test_folder_of_another_sweep_is_refused_unless_force(tmp_path, trace_path, capsys):
    out = str(tmp_path / "out")
    a = write_spec(tmp_path, trace_path)
    run_sweep(a, out, jobs=1, quiet=True)
    b = write_spec(tmp_path, trace_path, axes={"dot.multipliers": [256, 1024]})
    line = one_line(capsys, ["sweep", b, "--out", out])
    assert "another sweep" in line and "--force" in line and "sweep.json" in line
    code = main(["sweep", b, "--out", out, "--force", "--quiet", "--jobs", "1"])
    capsys.readouterr()
    assert code == 0
    run = run_sweep(b, out, jobs=1, quiet=True)
    # the 256-multiplier point was kept from the first sweep (same key), 1024 was run
    assert run.executed == 0 and run.reused == 2


def test_non_sweep_folder_is_refused(tmp_path, trace_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    line = one_line(capsys, ["sweep", write_spec(tmp_path, trace_path), "--out", str(out)])
    assert "holds no sweep.json" in line and "notes.txt" in line


def test_bad_jobs_count(tmp_path, trace_path, capsys):
    line = one_line(capsys, ["sweep", write_spec(tmp_path, trace_path), "--out", str(tmp_path / "o"),
                             "--jobs", "0"])
    assert "--jobs" in line
