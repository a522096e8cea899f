"""Dot-product array: the multipliers that compute q.K scores and p.V outputs.

The array is ``dot.multipliers`` multipliers arranged in rows of
``dot.lanes``; each row consumes ``lanes`` elements of one dot product per
cycle. A head width that is not a multiple of ``lanes`` leaves lanes idle in
the last pass, which is why :func:`macs_per_cycle` depends on ``head_dim``.
The array is pipelined: it is occupied for the throughput time of an
operation, and the result appears ``pipeline_cycles`` later.
"""

import math


def macs_per_cycle(multipliers, lanes, head_dim):
    """Sustained MACs per cycle at this head width (lane quantization)."""
    passes = math.ceil(head_dim / lanes)
    return multipliers * head_dim / (passes * lanes)


def service_cycles(macs, multipliers, lanes, head_dim):
    """Cycles the array is occupied by ``macs`` MACs (throughput part only)."""
    if macs <= 0:
        return 0
    # fractional: a transaction is part of a continuous stream, the grain is the engine's choice
    return macs / macs_per_cycle(multipliers, lanes, head_dim)


class DotOp:
    """One operation on the array: q.K of a block, its LSB recompute, or p.V."""

    __slots__ = ("kind", "step", "head", "block", "macs", "head_dim", "inputs", "waits",
                 "release", "out", "done", "score_rows", "score_cols", "part", "held")

    def __init__(self, kind, step, head, block, macs, head_dim):
        self.kind = kind        # 'qk', 'lsb' or 'pv'
        self.step = step
        self.head = head
        self.block = block
        self.macs = macs
        self.head_dim = head_dim
        self.inputs = []        # fetched transactions it reads
        self.waits = ()         # (Due, cause) it must see out first
        self.release = ()       # transactions whose buffer room it frees
        self.out = None         # score transaction for the softmax unit
        self.done = None        # when its result is out (a Due)
        self.score_rows = 0
        self.score_cols = 0
        self.part = None        # which part of a shared query transaction it reads (in order)
        # an input the op before it in the same pass read into the array (the query block, for
        # every key chunk after the first): not read from its buffer again
        self.held = None


def dot_process(env, ops, multipliers, lanes, pipeline, state, sm_queue, producer=None):
    """Run ``ops`` in program order on one array; ``state`` is its UnitState.

    For each op: wait for the first tile of each operand transaction (starved,
    charged to the stage that held it), then work for the throughput time
    (busy). Operands stream: an op ends no earlier than any part of an operand
    is on chip plus the work left from that part on (its arrival profile,
    ``txn.prof``), and the array waits for parts in between (starved on the
    memory transfer, or on the reorder stage when the data had to wait for an
    earlier transaction). A streamed operand's buffer room is freed as its rows
    are read (over the op); a query block at the end. Then it hands the score
    block to the softmax unit (blocked while its input queue is full).
    """
    rates = {}   # head_dim -> MACs per cycle
    set_state = state.set
    for op in ops:
        inputs = op.inputs
        for txn in inputs:
            t0 = env.now
            ready = txn.ready
            if ready is None or ready > t0:
                set_state("starved", "fetch")
                if ready is None:         # not timed yet: the fetch unit fires ``done`` then
                    if txn.done is None:
                        txn.done = env.event()
                    yield txn.done
                else:
                    yield env.timeout(ready - t0)
                state.charge_wait(t0, txn, producer=producer)
        for due, cause in op.waits:
            if not due.processed:
                set_state("starved", cause)
                yield due.event()
        for txn in inputs:
            if txn is not op.held:
                txn.buffer.note_read(txn.nbytes / txn.readers)
        macs = op.macs
        work = 0.0
        if macs > 0:
            rate = rates.get(op.head_dim)
            if rate is None:
                rate = rates[op.head_dim] = macs_per_cycle(multipliers, lanes, op.head_dim)
            work = macs / rate
        now = env.now
        end = now + work
        late = None
        for txn in inputs:
            if txn.readers > 1:   # its own part of a shared transaction, needed whole
                t = txn.hs + (txn.last - txn.hs) * (op.part + 1) / txn.readers + work
            else:                 # streamed: each part once on chip, then the work left from it
                t = max([a + x * work for a, x in txn.prof])
            if t > end:
                end, late = t, txn
        if late is None:
            set_state("busy")
        else:
            state.stream(work, end, "reorder" if late.last > late.mem_times[2] else "memory_transfer")
        at_end = None
        for txn in op.release:   # streamed rows free their room as they are read
            if txn.pieces > 1 and txn.readers == 1:
                txn.buffer.release_over(txn.hold, now, end)
            else:
                at_end = [txn] if at_end is None else at_end + [txn]
        yield env.timeout(end - now)
        if at_end is not None:
            for txn in at_end:
                txn.buffer.release(txn.hold)
        out = op.out
        if out is not None:
            out.log.append(("dot", env.now + pipeline))
            req = sm_queue.put(out)
            if req is not None:
                set_state("blocked", "softmax_input_full")
                yield req
        if op.done is not None:
            op.done.fire(pipeline)
        set_state("starved", None)
    set_state("idle")
