"""On-chip SRAM buffers modelled as capacity in bytes.

The fetch unit reserves room before it issues a transaction (and is
``blocked`` on the buffer while there is none); the consumer frees it after
the last use. So buffer size becomes back-pressure on memory, and -- through
the tiling rule in :mod:`sim.engine.tiling` -- it decides how often K and V
are re-streamed.

Like a simpy ``Container`` whose level is the bytes reserved, but a
reservation that fits is granted on the spot without an event: buffers are
touched by every transaction, and most reservations never wait.
"""

from collections import deque


class Buffer:
    """An on-chip buffer of ``capacity`` bytes with peak-occupancy tracking."""

    def __init__(self, env, name, capacity):
        if capacity <= 0:
            raise ValueError(f"buffer {name!r}: capacity must be > 0, got {capacity!r}")
        self.env = env
        self.name = name
        self.capacity = capacity
        self.level = 0.0
        self.waiting = deque()      # (nbytes, event), served in order
        self.peak = 0.0
        self.bytes_written = 0.0
        self.bytes_read = 0.0

    def reserve(self, nbytes):
        """Reserve ``nbytes``; None if granted now, else an event fired when granted."""
        if nbytes > self.capacity:
            raise ValueError(f"buffer {self.name!r}: {nbytes} bytes can never fit in {self.capacity}")
        self.bytes_written += nbytes
        if not self.waiting and self.level + nbytes <= self.capacity:
            self._grant(nbytes)
            return None
        ev = self.env.event()
        self.waiting.append((nbytes, ev))
        return ev

    def _grant(self, nbytes):
        self.level += nbytes
        if self.level > self.peak:
            self.peak = self.level

    def release(self, nbytes):
        self.level -= nbytes
        w = self.waiting
        while w and self.level + w[0][0] <= self.capacity:
            n, ev = w.popleft()
            self._grant(n)
            ev.succeed()

    def note_read(self, nbytes):
        self.bytes_read += nbytes

    def report(self):
        return {"capacity_bytes": self.capacity, "peak_bytes": self.peak,
                "peak_fraction": self.peak / self.capacity,
                "bytes_written": self.bytes_written, "bytes_read": self.bytes_read}
