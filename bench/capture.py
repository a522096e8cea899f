"""Capture benchmark: wall time (and peak memory) of captures on the CPU.

Encoder: cuts the bundled long text to exactly 256 tokens ([CLS] ... [SEP])
and captures it through the 6-layer bundled encoder with every policy on
(cascade token and head pruning, value pruning, progressive key
quantization, decode steps: ``traces/policies/moderate.yaml``). A capture is
a dense reference pass plus the pruned pass plus the fidelity report. Also
prints one pruned pass alone, and a capture with the fidelity-target search
(``fit95.yaml``), which runs about a dozen passes. Target: capture < 5 s.

Decoder (``--decoder``, in a fresh process each, for its peak memory): a
12-layer, 768-wide decoder with random weights (Llama family: 12 query heads
on 4 KV heads of width 64, gated feed-forward 2048 wide, 32000-token
vocabulary; and GPT-2 family: 12 heads, feed-forward 3072, 50257 tokens) is
written to a temporary folder and captured with a 512-token prompt and 64
generated tokens under ``traces/policies/kv_heavy.yaml`` (dense pass, policy
pass, fidelity report, trace). Target: capture < 60 s.

    python bench/capture.py [--repeat 5] [--tokens 256] [--decoder-only] [--skip-decoder]
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


DECODERS = {
    "llama": dict(family="llama", layers=12, hidden=768, heads=12, kv_heads=4, vocab=32000, positions=1024,
                  inter=2048),
    "gpt2": dict(family="gpt2", layers=12, hidden=768, heads=12, kv_heads=12, vocab=50257, positions=1024,
                 inter=3072),
}


def write_decoder(family, folder):
    """Write the random model folder (its own process: its memory is not the capture's)."""
    sys.path.insert(0, os.path.join(ROOT, "tests"))
    from helpers_decoder import make_decoder

    t0 = time.perf_counter()
    make_decoder(folder, seed=0, **DECODERS[family])
    print(f"  {family:5s} 12 x 768: random weights written in {time.perf_counter() - t0:.1f} s")


def decoder_case(family, folder, prompt=512, generate=64):
    """One decoder capture in this process; prints a line of figures."""
    import resource

    import numpy as np

    from sim.trace.decoder import Decoder
    from sim.trace.files import save_trace
    from sim.trace.generation import capture_decoder

    t1 = time.perf_counter()
    model = Decoder.load(folder)
    t2 = time.perf_counter()
    ids = np.random.default_rng(1).integers(0, 30000, prompt)
    policy = os.path.join(ROOT, "traces", "policies", "kv_heavy.yaml")
    res = capture_decoder(model, ids, policy, generate, name="bench")
    t3 = time.perf_counter()
    save_trace(res.trace, os.path.join(folder, "t.npz"))
    t4 = time.perf_counter()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    f = res.fidelity
    print(f"  {family:5s} 12 x 768: load {t2 - t1:4.1f} s, capture {t3 - t2:5.1f} s ({prompt} prompt + {generate} "
          f"generated; dense pass + policy pass + report)  target < 60 s: {'met' if t3 - t2 < 60 else 'NOT met'}; "
          f"trace write {t4 - t3:.2f} s; peak RSS {rss:.0f} MiB (weights {model_mib(model):.0f} MiB)")
    print(f"        agreement {f['agreement']:.3f}, mean KL {f['mean_kl']:.2e} nats, decode rows read "
          f"{100 * f['decode_rows_read']:.1f} % of the context (random weights: agreement means little)")


def model_mib(model):
    arrays = [model.wte, model.head] + ([model.wpe] if model.wpe is not None else [])
    for layer in model.layers:
        arrays += [a for a in (layer.wq, layer.wk, layer.wv, layer.wo) if a is not None]
        arrays += [w for w, _ in layer.mlp.values()]
    seen, total = set(), 0
    for a in arrays:
        base = a.base if a.base is not None else a
        if id(base) not in seen:
            seen.add(id(base))
            total += base.nbytes
    return total / 2**20


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--tokens", type=int, default=256)
    ap.add_argument("--decoder-only", action="store_true", help="only the decoder captures")
    ap.add_argument("--skip-decoder", action="store_true", help="only the encoder captures")
    ap.add_argument("--one-decoder", nargs=2, help=argparse.SUPPRESS)
    ap.add_argument("--write-decoder", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.write_decoder:
        write_decoder(*args.write_decoder)
        return
    if args.one_decoder:
        decoder_case(*args.one_decoder)
        return
    if not args.decoder_only:
        encoder_bench(args)
    if not args.skip_decoder:
        import subprocess
        import tempfile
        print("decoder capture (each in a fresh process; peak RSS is that process's):")
        for family in DECODERS:
            with tempfile.TemporaryDirectory() as tmp:
                folder = os.path.join(tmp, "model")
                for flag in ("--write-decoder", "--one-decoder"):
                    subprocess.run([sys.executable, __file__, flag, family, folder], check=True)


def encoder_bench(args):
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
