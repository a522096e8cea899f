"""Fetch unit: turns planned chunks into memory requests and hands data over in order.

It walks its transactions in program order. Each one first gets room in its
target buffer (reservations are granted in program order, which is what
keeps the datapath free of deadlock: nothing reserved can need room that only
a later transaction frees; a buffer may grant room ahead, against rows its
reader is already freeing, and the transaction then carries ``txn.room`` so
the pool lets each request in only once its part has room, see
:mod:`sim.engine.buffers`), then waits for its data dependency (the previous
layer, the softmax that decides an LSB refetch, the top-k that decides which
V rows are kept) and for a free in-flight slot, and is issued to the channel
pool (one issue cycle per request of ``fetch.request_bytes``).

**Issue window.** A transaction whose dependency has not fired need not hold
up the ones behind it: with ``fetch.issue_window`` > 0 the unit sets it aside
(its room already reserved) and goes on issuing later transactions whose
dependencies are met, up to ``issue_window`` requests past the oldest one set
aside, and never past buffer room. A set-aside transaction issues as soon as
its dependency fires, before any later one. With ``issue_window: 0`` the unit
is strictly in order and waits for a dependency before it reserves room. When
the window is full the unit is ``blocked`` on ``issue_window``.

**Streaming.** A transaction's bursts arrive between the pool's first and
last data; the unit hands data over in issue order (the reorder stage), so
each part of a transaction's arrival profile (``txn.prof``, from the pool) is
handed over at ``max(the part on chip, the previous transaction fully handed
over)``. ``txn.ready`` holds when the first part is (and its ``done`` event,
made only if a consumer waits before then, fires then) and ``txn.last`` when
the last is: a consumer starts on the first part and finishes no
earlier than any part's handover plus the work left from it (see
:mod:`sim.engine.dot`), so a coarse transaction keeps the overlap of fine
ones. ``fetch.inflight`` bounds the requests issued and not yet handed over:
a transaction may issue once its first request fits, and its further requests
wait in the pool, one by one, for slots (the pool keeps the count request by
request, under either scheduler and model, see :mod:`sim.engine.dram`), so a
large transaction never has more requests out than small ones would. ``fetch.reorder_entries``
bounds the requests that have arrived but wait for an earlier transaction --
when it is full the unit stops issuing.

**Descriptors.** Once the unit has begun issuing a descriptor (one plane of one
head group for one query block), it issues that descriptor's ready chunks
before any other's, as a unit working through whole descriptors would; a
descriptor whose dependency fires goes next. So the order memory sees does not
depend on how finely the engine cuts a descriptor.
"""

from bisect import insort
from collections import deque
from heapq import heappop, heappush
from operator import attrgetter

import numpy as np

from ..errors import SimulationStalled
from .due import later

# Re-checks without an issue between them that find the unit still blocked when its room
# was due: past this many the engine is at fault (it would spin a nanosecond at a time for ever).
NUDGE_LIMIT = 100_000

_ORDER = attrgetter("order")


class _Stream:
    """The transactions issued into one buffer, handed over in issue order."""

    __slots__ = ("pending", "untimed", "handed")

    def __init__(self):
        self.pending = deque()      # issued and not yet fully handed over
        self.untimed = deque()      # issued, waiting for the pool to say when data arrives
        self.handed = 0.0           # when the last issued transaction is fully handed over


