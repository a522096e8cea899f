"""The report's figures, each with the table of numbers it was drawn from.

Every function takes runs (see :mod:`sim.report.inputs`) and returns a
:class:`Figure`: a matplotlib figure (Agg, no display needed), a caption, and
``header, rows`` -- the data behind the figure, written next to it as CSV.
Figures are built on ``matplotlib.figure.Figure`` directly, without pyplot's
global state, so building a report never opens a window or leaks figures.
"""

import math

import numpy as np
from matplotlib.figure import Figure as MplFigure
from matplotlib.lines import Line2D
from matplotlib.ticker import FixedFormatter, FixedLocator, NullLocator

from .. import formats as fmt
from ..limits import verdict_of
from .inputs import group_key
from .verdict import energy_key, latency_key

BUSY, IDLE = "#2a9d8f", "#d9d9d9"
CAUSE_COLORS = ["#e76f51", "#f4a261", "#e9c46a", "#8d6cab", "#457b9d", "#c05780", "#7fb069", "#b0a18f"]
OTHER = "#9e9e9e"
SERIES = ["#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2", "#7f7f7f",
          "#bcbd22", "#17becf"]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "*", "<", ">"]
UNIT_ORDER = ("dram", "fetch", "dot", "dot_pv", "softmax", "topk")


class Figure:
    """One report figure: ``name`` (file stem), title, caption, the figure and its data."""

    def __init__(self, name, title, caption, fig, header, rows):
        self.name = name
        self.title = title
        self.caption = caption
        self.fig = fig
        self.header = header
        self.rows = rows


def _fig(w, h):
    fig = MplFigure(figsize=(w, h), dpi=110, layout="constrained")
    return fig


def _units(runs):
    seen = {u for r in runs for u in r.doc["units"]}
    return [u for u in UNIT_ORDER if u in seen] + sorted(seen - set(UNIT_ORDER))


def _color_map(keys, palette):
    return {k: palette[i % len(palette)] for i, k in enumerate(keys)}


def stall_breakdown(runs):
    """Stacked bars per run: each unit's time as busy, each stall cause, idle."""
    units = _units(runs)
    totals = {}
    for r in runs:
        for u in r.doc["units"].values():
            for c, f in u["stalls"].items():
                totals[c] = totals.get(c, 0.0) + f
    top = [c for c, _ in sorted(totals.items(), key=lambda kv: -kv[1])][:len(CAUSE_COLORS)]
    colors = _color_map(top, CAUSE_COLORS)
    n = len(runs)
    fig = _fig(min(3.0 * len(units) + 2.5, 18), 0.32 * n + 2.2)
    axes = fig.subplots(1, len(units), sharey=True, squeeze=False)[0]
    y = np.arange(n)
    rows = []
    for ax, unit in zip(axes, units):
        left = np.zeros(n)

        def seg(vals, color, label):
            nonlocal left
            ax.barh(y, vals, left=left, color=color, label=label, height=0.75, edgecolor="white", linewidth=0.3)
            left = left + vals

        get = lambda r, key: r.doc["units"].get(unit, {}).get(key, 0.0)  # noqa: E731
        seg(np.array([get(r, "busy") for r in runs]), BUSY, "busy")
        for c in top:
            seg(np.array([r.doc["units"].get(unit, {}).get("stalls", {}).get(c, 0.0) for r in runs]),
                colors[c], f"stall: {c}")
        other = np.array([sum(f for c, f in r.doc["units"].get(unit, {}).get("stalls", {}).items()
                              if c not in colors) for r in runs])
        seg(other, OTHER, "stall: other causes")
        seg(np.array([get(r, "idle") for r in runs]), IDLE, "idle")
        ax.set_title(unit, fontsize=10)
        ax.set_xlabel("share of the run", fontsize=8)
        ax.set_xlim(0, 1)
        ax.set_xticks([0, 0.5, 1])
        ax.set_xticklabels(["0", "50%", "100%"])
        ax.invert_yaxis() if unit == units[0] else None
        ax.grid(axis="x", alpha=0.3)
        for r in runs:
            u = r.doc["units"].get(unit)
            if u is None:
                continue
            rows.append([r.label, unit, "busy", u["busy"]])
            for c, f in u["stalls"].items():
                rows.append([r.label, unit, "stall:" + c, f])
            rows.append([r.label, unit, "idle", u["idle"]])
    axes[0].set_yticks(y)
    axes[0].set_yticklabels([r.label for r in runs], fontsize=8)
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncol=min(len(labels), 6), fontsize=8, frameon=False)
    return Figure("stalls", "Where each unit's time goes",
                  "Each bar is one run; segments are the unit's share of the run's cycles: busy, starved or "
                  "blocked by cause (the most frequent causes named, the rest grouped), idle.",
                  fig, ["run", "unit", "state", "fraction"], rows)


