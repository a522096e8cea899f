"""Sweep benchmark: a 64-point sweep, serial vs local process pool vs Dask.

Writes a seeded synthetic trace (4 layers, 4 heads, 256-token prefill, 16
decode steps) and a 64-point spec over the mid card (multipliers x key buffer
x value buffer x channels) into a temporary folder, then runs the same sweep
three times into fresh output folders: serial (in this process), the local
pool (``--jobs``, default every core) and a local Dask cluster of as many
workers. Prints points per minute for each, the speedup over serial, and
whether all three stores hold byte-identical records. With ``--repeat R`` the
three runs alternate R times and the best wall time of each counts (other
load on the machine only ever slows a run down); the load average is printed
so a busy machine shows.

    python bench/sweep.py [--jobs N] [--decode 16] [--repeat 1] [--skip-dask]
"""

import argparse
import os
import sys
import tempfile
import time

import yaml

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

from sim.sweep import open_store, run_sweep  # noqa: E402
from sim.sweep.store import dumps  # noqa: E402
from sim.trace.format import save_trace  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402

AXES = {"dot.multipliers": [256, 512, 1024, 2048], "buffers.key_kib": [32, 64, 128, 256],
        "buffers.value_kib": [64, 128], "dram.channels": [2, 4]}   # 64 points


def records(out):
    """Every stored record as canonical JSON, sorted (completion order differs between backends)."""
    with open_store(out) as st:
        return sorted(dumps(r) for r in st.records())


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 1, help="pool processes / Dask workers")
    ap.add_argument("--decode", type=int, default=16, help="decode steps of the benchmark trace")
    ap.add_argument("--repeat", type=int, default=1, help="alternate the runs this many times, keep the best")
    ap.add_argument("--skip-dask", action="store_true", help="leave the Dask run out")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as d:
        trace = os.path.join(d, "bench.npz")
        save_trace(synth_trace(prompt_tokens=256, decode_steps=args.decode, layers=4, heads=4, head_dim=64,
                               token_keep=0.75, value_keep=0.5, lsb_fraction=0.1, seed=42), trace)
        spec = os.path.join(d, "bench.yaml")
        with open(spec, "w") as fh:
            yaml.safe_dump({"name": "bench-64", "base": os.path.join(ROOT, "arch_configs", "mid.yaml"),
                            "traces": [trace], "axes": AXES, "objectives": ["cycles", "energy", "area"]}, fh)
        runs = [("serial", dict(jobs=1)), (f"local pool, {args.jobs} processes", dict(jobs=args.jobs))]
        if not args.skip_dask:
            runs.append((f"dask, local cluster of {args.jobs} workers", dict(workers=args.jobs)))
        print(f"sweep benchmark: 64 points, trace of 4 layers x 4 heads, 256-token prefill, "
              f"{args.decode} decode steps; {os.cpu_count()} cores")
        print(f"  load average before: {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
        best = {label: None for label, _kw in runs}
        stores = {}
        for rep in range(max(1, args.repeat)):
            for label, kw in runs:
                out = os.path.join(d, f"{label.split(',')[0].replace(' ', '_')}_{rep}")
                t0 = time.perf_counter()
                run = run_sweep(spec, out, quiet=True, **kw)
                wall = time.perf_counter() - t0
                assert run.executed == 64, run.summary["counts"]
                if best[label] is None or wall < best[label][0]:
                    best[label] = (wall, run.summary["counts"])
                stores[label] = records(out)
        base = None
        for label, (wall, c) in best.items():
            rate = 64 / wall * 60
            base = base or rate
            print(f"  {label:<34} {wall:7.2f} s  {rate:7.1f} points/min  x{rate / base:4.2f} vs serial"
                  f"  ({c['ok']} ok, {c['error']} failed)")
        print(f"  load average after:  {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
        stores = list(stores.values())
        same = all(s == stores[0] for s in stores)
        print(f"  records identical across backends: {'yes' if same else 'NO'}")
        return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
