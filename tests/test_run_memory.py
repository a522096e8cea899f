"""A run's memory does not grow with its transactions: the logs that did are written out
or summed as the run goes, and the figures read from them do not change.

References: NumPy's ``percentile`` (linear method) for the latency percentile; the
integral of a step function (occupancy = time-average of transactions present, the
quantity of Little's law, L = lambda W; Little, Operations Research 9(3), 1961) for the
occupancy curve, integrated here by a plain loop over the sorted events.
"""

import numpy as np
import pytest

import sim
from sim.engine import dram as dram_mod
from sim.engine import spill
from sim.engine import stats as stats_mod
from sim.trace.synth import synth_trace


@pytest.mark.parametrize("n,keep,seed", [(1, 1, 0), (2, 1, 1), (1000, 7, 2), (5000, 1000, 3), (20001, 512, 4)])
def test_latency_percentile_written_out_equals_numpy_percentile(n, keep, seed, monkeypatch):
    """Source: numpy.percentile (linear). Values with many ties (latencies repeat) and a
    spread; with the log written out every ``keep`` entries and gathering forced to narrow."""
    monkeypatch.setattr(spill, "_GATHER", 50)
    rng = np.random.default_rng(seed)
    vals = np.where(rng.random(n) < 0.5, rng.integers(20, 40, n).astype(float), rng.gamma(2.0, 30.0, n))
    log = spill.LatencyLog(keep=keep)
    for v in vals.tolist():
        log.append(v)
    assert len(log) == n
    assert (log._file is not None) == (n >= keep)
    for q in (0, 5, 50, 95, 99.9, 100):
        assert log.percentile(q) == np.percentile(vals, q)
    assert np.array_equal(log.all(), vals)


def _occupancy_by_hand(events, total, bins):
    """Time-average level per bin of [0, total) of the step function that the events
    (time, +1/-1) make; at one instant departures count before arrivals."""
    events = sorted(events, key=lambda e: (e[0], e[1]))
    width = total / bins
    area = [0.0] * bins
    level, peak = 0, 0
    for (t, d), nxt in zip(events, events[1:] + [(max(total, events[-1][0]), 0)]):
        level += d
        peak = max(peak, level)
        a, b = t, nxt[0]
        for k in range(bins):          # the part of [a, b) inside bin k
            lo, hi = max(a, k * width), min(b, (k + 1) * width)
            if hi > lo:
                area[k] += level * (hi - lo)
    return [x / width for x in area], sum(area) / total, peak


@pytest.mark.parametrize("keep,seed", [(3, 0), (16, 1), (10_000, 2)])
def test_occupancy_written_out_equals_the_step_function_integral(keep, seed):
    """Source: integral of a step function (Little 1961's L, time-average number present).
    Transactions arrive at the present and leave later, as in the pool; the log writes out
    the past every ``keep`` entries. Exact equality with the log kept whole in memory."""
    rng = np.random.default_rng(seed)
    whole, parts = spill.OccupancyLog(keep=1 << 30), spill.OccupancyLog(keep=keep)
    events, now, pending = [], 0.0, []
    for _ in range(400):
        now += float(rng.choice([0.0, 1.0, rng.exponential(3.0)]))
        for log in (whole, parts):
            for t in [t for t in pending if t <= now]:
                log.t.append(t)
                log.d.append(-1)
        events += [(t, -1) for t in pending if t <= now]
        pending = [t for t in pending if t > now]
        for log in (whole, parts):
            log.t.append(now)
            log.d.append(1)
            if len(log) >= log.keep:
                log.spill(now)
        events.append((now, 1))
        pending.append(now + float(rng.choice([0.0, 2.0, rng.exponential(10.0)])))
    for log in (whole, parts):
        for t in pending:
            log.t.append(t)
            log.d.append(-1)
    events += [(t, -1) for t in pending]
    total = now * 0.9                      # the curve's end may fall before the last event
    bins = 8
    by_hand, mean, peak = _occupancy_by_hand(events, total, bins)
    at, edges, got_peak = parts.curve(total, bins)
    assert (parts._file is not None) == (keep < 400)
    assert np.diff(at) / np.diff(edges) == pytest.approx(by_hand, rel=1e-9, abs=1e-9)
    assert at[-1] / total == pytest.approx(mean, rel=1e-9)
    assert got_peak == peak
    at0, _, peak0 = whole.curve(total, bins)
    assert at.tolist() == at0.tolist() and got_peak == peak0   # the same sums, in the same order
    assert parts.in_flight(now) == whole.in_flight(now) == sum(d for t, d in events if t <= now)