def utilization(runs):
    """Heat map: busy fraction of every unit in every run."""
    units = _units(runs)
    m = np.array([[r.doc["units"][u]["busy"] if u in r.doc["units"] else np.nan for u in units] for r in runs])
    fig = _fig(1.3 * len(units) + 4.5, 0.42 * len(runs) + 1.6)
    ax = fig.subplots()
    im = ax.imshow(m, vmin=0, vmax=1, cmap="viridis", aspect="auto")
    ax.set_xticks(range(len(units)))
    ax.set_xticklabels(units)
    ax.set_yticks(range(len(runs)))
    ax.set_yticklabels([r.label for r in runs], fontsize=8)
    for i, r in enumerate(runs):
        lanes = verdict_of(r.doc).get("lanes") or {}
        useful = lanes.get("utilization", {})
        for j, u in enumerate(units):
            if not math.isnan(m[i, j]):
                text = fmt.pct(m[i, j]) + (f"\n{fmt.pct(useful[u])} useful" if u in useful else "")
                ax.text(j, i, text, ha="center", va="center", fontsize=7 if u in useful else 8,
                        color="white" if m[i, j] < 0.6 else "black")
            else:
                ax.text(j, i, "no such unit", ha="center", va="center", fontsize=7, color="#888")
    cb = fig.colorbar(im, ax=ax, fraction=0.04)
    cb.set_label("busy share of the run")
    ax.set_xlabel("unit")
    rows = [[r.label, u, r.doc["units"][u]["busy"],
             (verdict_of(r.doc).get("lanes") or {}).get("utilization", {}).get(u)]
            for r in runs for u in units if u in r.doc["units"]]
    return Figure("utilization", "Per-unit utilization",
                  "Busy share of each unit's time per run (1 = busy every cycle of the run); for the dot arrays "
                  "also the useful share: useful MACs / (multipliers x cycles), lower when head widths leave "
                  "lanes idle.",
                  fig, ["run", "unit", "busy", "useful_macs"], rows)


def _peaks(doc):
    cfg = doc["arch"]["config"]
    return cfg["dot"]["multipliers"] * cfg["clock_ghz"], doc["dram"]["peak_gbps"]


def compute_ceiling(doc):
    """GMAC/s the closed-form compute bound allows this run: its MACs over ``bounds.compute_cycles``.

    Below the multiplier peak when head widths leave lanes idle or another
    unit (softmax, top-k) bounds the compute side -- the ceiling the table's
    "of roofline" is measured against.
    """
    b = doc["bounds"]
    clock = doc["arch"]["config"]["clock_ghz"]
    return doc["compute"]["macs"] * clock / b["compute_cycles"] if b["compute_cycles"] else _peaks(doc)[0]


def _legend_outside(ax, **kw):
    """A legend right of the axes, never over the data."""
    return ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, **kw)


