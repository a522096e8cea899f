"""Report figures that hold up: no legend over the data, thin intervals visible, categories not joined.

The overlap check asks matplotlib itself where things landed: after drawing
each figure with the Agg renderer it takes every legend's window extent and
every plotted point (line vertices, scatter offsets, bar rectangles) in
display pixels, and fails if a point inside its axes falls inside a legend box.
"""

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PathCollection, PolyCollection

import sim
from sim.report import figures as F
from sim.report import sensitivity as S
from sim.report.inputs import Run, label_runs

# enough runs and series that a legend placed inside the axes has nowhere free to go (the first
# release's bandwidth figure covered its lines with these)
TRACES = ("traces/demo_decode.yaml", "traces/captured_short_fit95.npz", "traces/captured_short_moderate.npz",
          "traces/synth_decode.npz")


@pytest.fixture(scope="module")
def runs():
    out = []
    for t in TRACES:
        for c in ("edge", "mid", "server", "hbm2_stack"):
            res = sim.simulate(f"arch_configs/{c}.yaml", t)
            out.append(Run(res.to_dict(), c, trace_path=t, intervals=res.intervals))
    label_runs(out)
    return out


@pytest.fixture(scope="module")
def sweep_runs():
    """A sweep with a linked pair of axes (channels and their rate move together) and a free axis."""
    base = sim.load_arch("arch_configs/edge.yaml")
    out = []
    for ch, gbps in ((1, 17.0), (2, 8.5), (4, 4.25)):
        for inflight in (4, 16):
            point = {"dram.channels": ch, "dram.channel_gbps": gbps, "fetch.inflight": inflight}
            doc = sim.simulate(base.with_overrides(point), TRACES[0], keep_intervals=False).to_dict()
            out.append(Run(doc, "sweep", point=point, trace_path=TRACES[0]))
    label_runs(out)
    return out


def all_figures(runs, sweep_runs):
    table, _notes = S.measure(runs[:1], jobs=1)
    return [F.stall_breakdown(runs), F.utilization(runs), F.roofline(runs), F.latency(runs),
            F.latency(sweep_runs), F.pareto(runs), F.energy_area(runs), F.bandwidth(runs), F.timeline(runs[0]),
            F.sensitivity(runs, table)]