@pytest.mark.parametrize("model", ["banked", "fixed-latency"])
def test_a_long_run_sums_its_logs_as_it_goes_and_reports_the_same(monkeypatch, model):
    """With small blocks, the fetch unit's log is summed and dropped during the run and the
    pool's latency and occupancy logs are written out; the document equals that of the same
    run with every log kept whole (the same sums in the same order), and the fetch log held
    at the end is a fraction of the intervals the run logged."""
    monkeypatch.setattr(dram_mod, "FOLD_INTERVALS", 256)
    monkeypatch.setattr(stats_mod, "STALL_BLOCK", 64)
    arch = sim.load_arch("arch_configs/mid.yaml").with_overrides({"dram.model": model})
    trace = synth_trace(prompt_tokens=2048, decode_steps=4, shape="dec-8b", layers=1, causal=True, seed=1)

    dropped, pools = [], []
    real_drop = stats_mod.UnitState.drop_first
    monkeypatch.setattr(stats_mod.UnitState, "drop_first", lambda self, n: (dropped.append(n), real_drop(self, n)))
    real_init = dram_mod.ChannelPool.__init__
    monkeypatch.setattr(dram_mod.ChannelPool, "__init__",
                        lambda self, *a, **k: (real_init(self, *a, **k), pools.append(self))[0])
    monkeypatch.setattr(spill.LatencyLog.__init__, "__defaults__", (100,))
    monkeypatch.setattr(spill.OccupancyLog.__init__, "__defaults__", (100,))
    folded = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    pool = pools[-1]
    assert pool.latencies._file is not None and pool._occ._file is not None
    assert len(pool._occ) < 0.2 * 2 * pool.txns
    logged = sum(dropped)
    assert len(dropped) >= 3 and logged > 4 * pool.txns // 5

    monkeypatch.setattr(stats_mod.BusyFold, "_fold", lambda self: None)
    monkeypatch.setattr(spill.LatencyLog.__init__, "__defaults__", (1 << 30,))
    monkeypatch.setattr(spill.OccupancyLog.__init__, "__defaults__", (1 << 30,))
    whole = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert pools[-1].latencies._file is None and pools[-1]._occ._file is None
    for doc in (folded, whole):
        for key in ("build", "wall", "wall_seconds"):
            doc.pop(key, None)
    assert folded == whole


def test_the_up_front_check_counts_a_timeline_but_not_the_logs(monkeypatch):
    """On a machine of 2 GiB (half of it the limit), a causal 8k-token prefill on mid
    (about 115,000 transactions) fits without a timeline, whose logs do not grow, and is
    refused with one line naming the way out when every interval is to be kept
    (16 KiB per transaction measured with the timeline's lists; arithmetic)."""
    from sim import budget
    from sim.errors import InputError

    monkeypatch.setattr(budget, "physical_memory", lambda: 2 * 2**30)
    arch = sim.load_arch("arch_configs/mid.yaml")
    trace = synth_trace(prompt_tokens=8192, decode_steps=0, shape="dec-8b", layers=1, causal=True, seed=1)
    n = budget.transactions(arch, trace)
    assert 2**30 < n * budget.TIMELINE_BYTES_PER_TXN
    budget.check_run(arch, trace)                       # no timeline: quiet
    with pytest.raises(InputError) as err:
        sim.simulate(arch, trace, keep_intervals=True)  # refused before the run
    msg = str(err.value)
    assert "\n" not in msg and "without a timeline" in msg and f"{n:,}" in msg


