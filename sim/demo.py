"""``attnsim demo``: the bundled workloads on the bundled datapaths, one command.

Replays the bundled traces -- the captured ones (``traces/captured_*.npz``,
recorded from a real encoder) when present, seeded synthetic ones otherwise --
on every bundled datapath (``arch_configs/{edge,mid,server,hbm2_stack}.yaml``),
prints a comparison table and writes a full report to ``reports/demo/``.
Runs are spread over the machine's cores (at most two worker processes; the
pairs are independent). The bundled files come from the checkout or, after a
normal install, from the package data (:mod:`sim.bundled`).
"""

import glob
import json
import os
import sys
import time
import traceback

from . import bundled
from .report.phases import PHASES

CONFIGS = ("edge", "mid", "server", "hbm2_stack")
TIMELINE_CONFIG = "mid"
SENSITIVITY = "fastest"   # which runs the demo measures sensitivity for (see sim.report.sensitivity)
REPORT_TITLE = "attnsim demo: bundled traces on bundled datapaths"
PHASE_HEAD = ("Where a run starts in the DRAM refresh schedule is arbitrary (dram.refresh_phase). Each "
              "trace's two fastest datapaths over phases " + ", ".join(f"{p:g}" for p in (0.0,) + PHASES) +
              "; a lead smaller than their spread may be where the refresh windows fell, and the "
              "report calls such runs tied")


def repo_root():
    """The folder holding the bundled ``arch_configs/`` and ``traces/`` (a checkout or the package data)."""
    return bundled.root() or os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def default_out_dir():
    """``reports/demo`` in the checkout when run from one, else under the current folder."""
    checkout = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    if bundled.root() == checkout:
        return os.path.join(checkout, "reports", "demo")
    return os.path.join(os.getcwd(), "reports", "demo")


def pick_traces(root):
    """``(kind, [(name, path or None)])``: captured traces if bundled, else synthetic ones."""
    captured = sorted(glob.glob(os.path.join(root, "traces", "captured_*.npz")))
    if captured:
        return "captured", [(os.path.basename(p)[:-4], p) for p in captured]
    synth = [os.path.join(root, "traces", n) for n in ("synth_prefill.npz", "synth_decode.npz")]
    if all(os.path.exists(p) for p in synth):
        return "synthetic", [(os.path.basename(p)[:-4], p) for p in synth]
    return "synthetic", [("synth_prefill", None), ("synth_decode", None)]


def _synth(name):
    from .trace.synth import synth_trace

    # our own demo workloads, generated when no bundled trace is at hand
    if name == "synth_prefill":
        return synth_trace(prompt_tokens=256, decode_steps=0, layers=4, heads=8, head_dim=64,
                           token_keep=0.8, head_keep=0.9, seed=1, name=name)
    return synth_trace(prompt_tokens=256, decode_steps=32, layers=4, heads=8, head_dim=64, token_keep=0.8,
                       value_keep=0.5, lsb_fraction=0.2, include_prefill=False, seed=2, name=name)


def _one(job):
    """Worker: simulate one (config, trace) pair; never raises."""
    config_path, trace_name, trace_path = job
    t0 = time.perf_counter()
    try:
        from .arch import load_arch
        from .run import simulate
        from .trace.files import load_trace

        trace = load_trace(trace_path) if trace_path else _synth(trace_name)
        res = simulate(load_arch(config_path), trace, keep_intervals=True)
        return {"ok": True, "doc": res.to_dict(), "intervals": res.intervals, "trace_path": trace_path,
                "seconds": time.perf_counter() - t0}
    except Exception as exc:  # a failing pair is reported, the others still run
        return {"ok": False, "error": f"{type(exc).__name__}: {exc}", "detail": traceback.format_exc(),
                "config": config_path, "trace": trace_name, "seconds": time.perf_counter() - t0}


