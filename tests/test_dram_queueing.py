"""The banked channel pool against queueing theory.

How the checks map onto the pool: with ``dram.steering: first_free`` each
request goes to the channel whose data bus frees first, which is one shared
FCFS queue in front of c servers; requests here are larger than any
transaction (``fetch.request_bytes`` 1 MiB), so a transaction is one customer. Every transaction reads bursts of
one DRAM row that stays open (one bank, a 1 MiB row, refresh off), so its
service time is exactly its burst count times the burst time (1 cycle here);
the queueing delay is the time from arrival to its first column command.
Exponential service: the burst count is ceil(Exp(mean 100)), a geometric
count whose squared coefficient of variation is 0.99. Deterministic service:
a fixed burst count.
"""

import heapq
import math

import numpy as np
import pytest
import simpy

import sim
from sim.engine.dram import ChannelPool
from sim.engine.txn import Txn

BURST = 64


def queue_arch(channels, **extra):
    over = {
        "clock_ghz": 1.0,
        "dram": {"model": "banked", "channels": channels, "steering": "first_free",
                 "channel_gbps": 64.0, "burst_bytes": BURST, "bus_bits": 128,
                 "banks": 1, "bank_groups": 1, "row_bytes": 1 << 20, "rows": 1,
                 "t_rfc_ns": 0.0, "t_ccd_l_ns": 0.0, "queue_depth": 1 << 30,
                 "interleave_bytes": 256, **extra},
        "fetch": {"request_bytes": 1 << 20},
    }
    return sim.load_arch(over)


def run_open_loop(arch, arrivals, sizes):
    """Submit one transaction of ``sizes[i]`` bursts at each ``arrivals[i]``; return the pool."""
    env = simpy.Environment()
    pool = ChannelPool(env, arch, keep_records=True)
    addr = [np.arange(n, dtype=np.int64) * BURST for n in range(int(sizes.max()) + 1)]

    def source():
        for t, n in zip(arrivals.tolist(), sizes.tolist()):
            if t > env.now:
                yield env.timeout(t - env.now)
            txn = Txn("K", 0, 0, 0, n, n * BURST, env.now, "probe")
            txn.bursts = addr[n]
            pool.submit(txn)

    env.process(source())
    env.run()
    return pool, env.now


def erlang_c_wait(c, lam, mu):
    """Mean wait in queue of M/M/c (A. K. Erlang 1917; Kleinrock, Queueing Systems Vol. 1),
    as written in the project's reference sheet."""
    a = lam / mu
    rho = a / c
    top = a ** c / math.factorial(c) / (1 - rho)
    p_wait = top / (sum(a ** k / math.factorial(k) for k in range(c)) + top)
    return p_wait / (c * mu - lam)


MEAN_BURSTS = 100.0


def fcfs_waits(arrivals, service, c):
    """Waits of a FCFS queue with c servers, each arrival taking the server that frees
    first (the Kiefer-Wolfowitz workload recursion, Kiefer & Wolfowitz 1955)."""
    free = [0.0] * c
    out = np.empty(len(arrivals))
    for i, (a, s) in enumerate(zip(arrivals.tolist(), service.tolist())):
        f = heapq.heappop(free)
        start = a if a > f else f
        out[i] = start - a
        heapq.heappush(free, start + s)
    return out


def mmc_sample(c, rho, n, seed):
    rng = np.random.default_rng(seed)
    sizes = np.ceil(rng.exponential(MEAN_BURSTS, n)).astype(np.int64)
    sizes[sizes < 1] = 1
    mu = 1 - math.exp(-1 / MEAN_BURSTS)           # 1 / E[ceil(Exp)] bursts, 1 cycle each
    lam = rho * c * mu
    arrivals = 1000.0 + np.cumsum(rng.exponential(1 / lam, n))
    return arrivals, sizes, lam, mu


def pool_waits(c, arrivals, sizes):
    """Open the row on every channel first (one burst each at time 0), then the arrivals."""
    arr = np.concatenate((np.zeros(c), arrivals))
    siz = np.concatenate((np.ones(c, dtype=np.int64), sizes))
    pool, _ = run_open_loop(queue_arch(c), arr, siz)
    rec = pool.share_records()
    return (rec["start"] - rec["arrival"])[c:]


CASES = [(c, rho) for c in (1, 4, 16) for rho in (0.5, 0.8)]


@pytest.mark.parametrize("c,rho", CASES)
def test_pool_is_a_fcfs_queue_with_c_servers(c, rho):
    """Per request, the pool's queueing delay equals the c-server FCFS recursion's."""
    arrivals, sizes, _, _ = mmc_sample(c, rho, 12_000, seed=c * 10 + int(rho * 10))
    measured = pool_waits(c, arrivals, sizes)
    expected = fcfs_waits(arrivals, sizes.astype(float), c)
    np.testing.assert_allclose(measured, expected, atol=1e-6)


