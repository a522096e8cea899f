"""Replay thousands of random valid workloads; every run must end, and end right.

    python bench/engine_fuzz.py                      # 2,000 cases, 2 worker processes
    python bench/engine_fuzz.py --cases 500 --timeout 60 --jobs 2 --seed 0
    python bench/engine_fuzz.py --grain              # and each case again at 16 rows: the grain is a speed knob
    python bench/engine_fuzz.py --replay '{"seed": 0, "case": 17}'   # one case again, in this process

The suite's property tests draw a few dozen cases each; this draws thousands,
from a wider space: a random version-2 trace (prefill and decode, grouped K/V
heads, batches, causal prefill, windows, cache writes, token/head/value
pruning, least-significant-plane flags) on a random datapath (a bundled config,
or ``mid`` with its clock, channels, array, buffers, softmax width, fetch limits,
issue window and grain redrawn, and half the time its memory model, scheduler,
page policy, layout, steering and write queue). Each case runs in a worker
with an alarm after ``--timeout`` s. Outcomes:

* ``ok``: the run ended and passed every check below;
* ``refused``: the config's checks refused the drawn knobs (not a fault of the
  engine: the draw should not make such combinations);
* ``hang``: the alarm rang (a run that never ends is an engine fault; the
  engine's own no-progress checks should have raised first);
* ``stalled``: ``SimulationStalled`` (the engine gave up: also a fault, on
  valid input);
* ``error``: any other exception;
* ``wrong_work``, ``below_floor``, ``bad_states``, ``bad_estimate``: the checks
  failed;
* ``grain_moves`` (``--grain`` only): the case at its drawn grain (256 rows at
  least) and at 16 rows differ by more than 2 % in cycles or 2 points in a
  unit's busy fraction, the tolerance of the grain issue's own checks. On the
  banked model such a case is run at both grains again with refresh off, and
  the line says whether the move persists (the summary counts those that do
  not: a small difference upstream that a refresh window turned into a large one).

The checks are those of ``tests/test_workload_v2_reference.py``, whose brute
force reads only the trace's fields (no call into the engine's planning code):
the reported q.K, LSB-recompute and p.V MACs and softmax elements equal the
trace's work; DRAM reads are at least the bytes that must be read; cycles are
at least the roofline bound (Williams, Waterman and Patterson, CACM 2009),
max(work / peak compute, bytes / peak bandwidth), and at least the result's own
roofline bound; each unit's busy, starved, blocked and idle fractions sum to one
and its stall causes to starved plus blocked (common practice, no source); the
run budget's upper estimate of the transactions (``sim.budget``) is not exceeded. A
failing case prints the line that replays it. The contract: every case
``ok``; with ``--grain``, DEVELOPERS.md says what a run still finds and why.
"""

import argparse
import collections
import json
import multiprocessing as mp
import os
import random
import signal
import sys
import time

import yaml

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path[:0] = [ROOT, os.path.join(ROOT, "tests")]   # this checkout's package, not an installed one

import sim  # noqa: E402
from sim import budget  # noqa: E402
from sim.errors import InputError, SimulationStalled  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402
from test_workload_v2_reference import roofline  # noqa: E402

CONFIGS = os.path.join(ROOT, "arch_configs")
BUNDLED = ("edge", "mid", "server", "hbm2_stack")
FINE, GRAIN_TOL, GRAIN_POINTS = 16, 0.02, 2.0   # issue's grain check: 16 rows, 2 %, 2 points


class _Alarm(Exception):
    pass


def _ring(*_):
    raise _Alarm()


