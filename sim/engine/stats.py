"""Per-unit state accounting: utilization and the stall breakdown.

Every unit is, at every instant, in exactly one state: ``busy``, ``starved``
(no input), ``blocked`` (no room for its output) or ``idle`` (nothing left to
do). Cause names are unique across states: starved causes name the stage that
held the input (``memory_latency``, ``softmax``...), blocked causes name what
is full (``key_buffer_full``, ``inflight_limit``...). :class:`UnitState` timestamps the transitions; the fractions of the four
states sum to 1 per unit and each starved or blocked interval carries a cause.
One helper for every unit, so a new unit gets utilization and stalls for free.
"""

from array import array
from collections import defaultdict
from itertools import islice

import numpy as np

STATES = ("busy", "starved", "blocked", "idle")


class UnitState:
    """State log of one unit.

    The unit calls :meth:`set` on each transition (or :meth:`charge_wait` after
    waiting for a transaction). Intervals are kept for the timeline export;
    consecutive intervals of the same state and cause are merged. They are
    logged in typed arrays (begin, end, a code per (state, cause)): about 20
    bytes an interval, where a long run logs millions.
    """

    def __init__(self, env, name, keep_intervals=True):
        self.env = env
        self.name = name
        self.keep_intervals = keep_intervals
        self.state = "starved"
        self.cause = "start"
        self.since = env.now
        self.totals = defaultdict(float)   # (state, cause) -> cycles
        self._t0 = array("d")              # the interval log: begin,
        self._t1 = array("d")              # end,
        self._code = array("i")            # and the code of its (state, cause)
        self._codes = {}                   # (state, cause) -> code
        self._keys = []                    # code -> (state, cause)

    def _log(self, t0, t1, key):
        code = self._codes.get(key)
        if code is None:
            code = self._codes[key] = len(self._keys)
            self._keys.append(key)
        ends = self._t1
        if ends and ends[-1] == t0 and self._code[-1] == code:
            ends[-1] = t1
            return
        self._t0.append(t0)
        ends.append(t1)
        self._code.append(code)

    def interval_arrays(self):
        """The log as numpy arrays ``(t0, t1, code)`` and the ``(state, cause)`` of each code."""
        return (np.frombuffer(self._t0, dtype=float) if self._t0 else np.zeros(0),
                np.frombuffer(self._t1, dtype=float) if self._t1 else np.zeros(0),
                np.frombuffer(self._code, dtype=np.int32) if self._code else np.zeros(0, dtype=np.int32),
                list(self._keys))

    def drop_first(self, n):
        """Forget the first ``n`` logged intervals (summed elsewhere; nothing asks for them)."""
        del self._t0[:n]
        del self._t1[:n]
        del self._code[:n]

    def _close(self, t):
        since = self.since
        if t <= since:
            return
        key = (self.state, self.cause)
        self.totals[key] += t - since
        if self.keep_intervals:
            self._log(since, t, key)
        self.since = t

    def set(self, state, cause=None):
        """Enter ``state`` now (or when a :meth:`busy_until` period ends); ``cause`` says why."""
        t = self.env.now
        if t > self.since:  # a transition at the same instant as the last closes nothing
            self._close(t)
        self.state = state
        self.cause = cause

    def relabel(self, state, cause):
        """Give the interval open since the last transition ``state`` and ``cause``
        (what the unit turned out to be waiting for), without closing it."""
        self.state, self.cause = state, cause

    def explain(self, t0, t1):
        """Split ``[t0, t1)`` of this unit's time into (t_end, cause) pieces.

        Used to see through a producer: a consumer that waited for data the
        fetch unit had not issued yet waited for whatever the fetch unit was
        waiting for (a full buffer, a dependency); time the producer was busy
        stays charged to the producer itself.
        """
        out = []
        begins, ends, codes, keys = self._t0, self._t1, self._code, self._keys
        lo, hi = 0, len(ends)
        while lo < hi:  # first interval ending after t0
            mid = (lo + hi) // 2
            if ends[mid] <= t0:
                lo = mid + 1
            else:
                hi = mid
        i = lo
        n = len(ends)
        while i < n and begins[i] < t1:
            state, cause = keys[codes[i]]
            out.append((min(ends[i], t1), self.name if state == "busy" or not cause else cause))
            i += 1
        if self.since < t1:  # the open interval, not logged yet
            out.append((t1, self.name if self.state == "busy" or not self.cause else self.cause))
        return out

    def busy_until(self, t):
        """Busy from now until ``t`` without waiting for it: what the unit does next
        starts at ``t`` (a later :meth:`set` before ``t`` takes effect from ``t``)."""
        now = self.env.now
        if now > self.since:
            self._close(now)
        self.state, self.cause = "busy", None
        self._close(t)
        self.state, self.cause = "starved", "program"

    def stream(self, work, end, cause):
        """Busy for ``work`` cycles from now, then starved by ``cause`` until ``end``: an
        operation whose operands arrive slower than it consumes them (the busy and
        waiting parts interleave tile by tile; the log keeps their totals)."""
        now = self.env.now
        if now > self.since:
            self._close(now)
        self.state, self.cause = "busy", None
        self._close(now + work)
        self.state, self.cause = "starved", cause
        self._close(end)
        self.state, self.cause = "starved", None

    def charge_wait(self, t0, txn, before="fetch", producer=None):
        """Charge a starved wait ``[t0, now)`` to the stages in ``txn``'s log.

        The part of the wait before the transaction existed goes to ``before``
        (the unit that had not yet produced it); the rest is split over the
        stages the transaction was in during the wait.
        """
        now = self.env.now
        if t0 > self.since:
            self._close(t0)  # anything pending up to t0 stays as it was
        if now > t0:
            self._split_wait(t0, now, txn, before, producer)
        self.state, self.cause, self.since = "starved", None, now

    def _split_wait(self, t0, now, txn, before, producer):
        log = txn.log
        starved = self._starved
        start = t0
        created = log[0][1]
        if created > start:
            # creation: the wait before it is charged to whoever created it late
            start = min(created, now)
            starved(t0, start, before)
        for stage, t_end in islice(log, 1, None):
            if start >= now:
                break
            if t_end > start:
                seg_end = min(t_end, now)
                if producer is not None and stage == producer.name:
                    for piece_end, cause in producer.explain(start, seg_end):
                        if piece_end > start:
                            starved(start, piece_end, cause)
                            start = piece_end
                    if start < seg_end:
                        starved(start, seg_end, stage)
                else:
                    starved(start, seg_end, stage)
                start = seg_end
        if start < now:
            # done but handed over late (e.g. the consumer itself was elsewhere)
            starved(start, now, log[-1][0])

    def _starved(self, t0, t1, cause):
        """Log ``[t0, t1)`` as starved by ``cause`` (a piece of a wait, t0 < t1)."""
        key = ("starved", cause)
        self.totals[key] += t1 - t0
        if self.keep_intervals:
            self._log(t0, t1, key)

    def finish(self, t_end):
        """Close the log at the end of the run; the tail after the last busy is idle."""
        self._close(min(self.env.now, t_end))
        if self.since < t_end:
            self.state, self.cause = "idle", None
            self._close(t_end)

    def summary(self, total):
        """Fractions of ``total`` cycles per state, and stalls per cause."""
        frac = dict.fromkeys(STATES, 0.0)
        stalls = defaultdict(float)
        for (state, cause), t in self.totals.items():
            frac[state] += t
            if state in ("starved", "blocked"):
                stalls[cause or "unattributed"] += t
        if total <= 0:
            return {**{s: (1.0 if s == "idle" else 0.0) for s in STATES}, "stalls": {}}
        out = {s: frac[s] / total for s in STATES}
        out["stalls"] = {k: v / total for k, v in sorted(stalls.items(), key=lambda kv: -kv[1])}
        return out