def test_plans_kept_for_reuse_are_bounded_by_their_chunks(monkeypatch):
    """Step plans are kept for reuse up to SHAPE_CACHE_CHUNKS planned chunks; a smaller bound
    re-plans more often and gives the same document (a plan depends only on its step)."""
    from sim.engine import program as program_mod

    arch = sim.load_arch("arch_configs/mid.yaml")
    trace = synth_trace(prompt_tokens=512, decode_steps=6, layers=3, heads=4, seed=2)
    whole = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    seen = []
    real = program_mod.ProgramBuilder._shape

    def shape(self, step, layer):
        out = real(self, step, layer)
        seen.append((self.cached_chunks, sum(s.chunks for s in self.shapes.values()), len(self.shapes)))
        return out

    monkeypatch.setattr(program_mod.ProgramBuilder, "_shape", shape)
    monkeypatch.setattr(program_mod, "SHAPE_CACHE_CHUNKS", 40)
    small = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert all(cached == held <= 40 for cached, held, _n in seen)
    assert max(n for _c, _h, n in seen) >= 1
    for doc in (whole, small):
        for key in ("build", "wall", "wall_seconds"):
            doc.pop(key, None)
    assert small == whole


@pytest.mark.parametrize("arch_name,kw", [
    ("edge", dict(prompt_tokens=700, decode_steps=3, layers=2, heads=4, causal=True, token_keep=0.7,
                  lsb_fraction=0.5)),
    ("mid", dict(prompt_tokens=1500, decode_steps=2, shape="dec-1b", layers=1, causal=True, window=256,
                 batch=2)),
])
def test_a_banded_step_planned_block_by_block_holds_a_few_blocks_and_gives_the_same_document(
        arch_name, kw, monkeypatch):
    """A consistency check, no outside source: a causal or windowed step whose blocks would
    stream more than SHAPE_CACHE_CHUNKS chunks is planned block by block as it is made.
    Forced here on every banded step (bound 0), and made 4 blocks at a time: the document is
    the one of plans made whole, and the block plans alive at once stay a few (the blocks
    made at a time, those awaiting p.V, and the one being planned), not the step's."""
    import gc

    from sim.engine import band as band_mod
    from sim.engine import program as program_mod
    from sim.engine.tiling import BlockPlan

    arch = sim.load_arch(f"arch_configs/{arch_name}.yaml")
    trace = synth_trace(**kw, seed=3)
    monkeypatch.setattr(program_mod, "BLOCKS_PER_MAKE", 4)
    whole = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    planned, alive = [0], []
    real = band_mod.BandPlanner.plan

    def plan(self, b):
        planned[0] += 1
        if planned[0] % 8 == 0:
            alive.append(sum(1 for o in gc.get_objects() if isinstance(o, BlockPlan)))
        return real(self, b)

    monkeypatch.setattr(band_mod.BandPlanner, "plan", plan)
    monkeypatch.setattr(program_mod, "SHAPE_CACHE_CHUNKS", 0)
    gc.collect()    # the plans of the run above
    lazy = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert planned[0] > 40
    assert max(alive) <= 4 + arch.dot.lookahead + 2 < planned[0] // 4
    for doc in (whole, lazy):
        for key in ("build", "wall", "wall_seconds"):
            doc.pop(key, None)
    assert lazy == whole


