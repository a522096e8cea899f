"""Decode-token sampling: which decode tokens a sampled run simulates, and what each stands for.

A long decode repeats nearly the same work token after token (the context grows
by one row a token), so a run can simulate some tokens and stand each one for
its neighbours. Each request's decode tokens at each layer are taken in order.
The first ``warmup`` (32 by default, our choice) run in full: the switch from
prefill to decode leaves the prefill's cache writes draining for a while, and a
while is time, which a sampled part runs through in fewer tokens than the
whole. The rest fall into strata of ``every`` consecutive tokens (the last may
be shorter), and the middle token of each stratum is simulated and stands for
all of it (of an even stratum's two middle tokens, the lower in even strata and
the upper in odd ones, so their offsets cancel): systematic sampling with a
centrally located start, exact for work that grows linearly along the decode
(Cochran, *Sampling Techniques*, 3rd ed., 1977, ch. 8, from memory). Prefill
steps always run. Strata alternate between two half-samples, so the estimate
comes with the spread of two independent ones (interpenetrating subsamples,
Mahalanobis 1946, from memory).

Every request samples the same token indices at every layer, so a batch keeps
its shape and a kept token's steps keep their own context, kept keys and cache
writes: the part is a valid trace, checked like any other, and its header
records the sampling (``provenance.decode_sample``). What the estimate of the
whole is made of (:class:`DecodeSample`) goes to :func:`sim.run.estimate_whole`.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass

from ..errors import InputError
from .format import Trace, validate

MAX_EVERY = 4096     # tokens a sampled token may stand for
MAX_WARMUP = 1 << 20  # decode tokens run in full before sampling starts
# the default: on mid with a 16-burst write queue (2 layers of the 24-layer bench shape) a warm-up
# of 8 tokens left the prefill's writes draining into sampled tokens, +3.0 %; 32 gave +0.2 %
DEFAULT_WARMUP = 32


@dataclass(frozen=True)
class DecodeSample:
    """A sampled part of a trace: the part, and for each of its steps (in order) how many
    steps of the whole it stands for (``weights``: 1 for prefill and warm-up tokens) and its
    stratum's parity (``halves``: 0 or 1 for a sampled token, -1 for a step run in full),
    which splits the strata into two interleaved half-samples for the error estimate."""

    part: Trace
    every: int
    warmup: int
    weights: tuple
    halves: tuple
    decode_tokens: int      # decode steps of the whole trace (over requests and layers)
    simulated_tokens: int   # those the part keeps


def sample_decode(trace: Trace, every: int, warmup: int | None = None, source: str = "decode sample",
                  fields: tuple = ("every", "warmup")) -> DecodeSample:
    """The part of ``trace`` a run simulating one decode token in ``every`` after the first
    ``warmup`` (None: :data:`DEFAULT_WARMUP`) of each request simulates. Raises
    :class:`InputError` naming ``source`` and the field (``fields``: the names of ``every``
    and ``warmup`` there) for a bad value or a trace where it would leave out no token."""
    if isinstance(every, bool) or not isinstance(every, int) or not 2 <= every <= MAX_EVERY:
        raise InputError(source, fields[0], every, f"expected a whole number from 2 to {MAX_EVERY}")
    if warmup is None:
        warmup = DEFAULT_WARMUP
    if isinstance(warmup, bool) or not isinstance(warmup, int) or not 0 <= warmup <= MAX_WARMUP:
        raise InputError(source, fields[1], warmup, f"expected a whole number from 0 to {MAX_WARMUP}")
    total = {}   # (request, layer) -> decode steps
    for s in trace.steps:
        if s.stage == "decode":
            total[s.request, s.layer] = total.get((s.request, s.layer), 0) + 1
    seen, kept, weights, halves = {}, [], [], []
    for s in trace.steps:
        k = seen.get((s.request, s.layer), 0) if s.stage == "decode" else -1
        if k >= 0:
            seen[s.request, s.layer] = k + 1
        if k < warmup:                     # prefill and warm-up tokens: in full
            kept.append(s)
            weights.append(1)
            halves.append(-1)
            continue
        stratum, at = divmod(k - warmup, every)
        size = min(every, total[s.request, s.layer] - warmup - stratum * every)
        if at == ((size - 1) // 2 if stratum % 2 == 0 else size // 2):
            kept.append(s)
            weights.append(size)
            halves.append(stratum % 2)
    decode = sum(total.values())
    simulated = sum(1 for s in kept if s.stage == "decode")
    if simulated == decode:
        longest = max(total.values(), default=0)
        raise InputError(source, fields[0], every,
                         f"expected a trace with more than {warmup + 1} decode tokens a request at a layer "
                         f"(it has at most {longest}) after a warm-up of {warmup}: nothing would be left out")
    header = copy.deepcopy(trace.header)
    header["name"] = f"{trace.name}-sampled"[:200]
    header.setdefault("provenance", {})["decode_sample"] = {
        "from": trace.name, "digest": trace.digest(), "every": every, "warmup_tokens": warmup,
        "decode_steps": decode, "simulated_decode_steps": simulated}
    part = validate(Trace(header, kept, source=f"{trace.source} (decode sample)"))
    return DecodeSample(part, every, warmup, tuple(weights), tuple(halves), decode, simulated)
