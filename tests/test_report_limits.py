"""One classification of what limits a run, read alike by the table, the verdict, the summary and the roofline.

Property test (hypothesis) over random datapaths and random synthetic
workloads: the resource the written verdict names is the one the comparison
table shows, the terminal summary and the roofline figure's data say the
same, and a run is never called bandwidth-bound when DRAM delivered less than
half its peak and the closed-form memory bound is under half the run (the
rule is checked from the document's own numbers, not from the classifier).

Also the lane case: head width 32 on an array of 128 lanes is named as lane
under-use, with lane utilization = useful MACs / (multipliers x cycles)
computed here from the counts.
"""

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.report import figures as F
from sim.report.inputs import Run
from sim.report.tables import COLUMNS, display_rows
from sim.report.verdict import write_verdict
from sim.result import format_summary
from sim.trace.synth import synth_trace

# the opening words of the verdict for each kind of limit (the test's own reading of the text)
OPENING = {
    "The dot-product array limits it": ("compute", "dot"),
    "The p.V array limits it": ("compute", "dot_pv"),
    "The softmax unit limits it": ("unit", "softmax"),
    "The top-k selector limits it": ("unit", "topk"),
    "DRAM bandwidth limits it": ("memory_bandwidth", None),
    "Memory latency limits it": ("memory_latency", None),
    "A dependency limits it": ("dependency", None),
    "Buffer room limits it": ("buffer", None),
}
LABEL_KIND = {"compute": "compute", "softmax unit": "unit", "top-k selector": "unit",
              "memory bandwidth": "memory_bandwidth", "memory latency": "memory_latency",
              "dependency": "dependency", "buffer": "buffer"}


def kind_of_label(label):
    return next(k for prefix, k in LABEL_KIND.items() if label.startswith(prefix))


archs = st.fixed_dictionaries({
    "dot.lanes": st.sampled_from([16, 32, 64, 128]),
    "dot.multipliers_per_lane": st.sampled_from([1, 2, 4, 8, 16, 32]),
    "dot.arrays": st.sampled_from(["shared", "separate"]),
    "dram.channels": st.sampled_from([1, 2, 4, 8]),
    "dram.channel_gbps": st.sampled_from([2.0, 8.0, 32.0, 128.0]),
    "buffers.key_kib": st.sampled_from([8, 32, 256]),
    "buffers.value_kib": st.sampled_from([8, 32, 256]),
    "softmax.lanes": st.sampled_from([1, 4, 16, 64]),
    "topk.comparators": st.sampled_from([1, 4, 32]),
    "fetch.inflight": st.sampled_from([2, 8, 32]),
})
workloads = st.fixed_dictionaries({
    "prompt_tokens": st.integers(16, 160),
    "decode_steps": st.integers(0, 6),
    "layers": st.integers(1, 3),
    "heads": st.integers(1, 6),
    "head_dim": st.sampled_from([32, 64, 96]),
    "token_keep": st.sampled_from([1.0, 0.8, 0.5]),
    "value_keep": st.sampled_from([1.0, 0.5]),
    "lsb_fraction": st.sampled_from([0.0, 0.3]),
    "include_prefill": st.booleans(),
    "seed": st.integers(0, 3),
})


def make_arch(a):
    over = dict(a)
    per = over.pop("dot.multipliers_per_lane")
    over["dot.multipliers"] = over["dot.lanes"] * per * (2 if over["dot.arrays"] == "separate" else 1)
    return sim.load_arch("arch_configs/mid.yaml").with_overrides(over)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(archs, workloads)