def roofline(runs):
    """Roofline (Williams, Waterman, Patterson, CACM 2009) per config with each run's achieved point.

    Solid: the config's roof from its multiplier and bandwidth peaks. Dashed:
    a run's own compute ceiling where it sits below the multiplier peak (lane
    quantization, softmax or top-k throughput). Each point is labelled with
    the run's limit from :func:`sim.limits.verdict_of`, the classification the
    table and the verdicts show.
    """
    fig = _fig(10.5, 5.8)
    ax = fig.subplots()
    configs = []
    for r in runs:
        if r.config_label not in configs:
            configs.append(r.config_label)
    traces = []
    for r in runs:
        if r.trace_label not in traces:
            traces.append(r.trace_label)
    ccol = _color_map(configs, SERIES)
    tmark = _color_map(traces, MARKERS)
    rows = []
    xs = []
    for r in runs:
        peak, bw = _peaks(r.doc)
        oi = r.doc["bounds"]["operational_intensity_mac_per_byte"]
        ach = r.doc["compute"]["macs"] / r.doc["seconds"] / 1e9 if r.doc["seconds"] else 0.0
        att = min(peak, bw * oi) if oi is not None else peak
        ceil = compute_ceiling(r.doc)
        att_run = min(ceil, bw * oi) if oi is not None else ceil
        v = verdict_of(r.doc)
        rows.append([r.label, r.config_label, r.trace_label, peak, bw, oi, ach, att, ceil, att_run,
                     ach / att_run if att_run else None, v["label"]])
        if oi:
            xs.append(oi)
        xs.append(peak / bw)
    lo, hi = min(xs) / 4, max(xs) * 4
    grid = np.geomspace(lo, hi, 200)
    drawn = set()
    for r in runs:
        if r.config_label in drawn:
            continue
        drawn.add(r.config_label)
        peak, bw = _peaks(r.doc)
        ax.plot(grid, np.minimum(peak, bw * grid), color=ccol[r.config_label], lw=1.6,
                label=f"{r.config_label}: {fmt.number(peak)} GMAC/s, {fmt.number(bw)} GB/s")
    annotate = len(runs) <= 12
    for row, r in zip(rows, runs):
        peak, bw, oi, ach, ceil = row[3], row[4], row[5], row[6], row[8]
        if ceil < peak * (1 - 1e-9):
            x0 = ceil / bw
            ax.plot([x0, hi], [ceil, ceil], color=ccol[r.config_label], lw=0.9, ls="--", alpha=0.8)
        if oi:
            ax.scatter([oi], [ach], color=ccol[r.config_label], marker=tmark[r.trace_label], s=55,
                       edgecolor="black", linewidth=0.6, zorder=3)
            if annotate:
                ax.annotate(row[11], (oi, ach), xytext=(5, -9), textcoords="offset points", fontsize=6.5,
                            color="#333")
    ax.plot([], [], color="#555", lw=0.9, ls="--", label="a run's compute ceiling (lanes, softmax, top-k)")
    for t in traces:
        ax.scatter([], [], marker=tmark[t], color="white", edgecolor="black", label=f"trace {t}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlim(lo, hi)
    ax.set_xlabel("operational intensity (MAC per DRAM byte)")
    ax.set_ylabel("throughput (GMAC/s)")
    ax.grid(True, which="both", alpha=0.25)
    _legend_outside(ax, fontsize=7)
    return Figure("roofline", "Roofline with achieved points",
                  "Solid lines: attainable = min(peak compute, peak bandwidth x intensity) per config (Williams, "
                  "Waterman and Patterson, CACM 2009). Dashed: a run's own compute ceiling where head widths "
                  "that leave lanes idle, or the softmax or top-k throughput, keep it below the multiplier "
                  "peak; the table's 'of roofline' is measured against it. Markers: each run's achieved MACs "
                  "per second at its measured intensity (MACs / bytes fetched), labelled with what limits it; "
                  "colour = config, shape = trace.",
                  fig, ["run", "config", "trace", "peak_gmac_per_s", "peak_gbps", "intensity_mac_per_byte",
                        "achieved_gmac_per_s", "attainable_gmac_per_s", "compute_ceiling_gmac_per_s",
                        "attainable_at_ceiling_gmac_per_s", "of_roofline", "limit"], rows)


def _numeric_axes(runs):
    axes = {}
    for r in runs:
        for k, v in r.point.items():
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                axes.setdefault(k, set()).add(v)
    return [k for k, vs in axes.items() if len(vs) > 1]   # in the order the points name them


def linked_axes(runs, axes):
    """``axes`` grouped so that axes whose values move together (one-to-one over the runs) share a group."""
    groups = []
    for a in axes:
        for g in groups:
            b = g[0]
            pairs = {(r.point.get(a), r.point.get(b)) for r in runs if a in r.point and b in r.point}
            if len({x for x, _ in pairs}) == len(pairs) == len({y for _, y in pairs}):
                g.append(a)
                break
        else:
            groups.append([a])
    return groups


def _value_text(v):
    return f"{v:g}" if isinstance(v, float) else str(v)


def _log_if_spread(ax, values, axis="y", factor=10.0):
    """A log scale when the values span more than ``factor`` (decades read better on it)."""
    vals = [v for v in values if v and v > 0 and math.isfinite(v)]
    if vals and max(vals) / min(vals) > factor:
        (ax.set_yscale if axis == "y" else ax.set_xscale)("log")
        return True
    return False


def _power_of_two(v):
    return float(v).is_integer() and v > 0 and (int(v) & (int(v) - 1)) == 0


def group_names(groups):
    """A legend name per comparable group: the trace, plus build / engine settings where traces repeat."""
    traces = [g[0] for g in groups]
    out = {}
    for g in groups:
        name = g[0]
        if traces.count(name) > 1:
            extra = ", ".join(x for x in (g[1], g[2]) if x)
            name = f"{name} [{extra}]"
        out[g] = name
    return out


def latency(runs):
    """Latency against each sweep axis (linked axes as one), or per config as points (no sweep axis).

    Configs without a sweep axis are categories: drawn as points, never joined
    by lines. A sweep axis is ordered: the best point at each value is joined.
    Latency is on a log scale when it spans more than a decade.
    """
    axes = linked_axes(runs, _numeric_axes(runs))
    groups = []
    for r in runs:
        if group_key(r) not in groups:
            groups.append(group_key(r))
    gcol = _color_map(groups, SERIES)
    gname = group_names(groups)
    rows = []
    key, mean = latency_key(runs)   # the means over refresh phases where every run has one
    lat = [key(r) * 1e6 for r in runs]
    what = "mean latency over refresh phases" if mean else "latency"
    if axes:
        n = len(axes)
        fig = _fig(5.0 * min(n, 3) + 2.6, 4.2 * math.ceil(n / 3))
        axs = fig.subplots(math.ceil(n / 3), min(n, 3), squeeze=False).ravel()
        for ax, keys in zip(axs, axes):
            name = " / ".join(keys)
            for g in groups:
                best = {}
                for r in runs:
                    if group_key(r) == g and all(k in r.point for k in keys):
                        v = tuple(r.point[k] for k in keys)
                        if v not in best or key(r) < key(best[v]):
                            best[v] = r
                xv = sorted(best)
                ys = [key(best[v]) * 1e6 for v in xv]
                if len(keys) == 1:
                    xs = [v[0] for v in xv]
                else:
                    xs = list(range(len(xv)))
                ax.plot(xs, ys, marker="o", color=gcol[g], label=gname[g])
                rows += [[name, " / ".join(_value_text(x) for x in v), gname[g], y, best[v].label]
                         for v, y in zip(xv, ys)]
            if len(keys) == 1:
                vals = [r.point[keys[0]] for r in runs if keys[0] in r.point]
                if min(vals) > 0 and max(vals) / min(vals) >= 4:
                    ax.set_xscale("log", base=2 if all(_power_of_two(v) for v in vals) else 10)
            else:
                vals = sorted({tuple(r.point[k] for k in keys) for r in runs if all(k in r.point for k in keys)})
                ax.set_xticks(range(len(vals)))
                ax.set_xticklabels([" / ".join(_value_text(x) for x in v) for v in vals], rotation=20,
                                   ha="right", fontsize=8)
            _log_if_spread(ax, lat)
            ax.set_xlabel(name + (" (linked: they move together)" if len(keys) > 1 else ""))
            ax.set_ylabel(f"{what} (us)")
            ax.grid(alpha=0.3, which="both")
        for ax in axs[n:]:
            ax.set_visible(False)
        _legend_outside(axs[min(n, 3) - 1], fontsize=8, title="trace", title_fontsize=8)
        caption = (f"{what.capitalize()} of the best point at each value of a sweep axis (best over the other "
                   "axes), one line per trace; axes a sweep moves together (linked) share one panel, labelled "
                   "with both values.")
    else:
        configs = []
        for r in runs:
            if r.config_label not in configs:
                configs.append(r.config_label)
        fig = _fig(max(6.5, 0.9 * len(configs) + 4.5), 4.6)
        ax = fig.subplots()
        x = np.arange(len(configs))
        width = 0.7 / max(len(groups), 1)
        for i, g in enumerate(groups):
            xs, ys = [], []
            for j, c in enumerate(configs):
                rr = [r for r in runs if group_key(r) == g and r.config_label == c]
                if rr:
                    xs.append(j + (i - (len(groups) - 1) / 2) * width)
                    ys.append(key(rr[0]) * 1e6)
                    rows.append(["config", c, gname[g], ys[-1], rr[0].label])
            ax.scatter(xs, ys, marker=MARKERS[i % len(MARKERS)], color=gcol[g], s=45, zorder=3,
                       edgecolor="black", linewidth=0.5, label=gname[g])
        ax.set_xticks(x)
        ax.set_xticklabels(configs, rotation=20, ha="right")
        log = _log_if_spread(ax, lat)
        ax.set_ylabel(f"{what} (us" + (", log scale)" if log else ")"))
        ax.set_xlabel("config")
        ax.grid(alpha=0.3, which="both", axis="y")
        _legend_outside(ax, fontsize=8, title="trace", title_fontsize=8)
        caption = (f"{what.capitalize()} of each config (no sweep axis among the inputs): one point per trace, "
                   "configs are categories, so points are not joined.")
    return Figure("latency", "Latency across the design space", caption, fig,
                  ["axis", "value", "trace", "latency_us", "run"], rows)


def pareto_front(points):
    """Indices of the points not dominated in (x, y), both minimized (the sweep summary's front)."""
    from ..sweep.pareto import front_indices

    return front_indices(points) if len(points) else []


def front_runs(runs):
    """The runs of one group on its latency/energy Pareto front, by the means over the refresh
    phases where every run has them (:func:`latency_key`, :func:`energy_key`)."""
    lat, _ = latency_key(runs)
    en, _ = energy_key(runs)
    return [runs[i] for i in pareto_front([(lat(r), en(r)) for r in runs])]


def pareto(runs):
    """Latency against energy and against area, per trace, with the Pareto front joined.

    A trace whose every run was measured at the refresh phases is drawn by the
    means over them (as the verdicts rank it): latency, and energy where the
    mean energy was measured too (else the run's as configured, said in the caption).
    """
    fig = _fig(12, 5.0)
    ax_e, ax_a = fig.subplots(1, 2)
    groups, configs = [], []
    for r in runs:
        if group_key(r) not in groups:
            groups.append(group_key(r))
        if r.config_label not in configs:
            configs.append(r.config_label)
    gcol = _color_map(groups, SERIES)
    gname = group_names(groups)
    cmark = _color_map(configs, MARKERS) if len(configs) <= len(MARKERS) else {c: "o" for c in configs}
    rows = []
    drawn = {}   # trace name -> (latency is a mean, energy is a mean)
    for g in groups:
        rr = [r for r in runs if group_key(r) == g and "energy" in r.doc and "area" in r.doc]
        if not rr:
            continue
        key, mean = latency_key(rr)
        emean = bool(mean) and all(r.phase_mean_pj for r in rr)
        drawn[gname[g]] = (bool(mean), emean)
        lat = [key(r) * 1e6 for r in rr]
        en = [(r.phase_mean_pj if emean else r.doc["energy"]["total_pj"]) / 1e6 for r in rr]
        ar = [r.doc["area"]["total_mm2"] for r in rr]
        fe = set(pareto_front(list(zip(lat, en))))
        fa = set(pareto_front(list(zip(lat, ar))))
        for ax, ys, front in ((ax_e, en, fe), (ax_a, ar, fa)):
            f = sorted(front, key=lambda i: lat[i])
            ax.plot([lat[i] for i in f], [ys[i] for i in f], color=gcol[g], lw=1.6, zorder=2)
            for i, r in enumerate(rr):
                ax.scatter([lat[i]], [ys[i]], color=gcol[g], marker=cmark[r.config_label], zorder=3,
                           s=60 if i in front else 35, alpha=1.0 if i in front else 0.45,
                           edgecolor="black" if i in front else "none", linewidth=0.6)
        for i, r in enumerate(rr):
            rows.append([gname[g], r.label, lat[i], en[i], ar[i], i in fe, i in fa, bool(mean), emean])
    lat_mean = [t for t, (m, _e) in drawn.items() if m]
    en_mean = [t for t, (_m, e) in drawn.items() if e]

    def label(what, unit, meaned):   # the axis says when every trace's points are means, the caption when some are
        if meaned and len(meaned) == len(drawn):
            return f"mean {what} over refresh phases ({unit})"
        return f"{what} ({unit})" + ("; means for some traces, see caption" if meaned else "")

    for ax, yl in ((ax_e, label("energy per run", "uJ", en_mean)), (ax_a, "area proxy (mm^2)")):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel(label("latency", "us", lat_mean))
        ax.set_ylabel(yl)
        ax.grid(alpha=0.3, which="both")
    ax_e.set_title("latency vs energy", fontsize=10)
    ax_a.set_title("latency vs area proxy", fontsize=10)
    handles = [Line2D([], [], color=gcol[g], lw=1.6, label=f"{gname[g]} (line: Pareto front)") for g in groups]
    if len(configs) <= len(MARKERS):
        handles += [Line2D([], [], ls="", marker=cmark[c], color="#888", markeredgecolor="black", label=c)
                    for c in configs]
    fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 4), fontsize=8,
               frameon=False)
    caption = ("Every run is a point (colour = trace, shape = config); per trace the line joins the "
               "Pareto front, the runs no other run on that trace beats on both axes (drawn solid). "
               "Energy and area are proxies (see the limits).")
    said = " whose every run was measured at the refresh phases, a point is the run's mean latency"
    if en_mean:
        caption += f" For {', '.join(en_mean)},{said} and mean energy over refresh phases."
    own = [t for t in lat_mean if t not in en_mean]
    if own:
        caption += (f" For {', '.join(own)},{said} over refresh phases and its energy as configured (no mean "
                    "energy over them was measured).")
    if lat_mean:
        caption += " The fronts are of the values drawn."
    return Figure("pareto", "Pareto fronts: latency against energy and against area", caption,
                  fig, ["trace", "run", "latency_us", "energy_uj", "area_mm2", "front_energy", "front_area",
                        "latency_is_mean", "energy_is_mean"], rows)


