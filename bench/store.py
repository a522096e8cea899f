"""Store benchmark: a million sweep points written, then read back the ways a user reads them.

Sections (each runs in a fresh process, so its peak memory is its own):

* ``write``  -- append N synthetic records to a new store (``sim.sweep.store.Store``)
  in transactions of ``--batch`` records; time, records/s, database size,
  bytes per point, mean compressed record size;
* ``front``  -- each trace's Pareto front over cycles, energy and area, streamed
  from the table, and those points as a DataFrame (``Sweep.front_frame``);
* ``filter`` -- a filtered DataFrame (one trace, large arrays, cycles under a
  threshold), every column;
* ``narrow`` -- every point, five columns;
* ``docs``   -- 1,000 whole records read on demand by key;
* ``pareto`` -- the Pareto implementation at 2k / 30k / 1M random points (2 and 3
  objectives) against the O(n^2) loop the sweep used before (run up to
  ``--old-max`` points), with a check that both give the same front
  (``--sizes`` picks the numbers of points).

Peak memory is the process's peak resident set (``ru_maxrss``), printed with
the resident set right after imports so the part the section itself added shows.

Synthetic records: a real result document from one simulation (mid card, a
small synthetic decode trace) is the template; each point changes its knobs
(multipliers, key/value buffers, channels, softmax lanes, clock), and its
cycles, seconds, per-step and per-layer cycles, DRAM figures, unit fractions and
stalls, bounds, energy (every operation's pJ) and area follow seeded formulas
and noise. Text fields stay as in the template, so records compress somewhat
better than real ones; the ``write`` section also prints the size of the real
records of a 24-point sweep for comparison.

    python bench/store.py [--points 1000000] [--dir DIR] [--sections write,front,filter,narrow,docs,pareto]
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
sys.path.insert(0, ROOT)

import numpy as np  # noqa: E402

AXES = {"dot.multipliers": [128, 256, 512, 1024, 2048, 4096, 8192, 16384],
        "buffers.key_kib": [8, 16, 32, 48, 64, 96, 128, 192, 256, 512],
        "buffers.value_kib": [8, 16, 32, 48, 64, 96, 128, 192, 256, 512],
        "dram.channels": [1, 2, 4, 8, 16],
        "softmax.lanes": [8, 16, 32, 64, 128],
        "clock_ghz": [0.8, 1.0, 1.2, 1.5, 2.0]}          # 500,000 combinations per trace
TRACES = ("decode", "prefill")


def rss_mib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _current_rss_mib():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def template():
    """A real record: one simulation of a small decode trace on the mid card."""
    import sim
    from sim.trace.synth import synth_trace

    tr = synth_trace(prompt_tokens=256, decode_steps=32, layers=4, heads=4, head_dim=64,
                     token_keep=0.75, value_keep=0.5, lsb_fraction=0.1, seed=3, name="decode")
    arch = sim.load_arch(os.path.join(ROOT, "arch_configs", "mid.yaml"))
    doc = sim.simulate(arch, tr).to_dict()
    return {"key": "", "point": {}, "trace": "decode", "trace_path": "traces/decode.npz",
            "trace_digest": doc["trace"]["digest"], "simulator_version": doc["simulator"]["version"],
            "simulator_build": "bench", "status": "ok", "error": None, "config": doc["arch"]["config"],
            "result": doc}


def _knobs(i):
    """Point ``i``'s trace and axis values (mixed radix over the grid)."""
    point = {}
    rest = i // len(TRACES)
    for path, vals in AXES.items():
        rest, j = divmod(rest, len(vals))
        point[path] = vals[j]
    return TRACES[i % len(TRACES)], point