def draw(seed, case):
    """The case numbered ``case`` of the stream ``seed``: (config name, overrides, synth
    arguments). The same pair always gives the same case."""
    r = random.Random(f"{seed}:{case}")
    name = r.choice(BUNDLED + ("mid",))   # the last: mid with its knobs redrawn
    over = {"engine.grain_rows": r.choice([16, 16, 64, 256, 1024]),
            "fetch.issue_window": r.choice([0, 1, 3, 8, 16, 32])}
    if name == "mid" and r.random() < 0.6:
        lanes = r.choice([16, 32, 64])
        over.update({
            "clock_ghz": r.choice([0.5, 1.0, 2.0]),
            "dram.channels": r.choice([1, 2, 4, 8]),
            "dram.channel_gbps": r.choice([8.5, 12.8, 25.6, 32.0]),
            "dot.lanes": lanes,
            "dot.multipliers": lanes * r.choice([2, 4, 16, 32]),
            "dot.arrays": r.choice(["shared", "separate"]),
            "dot.tile_rows": 16,
            "buffers.query_kib": r.choice([1, 2, 4, 64]),
            "buffers.key_kib": r.choice([4, 8, 16, 32, 256]),
            "buffers.value_kib": r.choice([4, 8, 16, 32, 256]),
            "softmax.lanes": r.choice([4, 16, 64]),
            "dot.lookahead": r.choice([1, 4, 16]),
            "fetch.request_bytes": r.choice([256, 1024, 4096]),
            "fetch.inflight": r.choice([4, 32, 128]),
            "fetch.reorder_entries": r.choice([2, 16, 64]),
            "dram.queue_depth": r.choice([4, 32]),
        })
        if r.random() < 0.5:   # the memory model's policies
            over.update({
                "dram.model": r.choice(["banked"] * 4 + ["fixed-latency"]),
                "dram.scheduler": r.choice(["fcfs", "row_hits_first"]),
                "dram.page_policy": r.choice(["open", "close"]),
                "dram.layout": r.choice(["head_regions", "head_planes", "heads_interleaved"]),
                "dram.steering": r.choice(["address"] * 3 + ["first_free"]),
                "dram.write_queue": r.choice([8, 64]),
            })
    heads = r.choice([1, 2, 4, 6, 8])
    shape = dict(
        prompt_tokens=r.choice([8, 16, 70, 200, 333]), decode_steps=r.randint(0, 4),
        layers=r.randint(1, 2), heads=heads,
        kv_heads=r.choice([k for k in (1, 2, 4, heads) if heads % k == 0]),
        head_dim=r.choice([32, 64, 128]), batch=r.randint(1, 3),
        causal=r.random() < 0.5, window=r.choice([0, 0, 1, 8, 50]), writes=r.random() < 0.5,
        token_keep=r.choice([1.0, 0.7, 0.3]), head_keep=r.choice([1.0, 0.5]),
        value_keep=r.choice([1.0, 0.4]), lsb_fraction=r.choice([0.0, 0.3, 1.0]),
        lsb_fraction_rows=r.choice([0.2, 1.0]), seed=r.randint(0, 9))
    return name, over, shape


def check(doc, trace, arch):
    """The outcome of a finished run: ``ok`` or what it got wrong."""
    (qk, lsb, pv, softmax, need), floor = roofline(trace, doc["arch"]["config"])
    got = doc["compute"]
    if (got["macs_qk"], got["macs_lsb_recompute"], got["macs_pv"], got["softmax_elements"]) != (qk, lsb, pv, softmax):
        return "wrong_work", (f"MACs/softmax {got['macs_qk']}/{got['macs_lsb_recompute']}/{got['macs_pv']}/"
                              f"{got['softmax_elements']}, trace asks {qk}/{lsb}/{pv}/{softmax}")
    if doc["dram"]["read_bytes"] < need:
        return "below_floor", f"read {doc['dram']['read_bytes']} bytes, must read {need:.0f}"
    if doc["cycles"] < floor * (1 - 1e-9):
        return "below_floor", f"{doc['cycles']} cycles, roofline bound {floor:.0f}"
    estimate = budget.transactions(arch, trace)
    if doc["fetch"]["transactions"] > estimate:
        return "bad_estimate", (f"{doc['fetch']['transactions']} transactions issued, the run budget's upper "
                                f"estimate {estimate}")
    own = doc["bounds"]["roofline_cycles"]
    if doc["cycles"] < own * (1 - 1e-9):
        return "below_floor", f"{doc['cycles']} cycles, the result's own roofline bound {own:.0f}"
    for unit, u in doc["units"].items():
        total = u["busy"] + u["starved"] + u["blocked"] + u["idle"]
        stalls = sum(u["stalls"].values())
        negative = min(u["stalls"].values(), default=0) < -1e-12
        if abs(total - 1) > 1e-6 or abs(stalls - u["starved"] - u["blocked"]) > 1e-6 or negative:
            return "bad_states", (f"{unit}: busy+starved+blocked+idle = {total:.9f}, stalls sum to {stalls:.9f} "
                                  f"against starved+blocked {u['starved'] + u['blocked']:.9f}")
    return "ok", ""


def grain_check(doc, fine):
    """The grain is a speed knob: cycles within GRAIN_TOL of the fine grain's, each unit's
    busy fraction within GRAIN_POINTS points."""
    a, b = doc["cycles"], fine["cycles"]
    if abs(a - b) > GRAIN_TOL * b:
        return "grain_moves", (f"cycles {a} at grain {doc['engine']['grain_rows']}, {b} at {FINE} rows "
                               f"({(a - b) / b:+.1%})")
    for unit, u in doc["units"].items():
        d = u["busy"] - fine["units"][unit]["busy"]
        if abs(d) > GRAIN_POINTS / 100:
            return "grain_moves", f"{unit} busy {u['busy']:.3f} against {fine['units'][unit]['busy']:.3f} at {FINE} rows"
    return "ok", ""


NO_REFRESH = {"dram.t_rfc_ns": 0.0, "dram.t_rfc_pb_ns": 0.0}
SMOOTHED = "; within the tolerance without refresh"


def without_refresh(arch, trace):
    """The grain check again with refresh off. A small difference upstream can put a burst on
    the other side of a refresh window and cost the run a whole tRFC; which cases move only
    that way says where to look (DEVELOPERS.md)."""
    quiet = arch.with_overrides(NO_REFRESH)
    docs = [sim.simulate(quiet.with_overrides({"engine.grain_rows": g}), trace, keep_intervals=False).to_dict()
            for g in (arch.engine.grain_rows, FINE)]
    outcome, detail = grain_check(*docs)
    return SMOOTHED if outcome == "ok" else f"; without refresh too: {detail}"


