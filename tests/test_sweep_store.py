"""The sweep store loses nothing: appends as points finish, survives SIGKILL of
the whole sweep, repairs a partial last line, resumes running only the missing
points (counted by wrapping the simulation itself), records failing points and
goes on. The CSV table is read back with the standard library's ``csv``
module (RFC 4180 style reader, outside the code under test).
"""

import csv
import json
import os
import signal
import subprocess
import sys
import time

import pytest
import yaml

import sim.sweep.worker as worker
from sim.sweep import read_records, run_sweep
from sim.sweep.store import METRIC_COLUMNS
from sim.trace.format import save_trace
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
AXES = {"dot.multipliers": [256, 512, 1024, 2048], "buffers.key_kib": [16, 32, 64],
        "buffers.value_kib": [32, 64]}                      # 24 points


@pytest.fixture(scope="module")
def traces(tmp_path_factory):
    d = tmp_path_factory.mktemp("tr")
    small = d / "small.npz"
    save_trace(synth_trace(prompt_tokens=64, decode_steps=2, layers=2, heads=2, head_dim=64,
                           token_keep=0.75, seed=5), str(small))
    slow = d / "slow.npz"   # ~0.2 s a point: long enough to kill a sweep in the middle
    save_trace(synth_trace(prompt_tokens=128, decode_steps=32, layers=2, heads=2, head_dim=64,
                           token_keep=0.75, value_keep=0.5, seed=6), str(slow))
    return {"small": str(small), "slow": str(slow)}


def spec_file(tmp_path, trace, axes=AXES, name="store-test", **over):
    doc = {"name": name, "base": MID, "traces": [trace], "axes": axes,
           "objectives": ["cycles", "energy", "area"], **over}
    p = tmp_path / f"{name}.yaml"
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


@pytest.fixture
def counted(monkeypatch):
    """Count simulations actually executed in this process (serial backend)."""
    calls = []
    real = worker._simulate

    def counting(config, trace):
        calls.append(config["dot"]["multipliers"])
        return real(config, trace)

    monkeypatch.setattr(worker, "_simulate", counting)
    return calls


def jsonl(out):
    recs, dropped = read_records(os.path.join(out, "points.jsonl"))
    return recs, dropped


