"""Does query-block sampling of long prefill ever reverse a design comparison?

    python bench/prefill_conclusions.py                   # 40 comparisons, 2 processes
    python bench/prefill_conclusions.py --cases 200 --seed 5 --jobs 2
    python bench/prefill_conclusions.py --ragged          # prompts off the round lengths
    python bench/prefill_conclusions.py --paced           # the array near the softmax's pace

``attnsim run --sample-prefill K`` makes one query block in K of a long prefill
step (twice) and estimates the whole run from them. What an architect reads
off the tool is a comparison, so this draws a prefill-heavy workload (a seeded
synthetic trace: 1 or 2 layers, a causal 1k- to 12k-token prompt, grouped heads
or not, head width 64 or 128, token keep 1 or 0.8, 0 or 4 decode tokens) on a
bundled datapath as design A, and as B the same with one knob an architect
would change (the multipliers, the key or value buffer, the channels, the
softmax lanes halved or doubled, or one dot array against two); it runs both
whole and sampled (K of 4, 8, 16 or 32) and compares the speed-ups
``cycles(A) / cycles(B)``. A comparison is *reversed* when one says B is faster
by more than ``--margin`` and the other slower by more than that; printed: how
many were reversed, how many changed side of the margin and whether their runs
were flagged, the largest estimate error against its whole run and the largest
gap between the two speed-ups, each over all runs and over those not flagged,
and how many sampled runs the run summary flags (the copies' or the
half-samples' estimates more than 1 % either side, or two arrays). Refused knob values and cases
where no step could be sampled are skipped. Figures go in the notes, not in tests.
"""

import multiprocessing as mp
import os
import random
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path[:0] = [ROOT, HERE]

import sim  # noqa: E402
from grain_conclusions import comparison_parser, disagreement  # noqa: E402  (one rule for what a disagreement is)
from sim.errors import InputError  # noqa: E402
from sim.result import prefill_sample_noisy  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402

# hbm2_stack and server keep these prompts' K/V resident below 8k tokens (nothing to sample)
CONFIGS = ("mid", "mid", "server", "edge")
KNOBS = ("dot.multipliers", "buffers.key_kib", "buffers.value_kib", "dram.channels", "softmax.lanes", "dot.arrays")


# --paced: mid with its array near the softmax unit's pace (head width 64: 2,048 multipliers do a
# block's q.K and p.V in the time 32 softmax lanes take for its scores)
PACED_MULTIPLIERS = (1664, 1792, 1920, 2048, 2176, 2304)