@pytest.mark.parametrize("sample", [None, 4])
def test_a_finished_step_planned_block_by_block_is_freed_while_the_run_goes_on(sample, monkeypatch):
    """A consistency check, no outside source: the engine runs with the cyclic collector
    off, so a step's plan must not refer to itself in a circle (a group and its block
    planner did), or every long step's plan stays in memory until the run ends. Eight
    layers of causal prefill planned block by block (whole, and sampled one block in
    about 4): the group plans alive while a block is planned stay those of the steps in
    flight, not one set per layer made so far."""
    import gc

    from sim.engine import band as band_mod
    from sim.engine import program as program_mod
    from sim.engine.tiling import GroupPlan

    arch = sim.load_arch("arch_configs/edge.yaml")
    trace = synth_trace(prompt_tokens=512, decode_steps=0, layers=8, heads=4, kv_heads=2, causal=True, seed=3)
    alive = []
    real = band_mod.BandPlanner.plan

    def plan(self, b):
        if b == 0 or len(alive) % 16 == 0:
            alive.append(sum(1 for o in gc.get_objects() if type(o) is GroupPlan))
        else:
            alive.append(alive[-1])
        return real(self, b)

    monkeypatch.setattr(band_mod.BandPlanner, "plan", plan)
    monkeypatch.setattr(program_mod, "SHAPE_CACHE_CHUNKS", 0)
    gc.collect()
    sim.simulate(arch, trace, keep_intervals=False, **({"sample_prefill": sample} if sample else {}))
    groups = 2   # K/V heads a step's plan has a group for
    assert len(alive) > 8
    assert max(alive) <= 3 * groups < 8 * groups


def test_the_up_front_check_lets_long_steps_through_as_their_plans_do_not_hold_re_streams(monkeypatch):
    """A causal 32k-token prefill on edge is some 26 million transactions in one step of a
    layer (arithmetic of the tiling rule: 16-row query blocks, each re-streaming the keys
    it sees), and a non-causal one more. Planned block by block (causal), or with every
    block reading one list of chunks (non-causal), their plans do not grow with the
    re-streams: on a machine of 4 GiB neither is refused. On one of 1 GiB what the run
    needs anyway is refused, in one line that names the way out."""
    from sim import budget
    from sim.errors import InputError

    monkeypatch.setattr(budget, "physical_memory", lambda: 4 * 2**30)
    arch = sim.load_arch("arch_configs/edge.yaml")
    for causal in (True, False):
        trace = synth_trace(prompt_tokens=32768, decode_steps=0, shape="dec-8b", layers=1, causal=causal, seed=1)
        assert budget.transactions(arch, trace) > 20_000_000
        budget.check_run(arch, trace)
    monkeypatch.setattr(budget, "physical_memory", lambda: 2**30)
    with pytest.raises(InputError) as err:
        budget.check_run(arch, trace)
    msg = str(err.value)
    assert "\n" not in msg and "1 GiB" in msg and "attnsim trace cut" in msg


def test_a_non_causal_plan_grows_with_blocks_and_chunks_not_their_product():
    """Measured with tracemalloc (Python's own allocation tracer): doubling a non-causal
    prefill doubles its query blocks and its key chunks, so the re-streams (blocks x
    chunks) grow four times; the plan, whose blocks share their chunk lists and per-chunk
    MACs, grows about twice."""
    import tracemalloc

    from sim.engine.addrmap import AddressMap
    from sim.engine.plan import plan_step

    arch = sim.load_arch("arch_configs/edge.yaml")
    held = []
    for n in (2048, 4096):
        step = synth_trace(prompt_tokens=n, decode_steps=0, shape="dec-8b", layers=1, seed=1).steps[0]
        amap = AddressMap(arch, 1, 32, step.kv_rows, step.head_dim)
        tracemalloc.start()
        plan = plan_step(arch, amap, step, arch.engine.grain_rows)
        held.append(tracemalloc.get_traced_memory()[0])
        tracemalloc.stop()
        reads = sum(len(bp.k_chunks or bp.k_idx) for gp in plan for bp in gp.blocks)
        del plan
    assert reads > 100_000
    assert held[1] < 2.3 * held[0]
