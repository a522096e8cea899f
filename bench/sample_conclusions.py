"""Does decode-token sampling ever reverse a design comparison?

    python bench/sample_conclusions.py                   # 60 comparisons, 2 processes
    python bench/sample_conclusions.py --cases 200 --seed 5 --jobs 2

``attnsim run --sample-decode K`` estimates a whole run from a part. What an
architect reads off the tool is a comparison, so this draws a decode-heavy
workload (a seeded synthetic trace: 2 to 8 layers, grouped heads or not, a
batch of 1 or 2, a 256- to 1024-token prompt, causal or not, token keep 1 to
0.7, 80 to 192 decode tokens) on a bundled datapath as design A, and as B the
same with one knob an architect would change (the multipliers, the key buffer,
the channels, the softmax lanes or the write queue, halved or doubled); it runs
both whole and sampled (K of 4, 8 or 16, the default warm-up) and compares the
speed-ups ``cycles(A) / cycles(B)``. A comparison is *reversed* when one says B
is faster by more than ``--margin`` and the other slower by more than that;
printed: how many were reversed, how many changed side of the margin, the
largest difference between the speed-ups, the largest estimate error against
its whole run, and how many sampled runs the half-sample spread flagged (over
1 %, as the run summary does). Refused knob values are skipped. Figures go in
the notes, not in tests.
"""

import multiprocessing as mp
import os
import random
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path[:0] = [ROOT, HERE, os.path.join(ROOT, "tests")]

import sim  # noqa: E402
from grain_conclusions import comparison_parser, disagreement  # noqa: E402  (one rule for what a disagreement is)
from sim.errors import InputError  # noqa: E402
from sim.run import estimate_whole  # noqa: E402
from sim.trace.sample import sample_decode  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402

CONFIGS = ("mid", "server", "hbm2_stack")    # edge's prefill alone takes minutes at these sizes
KNOBS = ("dot.multipliers", "buffers.key_kib", "dram.channels", "softmax.lanes", "dram.write_queue")
NOISY = 0.01        # the run summary's flag (sim.result.SAMPLE_NOISY)


def draw(seed, case):
    """``(config, trace arguments, K, knob, factor)`` for one case."""
    r = random.Random(f"sample:{seed}:{case}")
    heads = r.choice([4, 8, 16])
    shape = dict(layers=r.choice([2, 4, 8]), heads=heads, kv_heads=r.choice([heads, max(1, heads // 4)]),
                 head_dim=r.choice([64, 128]), batch=r.choice([1, 2]), prompt_tokens=r.choice([256, 512, 1024]),
                 decode_steps=r.choice([80, 128, 192]), causal=r.random() < 0.5,
                 token_keep=r.choice([1.0, 0.8, 0.7]), seed=r.randrange(1000))
    return r.choice(CONFIGS), shape, r.choice([4, 8, 16]), r.choice(KNOBS), r.choice([0.5, 2])


def compare(seed, case):
    """``(case, what, speed-up whole, speed-up sampled, worst error, flagged)`` or ``(case, None, why)``."""
    name, shape, k, key, factor = draw(seed, case)
    try:
        trace = synth_trace(**shape)
        sample = sample_decode(trace, k)
        a = sim.load_arch(name)
        section, knob = key.split(".")
        old = getattr(getattr(a, section), knob)
        b = a.with_overrides({key: type(old)(old * factor)}, "bench")
        whole, est, flagged = [], [], 0
        for arch in (a, b):
            whole.append(sim.simulate(arch, trace, keep_intervals=False).to_dict()["cycles"])
            e = estimate_whole(sim.simulate(arch, sample.part, keep_intervals=False).to_dict(), sample)
            est.append(e["cycles"])
            flagged += e.get("half_sample_spread", 0.0) > NOISY
    except InputError as e:
        return case, None, str(e).splitlines()[0]
    err = max(abs(e / w - 1) for e, w in zip(est, whole))
    what = f"{name}, {shape['layers']} layers, K {k}: {key} x{factor}"
    return case, what, whole[0] / whole[1], est[0] / est[1], err, flagged


def _work(args):
    return compare(*args)


def main():
    args = comparison_parser(__doc__, 60, 1).parse_args()
    t0 = time.perf_counter()
    m = args.margin
    reversed_, sided, skipped, worst, worst_err, flagged, done = [], [], 0, (0.0, None), (0.0, None), 0, 0
    with mp.get_context("fork").Pool(args.jobs, maxtasksperchild=20) as pool:
        for out in pool.imap_unordered(_work, [(args.seed, i) for i in range(args.cases)]):
            if out[1] is None:
                skipped += 1
                continue
            case, what, full, samp, err, flag = out
            done += 1
            flagged += flag
            gap = abs(samp - full) / full
            if gap > worst[0]:
                worst = (gap, out)
            if err > worst_err[0]:
                worst_err = (err, out)
            kind = disagreement(full, samp, m)
            if kind:
                (reversed_ if kind == "reversed" else sided).append(out)
    wall = time.perf_counter() - t0
    print(f"{done} comparisons (seed {args.seed}, {skipped} refused knob values skipped) on {args.jobs} "
          f"processes in {wall:.0f} s; margin {m:.0%}")
    print(f"  reversed (whole says faster, sampled slower, or the other way): {len(reversed_)}")
    print(f"  across the margin (one says a difference, the other none): {len(sided)}")
    print(f"  sampled runs flagged by their half-samples (over {NOISY:.0%}): {flagged} of {2 * done}")
    for label, (value, out) in (("largest gap between the speed-ups", worst),
                                ("largest estimate error against its whole run", worst_err)):
        if out is not None:
            print(f"  {label}: {value:.2%} (case {out[0]}, {out[1]}: speed-up {out[2]:.4f} whole, "
                  f"{out[3]:.4f} sampled)")
    for out in reversed_ + sided:
        print(f"  case {out[0]}: {out[1]}: speed-up {out[2]:.4f} whole, {out[3]:.4f} sampled, "
              f"estimate error up to {out[4]:.2%}{', flagged' if out[5] else ''}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
