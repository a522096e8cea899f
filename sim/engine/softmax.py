"""Softmax unit: turns a block of score rows into probabilities.

Per score row it finds the maximum (one pass), then exponentiates, sums and
normalizes (a second pass) and accumulates the column sums that cascade token
pruning ranks. ``softmax.lanes`` elements per cycle in each pass; the result
appears ``latency_cycles`` after the unit is done with a block.
"""

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
        self.done = None        # event: probabilities ready


def softmax_process(env, ops, lanes, latency, state, queue):
    """Run ``ops`` in order, taking each op's score block from ``queue``."""
    from .dot import later

    for op in ops:
        t0 = env.now
        state.set("starved", "dot")
        txn = yield queue.get()
        ready = txn.log[-1][1]          # the array's pipeline delivers it then
        if ready > env.now:
            yield env.timeout(ready - env.now)
        state.charge_wait(t0, txn, before="dot")
        state.set("busy")
        yield env.timeout(service_cycles(op.rows * op.cols, lanes))
        later(env, latency, op.done)
        state.set("starved", None)
    state.set("idle")
