"""Screening never removes a point of the true Pareto front.

The reference front is computed here by brute force straight from the
definition of Pareto dominance (a point is dominated when another is no worse
in every objective and better in one; K. Deb, *Multi-Objective Optimization
using Evolutionary Algorithms*, Wiley 2001, ch. 2 -- from memory), over the
full sweep's measured results. Screened sweeps over random sub-grids and
objective sets (hypothesis) must find exactly that front. The screened runs
replay the full sweep's real results through a backend, so the property test
runs the real screening code on real simulations without simulating again.
"""

import os
import tempfile

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sim.arch import load_arch
from sim.model.bounds import closed_form
from sim.sweep import objectives as obj
from sim.sweep import open_store, run_sweep
from sim.sweep.worker import build_id
from sim.trace.files import load_trace, save_trace
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
GRID = {"dot.multipliers": [128, 256, 512, 1024, 2048], "buffers.key_kib": [32, 64, 128],
        "buffers.value_kib": [32, 64], "dram.channels": [2, 4]}
NAMES = ["cycles", "energy", "area", "dram_bytes", "multipliers", "buffer_kib"]


def write_spec(folder, traces, axes, objectives, name="screen"):
    p = os.path.join(folder, f"{name}.yaml")
    with open(p, "w") as fh:
        yaml.safe_dump({"name": name, "base": MID, "traces": traces, "axes": axes,
                        "objectives": objectives}, fh)
    return p


@pytest.fixture(scope="module")
def full(tmp_path_factory):
    """The whole grid on two small traces, every point simulated (local pool)."""
    d = str(tmp_path_factory.mktemp("screen"))
    traces = []
    for name, kw in {"pre": dict(prompt_tokens=96, decode_steps=0, token_keep=0.7),
                     "dec": dict(prompt_tokens=64, decode_steps=3, token_keep=0.8, value_keep=0.5)}.items():
        p = os.path.join(d, f"{name}.npz")
        save_trace(synth_trace(layers=2, heads=2, head_dim=64, seed=21, name=name, **kw), p)
        traces.append(p)
    out = os.path.join(d, "full")
    run = run_sweep(write_spec(d, traces, GRID, NAMES, "full"), out, jobs=2, quiet=True)
    with open_store(out) as st:
        recs = list(st.records())
    assert run.summary["counts"]["ok"] == 2 * 60, [r["error"] for r in recs if r["status"] != "ok"][:3]
    return {"dir": d, "traces": traces, "records": {r["key"]: r for r in recs}}


class ReplayBackend:
    """Hands back the full sweep's recorded result for each submitted key."""

    name = "replay"
    slots = 3

    def __init__(self, records):
        self.records = records
        self.queue = []
        self.ran = []

    def submit(self, task):
        self.queue.append(task)

    def wait(self):
        task = self.queue.pop(0)
        self.ran.append(task.key)
        return [(task, ("ok", self.records[task.key]["result"], build_id()))]

    def pending(self):
        return len(self.queue)

    def close(self):
        pass


def brute_front(rows, names):
    """Keys of the non-dominated rows, by the definition (plain loops)."""
    vec = {k: [obj.OBJECTIVES[n].measure(r["result"], r["config"]) for n in names] for k, r in rows.items()}
    front = set()
    for k, a in vec.items():
        if not any(all(y <= x for x, y in zip(a, b)) and any(y < x for x, y in zip(a, b))
                   for j, b in vec.items() if j != k):
            front.add(k)
    return front


def in_grid(rec, axes):
    return all(rec["point"][p] in vals for p, vals in axes.items())


def test_lower_bounds_never_exceed_measured_values(full):
    """The foundation of screening: every bound is below what the run measured."""
    traces = {}
    for rec in full["records"].values():
        tr = traces.setdefault(rec["trace_path"], load_trace(rec["trace_path"]))
        cf = closed_form(load_arch(rec["config"]), tr)
        lb = obj.lower_bounds(NAMES, cf, rec["config"])
        got = obj.values(NAMES, rec["result"], rec["config"])
        for name, b, v in zip(NAMES, lb, got):
            assert b <= v, (name, b, v, rec["point"])
        assert lb[0] > 0 and lb[1] > 0   # cycles and energy bounds are not vacuous


def _screened(full, axes, names, traces=None):
    with tempfile.TemporaryDirectory() as d:
        spec = write_spec(d, traces or full["traces"], axes, names)
        backend = ReplayBackend(full["records"])
        run = run_sweep(spec, os.path.join(d, "out"), screen=True, quiet=True, backend=backend)
    return run, backend


def _check_same_front(full, axes, names, run):
    used = run.summary["objectives"]["used"]
    assert used == names  # energy and area are in the results: no fallback needed
    for name, _path, _digest in run.plan.traces:
        rows = {k: r for k, r in full["records"].items() if r["trace"] == name and in_grid(r, axes)}
        assert set(run.summary["pareto"][name]) == brute_front(rows, names), (name, axes, names)


subsets = {p: st.lists(st.sampled_from(v), min_size=1, max_size=len(v), unique=True)
           for p, v in GRID.items()}


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(axes=st.fixed_dictionaries(subsets),
       names=st.lists(st.sampled_from(NAMES), min_size=1, max_size=4, unique=True))
def test_screening_keeps_the_whole_true_front(full, axes, names):
    axes = {p: sorted(v) for p, v in axes.items()}
    run, backend = _screened(full, axes, names)
    n = len(run.plan.points)
    assert run.executed + run.skipped == n == len(backend.ran) + run.skipped
    _check_same_front(full, axes, names, run)


@pytest.mark.parametrize("names", [["cycles"], ["cycles", "buffer_kib"], ["cycles", "energy", "area"]])
def test_screening_skips_points_and_front_matches_full_sweep(full, names):
    run, _backend = _screened(full, GRID, names)
    _check_same_front(full, GRID, names, run)
    if names == ["cycles"]:
        # a 128-multiplier array's compute bound alone exceeds the best measured run
        assert run.skipped > 0
    c = run.summary["counts"]
    assert c["skipped_by_screen"] == run.skipped and c["missing"] == 0


def test_screen_through_the_command_line(full, capsys, tmp_path):
    from sim.cli import main

    axes = {"dot.multipliers": [128, 256, 2048], "buffers.key_kib": [32, 64],
            "buffers.value_kib": [64], "dram.channels": [4]}
    spec = write_spec(str(tmp_path), full["traces"][:1], axes, ["cycles"])
    code = main(["sweep", spec, "--out", str(tmp_path / "o"), "--screen", "--jobs", "2"])
    out = capsys.readouterr().out
    assert code == 0
    skipped = int(out.split("screened out ")[1].split(",")[0])
    assert skipped > 0
    want = brute_front({k: r for k, r in full["records"].items()
                        if r["trace_path"] == full["traces"][0] and in_grid(r, axes)}, ["cycles"])
    with open_store(str(tmp_path / "o")) as st:
        rows = {r["key"] for r in st.records()}
    assert want and want <= rows
