"""Open-loop load generator for a memory config: latency against delivered bandwidth.

Requests of ``fetch.request_bytes`` arrive as a Poisson stream at an offered
load given as a fraction of the pool's peak; each request reads one of three
patterns: ``sequential`` (consecutive requests, consecutive addresses),
``strided`` (each request ``stride`` bytes after the last, by default one
DRAM row times the banks of a channel times the channels, so every request
lands on the same bank of the same channel and a new row) and ``random``
(request-aligned addresses spread over ``footprint`` bytes). For each load
the pool's delivered bandwidth, mean and 95th-percentile latency and row hit
rate are measured; a point is marked saturated when it delivers under 90 % of the
load its arrivals offered. The run ends after a fixed number of requests, so it
stops even where the pattern saturates the pool below the offered load.
"""

import numpy as np
import simpy

from ..errors import InputError
from .dram import ChannelPool
from .txn import Txn

PATTERNS = ("sequential", "strided", "random")
DEFAULT_LOADS = (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95)
COLUMNS = ("pattern", "offered_fraction", "offered_gbps", "delivered_gbps", "mean_latency_ns",
           "p95_latency_ns", "row_hit_rate", "saturated")


def check_loads(arch, loads, source="--loads"):
    """Offered loads are fractions of the pool peak in (0, 1]: above it no pool can keep up."""
    out = []
    for x in loads:
        if not isinstance(x, (int, float)) or not 0 < x <= 1:
            raise InputError(source, "load", x,
                             f"expected a fraction of the pool peak {arch.peak_gbps:g} GB/s in (0, 1]; "
                             "a higher offered load can never be served")
        out.append(float(x))
    return out


def pattern_addresses(arch, pattern, n, rng, stride=None, footprint=1 << 32):
    """Start byte-address of each of ``n`` requests."""
    req = arch.fetch.request_bytes
    d = arch.dram
    if pattern == "sequential":
        return np.arange(n, dtype=np.int64) * req
    if pattern == "strided":
        step = stride or d.row_bytes * d.banks * d.channels
        return np.arange(n, dtype=np.int64) * step
    if pattern == "random":
        return rng.integers(0, footprint // req, n).astype(np.int64) * req
    raise InputError("--patterns", "pattern", pattern, f"expected one of {', '.join(PATTERNS)}")


def probe_point(arch, pattern, load, requests=2000, seed=0, stride=None):
    """One point of the curve: a dict keyed by :data:`COLUMNS`."""
    rng = np.random.default_rng(seed)
    req = arch.fetch.request_bytes
    burst = arch.dram.burst_bytes
    offered_bpc = load * arch.bytes_per_cycle            # bytes per cycle
    lam = offered_bpc / req                              # requests per cycle
    gaps = rng.exponential(1 / lam, requests)
    starts = pattern_addresses(arch, pattern, requests, rng, stride)
    within = np.arange(req // burst, dtype=np.int64) * burst
    env = simpy.Environment()
    pool = ChannelPool(env, arch)

    def source():
        for gap, a in zip(gaps.tolist(), starts.tolist()):
            yield env.timeout(gap)
            txn = Txn("probe", 0, -1, 0, 1, req, env.now, "probe")
            txn.bursts = a + within
            pool.submit(txn)

    env.process(source())
    t_first = float(gaps[0])
    env.run()
    span = env.now - t_first
    rep = pool.report(env.now)
    lat = np.asarray(pool.latencies) / arch.clock_ghz
    delivered = pool.bytes / span * arch.clock_ghz if span > 0 else 0.0
    offered = load * arch.peak_gbps
    arrival_span = float(gaps[1:].sum())
    # the arrivals actually drawn, so a light load is not called saturated by sampling noise
    realized = (requests - 1) * req / arrival_span * arch.clock_ghz if arrival_span > 0 else offered
    return {"pattern": pattern, "offered_fraction": load, "offered_gbps": offered,
            "delivered_gbps": delivered, "mean_latency_ns": float(lat.mean()),
            "p95_latency_ns": float(np.percentile(lat, 95)),
            "row_hit_rate": rep.get("row_hit_rate", float("nan")),
            "saturated": bool(delivered < 0.9 * realized)}


def probe(arch, patterns=PATTERNS, loads=DEFAULT_LOADS, requests=2000, seed=0, stride=None):
    """The whole sweep: one row per (pattern, load)."""
    loads = check_loads(arch, loads)
    for p in patterns:
        if p not in PATTERNS:
            raise InputError("--patterns", "pattern", p, f"expected one of {', '.join(PATTERNS)}")
    return [probe_point(arch, p, x, requests, seed, stride) for p in patterns for x in loads]


def format_rows(rows):
    """Plain-text table of the curve."""
    head = f"{'pattern':<11}{'offered':>9}{'GB/s in':>10}{'GB/s out':>10}{'mean ns':>10}{'p95 ns':>10}{'row hits':>10}"
    out = [head]
    for r in rows:
        out.append(f"{r['pattern']:<11}{r['offered_fraction']:>9.2f}{r['offered_gbps']:>10.1f}"
                   f"{r['delivered_gbps']:>10.1f}{r['mean_latency_ns']:>10.1f}{r['p95_latency_ns']:>10.1f}"
                   f"{r['row_hit_rate']:>10.3f}" + ("  saturated" if r["saturated"] else ""))
    return "\n".join(out)


def write_csv(rows, path):
    import csv

    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=COLUMNS)
        w.writeheader()
        for r in rows:
            w.writerow(r)
