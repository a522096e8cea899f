"""Fuzz the command line with thousands of bad inputs; print what happened, per category.

    python bench/fuzz.py                    # 3,300 cases (300 per category), 2 worker processes
    python bench/fuzz.py --per-category 50 --timeout 20 --jobs 2 --seed 0

Cases come from ``tests/fuzz_inputs.py`` (configs, extends, presets, YAML and
npz traces, policies, sweep specs, ``--set``, output paths, command-line
misuse, files of the wrong kind). Each runs in-process in a worker
(``sim.cli.main``) with an alarm after ``--timeout`` s; a worker that does not
answer ``--timeout`` + 15 s later is killed and the case counted as a hang.
Workers run under a 6 GiB address-space limit, so a runaway allocation shows
as a MemoryError traceback instead of taking the machine down.

Outcomes: ``refused`` (exit 2, one ``attnsim: error:`` line), ``accepted``
(exit 0; split into inputs built to be invalid and inputs that may be valid),
``traceback``, ``hang``, ``multiline`` (exit 2 with more than one line),
``other_exit``, and ``stray_write`` (a refused command changed a file).
The contract: zero tracebacks, hangs, multi-line errors and stray writes.
"""

import argparse
import collections
import json
import os
import select
import shutil
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path[:0] = [ROOT, os.path.join(ROOT, "tests")]   # this checkout's package, not an installed one

MEMORY_LIMIT = 6 << 30


def _place(detail):
    """Where a traceback ended: the last frame inside the package, and the exception type."""
    lines = detail.strip().splitlines()
    exc, where = "?", "?"
    for i, ln in enumerate(lines):
        s = ln.strip()
        if s.startswith('File "') and "/sim/" in s:
            path = s.split('"')[1]
            where = path[path.rfind("/sim/") + 1:] + ":" + s.split("line ")[1].split(",")[0]
        elif i and ln and not ln[0].isspace() and not ln.startswith(("Traceback", "During handling")):
            exc = ln.split(":", 1)[0]
    return f"{where} {exc}"


def worker(timeout):
    """Read ``category seed`` lines on stdin; answer one JSON line each."""
    import resource

    resource.setrlimit(resource.RLIMIT_AS, (MEMORY_LIMIT, MEMORY_LIMIT))
    import fuzz_inputs as fz

    _warm_up(fz)
    scratch = tempfile.mkdtemp(prefix="attnsim-fuzz-")
    os.chdir(scratch)
    watched = [os.path.join(ROOT, "reports"), scratch]
    for line in sys.stdin:
        category, seed = line.split()
        folder = tempfile.mkdtemp(dir=scratch)
        try:
            case = fz.make_case(category, int(seed), folder)
            before = [fz.listing(w) for w in watched]
            t0 = time.perf_counter()
            outcome = fz.run_case(case, timeout)
            secs = time.perf_counter() - t0
            after = [fz.listing(w) for w in watched]
            kind = outcome.kind
            if kind == "refused" and any(b != a for b, a in zip(before, after)):
                kind = "stray_write"
            place = _place(outcome.detail) if kind == "traceback" else ""
            msg = {"category": category, "seed": int(seed), "kind": kind, "must_refuse": case.must_refuse,
                   "note": case.note, "seconds": secs, "place": place,
                   "err": outcome.err.strip().splitlines()[-1][:300] if outcome.err.strip() else ""}
        except BaseException as exc:  # noqa: BLE001 - a broken case maker is reported, not fatal
            msg = {"category": category, "seed": int(seed), "kind": "case_error", "must_refuse": True,
                   "note": f"{type(exc).__name__}: {exc}"[:300], "seconds": 0.0, "place": "", "err": ""}
        finally:
            shutil.rmtree(folder, ignore_errors=True)
        sys.stdout.write(json.dumps(msg) + "\n")
        sys.stdout.flush()
    shutil.rmtree(scratch, ignore_errors=True)


def _warm_up(fz):
    """Load the compiled memory-model loops once, so no case pays for it."""
    import contextlib
    import io

    with contextlib.redirect_stdout(io.StringIO()):
        fz.run_case(fz.Case("warm-up", 0, ["run", "--arch", fz.repo("arch_configs", "mid.yaml"), "--trace",
                                           fz.repo("traces", "demo_decode.yaml")], False, "warm-up"), 300)


class Worker:
    def __init__(self, timeout):
        self.timeout = timeout
        env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
        self.proc = subprocess.Popen([sys.executable, os.path.abspath(__file__), "--worker",
                                      "--timeout", str(timeout)], env=env,
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, bufsize=1)
        self.case = None
        self.sent = 0.0

    def send(self, case):
        self.case = case
        self.sent = time.monotonic()
        self.proc.stdin.write(f"{case[0]} {case[1]}\n")
        self.proc.stdin.flush()

    def kill(self):
        self.proc.kill()
        self.proc.wait()


