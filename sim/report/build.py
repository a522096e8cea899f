"""Writes a comparison report: Markdown, one self-contained HTML file, CSVs, PNGs.

Layout of the output folder::

    report.md          summary, comparison table, verdicts, limits; links the PNGs
    report.html        the same with every figure embedded (base64 PNG), opens offline
    comparison.csv     the comparison table, exact values
    figures/NAME.png   each figure
    data/NAME.csv      the numbers each figure was drawn from
    manifest.json      what was written, from which inputs

An existing folder is refused unless ``force``; with ``force`` the files a
previous report wrote (its manifest says which) are replaced.
"""

import base64
import csv
import datetime
import html
import io
import json
import os

import matplotlib
import numpy as np

matplotlib.use("Agg")  # noqa: E402  (no display; before anything touches pyplot)

from ..version import __version__  # noqa: E402
from .. import formats as fm  # noqa: E402
from . import estimates as E  # noqa: E402
from . import figures as F  # noqa: E402
from .inputs import ReportError, group_key, label_runs  # noqa: E402
from .tables import columns_for, display_rows, markdown_table, table_rows  # noqa: E402
from .verdict import grouped_verdicts, inside_phase_spread, latency_key, short_line  # noqa: E402

MAX_FIGURE_RUNS = 24   # per-run bar charts stay readable up to about this many bars
MAX_BANDWIDTH_RUNS = 6

LIMITS = (
    "This is a cycle-approximate model, not sign-off data. Timing comes from a discrete-event "
    "simulation of transactions (tiles and burst groups), not from RTL: pipelines, arbitration and the "
    "memory controller are approximated and events are grouped, so cycle counts are estimates whose "
    "error against real hardware is unknown. Energy is a proxy: the dynamic energy of the modelled "
    "operations priced from a named per-operation table (45 nm figures of Horowitz, ISSCC 2014, plus "
    "derived and recalled values marked in the preset), a clock and control share per busy cycle and "
    "area, and leakage as a recalled density times the area proxy times the run time; wires outside "
    "the SRAM figures, DRAM background power and power gating are left out, and other process nodes "
    "are not scaled. Area is a proxy: arithmetic units and SRAM bits "
    "times per-item areas, without wiring, control, the fetch unit or the memory PHY. Use the numbers "
    "to compare candidate datapaths with each other on the same workloads, not as absolute figures.")


def _csv_text(header, rows):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([_cell(v) for v in row])
    return buf.getvalue()


def _cell(v):
    """Exact text of a value: floats by repr (round-trips), numpy scalars as Python numbers."""
    if v is None:
        return ""
    if isinstance(v, np.generic):
        v = v.item()
    return repr(v) if isinstance(v, float) else v


def _png(fig):
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def check_out(out_dir, force):
    """Refuse an output folder the report may not write into; nothing is changed (run before any work)."""
    if os.path.exists(out_dir):
        if not os.path.isdir(out_dir):
            raise ReportError("--out", "out", out_dir, "expected a folder; a file of that name exists")
        if os.listdir(out_dir) and not force:
            raise ReportError("--out", "out", out_dir, "folder exists; pass --force to overwrite it")
    root = os.path.realpath(out_dir)
    for sub in ("figures", "data"):
        p = os.path.join(out_dir, sub)
        if os.path.lexists(p) and not _inside(root, os.path.realpath(p)):
            raise ReportError("--out", sub, p,
                              "is a symbolic link out of the output folder; remove it or choose another --out")


def _prepare_out(out_dir, force):
    check_out(out_dir, force)
    if os.path.exists(out_dir):
        man = os.path.join(out_dir, "manifest.json")
        if os.path.exists(man):
            try:
                with open(man, encoding="utf-8") as fh:
                    old = json.load(fh).get("files", [])
            except (OSError, ValueError, AttributeError):
                old = []
            root = os.path.realpath(out_dir)
            for rel in old if isinstance(old, list) else []:
                p = _listed_file(root, rel)
                if p is not None:
                    os.remove(p)
    os.makedirs(os.path.join(out_dir, "figures"), exist_ok=True)
    os.makedirs(os.path.join(out_dir, "data"), exist_ok=True)


def _inside(root, real):
    return real != root and os.path.commonpath([root, real]) == root