def run_case(seed, case, timeout, grain=False, fixed=None):
    """(case, outcome, detail, seconds) of one case, in this process; with ``grain``, the
    case at its drawn grain (at least 256 rows) against FINE rows; ``fixed``: config values
    set in every case, over the drawn ones."""
    name, over, shape = draw(seed, case)
    over.update(fixed or {})
    if grain:
        over["engine.grain_rows"] = max(256, over["engine.grain_rows"])
    t0 = time.perf_counter()
    old = signal.signal(signal.SIGALRM, _ring)
    signal.alarm(timeout)
    try:
        trace = synth_trace(**shape)
        arch = sim.load_arch(os.path.join(CONFIGS, f"{name}.yaml")).with_overrides(over)
        doc = sim.simulate(arch, trace, keep_intervals=False).to_dict()
        outcome, detail = check(doc, trace, arch)
        if grain and outcome == "ok":
            fine = sim.simulate(arch.with_overrides({"engine.grain_rows": FINE}), trace, keep_intervals=False).to_dict()
            outcome, detail = grain_check(doc, fine)
            if outcome == "grain_moves" and arch.dram.model == "banked":
                detail += without_refresh(arch, trace)
        signal.alarm(0)
    except _Alarm:
        outcome, detail = "hang", f"no end after {timeout} s"
    except SimulationStalled as e:
        outcome, detail = "stalled", str(e)
    except InputError as e:   # a drawn combination the config's checks refuse: the draw's fault
        outcome, detail = "refused", str(e)
    except Exception as e:   # noqa: BLE001 -- any other fault is an outcome to report
        outcome, detail = "error", f"{type(e).__name__}: {e}"
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
    return case, outcome, detail, time.perf_counter() - t0


def _work(args):
    return run_case(*args)


def parse_setting(text):
    """``KEY=VALUE`` of ``--set``: the value read as YAML (a number, a word)."""
    key, sep, value = text.partition("=")
    if not sep or not key:
        raise SystemExit(f"--set {text!r}: expected KEY=VALUE, e.g. dram.refresh_postpone=8")
    return key, yaml.safe_load(value)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cases", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--timeout", type=int, default=60, help="seconds a case may take")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--grain", action="store_true",
                    help=f"also run each case at {FINE} rows: cycles within 2 %%, busy within 2 points")
    ap.add_argument("--replay", help='one case again: \'{"seed": S, "case": N}\'')
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="a config value every case takes, over the drawn one (e.g. dram.refresh_postpone=8)")
    args = ap.parse_args()
    fixed = dict(parse_setting(s) for s in args.set)
    if args.replay:
        r = json.loads(args.replay)
        print(draw(r["seed"], r["case"]))
        print(run_case(r["seed"], r["case"], args.timeout, args.grain, fixed)[1:])
        return 0
    t0 = time.perf_counter()
    counts = collections.Counter()
    smoothed = 0
    slow = []
    jobs = [(args.seed, i, args.timeout, args.grain, fixed) for i in range(args.cases)]
    sets = "".join(f" --set {s}" for s in args.set)
    replay = f"python bench/engine_fuzz.py{' --grain' * args.grain}{sets} --replay"
    with mp.get_context("fork").Pool(args.jobs, maxtasksperchild=200) as pool:
        results = pool.imap_unordered(_work, jobs)
        for _ in jobs:
            try:
                # the alarm interrupts Python code only: a worker stuck in a compiled loop
                # answers nothing, and the cases not done count as hangs
                case, outcome, detail, secs = results.next(timeout=2 * args.timeout + 30)
            except mp.TimeoutError:
                left = args.cases - sum(counts.values())
                counts["hang"] += left
                print(f"hang: no worker answered for {2 * args.timeout + 30} s; {left} cases not done", flush=True)
                pool.terminate()
                break
            counts[outcome] += 1
            smoothed += outcome == "grain_moves" and detail.endswith(SMOOTHED)
            slow.append((secs, case))
            if outcome != "ok":
                print(f"{outcome}: {detail}\n  replay: {replay} '{{\"seed\": {args.seed}, \"case\": {case}}}'",
                      flush=True)
    wall = time.perf_counter() - t0
    slow.sort(reverse=True)
    print(f"{args.cases} cases (seed {args.seed}) on {args.jobs} processes in {wall:.0f} s; "
          f"slowest cases {', '.join(f'{c} ({s:.1f} s)' for s, c in slow[:3])}")
    outcomes = ("ok", "refused", "hang", "stalled", "error", "wrong_work", "below_floor", "bad_states",
                "bad_estimate")
    for outcome in outcomes + ("grain_moves",) * args.grain:
        print(f"  {outcome:12s} {counts[outcome]:6d}")
    if args.grain:
        print(f"    of which within the tolerance without refresh: {smoothed}")
    return 0 if counts["ok"] + counts["refused"] == args.cases else 1


if __name__ == "__main__":
    sys.exit(main())