def draw(seed, case, ragged=False, paced=False):
    """``(config, trace arguments, K, knob, factor)`` for one case; ``ragged`` moves the prompt
    by up to 200 tokens either way (drawn after the rest, so the other draws stay the same);
    ``paced`` draws mid with the array near the softmax's pace on a compute-bound prompt, the
    config as ``(name, overrides)``."""
    if paced:
        r = random.Random(f"paced:{seed}:{case}")
        name = ("mid", {"dot.multipliers": r.choice(PACED_MULTIPLIERS)})
        heads = r.choice([16, 32])
        shape = dict(layers=1, heads=heads, kv_heads=heads // 4, head_dim=64,
                     prompt_tokens=r.choice([2048, 3072, 4096]), decode_steps=0, causal=True,
                     seed=r.randrange(1000))
        return name, shape, r.choice([4, 8, 16]), r.choice(KNOBS[:-1]), r.choice([0.5, 2])
    r = random.Random(f"prefill:{seed}:{case}")
    name = r.choice(CONFIGS)
    heads = r.choice([8, 16, 32])
    prompts = {"edge": [1024, 1536, 2048], "server": [8192, 12288]}.get(name, [1024, 2048, 4096, 6144])
    shape = dict(layers=1 if name == "edge" else r.choice([1, 2]), heads=heads,
                 kv_heads=r.choice([heads, max(1, heads // 4)]), head_dim=r.choice([64, 128]),
                 prompt_tokens=r.choice(prompts), decode_steps=r.choice([0, 4]), causal=True,
                 token_keep=r.choice([1.0, 1.0, 0.8]), seed=r.randrange(1000))
    out = name, shape, r.choice([4, 8, 16, 32]), r.choice(KNOBS), r.choice([0.5, 2])
    if ragged:   # rows that are not a whole number of query blocks
        shape["prompt_tokens"] += r.randrange(-200, 201)
    return out


def _other(a, key, factor):
    section, knob = key.split(".")
    old = getattr(getattr(a, section), knob)
    if key == "dot.arrays":
        return a.with_overrides({key: "separate" if old == "shared" else "shared"}, "bench")
    return a.with_overrides({key: type(old)(old * factor)}, "bench")


def compare(seed, case, ragged=False, paced=False):
    """``(case, what, speed-up whole, speed-up sampled, worst error, flagged, worst unflagged
    error)`` or ``(case, None, why)``."""
    name, shape, k, key, factor = draw(seed, case, ragged, paced)
    try:
        trace = synth_trace(**shape)
        if isinstance(name, tuple):
            a = sim.load_arch(name[0]).with_overrides(name[1], "bench")
            name = f"{name[0]} {' '.join(f'{p}={v}' for p, v in name[1].items())}"
        else:
            a = sim.load_arch(name)
        b = _other(a, key, factor)
        whole, est, flagged, loose = [], [], 0, 0.0
        for arch in (a, b):
            w = sim.simulate(arch, trace, keep_intervals=False).to_dict()["cycles"]
            doc = sim.simulate(arch, trace, keep_intervals=False, sample_prefill=k).to_dict()
            ps = doc["prefill_sample"]
            if not ps["sampled_steps"]:
                return case, None, "no step sampled"
            whole.append(w)
            est.append(ps["cycles"])
            noisy = prefill_sample_noisy(doc)
            flagged += noisy
            if not noisy:
                loose = max(loose, abs(ps["cycles"] / w - 1))
    except InputError as e:
        return case, None, str(e).splitlines()[0]
    err = max(abs(e / w - 1) for e, w in zip(est, whole))
    what = f"{name}, {shape['layers']} x {shape['prompt_tokens']} tokens, K {k}: {key} " + (
        "flipped" if key == "dot.arrays" else f"x{factor}")
    return case, what, whole[0] / whole[1], est[0] / est[1], err, flagged, loose


def _work(args):
    return compare(*args)


def main():
    ap = comparison_parser(__doc__, 40, 1)
    ap.add_argument("--ragged", action="store_true",
                    help="prompts up to 200 tokens off the round lengths drawn (a short last query block)")
    ap.add_argument("--paced", action="store_true",
                    help="mid with its array near the softmax unit's pace (1,664 to 2,304 multipliers, head width "
                         "64), compute-bound prompts")
    args = ap.parse_args()
    t0 = time.perf_counter()
    m = args.margin
    bad, skipped, flagged, done, loose_over = [], 0, 0, 0, 0
    worst_err, worst_loose, worst_gap, worst_clean_gap = (0.0, None), (0.0, None), (0.0, None), (0.0, None)
    with mp.get_context("fork").Pool(args.jobs, maxtasksperchild=10) as pool:
        for out in pool.imap_unordered(_work, [(args.seed, i, args.ragged, args.paced) for i in range(args.cases)]):
            if out[1] is None:
                skipped += 1
                continue
            case, what, full, samp, err, flag, loose = out
            done += 1
            flagged += flag
            loose_over += loose > 0.01
            if err > worst_err[0]:
                worst_err = (err, out)
            if loose > worst_loose[0]:
                worst_loose = (loose, out)
            gap = abs(samp - full) / full
            if gap > worst_gap[0]:
                worst_gap = (gap, out)
            if not flag and gap > worst_clean_gap[0]:
                worst_clean_gap = (gap, out)
            kind = disagreement(full, samp, m)
            if kind:
                bad.append((kind, out))
            print(f"  case {case}: {what}: speed-up {full:.4f} whole, {samp:.4f} sampled, error up to "
                  f"{err:.2%}, {flag} of 2 flagged{', ' + kind if kind else ''}", flush=True)
    wall = time.perf_counter() - t0
    print(f"{done} comparisons (seed {args.seed}, {skipped} skipped) on {args.jobs} processes in {wall:.0f} s; "
          f"margin {m:.0%}")
    for kind in ("reversed", "across"):
        outs = [o for k, o in bad if k == kind]
        print(f"  {kind}: {len(outs)} ({sum(1 for o in outs if o[5])} with a flagged run)")
    print(f"  sampled runs flagged: {flagged} of {2 * done}; comparisons with a run not flagged more than 1 % "
          f"off: {loose_over}")
    for label, (value, out) in (("largest estimate error", worst_err),
                                ("largest error of a run not flagged", worst_loose),
                                ("largest gap between the speed-ups", worst_gap),
                                ("largest gap where neither run was flagged", worst_clean_gap)):
        if out is not None:
            print(f"  {label}: {value:.2%} (case {out[0]}, {out[1]})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