def energy_area(runs):
    """Energy split over units for every run (with its total), and area per unit for every config."""
    rr = [r for r in runs if "energy" in r.doc and "area" in r.doc]
    eunits = []
    for r in rr:
        eunits += [u for u in r.doc["energy"]["units_pj"] if u not in eunits]
    aunits = []
    configs = {}
    for r in rr:
        aunits += [u for u in r.doc["area"]["units_mm2"] if u not in aunits]
        configs.setdefault(r.config_label, r)
    col = _color_map(sorted(set(eunits) | set(aunits)), SERIES)
    fig = _fig(13, 0.32 * max(len(rr), len(configs)) + 2.6)
    ax_e, ax_a = fig.subplots(1, 2, width_ratios=[1.5, 1])
    rows = []
    left = np.zeros(len(rr))
    totals = np.array([r.doc["energy"]["total_pj"] for r in rr], dtype=float)
    for u in eunits:
        pj = np.array([r.doc["energy"]["units_pj"].get(u, 0.0) for r in rr])
        v = np.divide(pj, totals, out=np.zeros_like(pj), where=totals > 0)
        ax_e.barh(range(len(rr)), v, left=left, color=col[u], label=u, height=0.75)
        left += v
        rows += [["energy_uj", r.label, u, r.doc["energy"]["units_pj"].get(u, 0.0) / 1e6] for r in rr]
    for i, t in enumerate(totals):
        ax_e.text(1.01, i, fmt.show(t, "energy"), va="center", fontsize=8)
    ax_e.set_yticks(range(len(rr)))
    ax_e.set_yticklabels([r.label for r in rr], fontsize=8)
    ax_e.invert_yaxis()
    ax_e.set_xlim(0, 1.18)
    ax_e.set_xticks([0, 0.25, 0.5, 0.75, 1])
    ax_e.set_xticklabels(["0", "25%", "50%", "75%", "100%"])
    ax_e.set_xlabel("share of the run's energy (total at the right)")
    ax_e.grid(axis="x", alpha=0.3)
    cl = list(configs)
    left = np.zeros(len(cl))
    atot = np.array([configs[c].doc["area"]["total_mm2"] for c in cl], dtype=float)
    for u in aunits:
        mm2 = np.array([configs[c].doc["area"]["units_mm2"].get(u, 0.0) for c in cl])
        v = np.divide(mm2, atot, out=np.zeros_like(mm2), where=atot > 0)
        ax_a.barh(range(len(cl)), v, left=left, color=col[u], label=u, height=0.75)
        left += v
        rows += [["area_mm2", c, u, configs[c].doc["area"]["units_mm2"].get(u, 0.0)] for c in cl]
    for i, t in enumerate(atot):
        ax_a.text(1.01, i, fmt.show(t, "area"), va="center", fontsize=8)
    ax_a.set_yticks(range(len(cl)))
    ax_a.set_yticklabels(cl, fontsize=8)
    ax_a.invert_yaxis()
    ax_a.set_xlim(0, 1.3)
    ax_a.set_xticks([0, 0.25, 0.5, 0.75, 1])
    ax_a.set_xticklabels(["0", "25%", "50%", "75%", "100%"])
    ax_a.set_xlabel("share of the config's area proxy (total at the right)")
    ax_a.grid(axis="x", alpha=0.3)
    ax_e.set_title("energy by unit", fontsize=10)
    ax_a.set_title("area proxy by unit", fontsize=10)
    handles = {}
    for ax in (ax_e, ax_a):
        for h, lab in zip(*ax.get_legend_handles_labels()):
            handles.setdefault(lab, h)
    fig.legend(list(handles.values()), list(handles), loc="outside lower center", ncol=min(len(handles), 8),
               fontsize=8, frameon=False)
    # the split by unit is recorded for the run as configured only, not for each refresh phase's run
    phased = any(r.phase_mean_s is not None for r in rr)
    return Figure("energy_area", "Energy and area by unit",
                  "Left: each run's energy split over the units that spend it (operations, clock and "
                  "leakage of each unit), its total at the bar's end"
                  + (", of the run as configured (not the mean over refresh phases)" if phased else "")
                  + ". Right: each config's area proxy split over "
                  "its units, its total at the bar's end (totals span decades, so shares are drawn).",
                  fig, ["quantity", "run_or_config", "unit", "value"], rows)


