"""Write-back: the writes a step leaves behind, posted to the channel pool.

Once a step ends, the K/V rows it appends to the cache and its output rows
go to memory as posted writes (``txn.is_write``): each waits only for room in
its channels' write queues, and the pool places them between reads by its
drain policy (:mod:`sim.engine.dram`). Nothing on chip waits for a write, so
writes cost time only through the bus time and turnarounds they take from
reads. The run ends when the last step has ended and the last write's data
has crossed the bus: the trace's work includes putting its results in memory.
"""

from .feed import WAIT


def writeback_process(env, writes, pool, router, burst):
    """Post each ``(end, write transactions)`` of ``writes`` once its step has ended (``end``: a Due)."""
    while True:
        item = writes.take()
        if item is WAIT:
            yield writes.wait()
            continue
        if item is None:
            return
        done, txns = item
        if not done.processed:
            yield done.event()
        for txn in txns:
            txn.bursts = router.bursts_for(txn)
            txn.nbytes = len(txn.bursts) * burst
            ev = pool.submit(txn)
            txn.bursts = None
            if ev is not None and not ev.processed:
                yield ev      # the write queue took it in
