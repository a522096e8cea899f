"""Capture benchmark: wall time of capturing a 256-token text on the CPU.

Cuts the bundled long text to exactly 256 tokens ([CLS] ... [SEP]) and
captures it through the 6-layer bundled encoder with every policy on
(cascade token and head pruning, value pruning, progressive key
quantization, decode steps: ``traces/policies/moderate.yaml``). A capture is
a dense reference pass plus the pruned pass plus the fidelity report. Also
prints one pruned pass alone, and a capture with the fidelity-target search
(``fit95.yaml``), which runs about a dozen passes. Target: capture < 5 s.

    python bench/capture.py [--repeat 5] [--tokens 256]
"""

import argparse
import os
import statistics
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

from sim.trace.capture import _run, capture_ids  # noqa: E402
from sim.trace.encoder import Encoder  # noqa: E402
from sim.trace.policies import load_policy  # noqa: E402


def timed(fn, repeat):
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return min(out), statistics.median(out)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--tokens", type=int, default=256)
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    enc = Encoder.load()
    load_s = time.perf_counter() - t0
    with open(os.path.join(ROOT, "traces", "texts", "lighthouse_log.txt"), encoding="utf-8") as fh:
        ids, _ = enc.tokenize(fh.read())
    if len(ids) < args.tokens:
        raise SystemExit(f"the bundled text has only {len(ids)} tokens")
    ids = list(ids[:args.tokens - 1]) + [int(ids[-1])]  # keep the closing [SEP]
    special = [0, args.tokens - 1]
    full = load_policy(os.path.join(ROOT, "traces", "policies", "moderate.yaml"))
    fit = load_policy(os.path.join(ROOT, "traces", "policies", "fit95.yaml"))

    cap_best, cap_med = timed(lambda: capture_ids(enc, ids, full, special=special), args.repeat)
    pass_best, pass_med = timed(lambda: _run(enc, ids, special, full, 1.0), args.repeat)
    dense_best, dense_med = timed(lambda: _run(enc, ids, special, full.dense(), 1.0), args.repeat)
    fit_best, fit_med = timed(lambda: capture_ids(enc, ids, fit, special=special), max(1, args.repeat // 2))
    res = capture_ids(enc, ids, full, special=special)

    try:
        import threadpoolctl  # noqa: F401
        blas = "passes on 1 BLAS thread (threadpoolctl)"
    except ImportError:
        blas = "BLAS threads as the library defaults (threadpoolctl missing)"
    print(f"capture benchmark: {args.tokens} tokens, {enc.config.layers} layers, {enc.config.heads} heads, "
          f"cpu count {os.cpu_count()}, {blas}")
    print(f"  model load (weights + tokenizer)            {load_s:7.3f} s")
    print(f"  capture, all policies on (dense + pruned)   {cap_best:7.3f} s best, {cap_med:.3f} s median "
          f"of {args.repeat}   target < 5 s: {'met' if cap_best < 5 else 'NOT met'}")
    print(f"  one pruned pass (all policies on)           {pass_best:7.3f} s best, {pass_med:.3f} s median")
    print(f"  one dense pass                              {dense_best:7.3f} s best, {dense_med:.3f} s median")
    print(f"  capture with fidelity-target search (fit95) {fit_best:7.3f} s best, {fit_med:.3f} s median")
    f = res.fidelity
    print(f"  moderate.yaml on these tokens: cosine {f['pooled_cosine']:.4f}, tokens kept "
          f"{100 * f['tokens_kept']:.1f} %, heads kept {100 * f['heads_kept']:.1f} %, values kept "
          f"{100 * f['values_kept']:.1f} %, key bits {f['key_bits']:.2f}")


if __name__ == "__main__":
    main()
