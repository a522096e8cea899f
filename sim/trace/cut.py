"""A part of a trace -- some of its layers, requests and decode tokens -- as a trace of its own.

For an answer from a trace too long to simulate whole in the time at hand (a
captured 32k-token prompt re-streamed through small buffers, a long batch):
layers of one request run one after another, so a run of some of its layers
shows where the time goes and about what share of the whole it takes; a few
decode tokens show the steady decode rate. The part is a valid trace, checked
like any other: the steps kept are the original ones unchanged except that
layers and requests are numbered again from 0 in their original order (so the
address map spans only what is kept), and the header records what was cut
from what (``provenance.cut``). Nothing is extrapolated here: scaling a part's
figures up is the reader's call.
"""

from __future__ import annotations

import copy
import dataclasses

from ..errors import InputError
from .format import Trace, validate

MAX_ID_TEXT = 10_000     # characters of an id list


def parse_ids(text: str, field: str, source: str = "trace cut") -> list[int]:
    """``"0,2,5-7"`` -> ``[0, 2, 5, 6, 7]`` (sorted, distinct)."""
    out = set()
    if not isinstance(text, str) or not text.strip() or len(text) > MAX_ID_TEXT:
        raise InputError(source, field, text, "expected ids such as 0,2,5-7")
    for part in text.split(","):
        lo, sep, hi = part.strip().partition("-")
        try:
            a = int(lo)
            b = int(hi) if sep else a
        except ValueError:
            raise InputError(source, field, text, "expected whole numbers and ranges such as 0,2,5-7") from None
        if a < 0 or b < a:
            raise InputError(source, field, text, f"expected ids >= 0 and ranges low-high, got {part.strip()!r}")
        if b - a > 1 << 20:
            raise InputError(source, field, text, "expected ranges of at most 2**20 ids")
        out.update(range(a, b + 1))
    return sorted(out)


def _ranges(ids):
    """``[0, 1, 2, 5]`` -> ``"0-2,5"`` (for messages)."""
    parts, i = [], 0
    while i < len(ids):
        j = i
        while j + 1 < len(ids) and ids[j + 1] == ids[j] + 1:
            j += 1
        parts.append(str(ids[i]) if i == j else f"{ids[i]}-{ids[j]}")
        i = j + 1
    return ",".join(parts)


def _check_ids(asked, have, field, source):
    """The ids to keep, ascending (a part keeps the original order, however they were asked)."""
    if asked is None:
        return have
    asked = sorted(set(int(x) for x in asked))
    missing = sorted(set(asked) - set(have))
    if missing:
        raise InputError(source, field, _ranges(missing), f"expected ids the trace has: {_ranges(have)}")
    return asked


def cut_trace(trace: Trace, layers=None, requests=None, decode_tokens=None, prefill=True,
              source: str = "trace cut") -> Trace:
    """The steps of ``trace`` whose layer is in ``layers`` and request in ``requests`` (None:
    all), keeping each request's first ``decode_tokens`` decode tokens (None: all) and its
    prefill steps unless ``prefill`` is False. Raises :class:`InputError` naming ``source``
    for an id the trace lacks or a cut that leaves no step."""
    steps = trace.steps
    layers = _check_ids(layers, sorted({s.layer for s in steps}), "layers", source)
    requests = _check_ids(requests, sorted({s.request for s in steps}), "requests", source)
    if decode_tokens is not None and (isinstance(decode_tokens, bool) or not isinstance(decode_tokens, int)
                                      or decode_tokens < 0):
        raise InputError(source, "decode_tokens", decode_tokens, "expected a whole number >= 0")
    new_layer = {x: i for i, x in enumerate(layers)}
    new_request = {x: i for i, x in enumerate(requests)}
    tokens = {}   # (request, layer) -> decode steps seen (the k-th is token k at that layer)
    kept = []
    for s in steps:
        if s.layer not in new_layer or s.request not in new_request:
            continue
        if s.stage == "prefill":
            if not prefill:
                continue
        else:
            k = tokens.get((s.request, s.layer), 0)
            tokens[s.request, s.layer] = k + 1
            if decode_tokens is not None and k >= decode_tokens:
                continue
        kept.append(dataclasses.replace(s, layer=new_layer[s.layer], request=new_request[s.request]))
    if not kept:
        raise InputError(source, "steps", 0, "expected a cut that keeps at least one step (prefill "
                                             "left out and no decode tokens kept?)")
    header = copy.deepcopy(trace.header)
    header["name"] = f"{trace.name}-cut"[:200]
    if isinstance(header.get("model"), dict) and "layers" in header["model"]:
        header["model"]["layers"] = len({s.layer for s in kept})
    header["provenance"]["cut"] = {"from": trace.name, "digest": trace.digest(), "layers": _ranges(layers),
                                   "requests": _ranges(requests), "decode_tokens": decode_tokens,
                                   "prefill": bool(prefill)}
    return validate(Trace(header, kept, source=f"{trace.source} (cut)"))
