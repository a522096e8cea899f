"""Feeds: each unit's operations in program order, made a step at a time.

The program builder (:mod:`sim.engine.program`) appends a step's operations
to every unit's feed when it makes the step (a long step a few query blocks
at a time); units read their feed as they go (see :class:`Feed`).
"""

from collections import deque


WAIT = object()   # Feed.take: the next operation is not made yet; wait for Feed.wait()


class Feed:
    """One unit's operations in program order, made a step at a time as the units
    reach them: only the steps in flight are held (of a long step, the blocks in
    flight), so a run's memory follows the work in flight, not the length of the
    trace or of one step.

    Iterating makes the next step when the feed runs dry. A unit whose
    operations are sparse (the selector, the write-back: a trace may have none)
    must not make steps ahead of the fetch unit, so it uses :meth:`take` and
    waits for :meth:`wait` instead.
    """

    def __init__(self, more, env=None):
        self.ops = deque()
        self.more = more          # makes the next step; False once every step is made
        self.env = env
        self.done = False         # every step made
        self.event = None         # fired when a step is made or the last was

    def append(self, op):
        self.ops.append(op)

    def __iter__(self):
        return self

    def __next__(self):
        ops = self.ops
        while not ops:
            if not self.more():
                raise StopIteration
        return ops.popleft()

    def take(self):
        """The next operation, None at the end, or WAIT (nothing made yet)."""
        if self.ops:
            return self.ops.popleft()
        return None if self.done else WAIT

    def wait(self):
        if self.event is None:
            self.event = self.env.event()
        return self.event

    def notify(self, done):
        self.done = done
        ev, self.event = self.event, None
        if ev is not None:
            ev.succeed()
