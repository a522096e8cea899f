"""DRAM pool cost: CPU time per transaction, open loop and in a replay, against another revision.

Prints CPU microseconds per transaction for the pool alone under both models
(sequential tiles, scattered pruned tiles, random single bursts, random 64-byte
reads; all submitted at once), then the whole replay of a synthetic trace. CPU
time (``time.process_time``), best of ``--repeat`` runs, so a busy machine
moves the figures less than wall time would.

``--against REV`` runs the same measurement on revision REV of this repository
(exported with ``git archive`` into a temporary folder, its own configs, its
compiled loops built there once) and prints new / old for each figure: this is
how the banked scheduler's cost is compared with an earlier pool.

    python bench/dram_bench.py [--arch mid] [--txns 3000] [--repeat 3] [--decode 16]
                               [--no-replay] [--against REV]
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
PATTERNS = ("sequential", "pruned", "random", "random64")


def batches(pattern, n, burst, rng):
    """Burst addresses of ``n`` transactions of one pattern."""
    import numpy as np

    if pattern == "sequential":
        return [(i * 128 + np.arange(128, dtype=np.int64)) * burst for i in range(n)]
    if pattern == "pruned":
        out = []
        for i in range(n):
            keep = np.flatnonzero(rng.random(256) < 0.3)
            out.append(np.unique((i * 256 + keep) * 32 // burst) * burst)
        return out
    if pattern == "random64":
        within = np.arange(max(1, 64 // burst), dtype=np.int64) * burst
        return [a + within for a in (rng.integers(0, 1 << 31, n) // 64 * 64).tolist()]
    return [np.array([a], dtype=np.int64) for a in (rng.integers(0, 1 << 31, n) // burst * burst).tolist()]


def pool_cost(arch, pattern, n):
    """CPU microseconds per transaction and the pool's report."""
    import numpy as np
    import simpy

    from sim.engine.dram import ChannelPool
    from sim.engine.txn import Txn

    rng = np.random.default_rng(0)
    work = batches(pattern, n, arch.dram.burst_bytes, rng)
    env = simpy.Environment()
    pool = ChannelPool(env, arch)
    t0 = time.process_time()
    for b in work:
        txn = Txn("K", 0, 0, 0, len(b), len(b) * arch.dram.burst_bytes, 0, "bench")
        txn.bursts = b
        pool.submit(txn)
    env.run()
    return (time.process_time() - t0) / n * 1e6, pool.report(env.now)


def measure(root, arch_name, txns, repeat, replay, decode):
    """All figures for the code and configs under ``root`` (imported from there)."""
    sys.path.insert(0, root)
    os.chdir(root)
    import sim

    base = sim.load_arch(os.path.join("arch_configs", arch_name + ".yaml"))
    models = ("fixed-latency", "banked")
    for model in models:                       # load the compiled loops outside the timing
        pool_cost(base.with_overrides({"dram.model": model}), "sequential", 2)
    out = {"config": f"{base.name}: {base.dram.channels} channels, burst {base.dram.burst_bytes} B",
           "pool": {}, "replay": {}}
    for pattern in PATTERNS:
        for model in models:
            arch = base.with_overrides({"dram.model": model})
            if pattern == "random64":
                arch = arch.with_overrides({"fetch.request_bytes": 64})
            runs = [pool_cost(arch, pattern, txns) for _ in range(repeat)]
            us, rep = min(runs, key=lambda r: r[0])
            out["pool"][f"{pattern} {model}"] = {"us": us, "gbps": rep["achieved_gbps"],
                                                 "row_hits": rep.get("row_hit_rate")}
    if replay:
        from sim.trace.synth import synth_trace
        trace = synth_trace(prompt_tokens=512, decode_steps=decode, layers=12, heads=12, head_dim=64, seed=1)
        for model in models:
            arch = base.with_overrides({"dram.model": model})
            best = None
            for _ in range(repeat):
                t0 = time.process_time()
                doc = sim.simulate(arch, trace).to_dict()
                dt = time.process_time() - t0
                best = dt if best is None else min(best, dt)
            out["replay"][model] = {"s": best, "cycles": doc["cycles"], "txns": doc["dram"]["transactions"],
                                    "gbps": doc["dram"]["achieved_gbps"]}
    return out


def run_elsewhere(rev, args):
    """:func:`measure` on revision ``rev``, exported into a temporary folder."""
    tmp = tempfile.mkdtemp(prefix="attnsim-bench-")
    archive = subprocess.run(["git", "-C", ROOT, "archive", rev], check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", tmp], input=archive, check=True)
    cmd = [sys.executable, os.path.abspath(__file__), "--measure", tmp, "--arch", args.arch,
           "--txns", str(args.txns), "--repeat", str(args.repeat), "--decode", str(args.decode)]
    if args.no_replay:
        cmd.append("--no-replay")
    env = dict(os.environ, PYTHONPATH=tmp)
    done = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env)
    return json.loads(done.stdout.strip().splitlines()[-1])


def show(new, old=None, rev=None):
    print(f"config {new['config']}; CPU time, best of the runs")
    for key, v in new["pool"].items():
        line = f"  pool {key:<28} {v['us']:8.1f} us/txn  {v['gbps']:7.1f} GB/s"
        if v["row_hits"] is not None:
            line += f"  row hits {v['row_hits']:.3f}"
        if old and key in old["pool"]:
            o = old["pool"][key]
            line += f"   {rev}: {o['us']:8.1f} us/txn {o['gbps']:7.1f} GB/s  new/old {v['us'] / o['us']:.2f}"
        print(line)
    for key, v in new["replay"].items():
        line = (f"  replay {key:<13} {v['s']:7.2f} s  {v['s'] / v['txns'] * 1e6:7.1f} us/txn  "
                f"cycles {v['cycles']:,}  dram {v['gbps']:.1f} GB/s")
        if old and key in old["replay"]:
            o = old["replay"][key]
            line += (f"   {rev}: {o['s']:7.2f} s, cycles {o['cycles']:,}  new/old {v['s'] / o['s']:.2f}")
        print(line)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--arch", default="mid", help="a bundled config name (arch_configs/NAME.yaml)")
    ap.add_argument("--txns", type=int, default=3000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--decode", type=int, default=16)
    ap.add_argument("--no-replay", action="store_true")
    ap.add_argument("--against", metavar="REV", help="also measure git revision REV and print new / old")
    ap.add_argument("--measure", metavar="ROOT", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.measure:
        print(json.dumps(measure(args.measure, args.arch, args.txns, args.repeat, not args.no_replay,
                                 args.decode)))
        return
    old = run_elsewhere(args.against, args) if args.against else None
    new = measure(ROOT, args.arch, args.txns, args.repeat, not args.no_replay, args.decode)
    show(new, old, args.against)


if __name__ == "__main__":
    main()
