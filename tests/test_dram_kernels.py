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

    @njit(cache=True)
    def thrice(x):
        return 3.0 * x
""")

STARTER = textwrap.dedent("""
    import json, sys
    from numba import types as nt
    from sim.engine import dram_timing as T
    import tiny

    T._init_numba()
    print("ready", flush=True)
    load = T.compile_or_load({"twice": (tiny.twice, (nt.float64,)), "thrice": (tiny.thrice, (nt.float64,))})
    assert tiny.twice(1.5) == 3.0 and tiny.thrice(1.5) == 4.5
    print(json.dumps(load._asdict()), flush=True)
""")


def start_holding(tmp_path, held, n):
    """Start ``n`` processes readying the two tiny kernels on an empty cache while this process
    holds the locks of the kernels ``held``; release them once every process is at its locks
    (it printed "ready" after numba's start-up, a second ago). Each process's report."""
    import fcntl

    (tmp_path / "tiny.py").write_text(TINY)
    cache = tmp_path / "cache"
    cache.mkdir()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([ROOT, str(tmp_path)]), NUMBA_CACHE_DIR=str(cache))
    fds = [os.open(T.lock_path(name, str(cache)), os.O_RDWR | os.O_CREAT, 0o666) for name in held]
    procs = []
    try:
        for fd in fds:
            fcntl.flock(fd, fcntl.LOCK_EX)      # as if another process were compiling them
        procs = [subprocess.Popen([sys.executable, "-c", STARTER], cwd=str(tmp_path), env=env,
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(n)]
        for p in procs:
            assert p.stdout.readline().strip() == "ready", p.stderr.read()
        time.sleep(1.0)
    finally:
        for fd in fds:
            os.close(fd)                        # releases the lock
    out = []
    for p in procs:
        text, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
        out.append(json.loads(text.strip().splitlines()[-1]))
    return out


def test_processes_starting_together_on_an_empty_cache_compile_each_kernel_once(tmp_path):
    results = start_holding(tmp_path, ["twice", "thrice"], 2)
    for name in ("twice", "thrice"):
        assert sum(name in r["compiled"] for r in results) == 1, (name, results)
    for r in results:
        assert sorted(r["compiled"] + r["loaded"]) == ["thrice", "twice"]
        assert r["waited"] >= 0.5              # both queued behind the locks held


def test_a_kernel_another_process_compiles_is_waited_for_last(tmp_path):
    """The lock of ``twice`` is held elsewhere: the process compiles ``thrice`` meanwhile,
    then waits for ``twice`` (whose holder compiled nothing, so it compiles it too)."""
    (r,) = start_holding(tmp_path, ["twice"], 1)
    assert r["compiled"] == ["thrice", "twice"]
    assert r["waited"] >= 0.5
