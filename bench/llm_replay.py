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
    python bench/llm_replay.py --sample-decode 8

With ``--sample-decode K`` each case also runs sampled (``attnsim run
--sample-decode K``: each request's first 32 decode tokens, then one in K) in a
process of its own, and prints that run's CPU seconds, peak RSS and
transactions, its estimate of the whole run's cycles, the estimate's error
against the whole run measured here, and the spread of its two half-samples.
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


def one_case(arch_name, keep, prompt, decode, sample=0):
    sys.path.insert(0, ROOT)
    import sim
    from sim.run import estimate_whole
    from sim.trace.sample import sample_decode
    from sim.trace.synth import synth_trace

    arch = sim.load_arch(arch_name)
    sim.simulate(arch, os.path.join(ROOT, "traces", "demo_decode.yaml"), keep_intervals=False)  # kernels loaded
    trace = synth_trace(prompt_tokens=prompt, decode_steps=decode, layers=24, heads=16, head_dim=64,
                        token_keep=keep, seed=0)
    t0 = time.process_time()
    part = sample_decode(trace, sample) if sample else None      # the sampling is part of the cost
    doc = sim.simulate(arch, part.part if part else trace, keep_intervals=False).to_dict()
    est = estimate_whole(doc, part) if part else None
    cpu = time.process_time() - t0
    txns = doc["fetch"]["transactions"]
    return {"arch": arch_name, "token_keep": keep, "cpu_s": cpu, "txns": txns, "txns_per_cpu_s": txns / cpu,
            "cycles": est["cycles"] if est else doc["cycles"],
            "half_sample_spread": est.get("half_sample_spread") if est else None,
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "bare_events_per_s": bare_event_rate()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--prompt", type=int, default=1024)
    ap.add_argument("--decode", type=int, default=256)
    ap.add_argument("--sample-decode", type=int, default=0, metavar="K",
                    help="also run each case sampled, one decode token in K, and give the estimate's error")
    ap.add_argument("--case", nargs=3, metavar=("ARCH", "KEEP", "SAMPLE"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.case:
        print(json.dumps(one_case(a.case[0], float(a.case[1]), a.prompt, a.decode, int(a.case[2]))))
        return
    print(f"24 layers x 16 heads (width 64), {a.prompt}-token prompt + {a.decode} decode tokens, default grain")
    print(f"{'arch':8} {'keep':>5} {'run':>8} {'CPU s':>8} {'peak MiB':>9} {'txns':>9} {'txns/s':>8} "
          f"{'bare ev/s':>10} {'cycles':>13} {'error':>7} {'halves':>7}")
    for arch in ("mid", "server"):
        for keep in (1.0, 0.7):
            whole = None
            for k in (0, a.sample_decode) if a.sample_decode else (0,):
                out = subprocess.run([sys.executable, __file__, "--prompt", str(a.prompt), "--decode",
                                      str(a.decode), "--case", arch, str(keep), str(k)],
                                     capture_output=True, text=True, check=True)
                r = json.loads(out.stdout.strip().splitlines()[-1])
                whole = whole or r["cycles"]
                err = f"{(r['cycles'] - whole) / whole:+7.2%}" if k else ""
                halves = f"{r['half_sample_spread']:7.2%}" if k and r["half_sample_spread"] is not None else ""
                print(f"{arch:8} {keep:5.1f} {'1 in ' + str(k) if k else 'whole':>8} {r['cpu_s']:8.1f} "
                      f"{r['peak_rss_mib']:9.0f} {r['txns']:9,} {r['txns_per_cpu_s']:8,.0f} "
                      f"{r['bare_events_per_s']:10,.0f} {r['cycles']:13,} {err:>7} {halves:>7}")


if __name__ == "__main__":
    main()