def run_all(cases, jobs, timeout, log):
    results = []
    todo = list(cases)
    workers = [Worker(timeout) for _ in range(jobs)]
    hard = timeout + 15.0
    try:
        for w in workers:
            if todo:
                w.send(todo.pop(0))
        while any(w.case for w in workers):
            busy = {w.proc.stdout: w for w in workers if w.case}
            ready, _, _ = select.select(list(busy), [], [], 1.0)
            for fh in ready:
                w = busy[fh]
                line = fh.readline()
                if line:
                    res = json.loads(line)
                else:  # the worker died (killed by the kernel, a crash in compiled code)
                    res = {"category": w.case[0], "seed": w.case[1], "kind": "traceback", "must_refuse": True,
                           "note": "worker process died", "seconds": time.monotonic() - w.sent,
                           "place": f"worker died (exit {w.proc.poll()})", "err": ""}
                    w.kill()
                    workers[workers.index(w)] = w = Worker(timeout)
                results.append(res)
                log(res)
                w.case = None
                if todo:
                    w.send(todo.pop(0))
            now = time.monotonic()
            for i, w in enumerate(workers):
                if w.case and now - w.sent > hard:
                    res = {"category": w.case[0], "seed": w.case[1], "kind": "hang", "must_refuse": True,
                           "note": "no answer; worker killed", "seconds": now - w.sent, "place": "", "err": ""}
                    results.append(res)
                    log(res)
                    w.kill()
                    workers[i] = Worker(timeout)
                    if todo:
                        workers[i].send(todo.pop(0))
    finally:
        for w in workers:
            if w.proc.poll() is None:
                w.proc.stdin.close()   # the worker's loop ends and it removes its temporary files
                try:
                    w.proc.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    w.kill()
    return results


def table(results):
    import fuzz_inputs as fz

    cols = ["cases", "refused", "accepted_bad", "accepted_maybe", "traceback", "hang", "multiline",
            "other_exit", "stray_write", "case_error"]
    counts = collections.OrderedDict((c, collections.Counter()) for c in fz.CATEGORIES)
    for r in results:
        c = counts.setdefault(r["category"], collections.Counter())
        c["cases"] += 1
        k = r["kind"]
        if k == "accepted":
            k = "accepted_bad" if r["must_refuse"] else "accepted_maybe"
        c[k] += 1
    total = collections.Counter()
    lines = [f"{'category':<12}" + "".join(f"{c:>15}" for c in cols)]
    for cat, c in counts.items():
        total.update(c)
        lines.append(f"{cat:<12}" + "".join(f"{c[k]:>15,}" for k in cols))
    lines.append(f"{'total':<12}" + "".join(f"{total[k]:>15,}" for k in cols))
    return "\n".join(lines), total


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--per-category", type=int, default=300)
    ap.add_argument("--seed", type=int, default=0, help="first case seed")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--timeout", type=float, default=20.0, help="seconds per case before it counts as a hang")
    ap.add_argument("--categories", help="comma-separated subset")
    ap.add_argument("--log", help="write every case's outcome here (JSON lines)")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        return worker(args.timeout)
    import fuzz_inputs as fz

    cats = args.categories.split(",") if args.categories else list(fz.CATEGORIES)
    cases = [(c, s) for s in range(args.seed, args.seed + args.per_category) for c in cats]
    logfh = open(args.log, "w", encoding="utf-8") if args.log else None
    done = [0]
    t0 = time.perf_counter()

    def log(res):
        done[0] += 1
        if logfh:
            logfh.write(json.dumps(res) + "\n")
            logfh.flush()
        if done[0] % 100 == 0:
            print(f"  {done[0]:,}/{len(cases):,} cases, {time.perf_counter() - t0:.0f} s", file=sys.stderr)

    results = run_all(cases, args.jobs, args.timeout, log)
    text, total = table(results)
    print(f"attnsim fuzz: {len(results):,} cases, seeds {args.seed}..{args.seed + args.per_category - 1}, "
          f"timeout {args.timeout:g} s, {time.perf_counter() - t0:.0f} s wall")
    print(text)
    places = collections.Counter(r["place"] for r in results if r["kind"] == "traceback")
    if places:
        print(f"\ntracebacks in {len(places)} distinct places:")
        for p, n in places.most_common(40):
            print(f"  {n:5d}  {p}")
    bad = [r for r in results if r["kind"] in ("hang", "multiline", "stray_write", "other_exit", "case_error")
           or (r["kind"] == "accepted" and r["must_refuse"])]
    if bad:
        print("\nexamples of other failures:")
        shown = collections.Counter()
        for r in bad:
            key = (r["category"], r["kind"])
            if shown[key] < 3:
                shown[key] += 1
                print(f"  {r['category']}/{r['seed']} {r['kind']}: {r['note'][:100]} | {r['err'][:160]}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
