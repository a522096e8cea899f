"""Open-loop load generator for a memory config: latency against delivered bandwidth.

Requests arrive as a Poisson stream at an offered load given as a fraction of
the pool's peak; each follows one of these patterns:

``sequential``
    consecutive requests of ``fetch.request_bytes`` at consecutive addresses;
``strided``
    each request ``stride`` bytes after the last, by default one DRAM row
    times the banks of a channel times the channels, so every request lands on
    the same bank of the same channel and opens a new row;
``random``
    requests of ``fetch.request_bytes`` at request-aligned addresses spread
    over ``footprint`` bytes;
``scattered``
    fully random 64-byte reads (one burst where bursts are larger): the access
    pruning leaves, bounded by the activation rules (tRC, tRRD, tFAW);
``mixed``
    ``random`` requests, a ``write_share`` of them (drawn at random) writes: the
    cost of bus turnarounds and write recovery.

For each load the pool's delivered bandwidth (read and written) and its share
of the peak, the mean and 95th-percentile read latency and the row hit rate are
measured; a point is marked saturated when it delivers under 90 % of the load
its arrivals offered. The run ends after a fixed number of requests, so it
stops even where the pattern saturates the pool below the offered load.
"""

import numpy as np
import simpy

from ..errors import InputError
from .dram import ChannelPool
from .txn import Txn

PATTERNS = ("sequential", "strided", "random", "scattered", "mixed")
DEFAULT_LOADS = (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95)
COLUMNS = ("pattern", "offered_fraction", "offered_gbps", "delivered_gbps", "efficiency",
           "mean_latency_ns", "p95_latency_ns", "row_hit_rate", "write_share", "saturated")
SCATTER_BYTES = 64


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


def default_stride(arch):
    """Bytes between strided requests: one DRAM row x banks x channels (a new row of one bank)."""
    d = arch.dram
    return d.row_bytes * d.banks * d.channels


def access_bytes(arch, pattern):
    """Bytes one request of ``pattern`` moves."""
    if pattern == "scattered":
        return max(SCATTER_BYTES, arch.dram.burst_bytes)
    return arch.fetch.request_bytes


def pattern_addresses(arch, pattern, n, rng, stride=None, footprint=1 << 32):
    """Start byte-address of each of ``n`` requests."""
    size = access_bytes(arch, pattern)
    if pattern == "sequential":
        return np.arange(n, dtype=np.int64) * size
    if pattern == "strided":
        return np.arange(n, dtype=np.int64) * (stride or default_stride(arch))
    if pattern in ("random", "scattered", "mixed"):
        return rng.integers(0, footprint // size, n).astype(np.int64) * size
    raise InputError("--patterns", "pattern", pattern, f"expected one of {', '.join(PATTERNS)}")


def probe_point(arch, pattern, load, requests=2000, seed=0, stride=None, write_share=0.5):
    """One point of the curve: a dict keyed by :data:`COLUMNS`."""
    rng = np.random.default_rng(seed)
    size = access_bytes(arch, pattern)
    burst = arch.dram.burst_bytes
    offered_bpc = load * arch.bytes_per_cycle            # bytes per cycle
    lam = offered_bpc / size                             # requests per cycle
    gaps = rng.exponential(1 / lam, requests)
    starts = pattern_addresses(arch, pattern, requests, rng, stride)
    share = write_share if pattern == "mixed" else 0.0
    writes = rng.random(requests) < share
    within = np.arange(size // burst, dtype=np.int64) * burst
    env = simpy.Environment()
    pool = ChannelPool(env, arch)

    def source():
        for gap, a, w in zip(gaps.tolist(), starts.tolist(), writes.tolist()):
            yield env.timeout(gap)
            txn = Txn("probe", 0, -1, 0, 1, size, env.now, "probe")
            txn.bursts = a + within
            txn.is_write = w
            pool.submit(txn)

    env.process(source())
    t_first = float(gaps[0])
    env.run()
    span = env.now - t_first
    rep = pool.report(env.now)
    lat = pool.latencies.all() / arch.clock_ghz
    delivered = pool.bytes / span * arch.clock_ghz if span > 0 else 0.0
    offered = load * arch.peak_gbps
    arrival_span = float(gaps[1:].sum())
    # the arrivals actually drawn, so a light load is not called saturated by sampling noise
    realized = (requests - 1) * size / arrival_span * arch.clock_ghz if arrival_span > 0 else offered
    return {"pattern": pattern, "offered_fraction": load, "offered_gbps": offered,
            "delivered_gbps": delivered, "efficiency": delivered / arch.peak_gbps,
            "mean_latency_ns": float(lat.mean()) if len(lat) else float("nan"),
            "p95_latency_ns": float(np.percentile(lat, 95)) if len(lat) else float("nan"),
            "row_hit_rate": rep.get("row_hit_rate", float("nan")), "write_share": share,
            "saturated": bool(delivered < 0.9 * realized)}


def probe(arch, patterns=PATTERNS, loads=DEFAULT_LOADS, requests=2000, seed=0, stride=None,
          write_share=0.5):
    """The whole sweep: one row per (pattern, load)."""
    loads = check_loads(arch, loads)
    for p in patterns:
        if p not in PATTERNS:
            raise InputError("--patterns", "pattern", p, f"expected one of {', '.join(PATTERNS)}")
    if not 0 <= write_share <= 1:
        raise InputError("--write-share", "write_share", write_share, "expected a fraction in [0, 1]")
    return [probe_point(arch, p, x, requests, seed, stride, write_share) for p in patterns for x in loads]


def describe(arch, patterns, stride=None, write_share=0.5):
    """Lines saying what each pattern of the run does, with the sizes it uses."""
    d = arch.dram
    out = []
    for p in patterns:
        if p == "strided":
            if stride:
                out.append(f"strided: each request {stride:,} B after the last (--stride)")
            else:
                out.append(f"strided: each request {default_stride(arch):,} B after the last "
                           f"({d.row_bytes:,} B row x {d.banks} banks x {d.channels} channels: a new row "
                           "of one bank each time)")
        elif p == "scattered":
            out.append(f"scattered: {access_bytes(arch, p)} B reads at random addresses")
        elif p == "mixed":
            out.append(f"mixed: {arch.fetch.request_bytes} B requests at random addresses, "
                       f"{write_share:.0%} of them writes")
    return out


def format_rows(rows):
    """Plain-text table of the curve."""
    head = (f"{'pattern':<11}{'offered':>9}{'GB/s in':>10}{'GB/s out':>10}{'of peak':>9}{'mean ns':>10}"
            f"{'p95 ns':>10}{'row hits':>10}")
    out = [head]
    for r in rows:
        out.append(f"{r['pattern']:<11}{r['offered_fraction']:>9.2f}{r['offered_gbps']:>10.1f}"
                   f"{r['delivered_gbps']:>10.1f}{r['efficiency']:>9.1%}{r['mean_latency_ns']:>10.1f}"
                   f"{r['p95_latency_ns']:>10.1f}{r['row_hit_rate']:>10.3f}"
                   + ("  saturated" if r["saturated"] else ""))
    return "\n".join(out)


def summary(rows):
    """One line: the most each pattern delivered, as a share of the peak."""
    best = {}
    for r in rows:
        best[r["pattern"]] = max(best.get(r["pattern"], 0.0), r["efficiency"])
    return "at most, of the peak: " + ", ".join(f"{p} {e:.0%}" for p, e in best.items())