class BusyFold:
    """The memory's stall split, kept up to date during a run without a timeline, so that a
    long run holds neither every data-bus interval nor every fetch interval.

    Called by the pool when its interval table is full: everything before the earlier of the
    pool's :meth:`~sim.engine.dram.ChannelPool.final_time` and the end of the fetch unit's
    last logged interval is taken (:meth:`~sim.engine.dram.ChannelPool.take_busy`) and added,
    per fetch interval, to :attr:`busy_in`; :attr:`total` counts it all. Then whole blocks of
    fetch intervals whose bus time is final, and that end before any array began its current
    wait (so :meth:`UnitState.explain` will not be asked about them), are summed into
    :attr:`split` and dropped from the fetch unit's log. :func:`sim.result._dram_states`
    sums the rest at the end, in the same blocks, so the sums are those of one pass.
    """

    def __init__(self, pool, fetch_state, readers=()):
        self.pool = pool
        self.fetch = fetch_state
        self.readers = list(readers)     # units that read the fetch log through explain()
        self.busy_in = np.zeros(1024)    # per fetch interval still logged, in log order
        self.total = 0.0                 # busy channel cycles taken, over all channels
        self.upto = -np.inf              # taken up to here
        self.split = StallSplit(pool.n)

    def __call__(self):
        a, b, _codes, _keys = self.fetch.interval_arrays()
        if not len(b):
            return
        h = min(self.pool.final_time(), float(b[-1]))
        if h <= self.upto:
            return
        parts = self.pool.take_busy(h)
        if len(b) > len(self.busy_in):
            self.busy_in = np.concatenate((self.busy_in, np.zeros(max(len(b), 2 * len(self.busy_in)))))
        # what was taken lies in [upto, h): only the intervals that reach into it change
        lo, hi = int(np.searchsorted(b, self.upto, side="right")), int(np.searchsorted(a, h))
        for busy in parts:
            if not len(busy):
                continue
            xs, ys = busy_curve(busy)
            self.total += float(ys[-1])
            if hi > lo:
                self.busy_in[lo:hi] += np.interp(b[lo:hi], xs, ys) - np.interp(a[lo:hi], xs, ys)
        self.upto = h
        del a, b, _codes    # views of the log, which _fold may shorten
        self._fold()

    def _fold(self):
        horizon = min([self.upto] + [s.since for s in self.readers])
        a, b, codes, keys = self.fetch.interval_arrays()
        n = 0
        # a block's last interval must not be the log's last, which may still grow
        while len(b) - n > STALL_BLOCK and b[n + STALL_BLOCK - 1] <= horizon:
            self.split.add_block(a[n:n + STALL_BLOCK], b[n:n + STALL_BLOCK], codes[n:n + STALL_BLOCK], keys,
                                 np.inf, self.busy_in[n:n + STALL_BLOCK].copy())
            n += STALL_BLOCK
        if n:
            del a, b, codes
            self.fetch.drop_first(n)
            self.busy_in[:-n] = self.busy_in[n:]
            self.busy_in[-n:] = 0.0

    def busy_within(self, lo, hi):
        """Busy time taken within the logged fetch intervals ``lo .. hi-1`` (a new array; zero
        for those logged after the last hand-over)."""
        out = np.zeros(hi - lo)
        got = self.busy_in[lo:hi]
        out[:len(got)] = got
        return out


