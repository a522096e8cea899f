"""Fetch unit: turns planned chunks into memory requests and hands data over in order.

It walks its transactions in program order. For each one it waits for the
data dependency (the previous layer, the softmax that decides an LSB refetch,
the top-k that decides which V rows are kept), reserves room in the target
buffer, waits for a free in-flight slot, then issues the transaction's bursts
to the channel pool (one issue cycle per request). Completions may come back
out of order; the reorder stage hands transactions to consumers in issue
order and holds at most ``fetch.reorder_entries`` that finished early --
when it is full the unit stops issuing.
"""

from collections import deque


def fetch_process(env, txns, pool, router, arch, state, stats):
    """Issue ``txns`` (in program order) to ``pool``; ``router.bursts_for(txn)`` gives addresses."""
    inflight_cap = arch.fetch.inflight
    reorder_cap = arch.fetch.reorder_entries
    req_bytes = arch.fetch.request_bytes
    burst = arch.dram.burst_bytes
    pending = deque()        # issued, not yet handed over, in issue order
    early = [0]              # completed but waiting for an earlier one
    progress = [env.event()]

    def on_complete(txn):
        def fire(_ev):
            txn.completed = True
            early[0] += 1
            now = env.now
            while pending and pending[0].completed:
                t = pending.popleft()
                early[0] -= 1
                t.mark("reorder", now)
                t.done.succeed()
            ev = progress[0]
            if not ev.triggered:
                ev.succeed()
        return fire

    for txn in txns:
        for ev, cause in txn.waits:
            if not ev.processed:
                txn.mark("fetch", env.now)
                state.set("starved", cause)
                yield ev
                txn.mark(cause, env.now)
        bursts = router.bursts_for(txn)
        nbytes = len(bursts) * burst
        txn.bursts = bursts
        txn.nbytes = nbytes
        txn.hold = nbytes
        req = txn.buffer.reserve(nbytes)
        if req is not None:
            txn.mark("fetch", env.now)
            cause = f"{txn.buffer.name}_buffer_full"
            state.set("blocked", cause)
            yield req
            txn.mark(cause, env.now)
        while len(pending) >= inflight_cap or early[0] >= reorder_cap:
            cause = "inflight_limit" if len(pending) >= inflight_cap else "reorder_full"
            txn.mark("fetch", env.now)
            state.set("blocked", cause)
            if progress[0].triggered:
                progress[0] = env.event()
            yield progress[0]
            txn.mark(cause, env.now)
        txn.mark("fetch", env.now)
        state.set("busy")
        pending.append(txn)
        ev = pool.submit(txn)
        ev.callbacks.append(on_complete(txn))
        txn.bursts = None
        stats["bytes"] += nbytes
        stats[f"bytes_{txn.kind}"] += nbytes
        stats["transactions"] += 1
        issue = -(-nbytes // req_bytes) if nbytes else 1
        stats["requests"] += issue
        yield env.timeout(issue)
        state.set("starved", "program")
    state.set("idle")
