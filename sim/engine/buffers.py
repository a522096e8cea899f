"""On-chip SRAM buffers modelled as capacity in bytes.

The fetch unit reserves room before it issues a transaction (and is
``blocked`` on the buffer while there is none); the consumer frees it as it
reads the rows. So buffer size becomes back-pressure on memory, and --
through the tiling rule in :mod:`sim.engine.tiling` -- it decides how often
K and V are re-streamed.

Like a simpy ``Container`` whose level is the bytes reserved, with two
differences. A reservation that fits is granted on the spot without an event:
buffers are touched by every transaction, and most reservations never wait.
And room can be freed over an interval (:meth:`Buffer.release_over`): an
operation that streams through a chunk frees its rows as it goes, not all at
its end, so a coarse simulated chunk holds the room fine ones would. Waiting
reservations are served in order, each as soon as the releases in progress
make room for it (one timer, not one event per row).

**Room request by request.** A buffer made with ``ahead=True`` also grants a
reservation that does not fit yet but that the releases already under way
will make room for (consumers that have started reading their rows): the
grant carries *when* room comes for each part of it (:meth:`Buffer.room`),
and the memory pool lets each request of the transaction in only once its
part has room. That is what a fetch unit reserving a buffer slot per request
does, so a chunk cut coarse does not hold room a finely cut one would only
take later. Reservations are still granted in order, and only against
releases already fixed in time, so nothing granted can wait on room that only
a later reservation frees.
"""

from collections import deque

import numpy as np

# a grant ahead may take up to this share of its bytes beyond the releases under way
TAIL_SHARE = 8


def ramp_time(now, amount, ramps):
    """Earliest time >= ``now`` at which ``ramps`` have released ``amount`` more.

    ``ramps`` are ``(t0, t1, left)``: ``left`` released linearly from
    ``max(now, t0)`` to ``t1`` (a ramp with ``t1 <= max(now, t0)`` releases it at
    once). Returns None if they never release that much. A sweep over the
    ramps' ends: O(n log n).
    """
    if amount <= 0:
        return now
    steps = []   # (time, change of rate, lump released at that time)
    for t0, t1, left in ramps:
        a = max(now, t0)
        if left <= 0:
            continue
        if t1 <= a:
            steps.append((a, 0.0, left))
        else:
            rate = left / (t1 - a)
            steps.append((a, rate, 0.0))
            steps.append((t1, -rate, 0.0))
    steps.sort()
    t0, rate, done = now, 0.0, 0.0
    want = amount * (1 - 1e-12)     # all of the ramps, summed in pieces, may come out a rounding short
    for t, d_rate, lump in steps:
        gain = rate * (t - t0)
        if rate > 0 and done + gain >= want:
            return min(t0 + (amount - done) / rate, t)
        done += gain + lump
        if done >= want:
            return t
        t0, rate = t, rate + d_rate
    return None


