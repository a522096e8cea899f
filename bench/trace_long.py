"""Long-context traces: synthesize, write, read and validate, with time and peak memory.

Each case runs in a fresh process (peak RSS is per process) and prints wall
seconds for synthesis, .npz write and read (read includes validation), the
file size, and the process's peak resident memory. Cases (8B-class decoder
shape `dec-8b`: 32 layers, 32 query heads, 8 KV heads, head width 128):

* ``prompt32k``: causal prefill of a 32768-token prompt + 64 decode tokens;
* ``decode128k``: 16 decode tokens on a 131072-token context (no prefill steps);
* ``batch32``: a batch of 32 requests, 4096-token prompts (spread 0.5), 16 tokens;
* ``prompt32k-L0`` (``--engine --case prompt32k-L0`` only): the first of the 32 layers
  of ``prompt32k`` (``sim.trace.cut``), on ``edge``, where the whole case is about
  3.5 billion transactions (the run budget's upper estimate).

With ``--engine`` each case is then simulated, each case x config in a fresh
process that builds the trace and runs ``sim.simulate`` (``keep_intervals``
off, as a sweep runs it): wall seconds of the simulation, peak RSS of the
process (trace included) and of the trace alone, fetch transactions and DRAM
transactions per wall second, simulated cycles. ``prompt32k`` runs on every
bundled datapath (``edge``, ``mid``, ``server``, ``hbm2_stack``), the others on
``mid``; ``--arch NAME`` (repeatable) replaces those lists. Each process's
address space is capped (``--limit-gib``, 8 by default); a case that fails
(refused, out of memory, killed) prints its exit status and last line of error.
``--skip-budget`` calls the engine directly, without ``sim.budget``'s up-front
estimate and refusal, to measure what the engine itself needs.

``--sample-prefill K`` (with ``--engine``) runs each case sampling its long
prefill steps' query blocks (``attnsim run --sample-prefill K``) and adds the
estimated cycles of the whole and the two spreads the run summary flags by;
``--case prompt8k-1L`` (a ``--slope`` point) and ``prompt32k-L0`` on ``mid`` are
short enough to run whole as well, for the estimate's error at that size.
``--sample-decode K`` (with ``--engine``) simulates a decode-sampled part of each
case (``attnsim run --sample-decode K``: each request's first 32 decode tokens,
then one in K) and adds its estimate of the whole; with ``--sample-prefill`` too
the part's prefill is sampled as well and the decode estimate weighs its steps'
estimated cycles.

``--slope`` asks whether simulation time follows the trace's work: one layer of
the 8B-class shape, causal prefill of 8k, 16k and 32k tokens (the work grows
as the square of the prompt), each simulated on ``mid`` (or ``--arch``) in a
fresh process; it prints each point's seconds, transactions and bytes, a
least-squares line of seconds over fetch transactions, and each point's
distance from it.

    python bench/trace_long.py [--repeat 3] [--case NAME]
    python bench/trace_long.py --engine [--repeat 1] [--case NAME] [--arch NAME] [--skip-build] [--skip-budget]
                               [--sample-prefill K] [--sample-decode K]
    python bench/trace_long.py --slope [--arch NAME]
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
# parts of a case (sim.trace.cut), simulated only: a run of one of a request's layers is about
# that share of the whole (traces/README), for a config on which the whole takes too long
CUT_CASES = {"prompt32k-L0": ("prompt32k", [0])}
# one layer of the 8B-class shape, causal prefill only: the points of --slope
SLOPE_CASES = {f"prompt{k}k-1L": dict(prompt_tokens=k * 1024, decode_steps=0, shape="dec-8b", layers=1,
                                       causal=True) for k in (8, 16, 32)}


def run_case(name):
    """One case in this process; prints a JSON line of figures."""
    sys.path.insert(0, ROOT)
    from sim.trace.files import load_trace, save_trace
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


ENGINE_ARCHS = {"prompt32k": ["edge", "mid", "server", "hbm2_stack"], "decode128k": ["mid"], "batch32": ["mid"],
                "prompt32k-L0": ["edge"]}


def engine_trace(name):
    """The trace of case ``name`` (a part of one, for CUT_CASES)."""
    from sim.trace.cut import cut_trace
    from sim.trace.synth import synth_trace

    if name in CUT_CASES:
        base, layers = CUT_CASES[name]
        return cut_trace(synth_trace(**CASES[base], seed=1), layers=layers)
    return synth_trace(**(CASES.get(name) or SLOPE_CASES[name]), seed=1)


def run_engine_case(name, arch_name, limit_gib, skip_budget=False, sample=None, decode=None):
    """One case simulated on one bundled config in this process; prints a JSON line.
    The address space is capped at ``limit_gib`` so a case that outgrows it fails
    (MemoryError) instead of taking the machine down."""
    resource.setrlimit(resource.RLIMIT_AS, (int(limit_gib * 2**30),) * 2)
    sys.path.insert(0, ROOT)
    import sim
    from sim.bundled import config
    from sim.trace.synth import synth_trace

    arch = sim.load_arch(config(arch_name))
    sim.simulate(arch, synth_trace(prompt_tokens=64, decode_steps=1, layers=1, heads=2))  # load the compiled loops
    t0 = time.perf_counter()
    trace = engine_trace(name)
    cut = None
    if decode:   # simulate a decode-sampled part (attnsim run --sample-decode K)
        from sim.trace.sample import sample_decode

        cut = sample_decode(trace, decode)
        trace = cut.part
    t1 = time.perf_counter()
    trace_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    if skip_budget:  # the engine itself, without sim.budget's estimate and refusal
        from sim.engine.datapath import run_datapath
        from sim.result import build_result

        doc = build_result(run_datapath(arch, trace, keep_intervals=False, sample_prefill=sample)).to_dict()
    else:
        opts = {"sample_prefill": sample} if sample else {}
        doc = sim.simulate(arch, trace, keep_intervals=False, **opts).to_dict()
    if cut is not None:
        from sim.run import estimate_whole

        doc["decode_sample"] = estimate_whole(doc, cut)
    t2 = time.perf_counter()
    rss_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    wall = t2 - t1
    print(json.dumps({"case": name, "arch": arch_name, "steps": len(trace.steps), "synth_s": t1 - t0,
                      "sim_s": wall, "trace_rss_mib": trace_rss, "peak_rss_mib": rss_mib,
                      "fetch_txns": doc["fetch"]["transactions"], "dram_txns": doc["dram"]["transactions"],
                      "fetch_txn_per_s": doc["fetch"]["transactions"] / wall,
                      "dram_txn_per_s": doc["dram"]["transactions"] / wall, "cycles": doc["cycles"],
                      "dram_gib": doc["dram"]["bytes"] / 2**30, "bound": doc["bounds"]["bound"],
                      "prefill_sample": _without_steps(doc.get("prefill_sample")),
                      "decode_sample": doc.get("decode_sample")}))


def _without_steps(section):
    return section and {k: v for k, v in section.items() if k != "per_step_cycles"}


def engine_run(name, arch, limit_gib, skip_budget=False, width=11, sample=None, decode=None):
    """One case simulated on ``arch`` in a fresh process: its figures, or None (failure printed)."""
    proc = subprocess.run([sys.executable, __file__, "--one-engine", name, arch, str(limit_gib)]
                          + (["--skip-budget"] if skip_budget else [])
                          + (["--sample-prefill", str(sample)] if sample else [])
                          + (["--sample-decode", str(decode)] if decode else []), capture_output=True, text=True)
    if proc.returncode:
        last = (proc.stderr.strip().splitlines() or ["(no message)"])[-1]
        print(f"{name:<{width}} {arch:<11} failed: exit {proc.returncode}: {last}")
        return None
    return json.loads(proc.stdout.strip().splitlines()[-1])


def slope_table(archs, limit_gib):
    """Simulation seconds against the trace's work: the prefill points of SLOPE_CASES on each
    config, a least-squares line of seconds over fetch transactions, each point's residual."""
    import numpy as np

    for arch in archs or ["mid"]:
        rows = [r for r in (engine_run(name, arch, limit_gib, width=13) for name in SLOPE_CASES) if r]
        print(f"\n{'case':<13} {'arch':<11} {'sim s':>8} {'fetch txns':>12} {'DRAM GiB':>9} {'us/txn':>7} "
              f"{'peak RSS MiB':>13}")
        for r in rows:
            print(f"{r['case']:<13} {arch:<11} {r['sim_s']:>8.1f} {r['fetch_txns']:>12,} {r['dram_gib']:>9.2f} "
                  f"{r['sim_s'] / r['fetch_txns'] * 1e6:>7.1f} {r['peak_rss_mib']:>13.0f}")
        if len(rows) >= 2:
            x = np.array([r["fetch_txns"] for r in rows], dtype=float)
            y = np.array([r["sim_s"] for r in rows])
            b, a = np.polyfit(x, y, 1)
            fit = a + b * x
            res = ", ".join(f"{(yi - fi) / yi:+.1%}" for yi, fi in zip(y, fit))
            print(f"  least squares: sim s = {a:.2f} + {b * 1e6:.1f} us x fetch transactions; "
                  f"residuals {res}; work grows {x[-1] / x[0]:.1f}x, time {y[-1] / y[0]:.1f}x")


