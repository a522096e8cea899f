"""The work of one sweep point, as run by any backend.

:func:`run_point` takes plain data only -- a resolved config mapping, a trace
path and that trace's digest -- and returns plain data, so a local process,
a pool worker and a Dask worker run exactly the same code on exactly the same
inputs and hand back the same document, bit for bit.

Traces are loaded once per worker process and kept by digest. :func:`build_id`
fingerprints the simulator's own source, so results from a different build
never pass for this one's (in the cache key, and checked on remote workers).

:func:`prepare` readies a process before its first point -- the compiled DRAM
kernels loaded (compiled first, once per machine, if numba's cache has none)
and the sweep's traces read -- so no point pays for either, and a forked pool
worker inherits both from the process that made the pool.
"""

import os
import time
from collections import OrderedDict

from ..build import build_id

TRACE_CACHE_SIZE = 8
_traces = OrderedDict()


def _trace(path, digest):
    from ..trace.files import load_trace

    tr = _traces.get(digest)
    if tr is None:
        tr = load_trace(path)
        if tr.digest() != digest:
            raise RuntimeError(f"trace {path} changed since the sweep was planned "
                               f"(digest {tr.digest()[:12]}, planned {digest[:12]})")
        _traces[digest] = tr
        while len(_traces) > TRACE_CACHE_SIZE:
            _traces.popitem(last=False)
    else:
        _traces.move_to_end(digest)
    return tr


def prepare(traces=(), one_thread=False):
    """Ready this process for sweep points; returns what it took, as a dict.

    ``traces``: ``[(path, digest)]`` read into the trace cache now (one that
    fails to read is left for its points to report). ``one_thread``: limit
    BLAS/OpenMP to one thread (for pool workers: N processes already fill N
    cores, and nested threads only contend). Cheap when called again.
    """
    t0 = time.perf_counter()
    if one_thread:
        _one_thread()
    from ..engine.dram_timing import load_kernels

    kernels = load_kernels()
    t1 = time.perf_counter()
    for path, digest in list(traces)[:TRACE_CACHE_SIZE]:
        try:
            _trace(path, digest)
        except Exception:  # noqa: S112 - the points of this trace record the error
            continue
    t2 = time.perf_counter()
    global _first
    report = {"pid": os.getpid(), "seconds": t2 - t0, "kernels_seconds": t1 - t0, "traces_seconds": t2 - t1,
              "kernels": kernels._asdict()}
    _first = _first or report
    return report


_first = None    # the first prepare() report of this process (a forked worker inherits its parent's)


def status():
    """This process's id and the first :func:`prepare` report it holds (``None``: never
    prepared); a report whose ``pid`` is another process's was inherited through fork."""
    return {"pid": os.getpid(), "prepared": _first}


def _one_thread():
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = "1"
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return
    threadpool_limits(limits=1)


def _simulate(config, trace, phases=1):
    from ..arch import load_arch, short_for_refresh, takes_refresh
    from ..run import AUTO_PHASES, refresh_phase_runs, simulate

    arch = load_arch(config, source="sweep point")
    # no per-unit intervals: the document is the same without them, and a point needs only the document
    doc = simulate(arch, trace, keep_intervals=False).to_dict()
    if phases == "auto":     # only a run short for refresh is repeated
        phases = AUTO_PHASES if short_for_refresh(arch, doc["cycles"]) else 1
    if phases > 1 and takes_refresh(arch.dram):
        doc["refresh_phases"] = refresh_phase_runs(arch, trace, phases, doc)
    return doc


_parts = OrderedDict()   # (trace digest, decode, warmup) -> the trace's decode-sampled part


def _simulate_sampled(config, trace_path, trace_digest, sampling):
    """The run of the spec's sampled part of the trace (as ``attnsim run --sample-prefill K
    --sample-decode K2 --sample-warmup N``), with the whole trace's estimate in its document."""
    from ..arch import load_arch
    from ..run import estimate_whole, simulate
    from ..trace.sample import sample_decode

    arch = load_arch(config, source="sweep point")
    trace = _trace(trace_path, trace_digest)
    opts = {"sample_prefill": sampling["prefill"]} if "prefill" in sampling else {}
    if "decode" not in sampling:
        return simulate(arch, trace, keep_intervals=False, **opts).to_dict()
    key = (trace_digest, sampling["decode"], sampling.get("warmup"))
    part = _parts.get(key)
    if part is None:
        part = _parts[key] = sample_decode(trace, sampling["decode"], sampling.get("warmup"))
        while len(_parts) > TRACE_CACHE_SIZE:
            _parts.popitem(last=False)
    doc = simulate(arch, part.part, keep_intervals=False, **opts).to_dict()
    doc["decode_sample"] = estimate_whole(doc, part)
    return doc


def run_point(config, trace_path, trace_digest, phases=1, sampling=None):
    """Simulate one point. Returns ``(status, document_or_error_line, build_id)``.

    ``phases`` > 1: the point at that many places in the refresh schedule
    (:func:`sim.run.refresh_phase_runs`); ``"auto"``: at :data:`sim.run.AUTO_PHASES` when the
    run proves short for refresh (:func:`sim.arch.short_for_refresh`), else once.
    ``sampling``: the spec's ``sampling`` (``prefill``, ``decode``, ``warmup``): the point is
    the run of that part of the trace, with the whole trace's estimate.

    Anything the simulation raises becomes an ``error`` outcome with a one-line
    message; only the death of the process itself escapes (the backend sees it).
    """
    try:
        if sampling:
            doc = _simulate_sampled(config, trace_path, trace_digest, sampling)
        else:
            doc = _simulate(config, _trace(trace_path, trace_digest), phases)
        return "ok", doc, build_id()
    except Exception as exc:  # a failing point is recorded, the sweep goes on
        text = " ".join(str(exc).split()) or type(exc).__name__
        return "error", f"{type(exc).__name__}: {text}", build_id()
