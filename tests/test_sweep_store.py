"""The sweep store loses nothing: appends as points finish, survives SIGKILL of
the whole sweep (and of a writer inside a transaction), resumes running only
the missing points (counted by wrapping the simulation itself), records failing
points and goes on, sets aside records of another sweep, converts a version-1
folder. The table, its CSV and ``sim.load_sweep`` carry the same columns, and
their values equal the stored result documents.

Outside references: the CSV is read back with the standard library's ``csv``
module (RFC 4180 style reader); the database is inspected with the standard
library's ``sqlite3`` directly (``PRAGMA integrity_check``, row counts);
expected values are read from the JSON result documents by plain dictionary
lookups, not through the store's flattening code.
"""

import csv
import json
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import pandas as pd
import pytest
import yaml

import sim
import sim.sweep.worker as worker
from sim.sweep import open_store, run_sweep
from sim.trace.files import save_trace
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

    def counting(config, trace, *rest):
        calls.append(config["dot"]["multipliers"])
        return real(config, trace, *rest)

    monkeypatch.setattr(worker, "_simulate", counting)
    return calls


def stored(out):
    """Every stored record, read back through the store's reader."""
    with open_store(out) as st:
        return list(st.records())


def db_count(out):
    """Rows of table points, counted with plain sqlite3 (0 while the database does not exist yet)."""
    path = os.path.join(out, "points.db")
    if not os.path.exists(path):
        return 0
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5)
        try:
            return con.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def check_complete(out, n):
    """Every planned point exactly once: in the records, the table, and the CSV."""
    recs = stored(out)
    keys = [r["key"] for r in recs]
    assert len(keys) == n and len(set(keys)) == n
    with open(os.path.join(out, "points.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert sorted(r["key"] for r in rows) == sorted(keys)
    con = sqlite3.connect(os.path.join(out, "points.db"))
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert con.execute("SELECT COUNT(*) FROM points").fetchone()[0] == n
        assert con.execute("SELECT COUNT(*) FROM documents").fetchone()[0] == n
    finally:
        con.close()
    return recs, rows


def doc_value(doc, dotted):
    node = doc
    for k in dotted.split("."):
        node = node[k]
    return node


def expected_figures(doc):
    """What the flat columns must hold, read from the document by plain lookups."""
    want = {"cycles": doc["cycles"], "seconds": doc["seconds"], "dram.bytes": doc["dram"]["bytes"],
            "energy.total_pj": doc["energy"]["total_pj"], "area.total_mm2": doc["area"]["total_mm2"],
            "bounds.bound": doc["bounds"]["bound"], "compute.macs": doc["compute"]["macs"]}
    for unit, u in doc["units"].items():
        for state in ("busy", "starved", "blocked", "idle"):
            want[f"units.{unit}.{state}"] = u[state]
        ranked = sorted(u["stalls"].items(), key=lambda kv: (-kv[1], kv[0]))
        if ranked:
            want[f"units.{unit}.stall1"] = ranked[0][0]
            want[f"units.{unit}.stall1_fraction"] = ranked[0][1]
    return want


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
    with open_store(out) as st:
        names = st.names
    with open(os.path.join(out, "points.csv"), newline="") as fh:
        header = next(csv.reader(fh))
    assert header == names and header[:5] == ["key", "plan_order", "trace", "status", "error"]
    assert {f"config.{p}" for p in AXES} <= set(header)
    for row in rows:
        res = by_key[row["key"]]["result"]
        for col, want in expected_figures(res).items():
            got = row[col]
            assert (float(got) == want) if isinstance(want, (int, float)) else (got == want), (col, got, want)
        for path in AXES:
            assert float(row[f"config.{path}"]) == by_key[row["key"]]["point"][path]
    meta = json.load(open(os.path.join(out, "sweep.json")))
    assert meta["format"] == "attnsim-sweep" and meta["version"] == 2
    assert meta["spec"]["name"] == "store-test"


def test_load_sweep_columns_match_the_store_and_the_documents(tmp_path, traces):
    out = str(tmp_path / "out")
    run_sweep(spec_file(tmp_path, traces["small"], axes={**AXES, "buffers.value_kib": [1, 32]}), out,
              jobs=1, quiet=True)
    df = sim.load_sweep(out)
    with open_store(out) as st:
        names, n = st.names, st.count()
    with open(os.path.join(out, "points.csv"), newline="") as fh:
        header = next(csv.reader(fh))
    assert list(df.columns) == names == header
    assert len(df) == n == 24
    assert str(df["cycles"].dtype) == "Int64"         # whole numbers; failed points have none
    by_key = {r["key"]: r for r in stored(out)}
    for _i, row in df.iterrows():
        rec = by_key[row["key"]]
        assert row["status"] == rec["status"] and row["trace"] == rec["trace"]
        if rec["status"] != "ok":
            assert row["error"] == rec["error"] and pd.isna(row["cycles"])
            continue
        for col, want in expected_figures(rec["result"]).items():
            assert row[col] == want, (col, row[col], want)
        assert row["config.dot.multipliers"] == rec["config"]["dot"]["multipliers"]
        b = rec["config"]["buffers"]
        assert row["derived.buffer_kib"] == b["query_kib"] + b["key_kib"] + b["value_kib"]
    # filters and column picks are applied while reading
    part = sim.load_sweep(out, columns=["key", "cycles", "config.dot.multipliers"],
                          filters=[("status", "==", "ok"), ("config.dot.multipliers", "in", [512, 2048]),
                                   ("cycles", "<", int(df["cycles"].max()))])
    full = df[(df["status"] == "ok") & df["config.dot.multipliers"].isin([512, 2048])
              & (df["cycles"] < df["cycles"].max())]
    assert list(part.columns) == ["key", "cycles", "config.dot.multipliers"]
    assert sorted(part["key"]) == sorted(full["key"]) and len(part) > 0
    with pytest.raises(KeyError, match="did you mean"):
        sim.load_sweep(out, filters=[("cycle", "<", 5)])


def test_front_and_records_on_demand(tmp_path, traces):
    """The front read from the store is the definition's front over the documents (brute force)."""
    out = str(tmp_path / "out")
    run = run_sweep(spec_file(tmp_path, traces["small"]), out, jobs=1, quiet=True)
    recs = {r["key"]: r for r in stored(out)}
    vec = {k: (r["result"]["cycles"], r["result"]["energy"]["total_pj"], r["result"]["area"]["total_mm2"])
           for k, r in recs.items()}
    want = {k for k, a in vec.items()
            if not any(all(y <= x for x, y in zip(a, b)) and b != a for j, b in vec.items() if j != k)}
    with sim.open_sweep(out) as sw:
        front = sw.front_frame()
        (summary_front,) = run.summary["pareto"].values()      # one trace
        assert set(front["key"]) == want == set(summary_front)
        assert list(front["key"]) == summary_front
        k = sorted(recs)[3]
        assert sw.record(k) == recs[k]
        with pytest.raises(KeyError):
            sw.record("no-such-key")


def test_rerun_skips_finished_points(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["small"])
    out = str(tmp_path / "out")
    run_sweep(spec, out, jobs=1, quiet=True)
    assert len(counted) == 24
    run = run_sweep(spec, out, jobs=1, quiet=True)
    assert len(counted) == 24 and run.executed == 0 and run.reused == 24
    check_complete(out, 24)


KILL_INSIDE_TRANSACTION = textwrap.dedent("""
    import os, signal, sys
    import sim.sweep.store as st
    from sim.sweep import run_sweep

    real, calls = st.Codec.encode, [0]

    def encode(self, text):   # runs after the point's table row is inserted, before the commit
        calls[0] += 1
        if calls[0] == int(sys.argv[3]):
            os.kill(os.getpid(), signal.SIGKILL)
        return real(self, text)

    st.Codec.encode = encode
    run_sweep(sys.argv[1], sys.argv[2], jobs=1, quiet=True)
""")


def test_writer_killed_inside_a_transaction_leaves_only_committed_points(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["small"])
    out = str(tmp_path / "out")
    proc = subprocess.run([sys.executable, "-c", KILL_INSIDE_TRANSACTION, spec, out, "6"], cwd=ROOT,
                          capture_output=True, text=True)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert db_count(out) == 5                 # the sixth point's row was never committed
    counted.clear()
    run = run_sweep(spec, out, jobs=1, quiet=True)
    assert len(counted) == 19 and run.executed == 19 and run.reused == 5
    check_complete(out, 24)


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


def test_killed_local_sweep_keeps_every_point_and_rerun_finishes_exactly_once(tmp_path, traces, counted):
    spec = spec_file(tmp_path, traces["slow"])
    out = str(tmp_path / "out")
    cmd = [sys.executable, "-m", "sim.cli", "sweep", spec, "--out", out, "--jobs", "2", "--quiet"]
    proc = subprocess.Popen(cmd, cwd=ROOT, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while db_count(out) < 4 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    os.killpg(proc.pid, signal.SIGKILL)     # the sweep and its pool workers, mid-run
    proc.wait()
    assert proc.returncode == -signal.SIGKILL, proc.stderr.read()
    before = stored(out)
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


def test_other_sweep_with_force_sets_records_aside_and_rebuilds_the_table(tmp_path, traces, counted):
    out = str(tmp_path / "out")
    run_sweep(spec_file(tmp_path, traces["small"], axes={"dot.multipliers": [256, 512]}), out,
              jobs=1, quiet=True)
    other = spec_file(tmp_path, traces["small"], name="other",
                      axes={"dot.multipliers": [256, 1024], "dram.row_bytes": [8192]})
    counted.clear()
    run = run_sweep(other, out, jobs=1, quiet=True, force=True)
    # 8192 is mid's row size: the 256-multiplier point resolves to the same config and key
    assert counted == [1024] and run.reused == 1
    assert run.summary["counts"]["records_set_aside"] == 1
    recs, rows = check_complete(out, 2)
    assert all(r["config.dram.row_bytes"] == "8192" for r in rows)   # a column of the new spec
    con = sqlite3.connect(os.path.join(out, "points.db"))
    try:
        aside = con.execute("SELECT key FROM set_aside").fetchall()
    finally:
        con.close()
    assert len(aside) == 1 and aside[0][0] not in {r["key"] for r in recs}


def test_version_1_folder_is_converted_without_running_again(tmp_path, traces, counted):
    """A folder written by the JSON-lines store: its records move into the database, a partial line is dropped."""
    spec = spec_file(tmp_path, traces["small"])
    out = str(tmp_path / "out")
    run_sweep(spec, out, jobs=1, quiet=True)
    recs = stored(out)
    meta = json.load(open(os.path.join(out, "sweep.json")))
    v1 = tmp_path / "v1"
    v1.mkdir()
    (v1 / "sweep.json").write_text(json.dumps({**meta, "version": 1}))
    lines = [json.dumps(r, sort_keys=True) + "\n" for r in recs]
    (v1 / "points.jsonl").write_text("".join(lines[:20]) + lines[20][:40])
    counted.clear()
    run = run_sweep(spec, str(v1), jobs=1, quiet=True)
    assert run.reused == 20 and run.executed == 4 == len(counted)
    assert any("converted a version-1 folder: 20 record(s)" in n and "1 partial line(s) dropped" in n
               for n in run.summary["notes"])
    assert (v1 / "points.v1.jsonl").exists() and not (v1 / "points.jsonl").exists()
    converted = {r["key"]: r for r in stored(str(v1))}
    for r in recs[:20]:
        assert converted[r["key"]] == r
    check_complete(str(v1), 24)


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
    err = main_quiet(spec, str(tmp_path / "c"), capsys)
    assert "ETA" not in err and "\r" not in err          # stderr is not a terminal under pytest
    assert "point(s) failed" in err                       # but the failed point is said, in one line


def main_quiet(spec, out, capsys):
    from sim.cli import main

    assert main(["sweep", spec, "--out", out, "--jobs", "1"]) == 1   # a point failed
    return capsys.readouterr().err