def engine_table(names, archs, repeat, limit_gib, skip_budget, sample=None, decode=None):
    print(f"\n{'case':<11} {'arch':<11} {'steps':>6} {'sim s':>8} {'fetch txn/s':>12} {'DRAM txn/s':>11} "
          f"{'cycles':>15} {'DRAM GiB':>9} {'trace RSS':>10} {'peak RSS MiB':>13}   (best of {repeat}; RSS: largest)")
    for name in names:
        for arch in archs or ENGINE_ARCHS.get(name, ["mid"]):
            runs = []
            for _ in range(repeat):
                run = engine_run(name, arch, limit_gib, skip_budget, sample=sample, decode=decode)
                if run is None:
                    break
                runs.append(run)
            if not runs:
                continue
            best = min(runs, key=lambda r: r["sim_s"])
            print(f"{name:<11} {arch:<11} {best['steps']:>6} {best['sim_s']:>8.1f} {best['fetch_txn_per_s']:>12,.0f} "
                  f"{best['dram_txn_per_s']:>11,.0f} {best['cycles']:>15,} {best['dram_gib']:>9.2f} "
                  f"{max(r['trace_rss_mib'] for r in runs):>10.0f} {max(r['peak_rss_mib'] for r in runs):>13.0f}",
                  flush=True)
            ps, ds = best.get("prefill_sample"), best.get("decode_sample")
            if ps:
                of = "the decode-sampled part" if ds else "whole"
                print(f"{'':<11} {'':<11} sampled 1 in {ps['every']} ({ps['sampled_steps']} steps, "
                      f"{ps['simulated_query_blocks']:,} blocks made for {ps['query_blocks']:,}): {of} estimated at "
                      f"{ps['cycles']:,} cycles; copies {ps['copy_spread']:.2%}, half-samples "
                      f"{ps.get('half_sample_spread', 0.0):.2%} either side", flush=True)
            if ds:
                print(f"{'':<11} {'':<11} decode tokens 1 in {ds['every']} after {ds['warmup_tokens']} "
                      f"({ds['simulated_decode_steps']:,} of {ds['decode_steps']:,} decode steps): whole estimated "
                      f"at {ds['cycles']:,} cycles; half-samples {ds.get('half_sample_spread', 0.0):.2%} either side",
                      flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--case", choices=sorted(CASES) + sorted(CUT_CASES) + sorted(SLOPE_CASES), action="append")
    ap.add_argument("--engine", action="store_true", help="also simulate each case (see above)")
    ap.add_argument("--arch", action="append", help="bundled config for --engine (repeatable)")
    ap.add_argument("--skip-build", action="store_true", help="with --engine: skip the trace-building table")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--limit-gib", type=float, default=8.0,
                    help="address-space cap of each --engine process (default 8 GiB)")
    ap.add_argument("--skip-budget", action="store_true",
                    help="with --engine: run the engine without sim.budget's up-front refusal (the cap still holds)")
    ap.add_argument("--one-engine", nargs=3, help=argparse.SUPPRESS)
    ap.add_argument("--slope", action="store_true", help="simulation time against work (see above)")
    ap.add_argument("--sample-prefill", type=int, metavar="K",
                    help="with --engine: sample long prefill steps' query blocks, one in about K (see above)")
    ap.add_argument("--sample-decode", type=int, metavar="K",
                    help="with --engine: simulate the first 32 decode tokens and then one in K (see above)")
    args = ap.parse_args()
    if args.one:
        run_case(args.one)
        return
    if args.one_engine:
        name, arch, limit = args.one_engine
        run_engine_case(name, arch, float(limit), args.skip_budget, args.sample_prefill, args.sample_decode)
        return
    if args.slope:
        slope_table(args.arch, args.limit_gib)
        return
    if not (args.engine and args.skip_build):
        build_table([c for c in args.case or list(CASES) if c in CASES], args.repeat)
    if args.engine:
        engine_table(args.case or list(CASES), args.arch, args.repeat, args.limit_gib, args.skip_budget,
                     args.sample_prefill, args.sample_decode)


def build_table(names, repeat):
    print(f"{'case':<11} {'steps':>6} {'synth s':>8} {'write s':>8} {'read s':>7} {'work s':>7} "
          f"{'file MiB':>9} {'peak RSS MiB':>13}   (best of {repeat}; RSS: largest)")
    for name in names:
        runs = []
        for _ in range(repeat):
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
