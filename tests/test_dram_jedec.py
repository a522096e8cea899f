"""The banked model against the JEDEC channel rates and the row-cycle bound.

Presets: arch_configs/memory/hbm2.yaml (JEDEC JESD235A: 128-bit channel at
2.0 Gb/s per pin = 32 GB/s) and arch_configs/memory/ddr4_3200.yaml (JEDEC
JESD79-4: 64-bit channel at 3200 MT/s = 25.6 GB/s). Each stream is measured
on one channel, refresh on.
"""

import os

import numpy as np
import pytest
import simpy

import sim
from sim.engine.dram import ChannelPool
from sim.engine.txn import Txn

HERE = os.path.dirname(os.path.abspath(__file__))
PRESETS = os.path.join(os.path.dirname(HERE), "arch_configs", "memory")
JEDEC_PEAK = {"hbm2": 32.0, "ddr4_3200": 25.6}   # GB/s: JESD235A, JESD79-4


def one_channel(name, **over):
    arch = sim.load_arch(os.path.join(PRESETS, f"{name}.yaml"))
    return arch.with_overrides({"dram.channels": 1, **over})


def stream(arch, batches):
    """Submit every batch of burst addresses at time 0 (a saturating stream); return report."""
    env = simpy.Environment()
    pool = ChannelPool(env, arch)

    def source():
        for b in batches:
            txn = Txn("K", 0, 0, 0, len(b), len(b) * arch.dram.burst_bytes, env.now, "probe")
            txn.bursts = b
            pool.submit(txn)
        yield env.timeout(0)

    env.process(source())
    env.run()
    return pool.report(env.now)


@pytest.mark.parametrize("name", ["hbm2", "ddr4_3200"])
def test_sequential_row_hits_reach_90_percent_of_jedec_peak(name):
    """Sequential reads, 16 bursts per request, ~130 us of traffic (dozens of refreshes)."""
    arch = one_channel(name)
    assert arch.dram.channel_gbps == JEDEC_PEAK[name]
    burst = arch.dram.burst_bytes
    batches = [(i * 16 + np.arange(16, dtype=np.int64)) * burst for i in range(4000)]
    rep = stream(arch, batches)
    assert rep["row_hit_rate"] > 0.9
    assert rep["refresh_share"] > 0
    assert rep["achieved_gbps"] >= 0.9 * JEDEC_PEAK[name]
    assert rep["achieved_gbps"] <= JEDEC_PEAK[name] * (1 + 1e-9)


@pytest.mark.parametrize("name", ["hbm2", "ddr4_3200"])
@pytest.mark.parametrize("policy", ["open", "close"])
def test_random_row_misses_stay_under_the_trc_bank_bound(name, policy):
    """Random single-burst reads over 2 GiB: every access opens a row, and one bank opens
    at most one row per tRC = tRAS + tRP (common practice), so the channel delivers at most
    banks x burst / tRC. The bound is computed here from the preset's timings."""
    arch = one_channel(name, **{"dram.page_policy": policy})
    d = arch.dram
    rng = np.random.default_rng(11)
    addr = rng.integers(0, 1 << 31, 6000) // d.burst_bytes * d.burst_bytes
    rep = stream(arch, [np.array([a], dtype=np.int64) for a in addr.tolist()])
    t_rc = d.t_ras_ns + d.t_rp_ns
    bound = d.banks * d.burst_bytes / t_rc          # bytes per ns = GB/s
    assert rep["row_hit_rate"] < 0.01
    assert rep["achieved_gbps"] <= bound
    assert rep["achieved_gbps"] > 0.1 * bound       # and the stream did run


def test_row_hits_first_raises_hit_rate_on_interleaved_streams():
    """Two streams on rows of the same banks, arriving alternately: serving hits first
    keeps rows open longer than first come first served (common practice, no source)."""
    rates = {}
    for policy in ("fcfs", "row_hits_first"):
        arch = one_channel("ddr4_3200", **{"dram.scheduler": policy})
        row_span = arch.dram.row_bytes * arch.dram.banks
        env = simpy.Environment()
        pool = ChannelPool(env, arch)

        def source():
            for i in range(800):
                for s in (0, 1):
                    base = s * 64 * row_span + (i % 32) * 256 + (i // 32) * row_span * 2
                    b = base + np.arange(4, dtype=np.int64) * 64
                    txn = Txn("K", 0, 0, 0, 4, 256, env.now, "probe")
                    txn.bursts = b
                    pool.submit(txn)
                yield env.timeout(4)

        env.process(source())
        env.run()
        rates[policy] = pool.report(env.now)["row_hit_rate"]
    assert rates["row_hits_first"] > rates["fcfs"]