class Synth:
    """Builds synthetic records from the template, cheaply (shallow copies of what changes)."""

    def __init__(self, tpl, seed=1):
        self.tpl = tpl
        self.res = tpl["result"]
        self.rng = np.random.default_rng(seed)

    def record(self, i):
        rng = self.rng
        trace, point = _knobs(i)
        base, res = self.tpl["config"], self.res
        cfg = {**base, "clock_ghz": point["clock_ghz"],
               "dot": {**base["dot"], "multipliers": point["dot.multipliers"]},
               "buffers": {**base["buffers"], "key_kib": float(point["buffers.key_kib"]),
                           "value_kib": float(point["buffers.value_kib"])},
               "dram": {**base["dram"], "channels": point["dram.channels"]},
               "softmax": {**base["softmax"], "lanes": point["softmax.lanes"]}}
        mult, ch = point["dot.multipliers"], point["dram.channels"]
        kib = point["buffers.key_kib"] + point["buffers.value_kib"]
        compute = res["bounds"]["compute_cycles"] * 1024 / mult * (1.0 if trace == "decode" else 4.0)
        memory = res["bounds"]["memory_cycles"] * 4 / ch * (1 + 64 / kib) * point["clock_ghz"]
        cycles = int(max(compute, memory) * (1.05 + 0.3 * rng.random()))
        scale = cycles / res["cycles"]
        units = {}
        for name, u in res["units"].items():
            f = rng.dirichlet([4, 3, 1, 0.5])
            stalls = {c: float(v) * (0.5 + rng.random()) for c, v in u["stalls"].items()}
            units[name] = {"busy": float(f[0]), "starved": float(f[1]), "blocked": float(f[2]),
                           "idle": float(f[3]), "stalls": stalls}
        e_scale = (0.9 + 0.0002 * kib + 0.00001 * mult) * (0.95 + 0.1 * rng.random())
        ops = {k: {**v, "pj": v["pj"] * e_scale} for k, v in res["energy"]["operations"].items()}
        energy = {**res["energy"], "operations": ops, "total_pj": res["energy"]["total_pj"] * e_scale,
                  "units_pj": {k: v * e_scale for k, v in res["energy"]["units_pj"].items()}}
        area_total = 0.0012 * mult + 0.0057 * (kib + 16)
        area = {**res["area"], "total_mm2": area_total}
        steps = np.asarray(res["per_step_cycles"]) * scale * (0.9 + 0.2 * rng.random(len(res["per_step_cycles"])))
        bytes_ = int(res["dram"]["bytes"] * (1 + 32 / kib))
        result = {**res, "cycles": cycles, "seconds": cycles / point["clock_ghz"] * 1e-9, "units": units,
                  "energy": energy, "area": area, "per_step_cycles": [round(float(x), 6) for x in steps],
                  "per_layer_cycles": {k: v * scale for k, v in res["per_layer_cycles"].items()},
                  "dram": {**res["dram"], "bytes": bytes_, "achieved_gbps": bytes_ / cycles * point["clock_ghz"],
                           "row_hit_rate": float(0.8 + 0.2 * rng.random())},
                  "bounds": {**res["bounds"], "compute_cycles": compute, "memory_cycles": memory,
                             "roofline_cycles": max(compute, memory),
                             "bound": "compute" if compute > memory else "memory"},
                  "arch": {**res["arch"], "config": cfg},
                  "trace": {**res["trace"], "name": trace}}
        return {**self.tpl, "key": f"{i:032x}", "point": point, "trace": trace, "config": cfg, "result": result}


def meta():
    return {"format": "attnsim-sweep", "version": 2, "spec_digest": "bench-store",
            "spec": {"name": "bench-store", "objectives": ["cycles", "energy", "area"]},
            "simulator_version": "bench", "simulator_build": "bench"}


def section_write(folder, n, batch):
    from sim.sweep.store import DB_FILE, Store

    tpl = template()
    synth = Synth(tpl)
    base = _current_rss_mib()
    t0 = time.perf_counter()
    st = Store.open(folder, meta(), (), list(AXES), force=True)
    try:
        for start in range(0, n, batch):
            recs = [synth.record(i) for i in range(start, min(n, start + batch))]
            st.append_many(recs, orders=list(range(start, start + len(recs))))
    finally:
        st.close()
    wall = time.perf_counter() - t0
    import sqlite3
    con = sqlite3.connect(os.path.join(folder, DB_FILE))
    docs = con.execute("SELECT AVG(LENGTH(body)) FROM documents").fetchone()[0]
    con.close()
    size = os.path.getsize(os.path.join(folder, DB_FILE))
    csv = os.path.getsize(os.path.join(folder, "points.csv"))
    raw = len(json.dumps(synth.record(0), sort_keys=True, separators=(",", ":")))
    return {"points": n, "wall_s": wall, "rate": n / wall, "db_bytes": size, "csv_bytes": csv,
            "doc_bytes": docs, "raw_doc_bytes": raw, "rss_base_mib": base, "rss_peak_mib": rss_mib()}


def section_front(folder):
    import sim

    base = _current_rss_mib()
    t0 = time.perf_counter()
    with sim.open_sweep(folder) as sw:
        df = sw.front_frame(["cycles", "energy", "area"])      # the fronts, then their rows
    wall = time.perf_counter() - t0
    return {"front_s": wall, "sizes": {str(t): int(n) for t, n in df.groupby("trace").size().items()},
            "rows": len(df), "cols": df.shape[1], "rss_base_mib": base, "rss_peak_mib": rss_mib()}


