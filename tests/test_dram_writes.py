"""Writes in the banked channel pool: posted into a write queue, drained between
watermarks (common practice, no single source: a controller buffers writes and
turns the bus around for a batch of them once its write queue fills), and timed
with the JEDEC write rules (tCWL, tWR, tWTR_S/L, tRTW), checked on the command log.
"""

import math
import os

import numpy as np
import pytest
import simpy

import sim
from sim.engine import dram_timing as T
from sim.engine.dram import ChannelPool
from sim.engine.txn import Txn
from test_dram_timing import check_protocol

HERE = os.path.dirname(os.path.abspath(__file__))
PRESETS = os.path.join(os.path.dirname(HERE), "arch_configs", "memory")
ALL = ["hbm2", "hbm2_pseudo", "ddr4_3200", "hbm3", "hbm3e", "lpddr5x", "gddr6"]


def preset(name, **over):
    return sim.load_arch(os.path.join(PRESETS, f"{name}.yaml")).with_overrides(over)


def submit(pool, addr, nbytes, write, t=0.0):
    d = pool.arch.dram
    txn = Txn("K", 0, 0, 0, 1, nbytes, t, "test")
    txn.bursts = addr + np.arange(nbytes // d.burst_bytes, dtype=np.int64) * d.burst_bytes
    txn.is_write = write
    return txn, pool.submit(txn)


def test_a_write_is_done_when_the_queue_takes_it_in():
    """Posted write: into an empty write queue it is taken in at once; its log marks that
    instant for all three memory stages, and mem_times says the same."""
    arch = preset("ddr4_3200")
    env = simpy.Environment()
    pool = ChannelPool(env, arch)
    seen = []

    def source():
        yield env.timeout(100)
        txn, ev = submit(pool, 1 << 20, 256, True)
        yield ev
        seen.append((env.now, txn.log[-3:], txn.mem_times))

    env.process(source())
    env.run()
    now, log, times = seen[0]
    assert now == 100
    assert [s for s, _ in log] == ["memory_queue", "memory_latency", "memory_transfer"]
    assert all(t == 100 for _, t in log) and times == (100, 100, 100)
    rep = pool.report(env.now)
    assert rep["write_bytes"] == 256 and rep["read_bytes"] == 0
    # nothing to read: the idle channel drained it
    assert rep["write_bursts_drained"] == 4 and rep["write_idle_drains"] == 1 and rep["write_drains"] == 0


def test_the_queue_drains_from_the_high_mark_to_the_low_mark():
    """A 64-burst write queue, marks 3/4 and 1/4: with reads keeping the channel busy, a
    drain starts when 48 bursts wait and leaves 16 waiting."""
    arch = preset("ddr4_3200", **{"fetch.request_bytes": 64})
    d = arch.dram
    assert (d.write_queue, d.write_high, d.write_low) == (64, 0.75, 0.25)
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    for i in range(2000):                                    # reads far into the future
        submit(pool, i * 4096, 64, False)
    for i in range(48):
        submit(pool, (1 << 30) + i * 64, 64, True)
    rep = pool.report(env.now)
    assert rep["write_drains"] == 1
    assert rep["write_bursts_drained"] == 48 - 16 and rep["write_bursts_waiting"] == 16
    log = pool.command_log()
    assert np.count_nonzero(log[:, 3] == T.CMD_WR) == 32
    env.run()
    rep = pool.report(env.now)
    assert rep["write_bursts_waiting"] == 0 and rep["write_idle_drains"] == 1
    assert check_protocol(pool.command_log(), arch) == []


def test_a_full_write_queue_makes_the_next_write_wait():
    """The 65th write burst into a 64-burst queue enters when the first one has left (its
    column command issued): later than the first 64, which enter at once; the writes
    behind it enter in order, each when the burst 64 places ahead has left."""
    arch = preset("ddr4_3200", **{"fetch.request_bytes": 64, "dram.write_high": 1.0})
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    for i in range(4000):                                    # reads keep the channel busy
        submit(pool, i * 4096, 64, False)
    txns = [submit(pool, (1 << 30) + i * 8192, 64, True)[0] for i in range(70)]
    assert all(t.mem_times is None for t in txns[64:])      # not taken in yet
    env.run()
    entered = [t.mem_times[0] for t in txns]
    assert entered[:64] == [0.0] * 64
    assert all(t > 0 for t in entered[64:])
    wr = pool.command_log()
    wr = np.sort(wr[wr[:, 3] == T.CMD_WR, 0])
    # queue position k - 64 left at its column command; the drain left them in order here
    np.testing.assert_allclose(entered[64:], wr[:6])


def test_a_write_larger_than_the_queue_enters_as_room_frees():
    """A 20,000-burst write into a 64-burst queue enters as the queue drains: at first
    only the queue's 64 bursts are in, it is taken in once the burst 64 places before
    its last one has left, and the channel's command timelines never hold more than a
    few queues' worth of commands (memory does not grow with the size of a write)."""
    arch = preset("ddr4_3200")
    n, cap = 20000, arch.dram.write_queue
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    txn, ev = submit(pool, 1 << 20, n * arch.dram.burst_bytes, True)
    rep = pool.report(0)
    assert rep["write_bursts_drained"] + rep["write_bursts_waiting"] == cap
    assert not ev.processed and txn.mem_times is None
    env.run()
    assert ev.processed
    rep = pool.report(env.now)
    assert rep["write_bursts_drained"] == n and rep["write_bursts_waiting"] == 0
    wr = pool.command_log()
    wr = np.sort(wr[wr[:, 3] == T.CMD_WR, 0])
    assert len(wr) == n
    assert wr[n - cap - 1] <= txn.mem_times[0] <= wr[-1]
    assert pool.TL.shape[2] <= 16 * cap
    assert check_protocol(pool.command_log(), arch) == []


@pytest.mark.parametrize("name", ALL)
def test_hammering_reads_and_writes_keep_every_timing_rule(name):
    """Random reads and writes over a small footprint: the command log keeps tWR, tWTR_S/L,
    tRTW and every read rule (JEDEC, see test_dram_timing), and the bus turned around."""
    arch = preset(name, **{"dram.channels": 2, "dram.refresh": "all_bank", "dram.t_refi_ns": 1500.0,
                           "fetch.request_bytes": 64})
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    rng = np.random.default_rng(3)
    mix = list(zip((rng.integers(0, 1 << 24, 3000) // 64 * 64).tolist(), (rng.random(3000) < 0.5).tolist()))

    def source():      # arriving over time: writes that wait for queue room meet later reads
        for i, (a, w) in enumerate(mix):
            submit(pool, a, 64, w)
            if i % 16 == 15:
                yield env.timeout(20)

    env.process(source())
    env.run()
    log = pool.command_log()
    assert check_protocol(log, arch) == []
    rep = pool.report(env.now)
    assert np.count_nonzero(log[:, 3] == T.CMD_WR) == rep["write_bytes"] // arch.dram.burst_bytes
    assert rep["read_to_write_turns"] > 10 and rep["write_to_read_turns"] > 10
    assert rep["write_bursts_waiting"] == 0


def turnaround_cost_ns(d):
    """Least bus time one drain between reads costs beyond its bursts, from the preset
    (arithmetic): read to write, tRTW (at least tCL - tCWL + one burst, so read data has
    left the bus before write data comes: JEDEC's definition of the read-to-write gap), less
    the burst it replaces; write to read, tCWL + burst + tWTR_S, less one burst."""
    burst = d.burst_bytes / d.channel_gbps
    rtw = max(d.t_rtw_ns, d.t_cl_ns - d.t_cwl_ns + burst)
    return (rtw - burst) + (d.t_cwl_ns + d.t_wtr_s_ns)


def mixed_run(arch, addrs, writes):
    env = simpy.Environment()
    pool = ChannelPool(env, arch)
    for a, w in zip(addrs.tolist(), writes.tolist()):
        submit(pool, a, arch.fetch.request_bytes, bool(w))
    env.run()
    return env.now / arch.clock_ghz, pool.report(env.now)


@pytest.mark.parametrize("name", ALL)
@pytest.mark.parametrize("req", [64, 1024])
def test_a_50_50_random_mix_is_slower_than_reads_by_the_turnarounds(name, req):
    """4000 random requests on one channel, all at once: the same requests with half of
    them writes take longer than all reads by at least one bus turnaround pair per drain
    (:func:`turnaround_cost_ns`) for the fewest drains the write queue allows: each drain
    moves at most (queue + one request - low mark) bursts. The last drain may end the
    run with no read after it, so one drain is not counted."""
    # a check of the memory: the fetch unit's in-flight limit (the pool applies it to reads
    # request by request) is lifted, as in the JEDEC checks
    arch = preset(name, **{"dram.channels": 1, "fetch.request_bytes": req, "fetch.inflight": 65536})
    d = arch.dram
    rng = np.random.default_rng(5)
    n = 4000
    addrs = rng.integers(0, 1 << 30, n) // req * req
    writes = rng.random(n) < 0.5
    t_reads, _ = mixed_run(arch, addrs, np.zeros(n, dtype=bool))
    t_mix, rep = mixed_run(arch, addrs, writes)
    per_req = req // d.burst_bytes
    most = d.write_queue + per_req - math.floor(d.write_low * d.write_queue)
    drains = math.ceil(int(writes.sum()) * per_req / most)
    assert rep["write_bytes"] == int(writes.sum()) * req
    assert t_mix - t_reads >= (drains - 1) * turnaround_cost_ns(d), (t_mix, t_reads, drains)


def bus_turns(log, channels):
    """Read-to-write and write-to-read turns: direction changes between neighbouring column
    commands on each channel's bus in a command log (arithmetic on the log)."""
    rw = wr = 0
    for c in range(channels):
        cols = log[(log[:, 1] == c) & np.isin(log[:, 3], (T.CMD_RD, T.CMD_WR))]
        kinds = cols[np.argsort(cols[:, 0], kind="stable"), 3]
        rw += int(np.count_nonzero((kinds[:-1] == T.CMD_RD) & (kinds[1:] == T.CMD_WR)))
        wr += int(np.count_nonzero((kinds[:-1] == T.CMD_WR) & (kinds[1:] == T.CMD_RD)))
    return rw, wr


@pytest.mark.parametrize("name,seed", [("hbm2", 3), ("ddr4_3200", 0), ("gddr6", 1), ("lpddr5x", 2)])
def test_turns_counted_are_the_turns_on_the_bus(name, seed):
    """The turn counts the pool keeps as it places commands (some before others, while its
    timelines drop what no later command can reach) equal the direction changes on each
    bus in the final command log (common practice, no source: a turn is a read next to a
    write). hbm2 seed 3 lost one when a trimmed timeline hid a command's neighbour."""
    arch = preset(name, **{"dram.channels": 2, "fetch.request_bytes": 64})
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    rng = np.random.default_rng(seed)
    n = 6000
    mix = list(zip((rng.integers(0, 1 << 22, n) // 64 * 64).tolist(), (rng.random(n) < 0.4).tolist(),
                   rng.integers(1, 9, n).tolist()))

    def source():
        for i, (a, w, k) in enumerate(mix):
            submit(pool, a, 64 * k, w)
            if i % 8 == 7:
                yield env.timeout(int(rng.integers(1, 200)))

    env.process(source())
    env.run()
    rep = pool.report(env.now)
    assert (rep["read_to_write_turns"], rep["write_to_read_turns"]) == bus_turns(pool.command_log(), 2)