def bandwidth_series(run, bins=40):
    """``(t_us, gbps)``: delivered DRAM bandwidth per time bin, from channel busy intervals."""
    d = run.doc
    cycles = max(float(d["cycles"]), 1.0)
    clock = d["arch"]["config"]["clock_ghz"]
    gbps = d["arch"]["config"]["dram"]["channel_gbps"]
    edges = np.linspace(0.0, cycles, bins + 1)
    busy = np.zeros(bins)
    for chan in run.intervals.get("dram", []):
        if not chan:
            continue
        a = np.asarray(chan, dtype=np.float64)
        lo = np.maximum(a[:, 0][:, None], edges[None, :-1])
        hi = np.minimum(a[:, 1][:, None], edges[None, 1:])
        busy += np.clip(hi - lo, 0, None).sum(axis=0)
    width = edges[1] - edges[0]
    return edges[:-1] / (clock * 1e3), busy / width * gbps


def bandwidth(runs):
    """Delivered DRAM bandwidth over time, one panel per run on its own time axis, its peak always shown."""
    rr = [r for r in runs if r.intervals and r.intervals.get("dram")]
    n = max(len(rr), 1)
    cols = 2 if n > 1 else 1
    fig = _fig(6.0 * cols, 2.7 * math.ceil(n / cols) + 0.4)
    axs = fig.subplots(math.ceil(n / cols), cols, squeeze=False).ravel()
    rows = []
    for ax, r in zip(axs, rr):
        t, g = bandwidth_series(r)
        peak = r.doc["dram"]["peak_gbps"]
        ax.step(t, g, where="post", color=SERIES[0], lw=1.4)
        ax.axhline(peak, color="#d62728", lw=1.0, ls="--")
        ax.text(0.995, peak, f"peak {fmt.show(peak, 'bandwidth')}", transform=ax.get_yaxis_transform(),
                ha="right", va="bottom", fontsize=7, color="#d62728")
        ax.set_ylim(0, max(peak, float(g.max()) if len(g) else 0.0) * 1.15)
        ax.set_xlim(0, r.doc["seconds"] * 1e6)
        ax.set_title(f"{r.label}: mean {fmt.show(r.doc['dram']['achieved_gbps'], 'bandwidth')}", fontsize=9)
        ax.set_xlabel("time (us)", fontsize=8)
        ax.set_ylabel("GB/s", fontsize=8)
        ax.grid(alpha=0.3)
        rows += [[r.label, float(a), float(b)] for a, b in zip(t, g)]
    for ax in axs[len(rr):]:
        ax.set_visible(False)
    return Figure("bandwidth", "Memory bandwidth over time",
                  "Delivered DRAM bandwidth per time bin (channel data-bus busy time x channel rate), one panel "
                  "per run on its own time axis (runs differ in length by decades); dashed: the pool's peak, "
                  "always inside the axis. Only runs simulated with intervals appear.",
                  fig, ["run", "t_us", "gbps"], rows)


