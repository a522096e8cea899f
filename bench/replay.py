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

``--against REV`` instead times the base case on this checkout and on
revision REV (exported with ``git archive``; its compiled loops are built there
first, which takes a minute) in one process, runs alternated for ``--rounds``
rounds, and prints each round's ratio, their median and the ratio of the best
runs. On a machine whose speed drifts by more than the change being measured,
runs one after the other (or in separate processes) cannot tell a few percent
apart; alternating in one process lets the drift fall on both sides alike.

    python bench/replay.py [--arch arch_configs/mid.yaml] [--decode 128] [--repeat 3]
                           [--dram-model banked|fixed-latency]
    python bench/replay.py --against REV [--rounds 10]
"""

import argparse
import importlib
import importlib.util
import os
import shutil
import statistics
import sys
import time

import simpy

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

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


def _package(root, name):
    """The ``sim`` package under ``root``, imported as ``name`` (so two versions live side by side)."""
    spec = importlib.util.spec_from_file_location(name, os.path.join(root, "sim", "__init__.py"),
                                                  submodule_search_locations=[os.path.join(root, "sim")])
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


def against(rev, arch_path, decode, rounds):
    """The base case on this checkout (A) and on ``rev`` (B), alternated in one process."""
    from dram_bench import export   # the sibling benchmark's git-archive export

    folder = export(rev)
    try:
        sides = {}
        for tag, pkg in (("A", sim), ("B", _package(folder, "sim_against"))):
            root = ROOT if tag == "A" else folder
            synth = importlib.import_module(pkg.__name__ + ".trace.synth").synth_trace
            arch = pkg.load_arch(os.path.join(root, os.path.relpath(arch_path, ROOT)))
            shape = dict(prompt_tokens=512, layers=12, heads=12, head_dim=64, seed=1)
            kw = {"writes": False} if "writes" in synth.__code__.co_varnames else {}
            pkg.simulate(arch, synth(decode_steps=0, **shape, **kw))   # loads (or builds) its compiled loops
            sides[tag] = (pkg, arch, synth(decode_steps=decode, **shape, **kw))
        times, cycles = {"A": [], "B": []}, {}
        print(f"base case, this checkout (A) against {rev} (B), CPU s, {rounds} rounds alternated in one process")
        for r in range(rounds):
            for tag in ("AB" if r % 2 == 0 else "BA"):
                pkg, arch, trace = sides[tag]
                t0 = time.process_time()
                cycles[tag] = pkg.simulate(arch, trace).to_dict()["cycles"]
                times[tag].append(time.process_time() - t0)
            print(f"  round {r + 1:2d}: A {times['A'][-1]:7.3f}  B {times['B'][-1]:7.3f}  "
                  f"A/B {times['A'][-1] / times['B'][-1]:.3f}", flush=True)
        print(f"  cycles: A {cycles['A']:,}, B {cycles['B']:,}")
        ratios = [a / b for a, b in zip(times["A"], times["B"])]
        print(f"  A/B median {statistics.median(ratios):.3f} (from {min(ratios):.3f} to {max(ratios):.3f}); "
              f"best A {min(times['A']):.3f} s, best B {min(times['B']):.3f} s, "
              f"ratio {min(times['A']) / min(times['B']):.3f}")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--arch", default=os.path.join(os.path.dirname(HERE), "arch_configs", "mid.yaml"))
    ap.add_argument("--decode", type=int, default=128)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--dram-model", choices=["banked", "fixed-latency"], default=None,
                    help="override dram.model of the config")
    ap.add_argument("--against", metavar="REV", help="time the base case against revision REV (see above)")
    ap.add_argument("--rounds", type=int, default=10, help="rounds of --against")
    args = ap.parse_args()
    if args.against:
        against(args.against, os.path.abspath(args.arch), args.decode, args.rounds)
        return

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