def section_filter(folder):
    import sim

    base = _current_rss_mib()
    t0 = time.perf_counter()
    df = sim.load_sweep(folder, filters=[("trace", "==", "decode"), ("config.dot.multipliers", ">=", 4096),
                                         ("cycles", "<", 60000)])
    t1 = time.perf_counter()
    return {"filtered_s": t1 - t0, "filtered_rows": len(df), "filtered_cols": df.shape[1],
            "filtered_frame_mib": df.memory_usage(deep=True).sum() / 2**20,
            "rss_base_mib": base, "rss_peak_mib": rss_mib()}


def section_narrow(folder):
    import sim

    base = _current_rss_mib()
    t0 = time.perf_counter()
    narrow = sim.load_sweep(folder, columns=["key", "trace", "cycles", "energy.total_pj", "area.total_mm2"])
    t1 = time.perf_counter()
    return {"narrow_s": t1 - t0, "narrow_rows": len(narrow),
            "narrow_frame_mib": narrow.memory_usage(deep=True).sum() / 2**20,
            "rss_base_mib": base, "rss_peak_mib": rss_mib()}


def section_docs(folder, n):
    import sim

    rng = np.random.default_rng(5)
    keys = [f"{int(i):032x}" for i in rng.integers(0, n, 1000)]
    with sim.open_sweep(folder) as sw:
        t0 = time.perf_counter()
        total = sum(len(sw.record(k)["result"]["per_step_cycles"]) for k in keys)
        wall = time.perf_counter() - t0
    return {"docs": len(keys), "per_doc_ms": wall / len(keys) * 1e3, "check": total, "rss_peak_mib": rss_mib()}


def old_pareto_mask(matrix):
    """The O(n^2) loop the sweep summary used before (kept here for comparison)."""
    m = np.asarray(matrix, dtype=np.float64)
    keep = np.ones(len(m), dtype=bool)
    for i in range(len(m)):
        le = np.all(m <= m[i], axis=1)
        lt = np.any(m < m[i], axis=1)
        if np.any(le & lt):
            keep[i] = False
    return keep


def section_pareto(old_max, repeat, sizes):
    from sim.sweep.pareto import pareto_mask

    rng = np.random.default_rng(11)
    rows = []
    for n in sizes:
        for k in (2, 3):
            m = np.round(rng.random((n, k)), 4)          # rounded: ties and duplicates occur
            new = min(_timed(pareto_mask, m) for _ in range(repeat))
            mask = pareto_mask(m)
            row = {"n": n, "k": k, "front": int(mask.sum()), "new_s": new[0], "old_s": None, "same": None}
            if n <= old_max:
                old_t, old_mask = _timed(old_pareto_mask, m)
                row.update(old_s=old_t, same=bool((old_mask == mask).all()))
            rows.append(row)
    return {"rows": rows, "rss_peak_mib": rss_mib()}


def _timed(fn, m):
    t0 = time.perf_counter()
    out = fn(m)
    return time.perf_counter() - t0, out


def child(args):
    if args.child == "write":
        out = section_write(args.dir, args.points, args.batch)
    elif args.child == "front":
        out = section_front(args.dir)
    elif args.child == "filter":
        out = section_filter(args.dir)
    elif args.child == "narrow":
        out = section_narrow(args.dir)
    elif args.child == "docs":
        out = section_docs(args.dir, args.points)
    else:
        out = section_pareto(args.old_max, args.repeat, [int(x) for x in args.sizes.split(",")])
    print(json.dumps(out))