# what a unit's interval was, in words, and its colour (fixed, so every timeline reads alike)
TIMELINE_KEYS = {
    "busy": BUSY,
    "waits on memory": "#457b9d",
    "waits for the previous layer": "#8d6cab",
    "waits for a softmax result": "#f4a261",
    "waits for a top-k result": "#e9c46a",
    "waits for the array": "#7fb069",
    "blocked: buffer full": "#d62728",
    "blocked: in-flight or reorder limit": "#c05780",
    "blocked: next unit's input full": "#b0a18f",
    "waits: other": OTHER,
    "idle (done)": IDLE,
}
_MEMORY = {"memory_latency", "memory_queue", "memory_transfer", "memory_bandwidth", "reorder", "fetch",
           "fetch_issue"}


def timeline_key(state, cause):
    """The legend entry of one interval: what the unit was doing or waiting for."""
    if state in ("busy", "idle"):
        return "busy" if state == "busy" else "idle (done)"
    c = cause or ""
    if c.endswith("_buffer_full"):
        return "blocked: buffer full"
    if c in ("inflight_limit", "reorder_full"):
        return "blocked: in-flight or reorder limit"
    if c.endswith("_input_full"):
        return "blocked: next unit's input full"
    if c in _MEMORY:
        return "waits on memory"
    return {"layer_dependency": "waits for the previous layer", "softmax": "waits for a softmax result",
            "topk": "waits for a top-k result", "dot": "waits for the array",
            "dot_pv": "waits for the array"}.get(c, "waits: other")


def _min_width(spans, width):
    """Spans at least ``width`` wide, so an interval narrower than a pixel still shows."""
    return [(a, max(w, width)) for a, w in spans]


def timeline(run, max_channels=16):
    """Per-unit intervals of one run coloured by what the unit waited for, plus each DRAM channel's busy time.

    A blocked interval names what was full (a buffer, the in-flight limit, the
    next unit's input), a starved one what the unit waited for (memory, the
    previous layer, a softmax or top-k result, the array) -- for the fetch unit
    as for any other. Intervals narrower than a pixel are drawn one pixel wide.
    """
    iv = run.intervals
    d = run.doc
    us = 1.0 / (d["arch"]["config"]["clock_ghz"] * 1e3)
    units = [u for u in UNIT_ORDER if u in iv and u != "dram"]
    chans = list(iv.get("dram", []))[:max_channels]
    lanes = units + [f"dram ch{c}" for c in range(len(chans))]
    width_in, dpi = 12.0, 110
    fig = _fig(width_in, 0.36 * len(lanes) + 2.2)
    ax = fig.subplots()
    span_us = d["cycles"] * us
    pixel = span_us / (width_in * dpi * 0.8)   # the axes take at most 80 % of the figure's width
    rows = []
    seen = set()
    for i, u in enumerate(units):
        groups = {}
        for t0, t1, state, cause in iv[u]:
            key = timeline_key(state, cause)
            groups.setdefault(key, []).append((t0 * us, (t1 - t0) * us))
            rows.append([u, t0 * us, t1 * us, state, cause or "", key])
        for key, spans in groups.items():
            seen.add(key)
            ax.broken_barh(_min_width(spans, pixel), (i - 0.4, 0.8), facecolors=TIMELINE_KEYS[key], linewidth=0)
    for j, chan in enumerate(chans):
        spans = [(a * us, (b - a) * us) for a, b in chan]
        ax.broken_barh(_min_width(spans, pixel), (len(units) + j - 0.35, 0.7), facecolors=BUSY, linewidth=0)
        rows += [[f"dram ch{j}", a * us, b * us, "busy", "", "busy"] for a, b in chan]
        seen.add("busy")
    ax.set_yticks(range(len(lanes)))
    ax.set_yticklabels(lanes, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlim(0, span_us)
    ax.set_xlabel("time (us)")
    ax.grid(axis="x", alpha=0.3)
    from matplotlib.patches import Patch
    handles = [Patch(color=c, label=k) for k, c in TIMELINE_KEYS.items() if k in seen]
    fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 5), fontsize=8, frameon=False)
    ax.set_title(f"{run.label}: limited by {verdict_of(d)['label']}", fontsize=10)
    more = len(iv.get("dram", [])) - len(chans)
    return Figure("timeline", f"Timeline of one run: {run.label}",
                  "Each unit's state over the run, coloured by what it did or waited for (blocked: what was "
                  "full; waiting: memory, the previous layer, a softmax or top-k result, the array), and the "
                  "busy time of each DRAM channel's data bus. Intervals narrower than a pixel are drawn one "
                  "pixel wide." + (f" {more} more channels not drawn." if more > 0 else ""),
                  fig, ["lane", "t0_us", "t1_us", "state", "cause", "shown_as"], rows)


