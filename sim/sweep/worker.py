"""The work of one sweep point, as run by any backend.

:func:`run_point` takes plain data only -- a resolved config mapping, a trace
path and that trace's digest -- and returns plain data, so a local process,
a pool worker and a Dask worker run exactly the same code on exactly the same
inputs and hand back the same document, bit for bit.

Traces are loaded once per worker process and kept by digest. :func:`build_id`
fingerprints the simulator's own source, so results from a different build
never pass for this one's (in the cache key, and checked on remote workers).
"""

from collections import OrderedDict

from ..build import build_id

TRACE_CACHE_SIZE = 8
_traces = OrderedDict()


def _trace(path, digest):
    from ..trace.format import load_trace

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


def _simulate(config, trace):
    from ..arch import load_arch
    from .. import simulate

    # no per-unit intervals: the document is the same without them, and a point needs only the document
    return simulate(load_arch(config, source="sweep point"), trace, keep_intervals=False).to_dict()


def run_point(config, trace_path, trace_digest):
    """Simulate one point. Returns ``(status, document_or_error_line, build_id)``.

    Anything the simulation raises becomes an ``error`` outcome with a one-line
    message; only the death of the process itself escapes (the backend sees it).
    """
    try:
        doc = _simulate(config, _trace(trace_path, trace_digest))
        return "ok", doc, build_id()
    except Exception as exc:  # a failing point is recorded, the sweep goes on
        text = " ".join(str(exc).split()) or type(exc).__name__
        return "error", f"{type(exc).__name__}: {text}", build_id()
