"""Replay benchmark: how fast the engine replays a realistic trace.

Replays a synthetic 12-layer, 12-head, 512-token prefill plus decode steps on
one config and prints wall seconds, transactions (tiles) per second, simulated
cycles per wall second, and simpy's own bare event rate measured in the same
run (a three-stage pipeline of 64-key tiles), then two scaling checks:
doubling the decode steps, and a tenfold clock change, the same trace with the
steps' KV-cache and output writes, and how far the default grain's cycles are
from a 64-row grain's (the grain is a speed knob). The base case reads only,
as it did before traces carried writes, so its figures compare with those of
earlier versions.

    python bench/replay.py [--arch arch_configs/mid.yaml] [--decode 128] [--repeat 3]
                           [--dram-model banked|fixed-latency]
"""

import argparse
import os
import sys
import time

import simpy

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

import sim  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402


def bare_simpy_rate(tiles=50_000):
    """Tiles per second through a bare three-stage simpy pipeline (fetch -> dot -> softmax)."""
    env = simpy.Environment()
    q1 = simpy.Store(env, capacity=4)
    q2 = simpy.Store(env, capacity=4)

    def fetch():
        for i in range(tiles):
            yield env.timeout(4)
            yield q1.put(i)

    def dot():
        for _ in range(tiles):
            t = yield q1.get()
            yield env.timeout(4)
            yield q2.put(t)

    def softmax():
        for _ in range(tiles):
            yield q2.get()
            yield env.timeout(2)

    for p in (fetch, dot, softmax):
        env.process(p())
    t0 = time.perf_counter()
    env.run()
    return tiles / (time.perf_counter() - t0)


def count_events(arch, trace):
    """simpy events one replay schedules (an untimed run): the simulator's work, free of machine noise."""
    env_cls = simpy.Environment
    orig = env_cls.schedule
    count = [0]

    def schedule(self, *a, **k):
        count[0] += 1
        return orig(self, *a, **k)

    env_cls.schedule = schedule
    try:
        sim.simulate(arch, trace)
    finally:
        env_cls.schedule = orig
    return count[0]


def timed_replay(arch, trace, repeat):
    best = None
    result = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = sim.simulate(arch, trace)
        dt = time.perf_counter() - t0
        best = dt if best is None else min(best, dt)
    return best, result.to_dict()


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--arch", default=os.path.join(os.path.dirname(HERE), "arch_configs", "mid.yaml"))
    ap.add_argument("--decode", type=int, default=128)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--dram-model", choices=["banked", "fixed-latency"], default=None,
                    help="override dram.model of the config")
    args = ap.parse_args()

    arch = sim.load_arch(args.arch)
    if args.dram_model:
        arch = arch.with_overrides({"dram.model": args.dram_model})
    # the base case reads only, as before traces carried writes, so its figures compare with
    # those of earlier versions; the "writes" run adds the steps' cache writes
    shape = dict(prompt_tokens=512, layers=12, heads=12, head_dim=64, seed=1)
    trace = synth_trace(decode_steps=args.decode, writes=False, **shape)
    rate = bare_simpy_rate()
    trace2 = synth_trace(decode_steps=2 * args.decode, writes=False, **shape)
    trace0 = synth_trace(decode_steps=0, writes=False, **shape)
    trace_w = synth_trace(decode_steps=args.decode, writes=True, **shape)
    fast = arch.with_overrides({"clock_ghz": arch.clock_ghz * 10})
    # the runs are interleaved, best of each kept: the machine's speed drifts, and
    # alternating keeps a slow spell from landing on one side of a comparison
    runs = {"base": (arch, trace), "prefill": (arch, trace0), "double": (arch, trace2),
            "clock": (fast, trace), "writes": (arch, trace_w)}
    best = dict.fromkeys(runs, None)
    docs = {}
    sim.simulate(arch, trace0)          # loads the compiled memory model once, outside the timing
    for _ in range(args.repeat):
        for name, (a, t) in runs.items():
            w, docs[name] = timed_replay(a, t, 1)
            best[name] = w if best[name] is None else min(best[name], w)
    wall, doc = best["base"], docs["base"]
    tiles = doc["fetch"]["transactions"]
    print(f"config {arch.name} (dram.model {arch.dram.model}): 12 layers x 12 heads, 512-token prefill + {args.decode} decode steps, "
          f"grain {doc['engine']['grain_rows']} rows")
    print(f"  wall seconds            {wall:8.3f}  (best of {args.repeat})")
    print(f"  fetch transactions      {tiles:8d}  -> {tiles / wall:,.0f} per second")
    print(f"  simulated cycles        {doc['cycles']:,}  -> {doc['cycles'] / wall:,.0f} per wall second")
    print(f"  bare simpy pipeline     {rate:,.0f} tiles per second (3 stages, same run)")
    w0, w2, w10 = best["prefill"], best["double"], best["clock"]
    print(f"  decode scaling: prefill only {w0:.3f} s; decode part {wall - w0:.3f} s at {args.decode} "
          f"steps, {w2 - w0:.3f} s at {2 * args.decode} steps -> ratio {(w2 - w0) / (wall - w0):.2f} "
          f"(whole replay {w2 / wall:.2f}x)")
    print(f"  clock x10: {docs['clock']['cycles']:,} cycles, wall {w10:.3f} s ({(w10 - wall) / wall:+.1%} vs base)")
    ww, dw = best["writes"], docs["writes"]
    print(f"  with the cache writes: {dw['cycles']:,} cycles, {dw['dram']['write_bytes'] / 2 ** 20:.1f} MiB "
          f"written, wall {ww:.3f} s ({(ww - wall) / wall:+.1%} vs base)")
    e1, e10 = count_events(arch, trace), count_events(fast, trace)
    print(f"  simpy events scheduled: {e1:,} at the base clock, {e10:,} at x10 ({(e10 - e1) / e1:+.2%})")
    t0 = time.perf_counter()
    fine = sim.simulate(arch, trace, keep_intervals=False, grain_rows=64).to_dict()
    print(f"  grain: {doc['cycles']:,} cycles at {doc['engine']['grain_rows']} rows, {fine['cycles']:,} at 64 rows "
          f"({(doc['cycles'] - fine['cycles']) / fine['cycles']:+.2%}); the 64-row run took "
          f"{time.perf_counter() - t0:.1f} s")

if __name__ == "__main__":
    main()
