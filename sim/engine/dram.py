"""DRAM channel pool: where fetched bytes come from, and how long they take.

This model: each channel is one data bus served first come, first served, at
``dram.channel_gbps``; every access pays a fixed ``dram.latency_ns`` that
overlaps with other accesses' transfers (the bus is pipelined); a channel holds
at most ``dram.queue_depth`` requests, queued or in service. Bursts map to
channels by address: ``interleave_bytes`` consecutive bytes per channel, round
robin. A transaction is served per channel in one step whose length follows
from its burst count -- never one event per burst.

Interface used by the fetch unit (kept stable as the model deepens):
``submit(txn) -> simpy event`` fired when the last byte has arrived, with the
transaction's log marked ``memory_queue``, ``memory_latency``,
``memory_transfer``; ``report(total_cycles)`` for the result's ``dram`` section;
``busy_intervals`` per channel for the unit state.
"""

from collections import deque

import numpy as np


def burst_cycles(arch):
    """Data-bus cycles (accelerator clock) to move one burst on one channel."""
    bytes_per_cycle = arch.dram.channel_gbps / arch.clock_ghz
    return arch.dram.burst_bytes / bytes_per_cycle


def latency_cycles(arch):
    return arch.dram.latency_ns * arch.clock_ghz


def channel_of(bursts, arch):
    """Channel index of each burst address (bytes)."""
    return (bursts // arch.dram.interleave_bytes) % arch.dram.channels


class ChannelPool:
    """A pool of memory channels with per-channel bandwidth, latency and queueing."""

    def __init__(self, env, arch):
        self.env = env
        self.arch = arch
        self.n = arch.dram.channels
        self.burst = arch.dram.burst_bytes
        self.t_burst = burst_cycles(arch)
        self.t_lat = latency_cycles(arch)
        self.depth = arch.dram.queue_depth
        self.req_bursts = max(1, arch.fetch.request_bytes // self.burst)
        self.free_at = [0.0] * self.n
        self.outstanding = [deque() for _ in range(self.n)]
        self.busy_intervals = [[] for _ in range(self.n)]
        self.busy_cycles = np.zeros(self.n)
        self.bytes = 0
        self.bursts = 0
        self.requests = 0
        self.txns = 0
        self.wait_total = 0.0
        self.latency_total = 0.0
        self.latencies = []

    def submit(self, txn):
        """Serve ``txn.bursts``; return an event fired when all data is in."""
        env = self.env
        now = env.now
        ch = channel_of(txn.bursts, self.arch)
        counts = np.bincount(ch, minlength=self.n)
        t_start = now
        t_end = now
        for c in np.flatnonzero(counts).tolist():
            nb = int(counts[c])
            nreq = -(-nb // self.req_bursts)
            start = self.free_at[c] if self.free_at[c] > now else now
            dq = self.outstanding[c]
            while dq and dq[0] <= now:
                dq.popleft()
            over = len(dq) + nreq - self.depth
            if over > 0:  # wait until enough queued requests have completed
                room_at = dq[min(over, len(dq)) - 1]
                if room_at > start:
                    start = room_at
            end = start + nb * self.t_burst
            self.free_at[c] = end
            iv = self.busy_intervals[c]
            if iv and iv[-1][1] >= start:
                iv[-1][1] = end
            else:
                iv.append([start, end])
            self.busy_cycles[c] += end - start
            done_c = end + self.t_lat
            dq.extend([done_c] * nreq)
            self.requests += nreq
            if start > t_start:
                t_start = start
            if end > t_end:
                t_end = end
        nbursts = len(txn.bursts)
        self.bursts += nbursts
        self.bytes += nbursts * self.burst
        self.txns += 1
        self.wait_total += t_start - now
        t_first = t_start + self.t_lat
        t_done = max(t_end, t_start) + self.t_lat
        self.latency_total += t_done - now
        self.latencies.append(t_done - now)
        txn.mark("memory_queue", t_start)
        txn.mark("memory_latency", t_first)
        txn.mark("memory_transfer", t_done)
        return env.timeout(t_done - now)

    def report(self, total_cycles):
        """The result document's ``dram`` section (before the engine adds peaks)."""
        seconds = total_cycles / (self.arch.clock_ghz * 1e9) if total_cycles else 0.0
        util = (self.busy_cycles / total_cycles).tolist() if total_cycles else [0.0] * self.n
        lat = np.asarray(self.latencies) if self.latencies else np.zeros(1)
        return {
            "model": "fixed-latency",
            "bytes": int(self.bytes),
            "bursts": int(self.bursts),
            "requests": int(self.requests),
            "transactions": int(self.txns),
            "achieved_gbps": (self.bytes / seconds / 1e9) if seconds else 0.0,
            "peak_gbps": self.arch.peak_gbps,
            "channel_utilization": util,
            "mean_queue_cycles": self.wait_total / self.txns if self.txns else 0.0,
            "mean_access_cycles": self.latency_total / self.txns if self.txns else 0.0,
            "p95_access_cycles": float(np.percentile(lat, 95)),
        }