def along(xy, step=2.0):
    """Points every ``step`` pixels along a drawn polyline (a legend must not cover its segments either)."""
    out = [xy[:1]]
    for a, b in zip(xy[:-1], xy[1:]):
        if not (np.isfinite(a).all() and np.isfinite(b).all()):
            continue
        n = int(np.hypot(*(b - a)) // step) + 1
        out.append(a + (b - a) * np.linspace(0, 1, n + 1)[1:, None])
    return np.vstack(out)


def plotted_points(ax, renderer):
    """Display coordinates of everything plotted in ``ax`` that lies inside it: (points, boxes)."""
    inside = ax.get_window_extent(renderer)
    pts = []
    for line in ax.get_lines():
        if line.get_visible() and len(line.get_xydata()):
            xy = np.asarray(line.get_xydata(), dtype=float)
            if line.get_drawstyle() == "steps-post" and len(xy) > 1:
                xy = np.column_stack([np.repeat(xy[:, 0], 2)[1:], np.repeat(xy[:, 1], 2)[:-1]])
            pts.append(along(line.get_transform().transform(xy)) if line.get_linestyle() not in ("", "None")
                       else line.get_transform().transform(xy))
    boxes = []
    for coll in ax.collections:
        if isinstance(coll, PathCollection) and len(coll.get_offsets()):
            pts.append(coll.get_offset_transform().transform(np.asarray(coll.get_offsets(), dtype=float)))
        elif isinstance(coll, PolyCollection):
            boxes += [p.get_extents(coll.get_transform()) for p in coll.get_paths()]
    for patch in ax.patches:
        boxes.append(patch.get_window_extent(renderer))
    pts = np.vstack(pts) if pts else np.zeros((0, 2))
    pts = pts[np.isfinite(pts).all(axis=1)]
    keep = (pts[:, 0] >= inside.x0) & (pts[:, 0] <= inside.x1) & (pts[:, 1] >= inside.y0) & (pts[:, 1] <= inside.y1)
    boxes = [b for b in boxes if b.width > 0 and b.height > 0 and b.overlaps(inside)]
    return pts[keep], boxes


def test_no_legend_box_covers_plotted_points(runs, sweep_runs):
    for fg in all_figures(runs, sweep_runs):
        canvas = FigureCanvasAgg(fg.fig)
        canvas.draw()
        renderer = canvas.get_renderer()
        legends = [ax.get_legend() for ax in fg.fig.axes if ax.get_legend()] + list(fg.fig.legends)
        for leg in legends:
            box = leg.get_window_extent(renderer)
            for ax in fg.fig.axes:
                if not ax.get_visible():
                    continue
                pts, boxes = plotted_points(ax, renderer)
                inside = ((pts[:, 0] > box.x0) & (pts[:, 0] < box.x1) & (pts[:, 1] > box.y0) & (pts[:, 1] < box.y1))
                assert not inside.any(), (fg.name, ax.get_title(), pts[inside][:3])
                for b in boxes:
                    ix = min(b.x1, box.x1) - max(b.x0, box.x0)
                    iy = min(b.y1, box.y1) - max(b.y0, box.y0)
                    assert not (ix > 0.5 and iy > 0.5), (fg.name, ax.get_title(), b)


def test_timeline_intervals_at_least_one_pixel(runs):
    fg = F.timeline(runs[0])
    canvas = FigureCanvasAgg(fg.fig)
    canvas.draw()
    ax = fg.fig.axes[0]
    widths = [p.get_extents(c.get_transform()).width for c in ax.collections if isinstance(c, PolyCollection)
              for p in c.get_paths()]
    assert widths and min(widths) >= 0.99
    # and the data file keeps every interval's true length
    assert min(r[2] - r[1] for r in fg.rows) < (ax.get_xlim()[1] / 2000)


def test_timeline_fetch_lane_names_what_it_waits_for(runs):
    fg = F.timeline(runs[0])
    shown = {(r[3], r[4]): r[5] for r in fg.rows if r[0] == "fetch"}
    for (state, cause), key in shown.items():
        if cause.endswith("_buffer_full"):
            assert key == "blocked: buffer full"
        if state == "starved" and cause == "softmax":
            assert key == "waits for a softmax result"
        assert "upstream" not in key


def test_categorical_configs_are_points_and_linked_axes_one_panel(runs, sweep_runs):
    fg = F.latency(runs)
    ax = fg.fig.axes[0]
    assert not [ln for ln in ax.get_lines() if len(ln.get_xdata()) > 1]   # nothing joins categories
    lat = [r.doc["seconds"] for r in runs]
    assert ax.get_yscale() == ("log" if max(lat) / min(lat) > 10 else "linear")   # decades read on a log axis
    fg = F.latency(sweep_runs)
    axes = {r[0] for r in fg.rows}
    assert axes == {"dram.channels / dram.channel_gbps", "fetch.inflight"}
    linked = [r for r in fg.rows if r[0] == "dram.channels / dram.channel_gbps"]
    assert {r[1] for r in linked} == {"1 / 17", "2 / 8.5", "4 / 4.25"}


def test_bandwidth_panels_show_each_peak(runs):
    fg = F.bandwidth(runs)
    shown = [ax for ax in fg.fig.axes if ax.get_visible()]
    assert len(shown) == len(runs)
    for ax, r in zip(shown, runs):
        assert ax.get_ylim()[1] >= r.doc["dram"]["peak_gbps"]          # the peak is inside the axis
        assert ax.get_xlim()[1] == pytest.approx(r.doc["seconds"] * 1e6)  # each run on its own time axis
