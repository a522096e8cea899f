"""On-chip SRAM buffers modelled as capacity in bytes.

A buffer is a simpy Container whose level is the bytes reserved in it. The
fetch unit reserves room before it issues a transaction (and is ``blocked`` on
the buffer while there is none); the consumer frees it after the last use. So
buffer size becomes back-pressure on memory, and -- through the tiling rule in
:mod:`sim.engine.tiling` -- it decides how often K and V are re-streamed.
"""

import simpy


class Buffer:
    """An on-chip buffer of ``capacity`` bytes with peak-occupancy tracking."""

    def __init__(self, env, name, capacity):
        if capacity <= 0:
            raise ValueError(f"buffer {name!r}: capacity must be > 0, got {capacity!r}")
        self.env = env
        self.name = name
        self.capacity = capacity
        self.store = simpy.Container(env, capacity=capacity, init=0)
        self.peak = 0.0
        self.bytes_written = 0.0
        self.bytes_read = 0.0

    def reserve(self, nbytes):
        """Event fired once ``nbytes`` of room are reserved."""
        ev = self.store.put(nbytes)
        self.bytes_written += nbytes
        level = self.store.level + (0 if ev.triggered else nbytes)
        if level > self.peak:
            self.peak = level
        return ev

    def release(self, nbytes):
        self.store.get(nbytes)

    def note_read(self, nbytes):
        self.bytes_read += nbytes

    def report(self):
        return {"capacity_bytes": self.capacity, "peak_bytes": self.peak,
                "peak_fraction": self.peak / self.capacity,
                "bytes_written": self.bytes_written, "bytes_read": self.bytes_read}