def _listed_file(root, rel):
    """The path to delete for an old manifest entry, or None.

    Folders on the way are resolved through symbolic links, and the entry must
    then lie inside the output folder ``root`` (itself resolved): nothing
    outside it is ever deleted. An entry that is itself a symbolic link is
    removed as a link; its target is never touched.
    """
    if not isinstance(rel, str) or not rel or os.path.isabs(rel):
        return None
    head, name = os.path.split(os.path.normpath(rel))
    if name in ("", ".", ".."):
        return None
    where = os.path.join(os.path.realpath(os.path.join(root, head)), name)
    if not _inside(root, where):
        return None
    return where if os.path.islink(where) or os.path.isfile(where) else None


def figure_runs(runs):
    """The runs per-run figures draw: all, or (many runs) each trace's latency/energy Pareto runs,
    fastest first (by the means over refresh phases where every run of the trace has them)."""
    if len(runs) <= MAX_FIGURE_RUNS:
        return list(runs), None
    keep = []
    groups = {}
    for r in runs:
        groups.setdefault(group_key(r), []).append(r)
    for rr in groups.values():
        key, _ = latency_key(rr)
        keep += [(key(r), r) for r in F.front_runs(rr)]
    keep = [r for _, r in sorted(keep, key=lambda kr: kr[0])][:MAX_FIGURE_RUNS]
    return keep, (f"{len(runs)} runs: the per-run figures show {len(keep)} of them (the latency/energy "
                  "Pareto points of each trace); the tables and the CSVs hold all.")


