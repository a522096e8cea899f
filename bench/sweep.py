"""Sweep benchmark: DRAM kernel compile/load cost, and a 1,000-point sweep serial vs 2 processes vs Dask.

Part 1, kernels (each in a fresh process, numba's cache pointed at an empty
temporary folder so the machine's own cache is left alone):

* compiling the DRAM kernels from nothing, then loading them in a later process
  (numba import, numba's start-up, the kernels themselves);
* two processes starting together on an empty cache: one compiles, the other
  waits and loads;
* ``attnsim demo`` end to end on an empty cache (the first run on a machine) and
  again afterwards (``--skip-demo`` leaves it out).

Part 2, the sweep: the bundled spec ``arch_configs/sweeps/decode_array_vs_buffers.yaml``
(mid card, array x key buffer x value buffer on the pruned decode and prefill
traces) widened over one more axis, ``fetch.issue_window`` 0, 2, ... 34 (18
values): 1,008 points. Runs it serially, on the local pool (2 processes) and on
local Dask clusters of 1, 2 and 4 workers, each into a fresh folder, and prints
points per minute, the speed-up over serial, the start-up of each backend and
what each worker spent readying itself (kernels, traces), and whether every
store holds byte-identical records. ``--values N`` shortens the extra axis.

    python bench/sweep.py [--values 18] [--dask 1,2,4] [--jobs 2] [--skip-demo] [--skip-kernels]

Wall figures depend on the load of the machine: the load average is printed
before and after each run, and so are the CPU seconds each run took (this
process and the worker processes it waited for), which other work on the
machine does not inflate.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap
import time

import yaml

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

from sim.sweep import open_store, run_sweep  # noqa: E402
from sim.sweep.store import dumps  # noqa: E402

SPEC = os.path.join(ROOT, "arch_configs", "sweeps", "decode_array_vs_buffers.yaml")

LOAD = textwrap.dedent("""
    import json, time
    t0 = time.perf_counter()
    import numba
    t1 = time.perf_counter()
    from sim.engine import dram_timing as T
    t2 = time.perf_counter()
    T._init_numba()
    t3 = time.perf_counter()
    r = T.load_kernels()
    print(json.dumps({"numba_import": t1 - t0, "numba_start": t3 - t2, **r._asdict()}))