def run_child(name, args, folder):
    cmd = [sys.executable, os.path.abspath(__file__), "--child", name, "--dir", folder, "--points",
           str(args.points), "--batch", str(args.batch), "--old-max", str(args.old_max), "--repeat", str(args.repeat),
           "--sizes", args.sizes]
    proc = subprocess.run(cmd, capture_output=True, text=True, env={**os.environ, "PYTHONPATH": ROOT})
    if proc.returncode:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"section {name} failed")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def real_sweep_doc_bytes():
    """Mean stored size of the real records of a small sweep (24 points), for comparison."""
    import sqlite3

    import yaml

    from sim.sweep import run_sweep
    from sim.trace.files import save_trace
    from sim.trace.synth import synth_trace

    with tempfile.TemporaryDirectory() as d:
        t = os.path.join(d, "t.npz")
        save_trace(synth_trace(prompt_tokens=256, decode_steps=32, layers=4, heads=4, head_dim=64,
                               token_keep=0.75, value_keep=0.5, lsb_fraction=0.1, seed=3), t)
        spec = os.path.join(d, "s.yaml")
        with open(spec, "w") as fh:
            yaml.safe_dump({"name": "real", "base": os.path.join(ROOT, "arch_configs", "mid.yaml"), "traces": [t],
                            "axes": {"dot.multipliers": [256, 512, 1024, 2048], "buffers.key_kib": [32, 64, 128],
                                     "buffers.value_kib": [64, 128]}}, fh)
        run_sweep(spec, os.path.join(d, "o"), jobs=2, quiet=True)
        con = sqlite3.connect(os.path.join(d, "o", "points.db"))
        n, avg = con.execute("SELECT COUNT(*), AVG(LENGTH(body)) FROM documents").fetchone()
        con.close()
        size = os.path.getsize(os.path.join(d, "o", "points.db"))
    return n, avg, size / n


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=1_000_000)
    ap.add_argument("--batch", type=int, default=1000, help="records per transaction when writing")
    ap.add_argument("--dir", help="store folder (default: a temporary folder, removed at the end)")
    ap.add_argument("--sections", default="write,front,filter,narrow,docs,pareto")
    ap.add_argument("--old-max", type=int, default=30_000, help="largest n the O(n^2) loop is timed at")
    ap.add_argument("--repeat", type=int, default=3, help="Pareto timings: best of this many")
    ap.add_argument("--sizes", default="2000,30000,1000000", help="Pareto timings: numbers of points")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        return child(args)
    sections = args.sections.split(",")
    tmp = None
    folder = args.dir
    if folder is None:
        tmp = tempfile.TemporaryDirectory(prefix="attnsim-store-bench-")
        folder = os.path.join(tmp.name, "store")
    print(f"store benchmark: {args.points:,} points; {os.cpu_count()} cores; "
          f"load average {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    try:
        if "write" in sections:
            w = run_child("write", args, folder)
            print(f"  write   {w['points']:,} records in {w['wall_s']:.1f} s ({w['rate']:,.0f}/s, transactions of "
                  f"{args.batch}); peak RSS {w['rss_peak_mib']:.0f} MiB (after imports {w['rss_base_mib']:.0f})")
            print(f"          points.db {w['db_bytes'] / 2**30:.2f} GiB = {w['db_bytes'] / w['points']:,.0f} B/point; "
                  f"record {w['raw_doc_bytes']:,} B as JSON -> {w['doc_bytes']:,.0f} B compressed; "
                  f"points.csv {w['csv_bytes'] / 2**30:.2f} GiB")
            n, avg, per = real_sweep_doc_bytes()
            print(f"          for comparison, a real {n}-point sweep: {avg:,.0f} B per compressed record, "
                  f"{per:,.0f} B/point in points.db")
        if "front" in sections:
            f = run_child("front", args, folder)
            print(f"  front   each trace's Pareto front (cycles, energy, area) streamed from the table and loaded "
                  f"as a DataFrame ({f['rows']} x {f['cols']}, per trace {f['sizes']}) in {f['front_s']:.1f} s; "
                  f"peak RSS {f['rss_peak_mib']:.0f} MiB (after imports {f['rss_base_mib']:.0f})")
        if "filter" in sections:
            r = run_child("filter", args, folder)
            print(f"  filter  filtered DataFrame {r['filtered_rows']:,} x {r['filtered_cols']} in "
                  f"{r['filtered_s']:.1f} s ({r['filtered_frame_mib']:.1f} MiB); peak RSS {r['rss_peak_mib']:.0f} MiB "
                  f"(after imports {r['rss_base_mib']:.0f})")
        if "narrow" in sections:
            r = run_child("narrow", args, folder)
            print(f"  narrow  every point x 5 columns, {r['narrow_rows']:,} rows in {r['narrow_s']:.1f} s "
                  f"({r['narrow_frame_mib']:.0f} MiB); peak RSS {r['rss_peak_mib']:.0f} MiB "
                  f"(after imports {r['rss_base_mib']:.0f})")
        if "docs" in sections:
            d = run_child("docs", args, folder)
            print(f"  docs    {d['docs']} whole records by key: {d['per_doc_ms']:.2f} ms each; "
                  f"peak RSS {d['rss_peak_mib']:.0f} MiB")
        if "pareto" in sections:
            p = run_child("pareto", args, folder)
            print(f"  pareto  best of {args.repeat}; the O(n^2) loop once, up to {args.old_max:,} points")
            for row in p["rows"]:
                old = (f"O(n^2) {row['old_s']:9.3f} s  same front: {'yes' if row['same'] else 'NO'}"
                       if row["old_s"] is not None else "O(n^2) not run")
                print(f"          n={row['n']:>9,} k={row['k']}  front {row['front']:>4}  "
                      f"new {row['new_s'] * 1e3:9.2f} ms   {old}")
    finally:
        if tmp is not None:
            tmp.cleanup()
    return 0


if __name__ == "__main__":
    sys.exit(main())
