"""Softmax unit: turns a block of score rows into probabilities.

Per score row it finds the maximum (one pass), then exponentiates, sums and
normalizes (a second pass) and accumulates the column sums that cascade token
pruning ranks. ``softmax.lanes`` elements per cycle in each pass; the result
appears ``latency_cycles`` after the unit is done with a block.
"""

from collections import deque

from .due import later

PASSES = 2  # max pass, then exp/sum/normalize pass


def service_cycles(elements, lanes):
    """Cycles the unit is occupied by ``elements`` score elements."""
    if elements <= 0:
        return 0
    return PASSES * elements / lanes


class SoftmaxOp:
    """One block of score rows: ``rows`` x ``cols`` elements."""

    __slots__ = ("step", "head", "block", "rows", "cols", "done", "second")

    def __init__(self, step, head, block, rows, cols, second=False):
        self.step = step
        self.head = head
        self.block = block
        self.rows = rows
        self.cols = cols
        self.second = second    # recompute after the LSB plane arrived
        self.done = None        # when the probabilities are out (a Due)


class ScoreQueue:
    """The score buffer between the dot array and the softmax unit: ``capacity`` blocks.

    A bounded FIFO like ``simpy.Store``, but a put that fits and a get that
    finds a block are served on the spot without events (most of them do).
    """

    def __init__(self, env, capacity):
        if capacity < 1:
            raise ValueError(f"score queue capacity must be >= 1, got {capacity!r}")
        self.env = env
        self.capacity = capacity
        self.items = deque()
        self.getter = None      # event of the waiting consumer
        self.putters = deque()  # (txn, event) waiting for room

    def put(self, txn):
        """None if stored now, else an event fired once there is room."""
        if self.getter is not None:
            # the waiting consumer resumes when the block is out of the array's pipeline
            ev, self.getter = self.getter, None
            later(self.env, txn.log[-1][1] - self.env.now, ev, txn)
            return None
        if len(self.items) < self.capacity:
            self.items.append(txn)
            return None
        ev = self.env.event()
        self.putters.append((txn, ev))
        return ev

    def get(self):
        """``(txn, None)`` when a block is waiting, else ``(None, event)`` whose value is the block."""
        if self.items:
            txn = self.items.popleft()
            if self.putters:
                t, ev = self.putters.popleft()
                self.items.append(t)
                ev.succeed()
            return txn, None
        self.getter = self.env.event()
        return None, self.getter


def softmax_process(env, ops, lanes, latency, state, queue):
    """Run ``ops`` in order, taking each op's score block from ``queue``."""
    set_state = state.set
    for op in ops:
        t0 = env.now
        txn, ev = queue.get()
        if ev is not None:
            set_state("starved", "dot")
            txn = yield ev
        ready = txn.log[-1][1]          # the array's pipeline delivers it then
        if ready > env.now:
            if ev is None:
                set_state("starved", "dot")
            yield env.timeout(ready - env.now)
        if env.now > t0:
            state.charge_wait(t0, txn, before="dot")
        set_state("busy")
        yield env.timeout(service_cycles(op.rows * op.cols, lanes))
        op.done.fire(latency)
        set_state("starved", None)
    set_state("idle")
