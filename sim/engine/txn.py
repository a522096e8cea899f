"""Transactions: the unit of work that moves between simulated units.

A transaction is a tile or a group of tiles (``rows`` key/value rows, or a
block of score rows) with the bytes it carries and a small log of where it
has been. The log is a list of ``(stage, t_end)``: the transaction spent
``[previous t_end, t_end)`` in ``stage``. When a consumer is starved waiting
for a transaction, that log says which upstream stage held it, and the wait is
charged to those stages (see :func:`sim.engine.stats.UnitState.charge_wait`).
"""


class Txn:
    """One transaction: what it is, how big, and where it has been."""

    __slots__ = ("kind", "step", "head", "block", "rows", "nbytes", "bursts", "log", "done",
                 "buffer", "hold", "layer", "positions", "waits", "skip", "pieces", "last",
                 "mem_times", "on_timed", "timed", "nreq", "order", "end_pos", "wait_cause",
                 "dep_cause", "hs", "early", "desc", "readers", "is_write", "room", "prof", "ready")

    def __init__(self, kind, step, head, block, rows, nbytes, t_created, creator):
        self.kind = kind          # 'Q', 'K', 'KL', 'V' (fetched) or 'S', 'P' (computed)
        self.step = step          # index of the attention step in the trace
        self.head = head          # head id (or -1 for whole-layer work)
        self.block = block        # query block within the head
        self.rows = rows          # key/value rows (fetched) or score rows (computed)
        self.nbytes = nbytes      # bytes moved from memory (burst-rounded)
        self.bursts = None        # burst addresses, set by the fetch unit
        self.log = [(creator, t_created)]
        self.done = None          # simpy event a consumer waits on for ``ready`` (made when one does)
        self.ready = None         # when its first piece is in place for the consumer, once timed
        self.buffer = None        # name of the on-chip buffer holding it
        self.hold = 0             # bytes reserved in that buffer
        self.layer = 0            # layer whose DRAM region holds the rows
        self.positions = None     # row positions to fetch (numpy), fetched kinds only
        self.waits = ()           # (Due, cause) to see out before issue
        self.skip = 0             # leading bursts the previous chunk of its stream brought
        self.pieces = 1           # tiles a consumer can start on one by one (streaming)
        self.last = None          # when its last piece is available (``ready``: the first)
        self.mem_times = None     # (start, first data, last data) once the pool has timed it
        self.on_timed = None      # called with the txn when ``mem_times`` is set
        self.timed = False
        self.nreq = 0.0           # requests of fetch.request_bytes it counts for
        self.order = 0            # place in the fetch program
        self.end_pos = 0.0        # requests taken from the program up to and including it
        self.wait_cause = None    # why it waits to issue, once room and dependency are there
        self.dep_cause = None     # the dependency it was set aside for
        self.hs = None            # when its handover to the consumer starts (``last``: ends)
        self.early = False        # arrived whole and waiting for an earlier transaction
        self.desc = 0             # fetch descriptor it belongs to (chunks of one plane fetch)
        self.readers = 1          # head groups each reading their own part of it (a shared query)
        self.is_write = False     # bursts written to memory (else read)
        self.room = None          # (bursts, times): when its buffer has room for them, if later
        self.prof = None          # [[on chip, share of the work left]]: how its data arrives

    def mark(self, stage, t_end):
        """Record that the transaction spent time until ``t_end`` in ``stage``."""
        self.log.append((stage, t_end))

    def __repr__(self):
        return f"Txn({self.kind} step={self.step} head={self.head} block={self.block} rows={self.rows})"
