"""``dram.steering: first_free``: requests, not transactions, take the channel that frees first.

The pool with steering ``first_free`` is one shared FCFS queue in front of its
channels, a request (``fetch.request_bytes``) being a customer. Checked here on a
pool whose service is exact (one bank, one 1 MiB row that stays open, refresh off,
a burst a cycle, as in ``tests/test_dram_queueing.py``): the channel each request
gets is the one the Kiefer-Wolfowitz workload recursion (Kiefer & Wolfowitz 1955)
gives it, of idle channels the one idle longest (common practice, no source), and the
cuts into requests follow a fetch descriptor across its transactions, so how the
engine's grain cuts a descriptor does not change where its requests go.
"""

import numpy as np
import simpy

import sim
from sim.engine.dram import ChannelPool
from sim.engine.txn import Txn

BURST = 64
RQ = 4                       # bursts a request


def steer_arch(channels):
    return sim.load_arch({
        "clock_ghz": 1.0,
        "dram": {"model": "banked", "channels": channels, "steering": "first_free",
                 "channel_gbps": 64.0, "burst_bytes": BURST, "bus_bits": 128,
                 "banks": 1, "bank_groups": 1, "row_bytes": 1 << 20, "rows": 1,
                 "t_rfc_ns": 0.0, "t_ccd_l_ns": 0.0, "queue_depth": 1 << 30,
                 "interleave_bytes": 256},
        "fetch": {"request_bytes": RQ * BURST, "inflight": 1 << 16},
    })


def bursts_by_channel(pool, channels):
    """Per transaction (by arrival), the bursts each channel served."""
    rec = pool.share_records()
    out = {}
    for c, a, n in zip(rec["channel"].tolist(), rec["arrival"].tolist(), rec["bursts"].tolist()):
        out.setdefault(a, [0] * channels)[c] += n
    return out


def submit_all(arch, jobs):
    """Submit ``(time, bursts, descriptor)`` transactions of K rows in order; run; return the pool."""
    env = simpy.Environment()
    pool = ChannelPool(env, arch, keep_records=True)

    def source():
        base = 0
        for t, n, desc in jobs:
            if t > env.now:
                yield env.timeout(t - env.now)
            txn = Txn("K", 0, 0, 0, n, n * BURST, env.now, "probe")
            txn.desc = desc
            txn.bursts = (base + np.arange(n, dtype=np.int64)) * BURST
            base += n
            pool.submit(txn)

    env.process(source())
    env.run()
    return pool


def test_each_request_takes_the_channel_that_frees_first():
    c, n = 4, 400
    rng = np.random.default_rng(5)
    sizes = rng.integers(1, 4 * RQ, n)            # up to four requests a transaction
    arrivals = 1000 + np.cumsum(1 + np.floor(rng.exponential(2.5 * RQ, n)))   # one a cycle at most
    # first a request on each channel, which opens its row: from then on every burst is a hit
    warm = [(0.0, c * RQ, 0)]
    pool = submit_all(steer_arch(c), warm + [(float(t), int(s), 0) for t, s in zip(arrivals, sizes)])
    got = bursts_by_channel(pool, c)
    # expected, without the pool: each request of a transaction (cut from its start) takes
    # the server whose work ends first (of those idle, the one idle longest; then the
    # lowest index), served from max(its end, arrival) for a cycle a burst
    assert got[0.0] == [RQ] * c
    free = [0.0] * c             # the warm-up ends at the same time on every channel
    for t, s in zip(arrivals.tolist(), sizes.tolist()):
        want = [0] * c
        left = s
        while left:
            k = min(range(c), key=lambda j: (max(free[j], t), free[j], j))
            m = min(RQ, left)
            free[k] = max(free[k], t) + m
            want[k] += m
            left -= m
        assert got[t] == want, (t, s)


def test_a_request_cut_between_two_transactions_of_one_descriptor_stays_on_its_channel():
    c = 4
    whole = bursts_by_channel(submit_all(steer_arch(c), [(0.0, 3 * RQ, 1)]), c)
    assert list(whole.values()) == [[RQ, RQ, RQ, 0]]
    # the same descriptor cut in two at the middle of its second request
    cut = submit_all(steer_arch(c), [(0.0, RQ + RQ // 2, 1), (0.0, RQ + RQ // 2, 1)])
    rec = cut.share_records()
    per_channel = np.bincount(rec["channel"], weights=rec["bursts"], minlength=c).tolist()
    assert per_channel == [RQ, RQ, RQ, 0]
    # two descriptors: the second starts a request of its own
    apart = submit_all(steer_arch(c), [(0.0, RQ + RQ // 2, 1), (0.0, RQ + RQ // 2, 2)])
    rec = apart.share_records()
    per_channel = np.bincount(rec["channel"], weights=rec["bursts"], minlength=c).tolist()
    assert per_channel == [RQ, RQ // 2, RQ, RQ // 2]
