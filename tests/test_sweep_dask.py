"""Sweeps on a real Dask distributed scheduler with two worker processes on
127.0.0.1 (the ``distributed`` package from PyPI, an outside reference
implementation of task scheduling): results bit-identical to the local pool,
and a worker killed mid-sweep loses and duplicates nothing.
"""

import json
import os
import signal

import pytest
import yaml

from sim.sweep import open_store, run_sweep
from sim.sweep.store import dumps
from sim.trace.files import save_trace
from sim.trace.synth import synth_trace

distributed = pytest.importorskip("distributed")   # the sweep extra; CI installs it

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
AXES = {"dot.multipliers": [256, 512, 1024, 2048], "buffers.key_kib": [32, 64, 128],
        "buffers.value_kib": [32, 64]}                      # 24 points


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as c:
        yield c


@pytest.fixture(scope="module")
def specs(tmp_path_factory):
    d = tmp_path_factory.mktemp("dask")
    out = {}
    for name, (prompt, decode) in {"quick": (64, 2), "slow": (128, 32)}.items():
        t = d / f"{name}.npz"
        save_trace(synth_trace(prompt_tokens=prompt, decode_steps=decode, layers=2, heads=2, head_dim=64,
                               token_keep=0.75, value_keep=0.5, lsb_fraction=0.25, seed=11), str(t))
        s = d / f"{name}.yaml"
        s.write_text(yaml.safe_dump({"name": f"dask-{name}", "base": MID, "traces": [str(t)], "axes": AXES,
                                     "objectives": ["cycles", "energy", "area"]}))
        out[name] = str(s)
    return out


def lines(out):
    """Every stored record as canonical JSON, sorted (completion order differs between backends)."""
    with open_store(out) as st:
        return sorted(dumps(r) for r in st.records())


def test_dask_results_identical_to_local_pool(tmp_path, cluster, specs):
    pool_out, dask_out = str(tmp_path / "pool"), str(tmp_path / "dask")
    a = run_sweep(specs["quick"], pool_out, jobs=2, quiet=True)
    b = run_sweep(specs["quick"], dask_out, cluster=cluster.scheduler_address, quiet=True)
    assert a.executed == b.executed == 24
    assert b.backend.startswith("dask at tcp://127.0.0.1:")
    la, lb = lines(pool_out), lines(dask_out)
    assert len(la) == 24
    assert la == lb                      # every record, byte for byte
    assert all(json.loads(x)["status"] == "ok" for x in la)
    sa = json.load(open(os.path.join(pool_out, "summary.json")))
    sb = json.load(open(os.path.join(dask_out, "summary.json")))
    assert sa["pareto"] == sb["pareto"] and sa["best"] == sb["best"]


def test_killed_dask_worker_loses_and_duplicates_nothing(tmp_path, cluster, specs):
    client = distributed.Client(cluster.scheduler_address, set_as_default=False)
    try:
        pids = client.run(os.getpid)
    finally:
        client.close()
    victim = sorted(pids.values())[0]
    seen = []

    def on_record(rec):
        seen.append(rec["key"])
        if len(seen) == 3:
            os.kill(victim, signal.SIGKILL)   # mid-sweep: both workers have points in flight

    dask_out = str(tmp_path / "dask")
    run = run_sweep(specs["slow"], dask_out, cluster=cluster.scheduler_address, quiet=True,
                    on_record=on_record)
    assert len(seen) == 24 and len(set(seen)) == 24
    with open_store(dask_out) as st:
        recs = list(st.records())
    assert len(recs) == 24 and len({r["key"] for r in recs}) == 24
    assert all(r["status"] == "ok" for r in recs), [r["error"] for r in recs if r["status"] != "ok"]
    assert run.summary["counts"]["missing"] == 0
    client = distributed.Client(cluster.scheduler_address, set_as_default=False)
    try:
        assert victim not in client.run(os.getpid).values()   # the kill did happen
    finally:
        client.close()
    # a rerun finds everything done, and the results match a local pool's
    assert run_sweep(specs["slow"], dask_out, cluster=cluster.scheduler_address, quiet=True).executed == 0
    pool_out = str(tmp_path / "pool")
    run_sweep(specs["slow"], pool_out, jobs=2, quiet=True)
    assert lines(pool_out) == lines(dask_out)