class FetchUnit:
    """The fetch unit's bookkeeping; :func:`fetch_process` is its simpy process."""

    def __init__(self, env, txns, pool, router, arch, state, stats):
        self.env = env
        self.program = iter(txns)
        self.pool = pool
        self.bursts_for = router.bursts_for
        self.state = state
        self.stats = stats
        f = arch.fetch
        self.window = f.issue_window
        # the pool counts the requests in flight one by one (the fetch slots, fetch.inflight)
        self.slot_room_at = pool.slot_room_at
        self.reorder_cap = f.reorder_entries
        self.req_bytes = f.request_bytes
        self.burst = arch.dram.burst_bytes
        self.streams = {}           # buffer name -> _Stream
        self.npending = 0           # transactions issued and not yet fully handed over
        self.early = 0.0            # requests of pending transactions arrived whole, not handed over
        self.arrivals = []          # heap of (last byte, order, txn) not yet counted in ``early``
        self.aside = []             # room reserved, waiting for a dependency (program order)
        self.ready = []             # room reserved, dependency met, not issued (program order)
        self.taken = 0              # transactions taken from the program
        self.walked = 0.0           # their requests
        self.issue_free = 0.0       # the request port is busy issuing until then
        self.desc_now = -1          # the descriptor issued last
        self.fired = False          # a set-aside transaction's dependency fired since the last look
        self.nudges = 0             # re-checks since the last issue that found room due and none there
        self.issuing = False        # inside pool.submit
        self.wake = env.event()
        self.timer = None           # the pending re-evaluation timer, and its time
        self.timer_at = 0.0
        self.plane_keys = {}

    # ------------------------------------------------------------------ events
    def poke(self, _ev=None):
        """Something the unit may be waiting for happened: re-evaluate."""
        if not self.wake.triggered:
            self.wake.succeed()

    def poke_at(self, t):
        """Re-evaluate at ``t`` (one timer at a time, the earliest wanted)."""
        if self.timer is not None and self.timer_at <= t:
            return
        ev = self.env.timeout(t - self.env.now)
        ev.callbacks.append(self._timer)
        self.timer, self.timer_at = ev, t

    def _timer(self, ev):
        if ev is self.timer:
            self.timer = None
        self.resume(ev)

    def resume(self, _ev):
        """Callback of an event the unit may be waiting for (its timer, buffer room): like
        :meth:`poke`, but the unit runs as part of that event instead of through a second one."""
        w = self.wake
        if not w.triggered:
            w._ok, w._value = True, None
            callbacks, w.callbacks = w.callbacks, None
            for cb in callbacks:
                cb(w)

    # ----------------------------------------------------------- the program
    def unissued(self):
        """Transactions taken and not yet issued, oldest first (for a stall report)."""
        return sorted(self.aside + self.ready, key=_ORDER)

    def take(self):
        """The next transaction of the program, with its addresses and size; None at the end."""
        txn = next(self.program, None)
        if txn is None:
            return None
        bursts = self.bursts_for(txn)
        txn.bursts = bursts
        txn.nbytes = txn.hold = len(bursts) * self.burst
        # limits count requests (fetch.request_bytes each), not simulated transactions,
        # so the engine's grain does not change the hardware being modelled
        txn.nreq = txn.nbytes / self.req_bytes
        txn.order = self.taken
        self.taken += 1
        return txn

    def window_open(self, txn):
        """May the unit take ``txn``? At most ``issue_window`` fetch descriptors (one
        plane of one head group for one query block, however many chunks the engine
        grain cuts it into) past the oldest one set aside."""
        return not self.aside or txn.desc - self.aside[0].desc <= self.window

    def next_ready(self):
        """Index in ``ready`` of the transaction to issue next: the oldest of the descriptor
        being issued (a descriptor is not interrupted while it can go on), else the oldest."""
        d = self.desc_now
        for k, t in enumerate(self.ready):
            if t.desc == d:
                return k
        return 0

    def set_aside(self, txn, now):
        cause = next(c for due, c in txn.waits if not due.processed)
        txn.dep_cause = cause
        txn.log.append(("fetch", now))
        self.aside.append(txn)
        for due, _c in txn.waits:
            if not due.processed:
                due.event().callbacks.append(self._fired)

    def _fired(self, _ev):
        """A dependency of a set-aside transaction fired."""
        self.fired = True
        self.poke()

    def release_aside(self, now):
        """Set-aside transactions whose dependency fired become ready."""
        if not self.fired:
            return
        self.fired = False
        keep = []
        for t in self.aside:
            if all(due.processed for due, _c in t.waits):
                t.log.append((t.dep_cause, now))
                insort(self.ready, t, key=_ORDER)
            else:
                keep.append(t)
        self.aside = keep

    # ------------------------------------------------------------ in flight
    # A transaction is handed over from ``hs`` (its first byte leaves the reorder
    # stage) to ``last``, linearly. Each buffer is written in issue order, so
    # within one stream the handover intervals follow each other and only its
    # oldest pending transaction is part way at any instant.
    def retire(self):
        """Drop transactions fully handed over by now from the in-flight count."""
        if not self.npending:
            return
        now = self.env.now
        for st in self.streams.values():
            p = st.pending
            while p and p[0].last is not None and p[0].last <= now:
                t = p.popleft()
                self.npending -= 1
                if t.early:
                    self.early -= t.nreq

    def count_early(self):
        """Requests that have arrived whole but wait for an earlier transaction."""
        now = self.env.now
        h = self.arrivals
        while h and h[0][0] <= now:
            _, _, t = heappop(h)
            if t.last > now:         # not handed over yet: it waits in the reorder stage
                t.early = True
                self.early += t.nreq
        return self.early

    def issue_block(self, txn):
        """Why ``txn`` cannot issue now (a blocked cause), or None."""
        if self.npending:
            if self.slot_room_at(self.env.now, txn.nreq) > self.env.now:
                return "inflight_limit"
            if self.count_early() >= self.reorder_cap:
                return "reorder_full"
        return None

    def slots_hold(self, txn):
        """When the pool's request slots let ``txn`` go, if that is after the request port is
        free (else None): nothing but the unit's own issues changes when they free."""
        if not self.npending:
            return None
        t = self.slot_room_at(self.env.now, txn.nreq)
        return t if t > self.issue_free else None

    def when_room(self, txn):
        """Earliest time the pool's request slots let ``txn`` issue."""
        return self.slot_room_at(self.env.now, txn.nreq)

    def next_handover(self):
        """When the next pending transaction is fully handed over (None: one is untimed)."""
        times = [st.pending[0].last for st in self.streams.values() if st.pending]
        if not times or None in times:
            return None
        return min(times)

    def stream(self, txn):
        st = self.streams.get(txn.buffer.name)
        if st is None:
            st = self.streams[txn.buffer.name] = _Stream()
        return st

    def room_ahead(self, txn, room):
        """Keep the buffer's room for ``txn`` if some of it comes later (see
        :meth:`sim.engine.buffers.Buffer.room`), in bursts, for the pool."""
        if room is not None:
            txn.room = (room[0] / self.burst, room[1])

    def issue(self, txn, cause):
        now = self.env.now
        self.nudges = 0   # progress: the spin count starts again
        txn.log.append((cause, now))
        if txn.room is not None:
            # its first burst waits for room in the pool: say so in its log
            rx, rt = txn.room
            t = float(rt[0] if rx[0] >= 1.0 else np.interp(1.0, rx, rt))
            if t > now:
                txn.log.append((f"{txn.buffer.name}_buffer_full", t))
        st = self.stream(txn)
        st.pending.append(txn)
        st.untimed.append(txn)
        self.npending += 1
        txn.last = None
        txn.on_timed = self.timed
        self.issuing = True
        self.pool.submit(txn)   # times it now (first come first served) or when it commits
        self.issuing = False
        txn.bursts = None
        stats = self.stats
        key = self.plane_keys.get(txn.kind)
        if key is None:
            key = self.plane_keys[txn.kind] = f"bytes_{txn.kind}"
        stats["bytes"] += txn.nbytes
        stats[key] += txn.nbytes
        stats["transactions"] += 1
        stats["requests"] += txn.nreq
        # one request issued per cycle; no event unless the next transaction is ready before
        self.issue_free = now + txn.nreq
        self.state.busy_until(self.issue_free)

    def timed(self, txn):
        """The pool has fixed ``txn``'s data times: hand data over, in order per buffer."""
        txn.timed = True
        st = self.stream(txn)
        u = st.untimed
        env = self.env
        while u and u[0].timed:
            t = u.popleft()
            _, first, done = t.mem_times
            h = st.handed
            prof = t.prof
            if prof is None:   # timed as a whole (no profile): its data assumed to arrive evenly
                prof = t.prof = [[first + (done - first) / t.pieces, 1.0], [done, 1.0 / t.pieces]]
            if prof[0][0] < h:
                # a part is handed over once it is on chip and the transactions before it are
                prof = t.prof = [[a if a > h else h, x] for a, x in prof]
            h_first = prof[0][0]
            t.hs = max(first, h)
            st.handed = max(done, h)
            t.last = prof[-1][0] = st.handed
            t.early = False
            heappush(self.arrivals, (done, t.order, t))
            t.log.append(("reorder", t.last))
            t.ready = h_first
            if t.done is not None:   # the consumer waits for it already
                later(env, max(0.0, h_first - env.now), t.done)
        if not self.issuing:   # timed inside issue: the unit looks again right after
            self.poke()

    def why(self, cur, more, head):
        """(state, cause) while nothing can move (``head``: the ready transaction to go next)."""
        if head is not None:
            return "blocked", head.wait_cause
        if cur is not None:
            return "blocked", f"{cur.buffer.name}_buffer_full"
        if more is not None and not self.window_open(more):
            return "blocked", "issue_window"
        if self.aside:
            return "starved", self.aside[0].dep_cause
        return "starved", None


