"""The compiled DRAM loops are made once per machine and only loaded afterwards.

* A later process finds every kernel in numba's cache and compiles nothing; runs of
  every channel-pool path (first come first served with a table map, row hits first,
  first-free steering, posted writes, the fixed-latency model, table growth) call each
  kernel with its one declared signature, so no run compiles a second version.
* Processes that start together while the cache is empty compile once: the first to
  take the machine-wide lock compiles, the others wait for it and load. Checked on a
  one-line kernel in a cache folder of its own (compiling the real loops from nothing
  takes half a minute).
"""

import json
import os
import subprocess
import sys
import textwrap
import time

import pytest

from sim.engine import dram_timing as T

pytestmark = pytest.mark.skipif(not T.JIT, reason="numba not installed: nothing is compiled")

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# a later process: load, then drive every path the pool has, then report each kernel's signatures
LATER = textwrap.dedent("""
    import json, os
    import numpy as np, simpy
    import sim
    from sim.engine import dram_timing as T
    from sim.engine.dram import ChannelPool
    from sim.engine.txn import Txn

    load = T.load_kernels()
    mid = sim.load_arch(os.path.join("arch_configs", "mid.yaml"))
    trace = sim.load_trace(os.path.join("traces", "demo_decode.yaml"))
    for over in ({}, {"dram.scheduler": "row_hits_first"}, {"dram.steering": "first_free"},
                 {"dram.model": "fixed-latency"}):
        sim.simulate(mid.with_overrides(over), trace, keep_intervals=False)
    env = simpy.Environment()
    pool = ChannelPool(env, mid)
    pool._make_room(4096)                     # grows the tables: compact
    for i in range(64):                       # posted writes, drained at the high mark
        txn = Txn("K", 0, 0, 0, 1, 256, 0.0, "test")
        txn.bursts = (i << 12) + np.arange(4, dtype=np.int64) * 64
        txn.is_write = True
        pool.submit(txn)
    env.run()
    assert pool.report(env.now)["write_bursts_drained"] > 0
    print(json.dumps({"load": load._asdict(),
                      "signatures": {n: [str(s) for s in getattr(T, n).signatures] for n in T.KERNELS}}))
""")


def test_a_later_process_only_loads_and_runs_use_the_one_compiled_signature():
    T.load_kernels()         # this process: compiled here if the cache was empty, else loaded
    out = subprocess.run([sys.executable, "-c", LATER], cwd=ROOT, capture_output=True, text=True,
                         env=dict(os.environ, PYTHONPATH=ROOT), timeout=600)
    assert out.returncode == 0, out.stderr
    got = json.loads(out.stdout.strip().splitlines()[-1])
    assert got["load"]["compiled"] == []
    assert got["load"]["loaded"] == list(T.KERNELS)
    want = T.signatures()
    for name in T.KERNELS:
        assert got["signatures"][name] == [str(want[name])], name


TINY = textwrap.dedent("""
    from numba import njit

    @njit(cache=True)
    def twice(x):
        return 2.0 * x
""")

STARTER = textwrap.dedent("""
    import json, sys
    from numba import types as nt
    from sim.engine import dram_timing as T
    import tiny

    T._init_numba()
    print("ready", flush=True)
    load = T.compile_or_load({"twice": (tiny.twice, (nt.float64,))})
    assert tiny.twice(1.5) == 3.0
    print(json.dumps(load._asdict()), flush=True)
""")


def test_processes_starting_together_on_an_empty_cache_compile_once(tmp_path):
    import fcntl

    (tmp_path / "tiny.py").write_text(TINY)
    cache = tmp_path / "cache"
    cache.mkdir()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([ROOT, str(tmp_path)]), NUMBA_CACHE_DIR=str(cache))
    fd = os.open(T.lock_path(str(cache)), os.O_RDWR | os.O_CREAT, 0o666)
    procs = []
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)       # as if a third process were compiling
        procs = [subprocess.Popen([sys.executable, "-c", STARTER], cwd=str(tmp_path), env=env,
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                 for _ in range(2)]
        for p in procs:
            assert p.stdout.readline().strip() == "ready", p.stderr.read()
        time.sleep(0.5)                      # both are at the lock now
    finally:
        os.close(fd)                         # releases the lock
    results = []
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
        results.append(json.loads(out.strip().splitlines()[-1]))
    assert sorted(r["compiled"] for r in results) == [[], ["twice"]]
    assert [r["loaded"] for r in results if not r["compiled"]] == [["twice"]]
    assert all(r["waited"] >= 0.4 for r in results)     # both queued behind the lock
