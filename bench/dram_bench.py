"""DRAM pool cost: CPU time per transaction, open loop and in a replay, against another revision.

Prints CPU microseconds per transaction for the pool alone under both models
(sequential tiles, scattered pruned tiles, random single bursts, random 64-byte
reads; all submitted at once), then the whole replay of a synthetic trace. CPU
time (``time.process_time``), best of ``--repeat`` runs, so a busy machine
moves the figures less than wall time would.

``--against REV`` runs the same measurement on revision REV of this repository
(exported with ``git archive`` into a temporary folder, its own configs, its
compiled loops built there once) and prints new / old for each figure: this is
how the banked scheduler's cost is compared with an earlier pool. ``--rev REV``
measures revision REV instead of this checkout on the new side, so two revisions
of the history can be compared (say the channel pool's changes alone, without the
engine changes that came after them). ``--rounds N`` measures the two sides in turn
N times and keeps each figure's best, so a machine whose speed drifts moves both
sides alike.

    python bench/dram_bench.py [--arch mid] [--txns 3000] [--repeat 3] [--decode 16]
                               [--no-replay] [--against REV] [--rev REV] [--rounds N]
"""

import argparse
import json
import os
import shutil
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


def export(rev):
    """A temporary folder holding revision ``rev`` of this repository (``git archive``)."""
    tmp = tempfile.mkdtemp(prefix="attnsim-bench-")
    archive = subprocess.run(["git", "-C", ROOT, "archive", rev], check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", tmp], input=archive, check=True)
    return tmp


def measure_in(root, args):
    """:func:`measure` on the code under ``root``, in a process of its own."""
    cmd = [sys.executable, os.path.abspath(__file__), "--measure", root, "--arch", args.arch,
           "--txns", str(args.txns), "--repeat", str(args.repeat), "--decode", str(args.decode)]
    if args.no_replay:
        cmd.append("--no-replay")
    env = dict(os.environ, PYTHONPATH=root)
    done = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env)
    return json.loads(done.stdout.strip().splitlines()[-1])


def best_of(runs):
    """Per figure, the run with the least CPU time."""
    out = dict(runs[0], pool={}, replay={})
    for part, cost in (("pool", "us"), ("replay", "s")):
        for key in runs[0][part]:
            out[part][key] = min((r[part][key] for r in runs), key=lambda v: v[cost])
    return out


def compare(args):
    """Measure the new side (this checkout or ``--rev``) and ``--against``, in turn for
    ``--rounds`` rounds, so a machine whose speed drifts moves both alike."""
    folders = []
    try:
        new_root = ROOT
        if args.rev:
            new_root = export(args.rev)
            folders.append(new_root)
        old_root = None
        if args.against:
            old_root = export(args.against)
            folders.append(old_root)
        new, old = [], []
        for _ in range(args.rounds):
            new.append(measure_in(new_root, args))
            if old_root:
                old.append(measure_in(old_root, args))
        return best_of(new), (best_of(old) if old else None)
    finally:
        for f in folders:
            shutil.rmtree(f, ignore_errors=True)


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
    ap.add_argument("--rev", metavar="REV", help="measure git revision REV instead of this checkout")
    ap.add_argument("--rounds", type=int, default=1,
                    help="measure the two sides in turn this many times (best of all rounds)")
    ap.add_argument("--measure", metavar="ROOT", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.measure:
        print(json.dumps(measure(args.measure, args.arch, args.txns, args.repeat, not args.no_replay,
                                 args.decode)))
        return
    new, old = compare(args)
    if args.rev:
        print(f"new side: revision {args.rev}")
    show(new, old, args.against)


if __name__ == "__main__":
    main()
