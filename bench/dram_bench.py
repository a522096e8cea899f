"""DRAM pool cost: banked model against the fixed-latency one, open loop and in a replay.

Prints wall microseconds per transaction for the pool alone (sequential
tiles, scattered pruned tiles, random single bursts; all submitted at once),
then the whole replay of a synthetic trace under both models and the ratio.

    python bench/dram_bench.py [--arch arch_configs/mid.yaml] [--txns 3000] [--decode 16]
"""

import argparse
import os
import sys
import time

import numpy as np
import simpy

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

import sim  # noqa: E402
from sim.engine.dram import ChannelPool  # noqa: E402
from sim.engine.txn import Txn  # noqa: E402


def batches(pattern, n, burst, rng):
    if pattern == "sequential":
        return [(i * 128 + np.arange(128, dtype=np.int64)) * burst for i in range(n)]
    if pattern == "pruned":
        out = []
        for i in range(n):
            keep = np.flatnonzero(rng.random(256) < 0.3)
            out.append(np.unique((i * 256 + keep) * 32 // burst) * burst)
        return out
    return [np.array([a], dtype=np.int64) for a in (rng.integers(0, 1 << 31, n) // burst * burst).tolist()]


def pool_cost(arch, pattern, n):
    rng = np.random.default_rng(0)
    work = batches(pattern, n, arch.dram.burst_bytes, rng)
    env = simpy.Environment()
    pool = ChannelPool(env, arch)
    t0 = time.perf_counter()
    for b in work:
        txn = Txn("K", 0, 0, 0, len(b), len(b) * arch.dram.burst_bytes, 0, "bench")
        txn.bursts = b
        pool.submit(txn)
    env.run()
    return (time.perf_counter() - t0) / n * 1e6, pool.report(env.now)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--arch", default=os.path.join(os.path.dirname(HERE), "arch_configs", "mid.yaml"))
    ap.add_argument("--txns", type=int, default=3000)
    ap.add_argument("--decode", type=int, default=16)
    ap.add_argument("--no-replay", action="store_true")
    args = ap.parse_args()
    base = sim.load_arch(args.arch)
    print(f"config {base.name}: {base.dram.channels} channels, burst {base.dram.burst_bytes} B")
    for model in ("fixed-latency", "banked"):    # load the compiled loops outside the timing
        pool_cost(base.with_overrides({"dram.model": model}), "sequential", 2)
    for pattern in ("sequential", "pruned", "random"):
        row = []
        for model in ("fixed-latency", "banked"):
            us, rep = pool_cost(base.with_overrides({"dram.model": model}), pattern, args.txns)
            row.append(us)
            extra = f" row hits {rep['row_hit_rate']:.3f}" if model == "banked" else ""
            print(f"  pool {pattern:<10} {model:<13} {us:8.1f} us/txn  {rep['achieved_gbps']:7.1f} GB/s{extra}")
        print(f"  pool {pattern:<10} banked / fixed-latency = {row[1] / row[0]:.2f}")
    if args.no_replay:
        return
    from sim.trace.synth import synth_trace
    trace = synth_trace(prompt_tokens=512, decode_steps=args.decode, layers=12, heads=12, head_dim=64, seed=1)
    walls = {}
    for model in ("fixed-latency", "banked"):
        arch = base.with_overrides({"dram.model": model})
        best = None
        for _ in range(2):
            t0 = time.perf_counter()
            doc = sim.simulate(arch, trace).to_dict()
            dt = time.perf_counter() - t0
            best = dt if best is None else min(best, dt)
        walls[model] = best
        print(f"  replay {model:<13} {best:7.2f} s  cycles {doc['cycles']:,}  "
              f"dram {doc['dram']['achieved_gbps']:.1f} GB/s")
    print(f"  replay banked / fixed-latency = {walls['banked'] / walls['fixed-latency']:.2f}")


if __name__ == "__main__":
    main()