SENS_COLORS = {"x2": "#2a9d8f", "/2": "#e76f51", "match": "#457b9d", "switch": "#8d6a9f", "bound": "#b0b0b0"}
SENS_TEXT = {"x2": "doubled", "/2": "halved", "match": "lanes matched to the head width",
             "switch": "memory policy switched", "bound": "refresh off (a bound, not a change)"}
MAX_SENSITIVITY_PANELS = 12
SPEEDUP_TICKS = (0.1, 0.25, 0.5, 0.67, 0.8, 1, 1.25, 1.5, 2, 4, 10)


def sensitivity(runs, table):
    """Tornado chart per run: the measured speedup of each resource doubled and halved (and of
    each switched policy).

    ``table``: ``{id(run): rows}`` from :func:`sim.report.sensitivity.measure`.
    Bars start at 1 (no change) on a log axis: right of it faster, left slower.
    Resources are sorted by their largest effect; a change that is not a valid
    datapath (or failed) is marked "n/a".
    """
    rr = [r for r in runs if table.get(id(r))][:MAX_SENSITIVITY_PANELS]
    cols = min(len(rr), 2)
    nrows = math.ceil(len(rr) / cols)
    fig = _fig(7.0 * cols + 1.5, 3.3 * nrows + 0.6)
    axs = fig.subplots(nrows, cols, squeeze=False).ravel()
    rows = []
    span = 1.05
    for r in runs:
        for row in table.get(id(r), []):
            rows.append([r.label, row["resource"], row["direction"], row["setting"], row["status"], row["cycles"],
                         row["seconds"], row["energy_pj"], row["speedup"], row["energy_ratio"], row["error"] or ""])
            if row["speedup"]:
                span = max(span, row["speedup"], 1 / row["speedup"])
    span *= 1.25
    for ax, r in zip(axs, rr):
        by_res = {}
        for row in table[id(r)]:
            by_res.setdefault(row["resource"], {})[row["direction"]] = row
        order = sorted(by_res, key=lambda k: -max((abs(math.log(x["speedup"])) for x in by_res[k].values()
                                                   if x["speedup"]), default=0.0))
        for y, res in enumerate(order):
            for direction, row in by_res[res].items():
                s = row["speedup"]
                if s is None:
                    ax.text(1.0, y + (0.2 if direction == "/2" else -0.2), f"{SENS_TEXT[direction]}: n/a",
                            ha="center", va="center", fontsize=6.5, color="#777")
                    continue
                yy = y + {"x2": -0.19, "/2": 0.19}.get(direction, 0.0)
                ax.barh(yy, s - 1.0, left=1.0, height=0.36 if direction in ("x2", "/2") else 0.6,
                        color=SENS_COLORS[direction], align="center")
                ax.text(s * (1.03 if s >= 1 else 1 / 1.03), yy, fmt.show(s, "speedup"), va="center",
                        ha="left" if s >= 1 else "right", fontsize=7)
        ax.axvline(1.0, color="black", lw=0.8)
        ax.set_xscale("log")
        ax.set_xlim(1 / span, span)
        ticks = [t for t in SPEEDUP_TICKS if 1 / span <= t <= span]
        ax.xaxis.set_major_locator(FixedLocator(ticks))
        ax.xaxis.set_major_formatter(FixedFormatter([f"{t:g}x" for t in ticks]))
        ax.xaxis.set_minor_locator(NullLocator())
        ax.set_yticks(range(len(order)))
        ax.set_yticklabels(order, fontsize=8)
        ax.set_ylim(len(order) - 0.5, -0.5)
        ax.set_title(r.label, fontsize=9)
        ax.set_xlabel("speedup (baseline cycles / cycles), log scale", fontsize=8)
        ax.grid(axis="x", which="both", alpha=0.25)
    for ax in axs[len(rr):]:
        ax.set_visible(False)
    from matplotlib.patches import Patch
    fig.legend(handles=[Patch(color=c, label=SENS_TEXT[k]) for k, c in SENS_COLORS.items()],
               loc="outside lower center", ncol=3, fontsize=8, frameon=False)
    more = len([r for r in runs if table.get(id(r))]) - len(rr)
    return Figure("sensitivity", "What to change: measured sensitivity",
                  "For each run, the same trace simulated again with one resource doubled (right of 1: faster) "
                  "or halved, or a memory-controller refresh policy switched (grey: refresh off, what "
                  "refresh costs, which no policy can beat); the bar is the measured speedup, "
                  "baseline cycles over cycles, the baseline "
                  "rerun by the same build. n/a: the change is not a valid datapath (the data file says why)."
                  + (f" {more} more runs in the data file." if more > 0 else ""),
                  fig, ["run", "resource", "direction", "setting", "status", "cycles", "seconds", "energy_pj",
                        "speedup", "energy_ratio", "error"], rows)


