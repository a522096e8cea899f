"""A sweep on two local processes stores exactly what the serial sweep stores.

The points of a small grid over the bundled decode spec's card and traces (array
size x key buffer x issue window, on the pruned decode and prefill traces) run once
in this process and once on a pool of two worker processes, which read the traces
and load the DRAM kernels before their first point. Every record must be the same,
byte for byte -- cycles, DRAM bytes and energy are named apart so a failure says
which figure moved.
"""

import json
import os

import yaml

from sim.sweep import open_store, run_sweep
from sim.sweep.store import dumps

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
AXES = {"dot.multipliers": [256, 2048], "buffers.key_kib": [32, 256], "fetch.issue_window": [0, 16]}


def spec(tmp_path):
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump({
        "name": "serial-vs-pool", "base": os.path.join(ROOT, "arch_configs", "mid.yaml"),
        "traces": [os.path.join(ROOT, "traces", "synth_decode.npz"),
                   os.path.join(ROOT, "traces", "synth_prefill.npz")],
        "axes": AXES, "fixed": {"buffers.value_kib": 128}, "objectives": ["cycles", "energy", "area"]}))
    return str(path)


def records(out):
    with open_store(out) as st:
        return {r["key"]: r for r in st.records()}


def test_two_processes_store_the_serial_documents(tmp_path):
    s = spec(tmp_path)
    serial = run_sweep(s, str(tmp_path / "serial"), jobs=1, quiet=True)
    pool = run_sweep(s, str(tmp_path / "pool"), jobs=2, quiet=True)
    assert serial.backend == "serial" and pool.backend == "local pool"
    assert serial.executed == pool.executed == 16
    a, b = records(str(tmp_path / "serial")), records(str(tmp_path / "pool"))
    assert sorted(a) == sorted(b)
    for key, ra in a.items():
        rb = b[key]
        assert ra["status"] == rb["status"] == "ok", (ra["error"], rb["error"])
        da, db = ra["result"], rb["result"]
        assert da["cycles"] == db["cycles"], key
        assert da["dram"]["bytes"] == db["dram"]["bytes"], key
        assert da["energy"] == db["energy"], key
        assert dumps(ra) == dumps(rb), key          # and everything else
    sa = json.load(open(tmp_path / "serial" / "summary.json"))
    sb = json.load(open(tmp_path / "pool" / "summary.json"))
    assert sa["pareto"] == sb["pareto"] and sa["best"] == sb["best"]
    # the grid is not degenerate: the knobs move the figures
    assert len({r["result"]["cycles"] for r in a.values()}) > 4