def check_complete(out, n):
    """Every planned point exactly once, in the JSON lines and in the CSV."""
    recs, dropped = jsonl(out)
    assert dropped == 0
    keys = [r["key"] for r in recs]
    assert len(keys) == n and len(set(keys)) == n
    with open(os.path.join(out, "points.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert sorted(r["key"] for r in rows) == sorted(keys)
    return recs, rows


def test_records_carry_config_digest_version_and_csv_matches(tmp_path, traces):
    out = str(tmp_path / "out")
    run = run_sweep(spec_file(tmp_path, traces["small"]), out, jobs=1, quiet=True)
    recs, rows = check_complete(out, 24)
    assert run.executed == 24
    for r in recs:
        assert r["status"] == "ok" and r["error"] is None
        assert r["trace_digest"] == r["result"]["trace"]["digest"]
        assert r["simulator_version"] == r["result"]["simulator"]["version"]
        assert r["config"] == r["result"]["arch"]["config"]
        for path, v in r["point"].items():
            sec, key = path.split(".")
            assert r["config"][sec][key] == v
    by_key = {r["key"]: r for r in recs}
    header = rows[0].keys()
    assert list(header)[:3] == ["key", "trace", "status"]
    assert set(AXES) <= set(header) and set(METRIC_COLUMNS) <= set(header)
    for row in rows:
        res = by_key[row["key"]]["result"]
        assert int(row["cycles"]) == res["cycles"]
        assert float(row["energy.total_pj"]) == res["energy"]["total_pj"]
        assert row["bound"] == res["bounds"]["bound"]
    meta = json.load(open(os.path.join(out, "sweep.json")))
    assert meta["format"] == "attnsim-sweep" and meta["version"] == 1
    assert meta["spec"]["name"] == "store-test"


def test_rerun_skips_finished_points(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["small"])
    out = str(tmp_path / "out")
    run_sweep(spec, out, jobs=1, quiet=True)
    assert len(counted) == 24
    run = run_sweep(spec, out, jobs=1, quiet=True)
    assert len(counted) == 24 and run.executed == 0 and run.reused == 24
    check_complete(out, 24)


def test_partial_last_line_is_ignored_and_repaired(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["small"])
    out = str(tmp_path / "out")
    run_sweep(spec, out, jobs=1, quiet=True)
    path = os.path.join(out, "points.jsonl")
    lines = open(path, "rb").read().splitlines(keepends=True)
    # drop five finished points and leave half of the next line, as a kill mid-write would
    with open(path, "wb") as fh:
        fh.write(b"".join(lines[:19]) + lines[19][: len(lines[19]) // 2])
    counted.clear()
    run = run_sweep(spec, out, jobs=1, quiet=True)
    assert run.repaired == 1
    assert len(counted) == 5 and run.executed == 5 and run.reused == 19
    check_complete(out, 24)
    assert open(path, "rb").read().endswith(b"\n")


def test_failing_point_is_recorded_and_sweep_goes_on(tmp_path, traces, counted):
    # 1 KiB of value buffer holds 16 rows at head_dim 64, under one 64-row tile: the
    # engine refuses that point when it runs it
    spec = spec_file(tmp_path, traces["small"], axes={"buffers.value_kib": [1, 32, 64]})
    out = str(tmp_path / "out")
    run = run_sweep(spec, out, jobs=1, quiet=True)
    recs, rows = check_complete(out, 3)
    bad = [r for r in recs if r["status"] == "error"]
    assert len(bad) == 1 and bad[0]["point"] == {"buffers.value_kib": 1}
    assert "buffers.value_kib" in bad[0]["error"] and "\n" not in bad[0]["error"]
    assert "result" not in bad[0]
    assert run.summary["counts"]["error"] == 1 and run.summary["counts"]["ok"] == 2
    row = next(r for r in rows if r["status"] == "error")
    assert row["cycles"] == ""
    # a rerun does not retry a recorded failure
    counted.clear()
    run_sweep(spec, out, jobs=1, quiet=True)
    assert counted == []


def test_invalid_config_points_are_recorded_without_running(tmp_path, traces, counted):
    # 96 is not a multiple of dot.lanes = 64
    spec = spec_file(tmp_path, traces["small"], axes={"dot.multipliers": [96, 128]})
    out = str(tmp_path / "out")
    run_sweep(spec, out, jobs=1, quiet=True)
    recs, _rows = check_complete(out, 2)
    bad = next(r for r in recs if r["status"] == "error")
    assert bad["config"] is None and "dot.lanes" in bad["error"]
    assert counted == [128]


def _count_lines(path):
    try:
        with open(path, "rb") as fh:
            return fh.read().count(b"\n")
    except FileNotFoundError:
        return 0


def test_killed_local_sweep_keeps_every_point_and_rerun_finishes_exactly_once(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["slow"])
    out = str(tmp_path / "out")
    cmd = [sys.executable, "-m", "sim.cli", "sweep", spec, "--out", out, "--jobs", "2", "--quiet"]
    proc = subprocess.Popen(cmd, cwd=ROOT, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    points = os.path.join(out, "points.jsonl")
    deadline = time.monotonic() + 120
    while _count_lines(points) < 4 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    os.killpg(proc.pid, signal.SIGKILL)     # the sweep and its pool workers, mid-run
    proc.wait()
    assert proc.returncode == -signal.SIGKILL, proc.stderr.read()
    before, _dropped = jsonl(out)
    assert 4 <= len(before) < 24, len(before)
    kept = {r["key"]: r for r in before}
    run = run_sweep(spec, out, jobs=1, quiet=True)
    assert run.executed == len(counted) == 24 - len(before)
    recs, _rows = check_complete(out, 24)
    for r in recs:                          # records written before the kill are untouched
        if r["key"] in kept:
            assert r == kept[r["key"]]
    # and a pooled rerun after that has nothing left to do
    again = run_sweep(spec, out, jobs=2, quiet=True)
    assert again.executed == 0 and again.reused == 24


class _Tty:
    def __init__(self):
        self.text = ""

    def isatty(self):
        return True

    def write(self, s):
        self.text += s

    def flush(self):
        pass


def test_progress_on_a_terminal_and_quiet_otherwise(tmp_path, traces, capsys):
    """Common practice, no source: a progress line belongs on a terminal only."""
    spec = spec_file(tmp_path, traces["small"], axes={"buffers.value_kib": [1, 32, 64]})
    tty = _Tty()
    run_sweep(spec, str(tmp_path / "a"), jobs=1, stream=tty)
    assert "3/3 points" in tty.text and "1 failed" in tty.text and "ETA" in tty.text
    assert tty.text.endswith("\n")
    quiet = _Tty()
    run_sweep(spec, str(tmp_path / "b"), jobs=1, stream=quiet, quiet=True)
    assert quiet.text == ""
    assert main_quiet(spec, str(tmp_path / "c"), capsys) == ""


def main_quiet(spec, out, capsys):
    from sim.cli import main

    assert main(["sweep", spec, "--out", out, "--jobs", "1"]) == 0
    return capsys.readouterr().err    # stderr is not a terminal under pytest