def run_pairs(jobs, workers, progress=False):
    """Results of ``jobs`` in order; ``progress`` draws a bar on stderr (a terminal or a notebook)."""
    bar = None
    if progress:
        from tqdm.auto import tqdm
        bar = tqdm(total=len(jobs), desc="attnsim demo", unit="run", file=sys.stderr, leave=False)
    try:
        if workers <= 1 or len(jobs) <= 1:
            out = []
            for j in jobs:
                out.append(_one(j))
                if bar is not None:
                    bar.update()
            return out
        import concurrent.futures as cf
        import multiprocessing as mp

        ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
        with cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            futures = [pool.submit(_one, j) for j in jobs]
            if bar is not None:
                for _f in cf.as_completed(futures):
                    bar.update()
            return [f.result() for f in futures]
    finally:
        if bar is not None:
            bar.close()


def terminal_table(runs):
    """The comparison as fixed-width text, one line per run, grouped by trace (numbers as the report shows them)."""
    from .formats import value
    from .limits import verdict_of
    from .report.verdict import limiting_unit

    head = (f"{'trace':<26} {'config':<11} {'latency us':>12} {'cycles':>12} {'limited by':<26} "
            f"{'busy %':>6} {'energy uJ':>11} {'area mm^2':>9}")
    lines = [head, "-" * len(head)]
    prev = None
    for r in sorted(runs, key=lambda r: (r.trace_label, r.doc["seconds"])):
        d = r.doc
        lim = limiting_unit(d)
        if prev is not None and r.trace_label != prev:
            lines.append("")
        prev = r.trace_label
        lines.append(f"{r.trace_label:<26} {r.config_label:<11} {value(d['seconds'], 'latency'):>12} "
                     f"{value(d['cycles'], 'cycles'):>12} {verdict_of(d)['label']:<26} "
                     f"{value(d['units'][lim]['busy'], 'share'):>6} {value(d['energy']['total_pj'], 'energy'):>11} "
                     f"{value(d['area']['total_mm2'], 'area'):>9}")
    return "\n".join(lines)


def phase_lines(runs):
    """The refresh-phase spread of the runs that have it, a line each (read under :data:`PHASE_HEAD`)."""
    from .formats import show

    done = sorted((r for r in runs if r.phase_range), key=lambda r: (r.trace_label, r.doc["seconds"]))
    return [f"{r.trace_label} on {r.config_label}: {r.phase_range[0]:,} to {r.phase_range[1]:,} cycles "
            f"({r.phase_spread:.1%} apart), mean {show(r.phase_mean_s, 'latency')}" for r in done]


def run_demo(out_dir=None, workers=None, configs=CONFIGS, echo=print, force=False, progress=False,
             phase_notes=None):
    """Run the demo; return ``(runs, failed, out_dir, seconds)``: seconds of simulation, as the report states.
    ``phase_notes``: a list to receive the refresh-phase lines (:func:`phase_lines`)."""
    from .report.build import build_report
    from .report.inputs import ReportError, Run

    t0 = time.perf_counter()
    root = repo_root()
    out_dir = out_dir or default_out_dir()
    _check_own_folder(out_dir, ReportError, force)
    kind, traces = pick_traces(root)
    cfgs = [os.path.join(root, "arch_configs", f"{c}.yaml") for c in configs]
    missing = [c for c in cfgs if not os.path.exists(c)]
    if missing:
        raise ReportError(missing[0], "<file>", missing[0], "bundled config not found (a broken install?)")
    jobs = [(c, name, path) for name, path in traces for c in cfgs]
    workers = workers or min(2, os.cpu_count() or 1)
    echo(f"attnsim demo: {len(traces)} {kind} traces x {len(cfgs)} datapaths = {len(jobs)} runs "
         f"on {workers} worker{'s' if workers > 1 else ''}")
    results = run_pairs(jobs, workers, progress=progress)
    runs, failed = [], []
    for job, res in zip(jobs, results):
        if res["ok"]:
            runs.append(Run(res["doc"], f"demo: {os.path.basename(job[0])} x {job[1]}",
                            trace_path=res["trace_path"], intervals=res["intervals"]))
        else:
            failed.append({"origin": f"demo: {os.path.basename(job[0])} x {job[1]}", "trace": job[1],
                           "point": {"config": os.path.basename(job[0])}, "error": res["error"]})
    sim_s = time.perf_counter() - t0
    if not runs:
        raise RuntimeError("every demo run failed: " + "; ".join(f["error"] for f in failed))
    # where the runs start in the refresh schedule, for each trace's two fastest datapaths
    from .report import phases as P
    from .report import sensitivity as S
    from .report.inputs import label_runs

    label_runs(runs)
    t1 = time.perf_counter()
    P.measure(runs, jobs=workers)
    phases = phase_lines(runs)
    phase_s = time.perf_counter() - t1
    if phase_notes is not None:
        phase_notes.extend(phases)
    # what to change, measured on the fastest datapath of each trace
    t1 = time.perf_counter()
    table, sens_notes = S.measure(S.select(runs, SENSITIVITY), jobs=workers, phases=P.AUTO_PHASES)
    sens_s = time.perf_counter() - t1
    timeline = next((r for r in runs if r.doc["arch"]["name"] == TIMELINE_CONFIG), runs[0])
    build_report(runs, out_dir, failed=failed, force=True, timeline_run=timeline, title=REPORT_TITLE,
                 notes=[f"Traces: {kind} ({', '.join(n for n, _ in traces)}); datapaths: "
                        f"{', '.join(configs)}. Simulation took {sim_s:.1f} s of wall time; the refresh-phase "
                        f"reruns {phase_s:.1f} s; the sensitivity reruns ({SENSITIVITY} run of each trace) "
                        f"{sens_s:.1f} s."] + ([f"{PHASE_HEAD}: {'; '.join(phases)}."] if phases else [])
                 + sens_notes,
                 inputs=[p or n for n, p in traces] + cfgs, sensitivity=table)
    return runs, failed, out_dir, sim_s