STALL_BLOCK = 1 << 16       # fetch intervals summed at a time (during the run and at its end)


class StallSplit:
    """The channel pool's time not moving data, summed by what the fetch unit was doing.

    A channel with nothing to move is starved for the same reason the fetch unit was not
    issuing (a full buffer, a dependency...): each fetch interval ``[a, b)`` contributes the
    channel cycles in it that no data bus was busy, to the class of its state and cause.
    Intervals are added a block at a time, in log order; :attr:`first` keeps the index of
    each class's first interval, so classes can be listed in order of first use.
    """

    def __init__(self, channels):
        self.n = channels
        self.sums = {}         # (state, cause) -> channel cycles not busy
        self.first = {}        # (state, cause) -> index of its first interval
        self.count = 0         # intervals added so far
        self.last_end = 0.0    # end of the last interval added that lay before the run's end

    @staticmethod
    def classify(state, cause):
        return (("idle", None) if state == "idle" else
                ("starved", "fetch_issue") if state == "busy" else ("starved", cause or "fetch"))

    def free_in(self, u0, u1, taken=None, curves=()):
        """Channel cycles not busy within each ``[u0, u1)``: ``taken`` is the busy time already
        known per interval, ``curves`` the channels' busy curves (:func:`busy_curve`) for the rest."""
        busy_in = np.zeros(len(u0)) if taken is None else taken
        for xs, ys in curves:
            busy_in += np.interp(u1, xs, ys) - np.interp(u0, xs, ys)
        return np.maximum((u1 - u0) * self.n - busy_in, 0.0)

    def add_block(self, a, b, codes, keys, end, taken=None, curves=()):
        """Add the next intervals ``[a, b)`` (codes into ``keys``, the ``(state, cause)`` of each
        code), clipped to the run's ``end``."""
        lo = self.count
        self.count += len(a)
        u1 = np.minimum(b, end)
        kept = np.flatnonzero(u1 > a)
        if not len(kept):
            return
        self.last_end = float(b[kept[-1]])
        classes = {}
        class_of = np.empty(len(keys), dtype=np.intp)
        for code, key in enumerate(keys):
            class_of[code] = classes.setdefault(self.classify(*key), len(classes))
        cls = class_of[codes[kept]]
        sums = np.bincount(cls, weights=self.free_in(a[kept], u1[kept], None if taken is None else taken[kept],
                                                    curves), minlength=len(classes))
        labels, at = np.unique(cls, return_index=True)
        where = dict(zip(labels.tolist(), (kept[at] + lo).tolist()))
        for key, k in classes.items():
            self.sums[key] = self.sums.get(key, 0.0) + float(sums[k])
            if k in where and key not in self.first:
                self.first[key] = where[k]

    def add_log(self, a, b, codes, keys, end, taken_of=None, curves=()):
        """Add intervals a block at a time (a long run's temporaries stay small; the blocks
        are those a fold during the run takes). ``taken_of(lo, hi)``: busy time already known
        in intervals ``lo .. hi-1`` of these."""
        for lo in range(0, len(a), STALL_BLOCK):
            hi = min(lo + STALL_BLOCK, len(a))
            self.add_block(a[lo:hi], b[lo:hi], codes[lo:hi], keys, end,
                           None if taken_of is None else taken_of(lo, hi), curves)

    def totals(self):
        """Channel cycles per class, in order of first use (classes never used left out)."""
        return {key: self.sums[key] for key in sorted(self.first, key=self.first.get)}