class Buffer:
    """An on-chip buffer of ``capacity`` bytes with peak-occupancy tracking."""

    def __init__(self, env, name, capacity, ahead=False):
        if capacity <= 0:
            raise ValueError(f"buffer {name!r}: capacity must be > 0, got {capacity!r}")
        self.env = env
        self.name = name
        self.capacity = capacity
        self.level = 0.0            # bytes reserved, ramps counted whole until they end
        self.ramps = []             # [t0, t1, bytes] being released linearly
        self.waiting = deque()      # (nbytes, event), served in order
        self.timer = None
        self.peak = 0.0
        self.bytes_written = 0.0
        self.bytes_read = 0.0
        self._slack = capacity * 1e-9    # rounding of the ramps' sums (a fraction of a byte)
        self.ahead = ahead
        self.granted = None         # room of the last grant (see :meth:`room`)

    def reserve(self, nbytes):
        """Reserve ``nbytes``; None if granted now, else an event fired when granted
        (:meth:`room` then says when each part of it has room)."""
        if nbytes > self.capacity:
            raise ValueError(f"buffer {self.name!r}: {nbytes} bytes can never fit in {self.capacity}")
        self.bytes_written += nbytes
        if not self.waiting:
            room = self._room_for(nbytes)
            if room is not False:
                self._grant(nbytes, room)
                return None
        ev = self.env.event()
        self.waiting.append((nbytes, ev))
        if len(self.waiting) == 1:
            self._arm()
        return ev

    def occupied(self):
        """Bytes held now: reserved, less what the releases in progress have freed."""
        now = self.env.now
        if not self.ramps:
            return self.level
        held = self.level
        ended = False
        for t0, t1, b in self.ramps:
            if now >= t1:
                self.level -= b
                held -= b
                ended = True
            elif now > t0:
                held -= b * (now - t0) / (t1 - t0)
        if ended:   # most calls see no ramp end: the list is remade only when one has
            self.ramps = [r for r in self.ramps if now < r[1]]
        return held

    def room(self):
        """When the last grant has room: None if all of it had room when granted, else
        ``(bytes, times)``, rising: its first ``bytes[k]`` bytes have room from
        ``times[k]`` (linear in between, ``times[0]`` up to ``bytes[0]``)."""
        return self.granted

    def _room_for(self, nbytes):
        """None if ``nbytes`` fit now; their room (see :meth:`room`) if the releases under
        way make it (``ahead`` buffers); False if neither."""
        held = self.occupied()
        free = self.capacity - held
        if nbytes <= free + self._slack:
            return None
        if not self.ahead or not self.ramps:
            return False
        now = self.env.now
        edges = {}
        for t0, t1, b in self.ramps:
            a = max(now, t0)
            rate = b / (t1 - t0)
            edges[a] = edges.get(a, 0.0) + rate
            edges[t1] = edges.get(t1, 0.0) - rate
        xs = [free]
        ts = [now]
        rate = last = 0.0
        for t in sorted(edges):
            if t > ts[-1]:
                xs.append(xs[-1] + rate * (t - ts[-1]))
                ts.append(t)
                last = rate
            rate += edges[t]
        short = nbytes - xs[-1]
        if short > self._slack:
            if short > nbytes / TAIL_SHARE:
                return False
            # a short tail: its room comes as the next reader goes on at the last one's pace
            xs.append(nbytes)
            ts.append(ts[-1] + short / last)
        return np.array(xs), np.array(ts)

    def _grant(self, nbytes, room=None):
        self.level += nbytes
        self.granted = room
        if self.level <= self.peak:   # held <= level: no new peak (occupied() can wait)
            return
        held = self.occupied()
        if held > self.peak:   # a grant ahead counts rows not in yet: the buffer holds at most its size
            self.peak = min(held, self.capacity)

    def release(self, nbytes):
        """Free ``nbytes`` now."""
        self.level -= nbytes
        self._serve()

    def release_over(self, nbytes, t0, t1):
        """Free ``nbytes`` linearly from ``t0`` (now) to ``t1``: rows read one after another."""
        if t1 <= t0:
            self.release(nbytes)
            return
        self.ramps.append((t0, t1, nbytes))
        self._serve()

    def _serve(self):
        w = self.waiting
        while w:
            room = self._room_for(w[0][0])
            if room is False:
                break
            n, ev = w.popleft()
            self._grant(n, room)
            ev.succeed(room)
        if w:
            self._arm()

    def _arm(self):
        """Wake the first waiter when the releases in progress make room for it."""
        now = self.env.now
        need = self.occupied() + self.waiting[0][0] - self.capacity
        t = ramp_time(now, need, [(t0, t1, b * (t1 - max(now, t0)) / (t1 - t0))
                                  for t0, t1, b in self.ramps])
        first = self.waiting[0][1]
        if t is None or (self.timer is not None and self.timer[0] <= t and self.timer[2] is first):
            return
        ev = self.env.timeout(max(t - now, 0.0))
        self.timer = (t, ev, first)
        ev.callbacks.append(self._ring)

    def _ring(self, ev):
        if self.timer is not None and self.timer[1] is ev:
            _t, _ev, armed = self.timer
            self.timer = None
            if self.waiting and self.waiting[0][1] is armed:
                # the releases have made the room it needed, to rounding: grant it
                n, first = self.waiting.popleft()
                self._grant(n)
                first.succeed()
        self._serve()

    def note_read(self, nbytes):
        self.bytes_read += nbytes

    def report(self):
        return {"capacity_bytes": self.capacity, "peak_bytes": self.peak,
                "peak_fraction": self.peak / self.capacity,
                "bytes_written": self.bytes_written, "bytes_read": self.bytes_read}