def test_table_verdict_summary_and_roofline_agree(a, w):
    if not w["include_prefill"] and w["decode_steps"] == 0:
        w = {**w, "include_prefill": True}
    trace = synth_trace(**w)
    doc = sim.simulate(make_arch(a), trace, keep_intervals=False).to_dict()
    run = Run(doc, "hypothesis")
    # the table
    header, rows = display_rows([run])
    table = dict(zip(header, rows[0]))
    label = table["limited by"]
    kind = kind_of_label(label)
    # the verdict names the same kind (and the same unit for compute or a unit)
    text = write_verdict(run)
    opening = next((o for o in OPENING if text.startswith(o)), None)
    assert opening is not None, text
    v_kind, v_unit = OPENING[opening]
    assert v_kind == kind, (label, text)
    head = label.split(" (close: ")[0]          # a close runner-up is named after the limit
    if v_unit is not None:
        assert f"({v_unit})" in head or head in ("softmax unit", "top-k selector")
    close = doc["verdict"]["close_to"]
    if close:   # named in the label and the verdict, and really within 5 points of the limit
        assert label == f"{head} (close: {close['label']})" and "comes close behind" in text
        assert doc["verdict"]["share"] - close["share"] <= 0.05
    # the terminal summary's limit line and the roofline figure's data
    limit_line = next(ln for ln in format_summary(doc).splitlines() if ln.strip().startswith("limit "))
    assert limit_line.split(None, 1)[1].startswith(label + ":")
    fig = F.roofline([run])
    assert fig.rows[0][fig.header.index("limit")] == label
    # never bandwidth-bound when DRAM ran under half its peak and the memory bound is under half the run
    dram = doc["dram"]
    achieved = dram["achieved_gbps"] / dram["peak_gbps"]
    mem_bound = doc["bounds"]["memory_cycles"] / doc["cycles"]
    if achieved < 0.5 and mem_bound < 0.5:
        assert kind != "memory_bandwidth", (label, achieved, mem_bound)


@pytest.fixture(scope="module")
def lane_case():
    """Head width 32 (a small encoder's) on an array of 128 lanes, compute-heavy prefill."""
    trace = synth_trace(prompt_tokens=256, decode_steps=0, layers=2, heads=6, head_dim=32, seed=5,
                        name="narrow_heads")
    arch = sim.load_arch("arch_configs/hbm2_stack.yaml")
    assert arch.dot.lanes == 128
    return arch, trace, sim.simulate(arch, trace, keep_intervals=False).to_dict()


def test_lane_underuse_is_named(lane_case):
    arch, _trace, doc = lane_case
    v = doc["verdict"]
    assert v["limit"] == "compute" and v["lane_underuse"]
    # useful MACs / (multipliers x cycles) per array, from the counts (separate arrays: half each)
    half = arch.dot.multipliers // 2
    qk = (doc["compute"]["macs_qk"] + doc["compute"]["macs_lsb_recompute"]) / (half * doc["cycles"])
    assert v["lanes"]["utilization"]["dot"] == pytest.approx(qk, rel=1e-9)
    # 32 of 128 lanes do useful work in each pass
    assert v["lanes"]["fill"] == pytest.approx(32 / 128)
    assert v["lanes"]["utilization"]["dot"] < doc["units"]["dot"]["busy"] * 0.26
    text = write_verdict(Run(doc, "lanes"))
    assert "lane under-use" in text and "head width 32" in text and "128 lanes" in text
    summary = format_summary(doc)
    assert "head width 32 on 128 lanes" in summary


def test_lane_fill_by_hand_for_mixed_widths():
    """fill = useful MACs / lane slots the array spends: for widths 32 and 96 on 64 lanes, by hand."""
    from sim.limits import lane_figures

    doc = {"compute": {"macs_by_head_dim": {"32": 1000, "96": 3000}, "macs": 4000, "macs_qk": 2000,
                       "macs_lsb_recompute": 0, "macs_pv": 2000},
           "arch": {"config": {"dot": {"lanes": 64, "multipliers": 256, "arrays": "shared"}}}, "cycles": 100}
    # 32 wide: one pass of 64 lanes (half used); 96 wide: two passes of 64 (96 of 128 used)
    slots = 1000 * 64 / 32 + 3000 * 128 / 96
    lf = lane_figures(doc)
    assert lf["fill"] == pytest.approx(4000 / slots)
    assert lf["utilization"]["dot"] == pytest.approx(4000 / (256 * 100))
    assert lf["mismatch"] and lf["head_dims"] == [32, 96]
    assert not math.isnan(lf["fill"])


def test_table_columns_have_units_or_are_text():
    for c in COLUMNS:
        assert c.quantity is None or "(" in c.header or c.header in ("cycles", "MACs")