def fetch_process(u):
    """The fetch unit ``u`` issuing its program (in order) to its pool."""
    env, state = u.env, u.state
    strict = u.window == 0
    cur = req = None     # taken from the program, waiting for buffer room
    nxt = u.take()
    while True:
        now = env.now
        if u.aside:
            u.release_aside(now)
        # 1. issue the oldest ready transaction when the port and the limits allow
        if u.ready:
            u.retire()
            k = u.next_ready()
            txn = u.ready[k]
            if now < u.issue_free:
                # the port is still issuing: nothing else goes out before it is free
                hold = u.slots_hold(txn)
                if hold is None:
                    yield env.timeout(u.issue_free - now)
                    continue
                # the slots hold it past then: it waits for them from the port's end
                u.poke_at(hold)
                why, t_wait = "inflight_limit", u.issue_free
            else:
                why, t_wait = u.issue_block(txn), now
            if why is None:
                del u.ready[k]
                u.desc_now = txn.desc
                u.issue(txn, txn.wait_cause or "fetch")
                continue
            if txn.wait_cause is None:
                txn.log.append(("fetch", t_wait))
            txn.wait_cause = why
        # 2. take the next transaction while the window allows, and reserve its room
        if cur is None and nxt is not None and u.window_open(nxt) and not (strict and u.ready):
            cur, nxt = nxt, u.take()
            cur.wait_cause = None
            if strict and not all(due.processed for due, _c in cur.waits):
                # strictly in order: wait for the dependency before reserving room
                for due, cause in cur.waits:
                    if not due.processed:
                        cur.log.append(("fetch", env.now))
                        state.set("starved", cause)
                        yield due.event()
                        cur.log.append((cause, env.now))
                now = env.now
            req = cur.buffer.reserve(cur.nbytes)
            if req is not None:
                cur.log.append(("fetch", now))
                req.callbacks.append(u.resume)
            else:
                u.room_ahead(cur, cur.buffer.room())
        # 3. room granted: ready to issue, or set aside until its dependency fires
        if cur is not None and (req is None or req.processed):
            if req is not None:
                cur.log.append((f"{cur.buffer.name}_buffer_full", now))
                u.room_ahead(cur, req.value)
            txn, cur, req = cur, None, None
            u.walked += txn.nreq
            txn.end_pos = u.walked
            if all(due.processed for due, _c in txn.waits):
                insort(u.ready, txn, key=_ORDER)
            else:
                u.set_aside(txn, now)
            continue
        if cur is None and nxt is None and not u.aside and not u.ready:
            break
        # 4. nothing can move now: say why and wait for something to change
        # the transaction that goes next, not the oldest: a descriptor under way goes first,
        # and a smaller one's room can come earlier than its own (a timer that found the unit
        # blocked again would then come back every nanosecond for ever)
        head = u.ready[u.next_ready()] if u.ready else None
        state.set(*u.why(cur, nxt, head))
        if head is not None and u.npending:
            t = u.when_room(head) if head.wait_cause == "inflight_limit" else u.next_handover()
            if t is not None:   # else the pool pokes when it times the transaction on the way
                if t <= now:
                    # blocked now, so room comes later: a ramp a rounding error long must not
                    # bring the unit back at the same instant forever
                    t = now + 1e-9
                    u.nudges += 1
                    if u.nudges > NUDGE_LIMIT:
                        raise SimulationStalled(
                            f"no progress at cycle {now:.0f}: the fetch unit found its next "
                            f"transaction ({head.kind} of step {head.step}) still blocked by "
                            f"{head.wait_cause} {NUDGE_LIMIT:,} times when room was due")
                u.poke_at(t)
        if not u.wake.triggered:
            yield u.wake
        u.wake = env.event()
    if env.now < u.issue_free:
        yield env.timeout(u.issue_free - env.now)
    state.set("idle")
