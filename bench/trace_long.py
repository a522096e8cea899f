"""Long-context traces: synthesize, write, read and validate, with time and peak memory.

Each case runs in a fresh process (peak RSS is per process) and prints wall
seconds for synthesis, .npz write and read (read includes validation), the
file size, and the process's peak resident memory. Cases (8B-class decoder
shape `dec-8b`: 32 layers, 32 query heads, 8 KV heads, head width 128):

* ``prompt32k``: causal prefill of a 32768-token prompt + 64 decode tokens;
* ``decode128k``: 16 decode tokens on a 131072-token context (no prefill steps);
* ``batch32``: a batch of 32 requests, 4096-token prompts (spread 0.5), 16 tokens.

    python bench/trace_long.py [--repeat 3] [--case NAME]
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)

CASES = {
    "prompt32k": dict(prompt_tokens=32768, decode_steps=64, shape="dec-8b", causal=True),
    "decode128k": dict(prompt_tokens=131072, decode_steps=16, shape="dec-8b", include_prefill=False),
    "batch32": dict(prompt_tokens=4096, decode_steps=16, shape="dec-8b", batch=32, causal=True),
}


def run_case(name):
    """One case in this process; prints a JSON line of figures."""
    sys.path.insert(0, ROOT)
    from sim.trace.format import load_trace, save_trace
    from sim.trace.synth import synth_trace

    t0 = time.perf_counter()
    trace = synth_trace(**CASES[name], seed=1)
    t1 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "t.npz")
        save_trace(trace, path)
        t2 = time.perf_counter()
        size = os.path.getsize(path)
        del trace
        back = load_trace(path)
        t3 = time.perf_counter()
        work = back.work()
        t4 = time.perf_counter()
    rss_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"case": name, "steps": len(back.steps), "synth_s": t1 - t0, "write_s": t2 - t1,
                      "read_s": t3 - t2, "work_s": t4 - t3, "file_mib": size / 2**20,
                      "peak_rss_mib": rss_mib, "qk_macs": work.qk_macs,
                      "max_kv_rows": max(s.kv_rows for s in back.steps)}))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--case", choices=sorted(CASES), action="append")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        run_case(args.one)
        return
    print(f"{'case':<11} {'steps':>6} {'synth s':>8} {'write s':>8} {'read s':>7} {'work s':>7} "
          f"{'file MiB':>9} {'peak RSS MiB':>13}   (best of {args.repeat}; RSS: largest)")
    for name in args.case or list(CASES):
        runs = []
        for _ in range(args.repeat):
            out = subprocess.run([sys.executable, __file__, "--one", name], check=True,
                                 capture_output=True, text=True).stdout
            runs.append(json.loads(out.strip().splitlines()[-1]))
        best = {k: min(r[k] for r in runs) for k in ("synth_s", "write_s", "read_s", "work_s")}
        r = runs[0]
        print(f"{name:<11} {r['steps']:>6} {best['synth_s']:>8.2f} {best['write_s']:>8.2f} "
              f"{best['read_s']:>7.2f} {best['work_s']:>7.2f} {r['file_mib']:>9.2f} "
              f"{max(x['peak_rss_mib'] for x in runs):>13.0f}")


if __name__ == "__main__":
    main()