def busy_curve(busy):
    """Busy intervals ``[[begin, end], ...]`` (sorted, disjoint) as a cumulative curve: the
    points ``xs`` and the busy cycles before each, ``ys`` (linear in between)."""
    dur = busy[:, 1] - busy[:, 0]
    c = np.cumsum(dur)
    ys = np.empty(2 * len(c))
    ys[0::2] = c - dur
    ys[1::2] = c
    return busy.reshape(-1), ys


class RunStats:
    """What a finished run measured: the raw material of the result document.

    The engine hands this over and is done; :func:`sim.result.build_result`
    reads it (and closes the unit logs at ``end``).
    """

    __slots__ = ("arch", "trace", "prog", "pool", "states", "buffers", "fetch_stats", "step_times",
                 "end", "engine", "timeline", "folded")

    def __init__(self, arch, trace, prog, pool, states, buffers, fetch_stats, step_times, end, engine,
                 timeline=True, folded=None):
        self.arch = arch
        self.trace = trace
        self.prog = prog                # per-unit programs and work counts
        self.pool = pool                # the channel pool, with its counters
        self.states = states            # unit name -> UnitState
        self.buffers = buffers          # buffer name -> Buffer
        self.fetch_stats = fetch_stats  # bytes, transactions, requests by plane
        self.step_times = step_times    # cycle each step finished
        self.end = end                  # cycle the last step finished and the last write left
        self.engine = engine            # engine settings the run used
        self.timeline = timeline        # every unit's intervals were kept (for a timeline)
        self.folded = folded            # a BusyFold: bus time the pool handed over during the run