@pytest.mark.parametrize("c,rho", CASES)
def test_erlang_c_mean_wait(c, rho):
    """M/M/c: mean queueing delay within 5 % of Erlang C (Erlang 1917; Kleinrock 1975).

    Where a few tens of thousands of requests pin the mean to about 2 %, the pool itself
    is measured. Where they cannot (one server at rho 0.8, 4 servers, 16 servers at rho 0.5,
    where waits are rare and the sample mean is noisy), the pool was shown equal request
    by request to the FCFS recursion above, and the recursion is run long enough instead."""
    direct = {(1, 0.5): 80_000, (16, 0.8): 60_000}
    n = direct.get((c, rho), 1_500_000)
    arrivals, sizes, lam, mu = mmc_sample(c, rho, n, seed=1000 * c + int(rho * 10))
    if (c, rho) in direct:
        wait = pool_waits(c, arrivals, sizes)
    else:
        wait = fcfs_waits(arrivals, sizes.astype(float), c)
    measured = wait[n // 20:].mean()
    expected = erlang_c_wait(c, lam, mu)
    assert measured == pytest.approx(expected, rel=0.05), (measured, expected)


def test_md1_pollaczek_khinchine():
    """M/D/1: mean wait within 5 % of Pollaczek-Khinchine, Wq = rho / (2 mu (1 - rho))."""
    rng = np.random.default_rng(7)
    n, size, rho = 120_000, 50, 0.7
    mu = 1 / size
    lam = rho * mu
    arrivals = np.cumsum(rng.exponential(1 / lam, n))
    pool, _ = run_open_loop(queue_arch(1), arrivals, np.full(n, size))
    rec = pool.share_records()
    measured = (rec["start"] - rec["arrival"])[n // 20:].mean()
    expected = rho / (2 * mu * (1 - rho))
    assert measured == pytest.approx(expected, rel=0.05), (measured, expected)


def test_littles_law_in_flight():
    """Little's law (Little 1961): time-average transactions in the pool = lambda x mean time
    in the pool, within 2 %. The pool's occupancy comes from its live in-flight counter
    (changed when transactions arrive and when their completion events fire), the times
    from the latencies it records: two separate paths. Real bank timing here: the HBM2
    preset with random addresses, refresh on."""
    arch = sim.load_arch("arch_configs/memory/hbm2.yaml")
    rng = np.random.default_rng(3)
    n = 20_000
    lam = 1 / 40.0
    arrivals = np.cumsum(rng.exponential(1 / lam, n))
    env = simpy.Environment()
    pool = ChannelPool(env, arch, keep_records=True)

    def source():
        for t in arrivals.tolist():
            yield env.timeout(t - env.now)
            k = int(rng.integers(1, 16))
            b = np.unique(rng.integers(0, 1 << 30, k) // 64 * 64).astype(np.int64)
            txn = Txn("K", 0, 0, 0, len(b), len(b) * 64, env.now, "probe")
            txn.bursts = b
            pool.submit(txn)

    env.process(source())
    env.run()
    total = env.now
    occ = pool.occupancy(total)
    lam_measured = n / total
    w = np.mean(pool.latencies.all())
    assert occ["mean"] == pytest.approx(lam_measured * w, rel=0.02)
    assert pool.in_flight == 0
    # the binned series integrates to the same mean
    assert np.mean(occ["bins"]) == pytest.approx(occ["mean"], rel=1e-9)


def test_erlang_c_through_the_default_address_steering():
    """The same queue through ``dram.steering: address`` (every bundled config's): each
    transaction's address names one of 4 channels at random, so each channel sees a
    Poisson stream of a quarter of the rate (thinning of a Poisson process) and is an
    M/M/1 queue. Mean queueing delay within 5 % of Erlang C with one server at each
    channel's load (Erlang 1917; Kleinrock 1975). A channel's whole transaction stays in
    one 1 MiB row: the channel interleave is the row."""
    c, rho, n = 4, 0.5, 80_000
    arch = queue_arch(c, steering="address", interleave_bytes=1 << 20)
    rng = np.random.default_rng(17)
    sizes = np.ceil(rng.exponential(MEAN_BURSTS, n)).astype(np.int64)
    sizes[sizes < 1] = 1
    mu = 1 - math.exp(-1 / MEAN_BURSTS)
    lam = rho * c * mu                            # rho per channel after the random split
    arrivals = 1000.0 + np.cumsum(rng.exponential(1 / lam, n))
    chans = rng.integers(0, c, n)
    env = simpy.Environment()
    pool = ChannelPool(env, arch, keep_records=True)

    def source():
        for ch in range(c):                       # open each channel's row first
            txn = Txn("K", 0, 0, 0, 1, BURST, 0.0, "probe")
            txn.bursts = np.array([ch << 20], dtype=np.int64)
            pool.submit(txn)
        for t, k, ch in zip(arrivals.tolist(), sizes.tolist(), chans.tolist()):
            yield env.timeout(t - env.now)
            txn = Txn("K", 0, 0, 0, k, k * BURST, env.now, "probe")
            txn.bursts = (ch << 20) + np.arange(k, dtype=np.int64) * BURST
            pool.submit(txn)

    env.process(source())
    env.run()
    rec = pool.share_records()
    assert np.array_equal(np.bincount(rec["channel"][c:], minlength=c), np.bincount(chans, minlength=c))
    wait = (rec["start"] - rec["arrival"])[c:]
    measured = wait[n // 20:].mean()
    expected = erlang_c_wait(1, lam / c, mu)
    assert measured == pytest.approx(expected, rel=0.05), (measured, expected)