def _check_own_folder(out_dir, error, force=False):
    """The demo replaces its own previous output (the files its manifest lists), nothing else."""
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise error(out_dir, "--out", out_dir, "is a file; expected a folder")
    if not os.path.exists(out_dir):
        up = os.path.dirname(os.path.abspath(out_dir))
        while not os.path.exists(up):
            up = os.path.dirname(up)
        if not os.path.isdir(up):
            raise error(out_dir, "--out", out_dir, f"{up} is a file; expected a folder")
        return
    if not os.listdir(out_dir) or force:
        return
    man = os.path.join(out_dir, "manifest.json")
    try:
        with open(man, encoding="utf-8") as fh:
            doc = json.load(fh)
        ours = set(doc.get("files", [])) if doc.get("format") == "attnsim-report" else None
    except (OSError, ValueError, AttributeError):
        ours = None
    if ours is None:
        raise error(out_dir, "--out", out_dir, "exists and holds something other than an attnsim report; "
                    "move it away or pass --force")
    ours |= {"manifest.json"}
    foreign = []
    for dirpath, _dirs, files in os.walk(out_dir):
        for f in files:
            rel = os.path.relpath(os.path.join(dirpath, f), out_dir).replace(os.sep, "/")
            if rel not in ours:
                foreign.append(rel)
    if foreign:
        raise error(out_dir, "--out", out_dir, f"holds files the last demo did not write ({', '.join(sorted(foreign)[:3])}"
                    f"{', ...' if len(foreign) > 3 else ''}); move them away or pass --force")


def main_demo(out_dir=None, force=False, quiet=False):
    """Entry point of ``attnsim demo``; returns the exit status."""
    def notice(text):
        if not quiet:
            print(text, file=sys.stderr)

    t0 = time.perf_counter()
    phases = []
    runs, failed, out_dir, secs = run_demo(out_dir=out_dir, echo=notice, force=force,
                                           progress=not quiet and sys.stderr.isatty(), phase_notes=phases)
    total = time.perf_counter() - t0
    if not quiet:
        print(terminal_table(runs))
        if phases:
            print(f"\n{PHASE_HEAD}:")
            for ln in phases:
                print(f"  {ln}")
    for f in failed:
        print(f"attnsim: demo run failed: {f['origin']}: {f['error']}", file=sys.stderr)
    rel = os.path.relpath(out_dir)
    if not quiet:
        print(f"\n{len(runs)} runs simulated in {secs:.1f} s of wall time ({total:.1f} s with the report). "
              f"Report: {os.path.join(rel, 'report.html')} (also report.md, figures/, data/*.csv)")
    return 1 if failed else 0
