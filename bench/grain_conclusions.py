"""Does the simulation grain ever reverse a design comparison?

    python bench/grain_conclusions.py                       # 1,000 comparisons, 2 processes
    python bench/grain_conclusions.py --cases 200 --seed 14 --jobs 2
    python bench/grain_conclusions.py --phases          # each answer the mean over 4 refresh phases
    python bench/grain_conclusions.py --set dram.refresh_postpone=8   # a value every case takes

The grain fuzz (``bench/engine_fuzz.py --grain``) counts runs whose cycles move
by more than 2 % between a coarse grain and 16 rows. What an architect reads
off the tool is a comparison: design B against design A on one workload. This
draws the fuzz's random workload and datapath (``engine_fuzz.draw``) as A, and
as B the same with one knob an architect would change (the multipliers, the
key or value buffer, the channels or the softmax lanes, halved or doubled),
runs both at the drawn grain (256 rows at least) and at 16 rows, and compares
the speed-ups ``cycles(A) / cycles(B)``. A comparison is *reversed* when one
grain says B is faster by more than ``--margin`` and the other says it is
slower by more than that; printed: how many were reversed, how many changed
side of the margin (one grain says a difference, the other says none), and the
largest difference between the two grains' speed-ups. Refused knob values
(a buffer too small for a tile) are skipped. With ``--phases`` every cycle
count is the mean over ``dram.refresh_phase`` 0, 0.25, 0.5 and 0.75 (four
times the runs), so where the refresh windows happen to fall no longer decides
a short run and what is left is the grain's own effect. Figures go in the
notes, not in tests.
"""

import argparse
import multiprocessing as mp
import os
import random
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path[:0] = [ROOT, HERE, os.path.join(ROOT, "tests")]

import sim  # noqa: E402
from engine_fuzz import CONFIGS, FINE, draw, parse_setting  # noqa: E402
from sim.errors import InputError  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402

KNOBS = ("dot.multipliers", "buffers.key_kib", "buffers.value_kib", "dram.channels", "softmax.lanes")


def change(arch, seed, case):
    """One knob of ``arch`` halved or doubled: ``(key, old, new)``."""
    r = random.Random(f"change:{seed}:{case}")
    key = r.choice(KNOBS)
    section, name = key.split(".")
    old = getattr(getattr(arch, section), name)
    new = old * r.choice([0.5, 2])
    return key, old, type(old)(new)


PHASES = (0.0,)      # refresh phases each answer is averaged over (--phases: four)
FIXED = {}           # config values every case takes over the drawn ones (--set)


def _cycles(arch, trace):
    return sum(sim.simulate(arch.with_overrides({"dram.refresh_phase": p}), trace,
                            keep_intervals=False).to_dict()["cycles"] for p in PHASES) / len(PHASES)


def compare(seed, case):
    """``(case, key, speed-up coarse, speed-up fine, grain)`` or ``(case, None, reason)``."""
    name, over, shape = draw(seed, case)
    over["engine.grain_rows"] = max(256, over["engine.grain_rows"])
    over.update(FIXED)
    try:
        trace = synth_trace(**shape)
        a = sim.load_arch(os.path.join(CONFIGS, f"{name}.yaml")).with_overrides(over)
        key, _old, new = change(a, seed, case)
        b = a.with_overrides({key: new})
        cyc = {}
        for label, arch in (("a", a), ("b", b)):
            for g in (over["engine.grain_rows"], FINE):
                cyc[label, g] = _cycles(arch.with_overrides({"engine.grain_rows": g}), trace)
    except InputError as e:
        return case, None, str(e).splitlines()[0]
    g = over["engine.grain_rows"]
    return case, f"{key} -> {new}", cyc["a", g] / cyc["b", g], cyc["a", FINE] / cyc["b", FINE], g


def _work(args):
    return compare(*args)


def disagreement(a, b, margin):
    """How two speed-ups of one comparison disagree: ``"reversed"`` (one says faster by more
    than ``margin``, the other slower by more), ``"across"`` (one says a difference, the other
    none) or None."""
    sa, sb = (0 if abs(x - 1) <= margin else (1 if x > 1 else -1) for x in (a, b))
    return "reversed" if sa * sb < 0 else ("across" if sa != sb else None)


def comparison_parser(doc, cases, seed):
    """The options every conclusion bench takes: how many cases, the seed that draws them, the
    processes, and the margin below which a speed-up is no difference."""
    ap = argparse.ArgumentParser(description=doc.split("\n\n")[0])
    ap.add_argument("--cases", type=int, default=cases)
    ap.add_argument("--seed", type=int, default=seed)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--margin", type=float, default=0.02, help="a difference smaller than this is none")
    return ap


def main():
    ap = comparison_parser(__doc__, 1000, 14)
    ap.add_argument("--phases", action="store_true", help="average each answer over four refresh phases")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="a config value every case takes, over the drawn one (e.g. dram.refresh_postpone=8)")
    args = ap.parse_args()
    global PHASES
    if args.phases:
        PHASES = (0.0, 0.25, 0.5, 0.75)
    FIXED.update(parse_setting(s) for s in args.set)
    t0 = time.perf_counter()
    m = args.margin
    reversed_, sided, skipped, worst, done = [], [], 0, (0.0, None), 0
    with mp.get_context("fork").Pool(args.jobs, maxtasksperchild=100) as pool:
        for out in pool.imap_unordered(_work, [(args.seed, i) for i in range(args.cases)]):
            if out[1] is None:
                skipped += 1
                continue
            case, what, coarse, fine, g = out
            done += 1
            gap = abs(coarse - fine) / fine
            if gap > worst[0]:
                worst = (gap, out)
            kind = disagreement(coarse, fine, m)
            if kind:
                (reversed_ if kind == "reversed" else sided).append(out)
    wall = time.perf_counter() - t0
    print(f"{done} comparisons (seed {args.seed}, {skipped} refused knob values skipped) on {args.jobs} "
          f"processes in {wall:.0f} s; margin {m:.0%}; each answer over refresh phases {PHASES}"
          + "".join(f"; {k} = {v}" for k, v in FIXED.items()))
    print(f"  reversed (one grain says faster, the other slower): {len(reversed_)}")
    print(f"  across the margin (one grain says a difference, the other none): {len(sided)}")
    gap, out = worst
    if out is not None:
        print(f"  largest gap between the grains' speed-ups: {gap:.2%} (case {out[0]}, {out[1]}: "
              f"{out[2]:.4f} at {out[4]} rows, {out[3]:.4f} at {FINE})")
    for out in reversed_ + sided:
        print(f"  case {out[0]}: {out[1]}: speed-up {out[2]:.4f} at {out[4]} rows, {out[3]:.4f} at {FINE}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
