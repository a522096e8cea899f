"""LLM-scale replay benchmark: the 24-layer x 16-head case of the speed targets.

A synthetic 1024-token prompt + 256-token decode replay of 24 layers x 16
heads of width 64, dense and with token keep 0.7, on the mid and server
cards at the default grain. Each case runs in its own process, so its peak
RSS is its own; printed per case: CPU seconds of the simulation (trace made
before the clock starts), peak RSS, fetch transactions, transactions per CPU
second, and the bare simpy event rate measured in the same process (so a
figure can be compared across machines).

    python bench/llm_replay.py                  # all four cases
    python bench/llm_replay.py --decode 64      # a shorter decode
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def bare_event_rate(n=200_000):
    """simpy timeouts processed per CPU second by one bare process."""
    import simpy

    env = simpy.Environment()

    def proc():
        for _ in range(n):
            yield env.timeout(1)

    env.process(proc())
    t0 = time.process_time()
    env.run()
    return n / (time.process_time() - t0)


def one_case(arch_name, keep, prompt, decode):
    sys.path.insert(0, ROOT)
    import sim
    from sim.trace.synth import synth_trace

    arch = sim.load_arch(arch_name)
    sim.simulate(arch, os.path.join(ROOT, "traces", "demo_decode.yaml"), keep_intervals=False)  # kernels loaded
    trace = synth_trace(prompt_tokens=prompt, decode_steps=decode, layers=24, heads=16, head_dim=64,
                        token_keep=keep, seed=0)
    t0 = time.process_time()
    doc = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    cpu = time.process_time() - t0
    txns = doc["fetch"]["transactions"]
    return {"arch": arch_name, "token_keep": keep, "cpu_s": cpu, "txns": txns, "txns_per_cpu_s": txns / cpu,
            "cycles": doc["cycles"], "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "bare_events_per_s": bare_event_rate()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--prompt", type=int, default=1024)
    ap.add_argument("--decode", type=int, default=256)
    ap.add_argument("--case", nargs=2, metavar=("ARCH", "KEEP"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.case:
        print(json.dumps(one_case(a.case[0], float(a.case[1]), a.prompt, a.decode)))
        return
    print(f"24 layers x 16 heads (width 64), {a.prompt}-token prompt + {a.decode} decode tokens, default grain")
    print(f"{'arch':8} {'keep':>5} {'CPU s':>8} {'peak MiB':>9} {'txns':>9} {'txns/s':>8} {'bare ev/s':>10}")
    for arch in ("mid", "server"):
        for keep in (1.0, 0.7):
            out = subprocess.run([sys.executable, __file__, "--prompt", str(a.prompt), "--decode", str(a.decode),
                                  "--case", arch, str(keep)], capture_output=True, text=True, check=True)
            r = json.loads(out.stdout.strip().splitlines()[-1])
            print(f"{arch:8} {keep:5.1f} {r['cpu_s']:8.1f} {r['peak_rss_mib']:9.0f} {r['txns']:9,} "
                  f"{r['txns_per_cpu_s']:8,.0f} {r['bare_events_per_s']:10,.0f}")


if __name__ == "__main__":
    main()