def build_report(runs, out_dir, failed=(), warnings=(), force=False, timeline_run=None, title=None,
                 notes=(), inputs=(), sensitivity=None, probes=()):
    """Write the report for ``runs`` into ``out_dir``; return the manifest (a dict).

    ``sensitivity``: ``{id(run): rows}`` measured by :func:`.sensitivity.measure`, or None.
    """
    _prepare_out(out_dir, force)
    warnings = list(warnings) + label_runs(runs)
    sensitivity = sensitivity or {}
    fruns, fnote = figure_runs(runs)
    figs = [F.stall_breakdown(fruns), F.utilization(fruns), F.roofline(fruns), F.latency(runs),
            F.pareto(runs), F.energy_area(fruns)]
    if sensitivity:
        figs.append(F.sensitivity(runs, sensitivity))
    if probes:                                   # attnsim dram probe --csv curves
        figs.append(F.memory_probe(probes))
    skipped = []
    with_iv = [r for r in runs if r.intervals]
    if timeline_run is None and with_iv:
        timeline_run = with_iv[0]
    if with_iv:
        pick = [r for r in with_iv if timeline_run is None or r.trace_label == timeline_run.trace_label]
        figs.append(F.bandwidth(pick[:MAX_BANDWIDTH_RUNS]))
    else:
        skipped.append("memory bandwidth over time")
    if timeline_run is not None and timeline_run.intervals:
        figs.append(F.timeline(timeline_run))
    else:
        skipped.append("per-unit timeline")
    files = []
    for fg in figs:
        png = _png(fg.fig)
        fg.png = png
        for rel, data, mode in ((f"figures/{fg.name}.png", png, "wb"),
                                (f"data/{fg.name}.csv", _csv_text(fg.header, fg.rows), "w")):
            with open(os.path.join(out_dir, rel), mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
                fh.write(data)
            files.append(rel)
    header, rows = table_rows(runs)
    with open(os.path.join(out_dir, "comparison.csv"), "w", encoding="utf-8") as fh:
        fh.write(_csv_text(header, rows))
    files.append("comparison.csv")
    groups = {}
    for r in runs:
        groups.setdefault(group_key(r), []).append(r)
    verdicts = grouped_verdicts(groups, sensitivity=sensitivity, front=F.front_runs)
    ctx = {
        "title": title or "attnsim comparison report",
        "made": datetime.datetime.now().strftime("%Y-%m-%d %H:%M"),
        "version": __version__,
        "runs": runs, "failed": list(failed), "warnings": warnings, "notes": list(notes)
        + ([fnote] if fnote else []) + [f"No {s} figure: {why}" for s, why in _skip_reasons(skipped, runs)],
        "figs": figs, "verdicts": verdicts, "inputs": list(inputs),
        "sensitivity": [(r, sensitivity[id(r)]) for r in runs if sensitivity.get(id(r))],
        "timeline_run": timeline_run,
    }
    for name, text in (("report.md", _markdown(ctx)), ("report.html", _html(ctx))):
        with open(os.path.join(out_dir, name), "w", encoding="utf-8") as fh:
            fh.write(text)
        files.append(name)
    return _write_manifest(out_dir, runs, files, [f.name for f in figs], warnings, ctx["notes"], failed, inputs)


def _write_manifest(out_dir, runs, files, figures, warnings, notes, failed, inputs, run_extra=None, **extra):
    """``manifest.json``: what the report wrote, from which runs and inputs; returns it."""
    manifest = {"format": "attnsim-report", "version": 1, "simulator_version": __version__, **extra,
                "files": files + ["manifest.json"], "figures": figures,
                "runs": [{"label": r.label, "origin": r.origin, "trace_digest": r.digest,
                          "simulator_version": r.version, "simulator_build": r.build,
                          **(run_extra(r) if run_extra else {}),
                          "engine": dict(zip(("grain_rows", "issue_window", "seed"), r.engine_settings))}
                         for r in runs],
                "warnings": warnings, "notes": notes, "failed": list(failed), "inputs": list(inputs)}
    with open(os.path.join(out_dir, "manifest.json"), "w", encoding="utf-8") as fh:
        json.dump(manifest, fh, indent=2)
        fh.write("\n")
    return manifest


SENS_INTRO = ("Each row is one rerun of the run's trace with one resource or memory policy changed (or, where "
              "the memory refreshes, refresh turned off: not a change to make, but what refresh costs the run, "
              "a bound on any refresh policy); speedup = "
              "the baseline's cycles (the recorded config simulated again by this build) / the rerun's cycles, "
              "energy = the rerun's energy / the baseline's. Measured, not estimated. Where the run's "
              "refresh-phase spread was measured, a speedup inside it is marked: not a difference the trace "
              "can show; with --refresh-phases a run short for refresh (20 refresh intervals or fewer) has "
              "its baseline and each change run at four refresh phases and compared by their means.")


def sensitivity_rows(items):
    """``(header, rows)`` of the sensitivity table for Markdown and HTML."""
    header = ["run", "change", "setting", "status", fm.header("speedup", "speedup"),
              fm.header("energy", "speedup")]
    rows = []
    for r, sens in items:
        for row in sens:
            status = row["status"] if not row["error"] else f"n/a: {row['error']}"
            if row["speedup"] and row.get("phases", 1) > 1:
                status += f", means of {row['phases']} refresh phases"
            elif row["speedup"] and inside_phase_spread(row["speedup"], r.phase_spread):
                status += f", inside the {r.phase_spread:.0%} refresh-phase spread"
            rows.append([r.label, row["change"], row["setting"], status,
                         fm.value(row["speedup"], "speedup") if row["speedup"] else "-",
                         fm.value(row["energy_ratio"], "speedup") if row["energy_ratio"] else "-"])
    return header, rows


def _run_line(r):
    """A run's provenance: where it came from, trace digest, build and engine settings."""
    grain, window, seed = r.engine_settings
    return (f"{r.label}: {r.origin} (trace digest {r.digest[:12]}, attnsim {r.build}, grain {grain} rows, "
            f"issue window {window}, seed {seed})")


def _skip_reasons(skipped, runs):
    why = ("no run carries per-unit intervals (result documents do not hold them; the report replays "
           "the first run for them when its trace file is at hand)")
    return [(s, why) for s in skipped]


def _provenance(runs):
    """Distinct energy and area presets used, with their sources."""
    seen = []
    for r in runs:
        for sec in ("energy", "area"):
            p = r.doc.get(sec, {}).get("preset")
            if p and (sec, p["name"], p["source"]) not in seen:
                seen.append((sec, p["name"], p["source"]))
    return seen


def _markdown(c):
    out = [f"# {c['title']}", "",
           f"attnsim {c['version']}, written {c['made']}. {len(c['runs'])} runs"
           + (f", {len(c['failed'])} failed points" if c["failed"] else "") + ".", ""]
    if c["warnings"]:
        out += ["## Warnings", ""] + [f"- {w}" for w in c["warnings"]] + [""]
    out += ["## Limits of this model", "", LIMITS, ""]
    header, rows = display_rows(c["runs"])
    out += ["## Comparison", "", markdown_table(header, rows), "",
            "Exact values: `comparison.csv`. Latency is simulated time; energy and area are proxies.", ""]
    out += ["## Verdicts", ""]
    for title, summary, verdicts, rest in c["verdicts"]:
        out += [f"### {title}", ""] + ([summary, ""] if summary else [])
        out += [f"- **{r.label}**: {v}" for r, v in verdicts]
        if rest:
            out += ["", f"The other {len(rest)} runs, by latency:", ""]
            out += [f"- {r.label}: {short_line(r)}" for r in rest]
        out += [""]
    if c["sensitivity"]:
        out += ["## What to change (measured)", "", SENS_INTRO, "",
                markdown_table(*sensitivity_rows(c["sensitivity"]), text_columns=4), "",
                "Exact values: `data/sensitivity.csv`.", ""]
    out += _failed_markdown(c["failed"])
    out += ["## Figures", ""]
    for fg in c["figs"]:
        out += [f"### {fg.title}", "", f"![{fg.title}](figures/{fg.name}.png)", "",
                f"{fg.caption} Data: `data/{fg.name}.csv`.", ""]
    if c["notes"]:
        out += ["## Notes", ""] + [f"- {n}" for n in c["notes"]] + [""]
    out += ["## Sources of the cost figures", ""]
    out += [f"- {sec} preset `{name}`: {src}" for sec, name, src in _provenance(c["runs"])] + [""]
    out += ["## Runs", ""] + [f"- {_run_line(r)}" for r in c["runs"]] + [""]
    return "\n".join(out)


def _failed_markdown(failed):
    """The "Failed points" section (none when nothing failed)."""
    if not failed:
        return []
    return ["## Failed points", ""] + [f"- {f['origin']}: {f.get('trace')} {f.get('point')}: {f.get('error')}"
                                       for f in failed] + [""]


def _failed_html(failed):
    e = html.escape
    if not failed:
        return []
    return ["<h2>Failed points</h2><ul>" + "".join(
        f"<li>{e(f['origin'])}: {e(str(f.get('trace')))} {e(str(f.get('point')))}: {e(str(f.get('error')))}</li>"
        for f in failed) + "</ul>"]


CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:24px auto;max-width:1280px;
color:#222;line-height:1.45;padding:0 16px}
h1{font-size:1.6em;margin-bottom:4px}h2{border-bottom:1px solid #ddd;padding-bottom:3px;margin-top:1.6em}
table{border-collapse:collapse;font-size:13px;margin:8px 0}th,td{border:1px solid #ccc;padding:3px 7px}
th{background:#f2f4f6}td.num{text-align:right;font-variant-numeric:tabular-nums}
.limits{background:#fff6e5;border-left:4px solid #e9a23b;padding:8px 12px}
.warn{background:#fdecea;border-left:4px solid #d62728;padding:8px 12px}
figure{margin:18px 0}figure img{max-width:100%;border:1px solid #eee}
figcaption{font-size:13px;color:#555}.verdict{margin:6px 0}.meta{color:#666;font-size:13px}
"""

SCRIPT = """
window.addEventListener('load', function () {
  var imgs = document.querySelectorAll('img.fig'), ok = 0;
  imgs.forEach(function (im) { if (im.complete && im.naturalWidth > 0) ok++; });
  document.body.setAttribute('data-figures-loaded', String(ok));
});
"""


def _html(c):
    e = html.escape
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             f"<title>{e(c['title'])}</title><style>{CSS}</style></head>",
             f"<body data-figures-expected='{len(c['figs'])}' data-figures-loaded='0'>",
             f"<h1>{e(c['title'])}</h1>",
             f"<p class='meta'>attnsim {e(c['version'])}, written {e(c['made'])}. {len(c['runs'])} runs"
             + (f", {len(c['failed'])} failed points" if c["failed"] else "") + ".</p>"]
    if c["warnings"]:
        parts.append("<div class='warn'><b>Warnings</b><ul>" + "".join(f"<li>{e(w)}</li>" for w in c["warnings"])
                     + "</ul></div>")
    parts.append(f"<h2>Limits of this model</h2><p class='limits'>{e(LIMITS)}</p>")
    header, rows = display_rows(c["runs"])
    numeric = [False, False] + [col.quantity is not None for col, _v in columns_for(c["runs"])]
    parts.append("<h2>Comparison</h2><table id='comparison'><tr>" + "".join(f"<th>{e(h)}</th>" for h in header)
                 + "</tr>")
    for row in rows:
        parts.append("<tr>" + "".join(f"<td{' class=num' if numeric[i] else ''}>{e(str(v))}</td>"
                                      for i, v in enumerate(row)) + "</tr>")
    parts.append("</table><p class='meta'>Exact values in comparison.csv. Energy and area are proxies.</p>")
    parts.append("<h2>Verdicts</h2>")
    for title, summary, verdicts, rest in c["verdicts"]:
        parts.append(f"<h3>{e(title)}</h3>" + (f"<p>{e(summary)}</p>" if summary else ""))
        parts += [f"<p class='verdict'><b>{e(r.label)}</b>: {e(v)}</p>" for r, v in verdicts]
        if rest:
            parts.append(f"<p>The other {len(rest)} runs, by latency:</p><ul>"
                         + "".join(f"<li>{e(r.label)}: {e(short_line(r))}</li>" for r in rest) + "</ul>")
    if c["sensitivity"]:
        header, rows = sensitivity_rows(c["sensitivity"])
        parts.append(f"<h2>What to change (measured)</h2><p>{e(SENS_INTRO)}</p><table id='sensitivity'><tr>"
                     + "".join(f"<th>{e(h)}</th>" for h in header) + "</tr>")
        for row in rows:
            parts.append("<tr>" + "".join(f"<td{' class=num' if i >= 4 else ''}>{e(str(v))}</td>"
                                          for i, v in enumerate(row)) + "</tr>")
        parts.append("</table><p class='meta'>Exact values in data/sensitivity.csv.</p>")
    parts += _failed_html(c["failed"])
    parts.append("<h2>Figures</h2>")
    for fg in c["figs"]:
        b64 = base64.b64encode(fg.png).decode("ascii")
        parts.append(f"<figure id='fig-{fg.name}'><h3>{e(fg.title)}</h3>"
                     f"<img class='fig' alt='{e(fg.title)}' src='data:image/png;base64,{b64}'>"
                     f"<figcaption>{e(fg.caption)} Data: data/{fg.name}.csv.</figcaption></figure>")
    if c["notes"]:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{e(n)}</li>" for n in c["notes"]) + "</ul>")
    parts.append("<h2>Sources of the cost figures</h2><ul>" + "".join(
        f"<li>{e(sec)} preset <code>{e(name)}</code>: {e(src)}</li>" for sec, name, src in _provenance(c["runs"]))
        + "</ul>")
    parts.append("<h2>Runs</h2><ul>" + "".join(f"<li>{e(_run_line(r))}</li>" for r in c["runs"]) + "</ul>")
    parts.append(f"<script>{SCRIPT}</script></body></html>\n")
    return "\n".join(parts)


ESTIMATE_INTRO = (
    "Some runs here simulated part of their trace (attnsim run --sample-prefill or --sample-decode). Every "
    "figure of such a run but its estimate of the whole trace is the part's, and a report ranking those would "
    "compare the parts, which differ with the sampling and with each config's query blocks. So this report "
    "ranks each trace's runs by the whole trace's latency alone: a whole run's own, a sampled run's estimate, "
    "beside the estimate's reach, the lead below which it is not told apart from another run (at least "
    f"{fm.show(E.SAMPLE_NOISY, 'share')}, what estimates whose checks agreed came within against whole runs; "
    f"its own checks' spread where larger; {fm.show(E.SAMPLE_FEW_LAYERS_OFF, 'share')} for decode sampled on "
    f"fewer than {E.SAMPLE_FEW_LAYERS} layers; a whole run's is the {fm.show(E.TIE, 'share')} within which any "
    "report ties two runs, or its spread over refresh phases). A prefill estimate made on two arrays, or where "
    "the softmax unit "
    "paces the array, is listed but not ranked: there a made block's time depends on the blocks around it. "
    "Energy, traffic, stalls and what to change are not shown: for those, report whole runs.")
ESTIMATE_HEADER = ["trace", "run", "simulated", fm.header("latency", "latency"), "cycles", fm.header("reach", "share"),
                   fm.header("vs fastest", "speedup"), "standing"]


def _estimate_rows(groups):
    rows = []
    for trace, ranked in groups:
        for i, (r, e, slower, apart) in enumerate(ranked):
            standing = ("not ranked" if not e.ranked else "fastest" if i == 0
                        else "told apart" if apart else "not told apart")
            rows.append([trace, r.config_label, e.made, fm.value(e.seconds, "latency"), fm.value(e.cycles, "cycles"),
                         fm.value(e.reach, "share"), fm.value(slower, "speedup") if slower else "-", standing])
    return rows


def _estimate_csv(groups):
    header = ["trace", "run", "origin", "sampling", "simulated", "whole_cycles", "whole_seconds",
              "simulated_cycles", "reach", "ranked", "slower_than_fastest", "told_apart", "spreads", "caveats"]
    rows = []
    for trace, ranked in groups:
        for r, e, slower, apart in ranked:
            rows.append([trace, r.config_label, r.origin, E.sampling_tag(r.doc) or "whole", e.made, e.cycles,
                         e.seconds, r.doc["cycles"], e.reach, e.ranked, slower, apart,
                         "; ".join(f"{k} {v!r}" for k, v in e.spreads.items()), "; ".join(e.caveats)])
    return _csv_text(header, rows)


def build_estimate_report(runs, out_dir, failed=(), force=False, title=None, notes=(), inputs=()):
    """Write the report of runs among which some are sampled (:mod:`.estimates`) into ``out_dir``;
    return the manifest. The same files as :func:`build_report`, with one figure."""
    _prepare_out(out_dir, force)
    # the sampling goes into the labels only where the runs differ in it (the table says it anyway)
    tagged = len({E.sampling_tag(r.doc) for r in runs}) > 1
    warnings = label_runs(runs, trace_of=E.whole_trace, config_tag=E.sampling_tag if tagged else None)
    by_trace = {}
    for r in runs:
        by_trace.setdefault(group_key(r), []).append(r)
    groups = [(rr[0].trace_label, E.rank(rr)) for rr in by_trace.values()]
    fg = F.estimated_latency(groups)
    fg.png = _png(fg.fig)
    files = [f"figures/{fg.name}.png", f"data/{fg.name}.csv", "comparison.csv", "report.md", "report.html"]
    texts = [fg.png, _csv_text(fg.header, fg.rows), _estimate_csv(groups)]
    verdicts = [(trace, E.verdict(ranked), [(r, e.caveats) for r, e, _s, _a in ranked if e.caveats])
                for trace, ranked in groups]
    sampled = sum(E.is_sampled(r.doc) for r in runs)
    ctx = {"title": title or "attnsim comparison report: whole-trace estimates",
           "meta": (f"attnsim {__version__}, written {datetime.datetime.now().strftime('%Y-%m-%d %H:%M')}. "
                    f"{len(runs)} runs, {sampled} of them sampled"
                    + ("" if tagged else f" ({E.sampling_tag(runs[0].doc)})")
                    + (f", {len(failed)} failed points" if failed else "") + "."),
           "warnings": warnings, "rows": _estimate_rows(groups), "verdicts": verdicts, "fig": fg,
           "notes": list(notes), "runs": runs, "failed": list(failed)}
    texts += [_estimate_markdown(ctx), _estimate_html(ctx)]
    for rel, data in zip(files, texts):
        with open(os.path.join(out_dir, rel), "wb" if isinstance(data, bytes) else "w",
                  **({} if isinstance(data, bytes) else {"encoding": "utf-8"})) as fh:
            fh.write(data)
    return _write_manifest(out_dir, runs, files, [fg.name], warnings, ctx["notes"], failed, inputs,
                           run_extra=lambda r: {"sampling": E.sampling_tag(r.doc) or "whole"},
                           ranked_by="whole-trace estimates")


def _estimate_markdown(c):
    out = [f"# {c['title']}", "", c["meta"], ""]
    if c["warnings"]:
        out += ["## Warnings", ""] + [f"- {w}" for w in c["warnings"]] + [""]
    out += ["## Limits of this model", "", LIMITS, "", ESTIMATE_INTRO, ""]
    out += ["## Whole-trace latency", "", markdown_table(ESTIMATE_HEADER, c["rows"], text_columns=3), "",
            "Exact values: `comparison.csv`.", ""]
    out += ["## Verdicts", ""]
    for trace, text, caveats in c["verdicts"]:
        out += [f"### {trace}", "", text, ""] + [f"- {r.config_label}: {'; '.join(cv)}" for r, cv in caveats]
        out += [""] if caveats else []
    out += _failed_markdown(c["failed"])
    fg = c["fig"]
    out += ["## Figure", "", f"![{fg.title}](figures/{fg.name}.png)", "", f"{fg.caption} Data: `data/{fg.name}.csv`.",
            ""]
    if c["notes"]:
        out += ["## Notes", ""] + [f"- {n}" for n in c["notes"]] + [""]
    out += ["## Runs", ""] + [f"- {_estimate_run_line(r)}" for r in c["runs"]] + [""]
    return "\n".join(out)


def _estimate_run_line(r):
    """A run's provenance, and its sampling where it made part of its trace."""
    return _run_line(r) + (f"; sampled: {E.sampling_tag(r.doc)}" if E.is_sampled(r.doc) else "")


def _estimate_html(c):
    e = html.escape
    fg = c["fig"]
    b64 = base64.b64encode(fg.png).decode("ascii")
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
             f"<title>{e(c['title'])}</title><style>{CSS}</style></head>",
             "<body data-figures-expected='1' data-figures-loaded='0'>",
             f"<h1>{e(c['title'])}</h1>", f"<p class='meta'>{e(c['meta'])}</p>"]
    if c["warnings"]:
        parts.append("<div class='warn'><b>Warnings</b><ul>" + "".join(f"<li>{e(w)}</li>" for w in c["warnings"])
                     + "</ul></div>")
    parts.append(f"<h2>Limits of this model</h2><p class='limits'>{e(LIMITS)}</p><p>{e(ESTIMATE_INTRO)}</p>")
    parts.append("<h2>Whole-trace latency</h2><table id='comparison'><tr>"
                 + "".join(f"<th>{e(h)}</th>" for h in ESTIMATE_HEADER) + "</tr>")
    for row in c["rows"]:
        parts.append("<tr>" + "".join(f"<td{' class=num' if 3 <= i < 7 else ''}>{e(str(v))}</td>"
                                      for i, v in enumerate(row)) + "</tr>")
    parts.append("</table><p class='meta'>Exact values in comparison.csv.</p><h2>Verdicts</h2>")
    for trace, text, caveats in c["verdicts"]:
        parts.append(f"<h3>{e(trace)}</h3><p class='verdict'>{e(text)}</p>")
        if caveats:
            parts.append("<ul>" + "".join(f"<li>{e(r.config_label)}: {e('; '.join(cv))}</li>" for r, cv in caveats)
                         + "</ul>")
    parts += _failed_html(c["failed"])
    parts.append(f"<h2>Figure</h2><figure id='fig-{fg.name}'><h3>{e(fg.title)}</h3>"
                 f"<img class='fig' alt='{e(fg.title)}' src='data:image/png;base64,{b64}'>"
                 f"<figcaption>{e(fg.caption)} Data: data/{fg.name}.csv.</figcaption></figure>")
    if c["notes"]:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{e(n)}</li>" for n in c["notes"]) + "</ul>")
    parts.append("<h2>Runs</h2><ul>" + "".join(f"<li>{e(_estimate_run_line(r))}</li>" for r in c["runs"])
                 + "</ul>")
    parts.append(f"<script>{SCRIPT}</script></body></html>\n")
    return "\n".join(parts)


def replay_intervals(run):
    """Simulate ``run`` again from its recorded config and trace to get its intervals.

    Returns a note for the report (why the replay was skipped, or how it
    compares with the document), or None when it matched.
    """
    from ..arch import load_arch
    from ..run import simulate
    from ..trace.files import load_trace

    path = run.trace_path
    if not path or not os.path.exists(path):
        return f"timeline not drawn: the trace of {run.label} ({path}) is not at hand to replay"
    trace = load_trace(path)
    if trace.digest() != run.digest:
        return (f"timeline not drawn: {path} no longer has the digest recorded for {run.label} "
                f"({run.digest[:12]})")
    arch = load_arch(run.doc["arch"]["config"], source=run.doc["arch"].get("source", "<recorded config>"))
    eng = run.doc.get("engine", {})
    res = simulate(arch, trace, grain_rows=eng.get("grain_rows"), seed=eng.get("seed"), keep_intervals=True)
    run.intervals = res.intervals
    note = None
    if run.version != __version__:
        note = (f"timeline of {run.label} replayed with attnsim {__version__}; the document was made by "
                f"{run.version}")
    if res.cycles != run.doc["cycles"]:
        note = (note + "; " if note else f"timeline of {run.label}: ") + (
            f"the replay took {res.cycles:,} cycles, the document says {run.doc['cycles']:,} "
            "(the figure shows the replay)")
    return note


def attach_timeline(runs, path):
    """Give the run a timeline file (``attnsim run --timeline``) belongs to its intervals; return it."""
    from .timeline import read_timeline

    info, intervals = read_timeline(path)
    for r in runs:
        if (r.doc["arch"]["name"] == info.get("arch") and r.digest == info.get("trace_digest")
                and r.version == info.get("simulator_version") and r.doc["cycles"] == info.get("cycles")):
            r.intervals = intervals
            return r
    raise ReportError(path, "otherData", f"{info.get('arch')} x {info.get('trace')}",
                      "expected the timeline of one of the runs in the report (same arch, trace digest, "
                      "simulator version and cycles)")


def _estimates_only(runs, sensitivity, refresh_phases, timeline_path, probes):
    """Refuse what a report of sampled runs does not do (they are ranked by estimates alone)."""
    first = next(r for r in runs if E.is_sampled(r.doc))
    why = (f"{first.origin} is a sampled run ({E.sampling_tag(first.doc)}): such a report ranks the whole "
           "trace's estimates alone; report whole runs for")
    for option, value, what in (("--sensitivity", sensitivity if sensitivity not in ("auto", "off") else None,
                                 "what to change"),
                                ("--refresh-phases", refresh_phases or None, "refresh phases"),
                                ("--timeline", timeline_path, "a timeline"),
                                ("RESULTS", ", ".join(map(str, probes)) or None, "memory probe curves")):
        if value is not None:
            raise ReportError("attnsim report", option, value, f"expected without sampled runs: {why} {what}")


def report_from_paths(paths, out_dir, force=False, timeline_path=None, replay=True, title=None,
                      sensitivity="auto", sensitivity_limit=None, jobs=None, cluster=None, workers=None,
                      echo=None, refresh_phases=False):
    """``attnsim report``: load inputs, measure sensitivity (and with ``refresh_phases`` each
    trace's leading runs at other refresh phases, :mod:`.phases`), get one run's intervals,
    write the report.

    Everything that can refuse (the output folder, a sensitivity request over
    its limit) is checked before any simulation starts.
    """
    from . import phases as phases_mod
    from . import sensitivity as S
    from .inputs import load_inputs

    probes = [p for p in paths if str(p).endswith(".csv")]
    runs, failed = load_inputs([p for p in paths if p not in probes])
    check_out(out_dir, force)
    if any(E.is_sampled(r.doc) for r in runs):
        _estimates_only(runs, sensitivity, refresh_phases, timeline_path, probes)
        note = ("Sensitivity not measured: some runs are sampled, and this report ranks by whole-trace estimates "
                "only" if sensitivity == "auto" else None)
        manifest = build_estimate_report(runs, out_dir, failed=failed, force=force, title=title,
                                         notes=[note] if note else [], inputs=list(paths))
        return runs, manifest
    label_runs(runs)   # groups (per trace) decide which runs sensitivity picks
    # with refresh phases, a short run's changes are measured as means over the same phases
    n_phases = phases_mod.AUTO_PHASES if refresh_phases else 1
    picked, sens_note = S.choose(runs, sensitivity, S.DEFAULT_LIMIT if sensitivity_limit is None
                                 else sensitivity_limit, n_phases)
    notes = [sens_note] if sens_note else []
    table = {}
    if picked:
        table, more = S.measure(picked, jobs=jobs, cluster=cluster, workers=workers, echo=echo, phases=n_phases)
        notes += more
    if refresh_phases:
        notes += phases_mod.measure(runs, jobs=jobs, cluster=cluster, workers=workers, echo=echo)
    timeline_run = None
    if timeline_path:
        timeline_run = attach_timeline(runs, timeline_path)
    elif replay:
        note = replay_intervals(runs[0])
        if note:
            notes.append(note)
        if runs[0].intervals:
            timeline_run = runs[0]
    manifest = build_report(runs, out_dir, failed=failed, force=force, timeline_run=timeline_run, title=title,
                            notes=notes, inputs=list(paths), sensitivity=table, probes=probes)
    return runs, manifest