PROBE_COLUMNS = ("pattern", "offered_fraction", "delivered_gbps", "efficiency", "mean_latency_ns")


def memory_probe(paths):
    """Latency against delivered bandwidth per access pattern, from ``attnsim dram probe --csv`` files."""
    import csv
    import os

    from .inputs import ReportError

    curves = {}
    for path in paths:
        label = os.path.splitext(os.path.basename(path))[0]
        try:
            with open(path, newline="", encoding="utf-8") as fh:
                reader = csv.DictReader(fh)
                missing = [c for c in PROBE_COLUMNS if c not in (reader.fieldnames or ())]
                if missing:
                    raise ReportError(path, "header", ",".join(reader.fieldnames or ()),
                                      "expected a curve written by attnsim dram probe --csv (columns "
                                      + ", ".join(PROBE_COLUMNS) + ")")
                for line, r in enumerate(reader, 2):
                    try:
                        vals = [float(r[c]) for c in PROBE_COLUMNS[1:]]
                    except (TypeError, ValueError):
                        raise ReportError(path, f"line {line}", r, "expected numbers in "
                                          + ", ".join(PROBE_COLUMNS[1:])) from None
                    curves.setdefault((label, r["pattern"]), []).append(vals)
        except (OSError, UnicodeDecodeError) as exc:
            raise ReportError(path, "<file>", path, f"expected a readable probe CSV ({exc})") from None
    fig = _fig(11, 4.4)
    ax, bx = fig.subplots(1, 2, width_ratios=[3, 2])
    col = _color_map(sorted({p for _, p in curves}), SERIES)
    marks = _color_map(sorted({f for f, _ in curves}), MARKERS)
    rows, best = [], {}
    for (label, pattern), pts in curves.items():
        pts = sorted(pts)
        gbps = [p[1] for p in pts]
        lat = [p[3] for p in pts]
        ax.plot(gbps, lat, marker=marks[label], color=col[pattern], lw=1.3, ms=4,
                label=f"{pattern}" + (f" ({label})" if len(marks) > 1 else ""))
        best[(label, pattern)] = max(p[2] for p in pts)
        rows += [[label, pattern] + p for p in pts]
    ax.set_xlabel("delivered bandwidth (GB/s)")
    ax.set_ylabel("mean read latency (ns), log scale")
    ax.set_yscale("log")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    keys = list(best)
    bx.barh(range(len(keys)), [best[k] * 100 for k in keys], color=[col[p] for _, p in keys])
    bx.set_yticks(range(len(keys)))
    bx.set_yticklabels([p if len(marks) == 1 else f"{p} ({f})" for f, p in keys], fontsize=8)
    bx.invert_yaxis()
    bx.set_xlim(0, 100)
    bx.set_xlabel("most delivered, % of the pool's peak")
    bx.grid(axis="x", alpha=0.3)
    return Figure("memory_probe", "Memory probe: latency against delivered bandwidth",
                  "Open-loop probe of a memory config (attnsim dram probe): each point one offered load; left, "
                  "the mean read latency against the bandwidth delivered (reads and writes); right, the most "
                  "each access pattern delivered as a share of the peak.",
                  fig, ["probe", "pattern"] + list(PROBE_COLUMNS[1:]), rows)


def estimated_latency(groups):
    """Each trace's runs by the whole trace's latency (a sampled run's estimate), its reach as
    an error bar; runs not ranked drawn hatched. ``groups``: ``[(trace label, ranked)]`` from
    :func:`sim.report.estimates.rank`."""
    n = sum(len(rk) for _t, rk in groups)

    def name(r, trace):   # one trace: it goes in the axis title instead
        return r.config_label if len(groups) == 1 else f"{r.config_label} / {trace}"

    longest = max((len(name(r, t)) for t, rk in groups for r, *_rest in rk), default=0)
    fig = _fig(min(6.0 + 0.065 * longest, 20.0), 0.34 * n + 0.5 * len(groups) + 1.4)
    ax = fig.subplots()
    rows, ticks, labels = [], [], []
    y = 0.0
    for g, (trace, ranked) in enumerate(groups):
        color = SERIES[g % len(SERIES)]
        for r, e, _slower, _apart in ranked:
            us = e.seconds * 1e6
            ax.barh(y, us, height=0.7, color=color if e.ranked else "white", edgecolor=color,
                    hatch=None if e.ranked else "//", xerr=us * e.reach if e.reach else None,
                    error_kw={"ecolor": "#333", "capsize": 3, "lw": 1})
            ticks.append(y)
            labels.append(name(r, trace))
            rows.append([trace, r.config_label, e.made, us, e.reach, e.ranked])
            y += 1.0
        y += 0.6
    ax.set_yticks(ticks)
    ax.set_yticklabels(labels, fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("latency of the whole trace (us; a sampled run's estimate)")
    if len(groups) == 1:
        ax.set_title(f"trace {groups[0][0]}", fontsize=9)
    _log_if_spread(ax, [row[3] for row in rows], axis="x")
    ax.grid(axis="x", alpha=0.3)
    return Figure("estimated_latency", "Whole-trace latency, sampled runs estimated",
                  "Each trace's runs, fastest first: a whole run's latency, a sampled run's estimate of its "
                  "whole trace with its reach either side (the lead below which it is not told apart from "
                  "another); hatched: not ranked.",
                  fig, ["trace", "run", "simulated", "latency_us", "reach", "ranked"], rows)