""")

def cpu_seconds():
    """User + system seconds of this process and of the children it has waited for."""
    import resource

    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def load_avg():
    return ", ".join(f"{x:.2f}" for x in os.getloadavg())


def child(code, env, timeout=1800):
    """Run ``code`` in a fresh interpreter; its last output line as JSON, and the wall seconds."""
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True,
                         timeout=timeout)
    wall = time.perf_counter() - t0
    if out.returncode:
        raise SystemExit(f"child failed:\n{out.stderr}")
    lines = out.stdout.strip().splitlines()
    return (json.loads(lines[-1]) if lines else None), wall


def kernels(tmp, skip_demo):
    print("DRAM kernels (fresh processes, numba cache in an empty temporary folder)")
    print(f"  load average: {load_avg()}")
    env = dict(os.environ, PYTHONPATH=ROOT, NUMBA_CACHE_DIR=os.path.join(tmp, "cache-a"))
    cold, wall = child(LOAD, env)
    print(f"  compile from nothing:   {cold['seconds']:6.1f} s in load_kernels ({wall:.1f} s process), "
          f"compiled {len(cold['compiled'])} of 6")
    warm, wall = child(LOAD, env)
    print(f"  later process, load:    {warm['numba_import'] + warm['numba_start'] + warm['seconds']:6.2f} s "
          f"({wall:.2f} s process): import numba {warm['numba_import']:.2f} s, numba start-up "
          f"{warm['numba_start']:.2f} s, the 6 kernels {warm['seconds']:.2f} s; compiled {len(warm['compiled'])}")
    # two processes starting together on an empty cache
    env_b = dict(env, NUMBA_CACHE_DIR=os.path.join(tmp, "cache-b"))
    t0 = time.perf_counter()
    procs = [subprocess.Popen([sys.executable, "-c", LOAD], cwd=ROOT, env=env_b, stdout=subprocess.PIPE,
                              text=True) for _ in range(2)]
    both = [json.loads(p.communicate(timeout=1800)[0].strip().splitlines()[-1]) for p in procs]
    wall = time.perf_counter() - t0
    for i, r in enumerate(both):
        print(f"  together, process {i + 1}:  compiled {len(r['compiled'])}, loaded {len(r['loaded'])}, "
              f"waited {r['waited']:.1f} s for the lock, {r['seconds']:.1f} s in all")
    print(f"  together, wall:         {wall:.1f} s")
    if skip_demo:
        return
    code = ("import json, tempfile, time\nfrom sim.demo import run_demo\nt0 = time.perf_counter()\n"
            "with tempfile.TemporaryDirectory() as d:\n"
            "    runs, failed, _o, _s = run_demo(out_dir=d + '/demo', echo=lambda *a: None)\n"
            "print(json.dumps({'runs': len(runs), 'failed': len(failed), 'seconds': time.perf_counter() - t0}))")
    env_c = dict(env, NUMBA_CACHE_DIR=os.path.join(tmp, "cache-c"))
    first, wall1 = child(code, env_c)
    later, wall2 = child(code, env_c)
    print(f"  attnsim demo, first run on an empty cache: {wall1:5.1f} s ({first['runs']} runs, "
          f"{first['failed']} failed)")
    print(f"  attnsim demo, later run:                   {wall2:5.1f} s")


def wide_spec(tmp, values):
    with open(SPEC) as fh:
        d = yaml.safe_load(fh)
    base = os.path.dirname(SPEC)
    d["base"] = os.path.normpath(os.path.join(base, d["base"]))
    d["traces"] = [os.path.normpath(os.path.join(base, t)) for t in d["traces"]]
    d["axes"]["fetch.issue_window"] = {"from": 0, "to": 2 * (values - 1), "step": 2}
    d["name"] = f"{d['name']}-x-issue-window"
    path = os.path.join(tmp, "wide.yaml")
    with open(path, "w") as fh:
        yaml.safe_dump(d, fh, sort_keys=False)
    return path


def records(out):
    with open_store(out) as st:
        return sorted(dumps(r) for r in st.records())


def _status_slowly():
    """:func:`sim.sweep.worker.status` after a pause, so that every pool worker gets a turn."""
    from sim.sweep.worker import status

    time.sleep(0.25)
    return status()


def pool_status(jobs, traces):
    """What each worker of the sweep's local pool found when it started: a fresh pool made the
    way the backend makes it (prepared, then started) answers :func:`sim.sweep.worker.status`."""
    import concurrent.futures as cf

    from sim.sweep.backends import PoolBackend

    backend = PoolBackend(jobs)
    backend.prepare(traces)
    pool = backend._new_pool()        # the pool the first submit would start
    try:
        seen = {}
        for f in cf.as_completed([pool.submit(_status_slowly) for _ in range(4 * jobs)]):
            s = f.result()
            seen[s["pid"]] = s["prepared"]
    finally:
        pool.shutdown()
    return seen


def sweep(tmp, values, jobs, dask):
    from sim.sweep.backends import DaskBackend

    spec = wide_spec(tmp, values)
    n = None
    rows, stores = [], {}
    runs = [("serial", 1, None), (f"local pool, {jobs} processes", jobs, None)]
    runs += [(f"dask, {w} local worker{'s' if w > 1 else ''}", None, w) for w in dask]
    print(f"\nsweep: {os.path.relpath(SPEC, ROOT)} x fetch.issue_window ({values} values); "
          f"{os.cpu_count()} cores")
    # this process's imports and kernels once, before any timed run (the serial run would pay
    # them alone, the pool's workers inherit them); Dask workers ready themselves, timed
    import sim.engine.datapath  # noqa: F401
    import sim.result  # noqa: F401
    from sim.sweep.worker import prepare

    prepare()
    for label, j, w in runs:
        out = os.path.join(tmp, label.split(",")[0].replace(" ", "_") + f"_{j or w}")
        la = load_avg()
        cpu0 = cpu_seconds()
        t0 = time.perf_counter()
        extra = ""
        if w is None:
            run = run_sweep(spec, out, jobs=j, quiet=True)
            start = None
        else:
            backend = DaskBackend(workers=w)
            start = time.perf_counter() - t0
            try:
                run = run_sweep(spec, out, backend=backend, quiet=True)
                reps = backend.worker_reports()
            finally:
                backend.close()
            prep = [r["prepared"] for r in reps.values() if r["prepared"]]
            rss = sorted(r["rss"] / 2 ** 20 for r in reps.values())
            ready = ", ".join(f"{p['seconds']:.2f}" for p in prep)
            kern = ", ".join(f"{p['kernels_seconds']:.2f}" for p in prep)
            mib = ", ".join(f"{m:.0f}" for m in rss)
            extra = f"; cluster start {start:.1f} s; per worker: ready in {ready} s (kernels {kern} s), RSS {mib} MiB"
        wall = time.perf_counter() - t0
        cpu = cpu_seconds() - cpu0
        c = run.summary["counts"]
        n = n or run.executed
        assert run.executed == n, c
        stores[label] = records(out)
        rows.append((label, wall, cpu, c, la, load_avg(), extra))
    base = rows[0][1]
    print(f"  {'backend':<28} {'wall s':>8} {'points/min':>11} {'vs serial':>9} {'CPU s':>7}")
    for label, wall, cpu, c, la, lb, extra in rows:
        print(f"  {label:<28} {wall:8.1f} {n / wall * 60:11.0f} {base / wall:8.2f}x {cpu:7.1f}  "
              f"({c['ok']} ok, {c['error']} failed; load {la} -> {lb}){extra}")
    print("  CPU s: this process and every worker process it waited for (user + system); on a machine"
          " other work shares, it shows what a run costs where the wall time cannot")
    from sim.sweep.plan import make_plan
    from sim.sweep.spec import load_spec

    seen = pool_status(jobs, [(p, d) for _n, p, d in make_plan(load_spec(spec)).traces])
    inherited = sum(1 for pid, rep in seen.items() if rep and rep["pid"] != pid)
    print(f"  local pool workers: {len(seen)} answered, {inherited} inherited the kernels and traces from "
          f"the process that made the pool (readied once there in "
          f"{next(iter(seen.values()))['seconds']:.2f} s)" if seen else "  local pool: no worker answered")
    same = all(s == stores[rows[0][0]] for s in stores.values())
    print(f"  records identical across backends: {'yes' if same else 'NO'} ({n} points each)")
    return same


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--values", type=int, default=18, help="values of the added fetch.issue_window axis")
    ap.add_argument("--jobs", type=int, default=2, help="local pool processes")
    ap.add_argument("--dask", default="1,2,4", help="local Dask worker counts to run ('' for none)")
    ap.add_argument("--skip-demo", action="store_true", help="leave out the two demo runs")
    ap.add_argument("--skip-kernels", action="store_true", help="leave out part 1")
    ap.add_argument("--skip-sweep", action="store_true", help="leave out part 2")
    args = ap.parse_args(argv)
    dask = [int(x) for x in args.dask.split(",") if x.strip()]
    with tempfile.TemporaryDirectory() as tmp:
        if not args.skip_kernels:
            kernels(tmp, args.skip_demo)
        if not args.skip_sweep:
            return 0 if sweep(tmp, args.values, args.jobs, dask) else 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
