"""Fetch unit: turns planned chunks into memory requests and hands data over in order.

It walks its transactions in program order. For each one it waits for the
data dependency (the previous layer, the softmax that decides an LSB refetch,
the top-k that decides which V rows are kept), reserves room in the target
buffer, waits for a free in-flight slot, then issues the transaction's bursts
to the channel pool (one issue cycle per request). Completions may come back
out of order; the reorder stage hands transactions to consumers in issue
order and holds at most ``fetch.reorder_entries`` requests' worth of data that
finished early -- when it is full the unit stops issuing. ``fetch.inflight``
bounds the requests issued and not yet handed over.
"""

from collections import deque


def fetch_process(env, txns, pool, router, arch, state, stats):
    """Issue ``txns`` (in program order) to ``pool``; ``router.bursts_for(txn)`` gives addresses."""
    inflight_cap = arch.fetch.inflight
    reorder_cap = arch.fetch.reorder_entries
    req_bytes = arch.fetch.request_bytes
    burst = arch.dram.burst_bytes
    pending = deque()        # issued, not yet handed over, in issue order
    inflight = 0.0           # requests issued and not yet handed over
    early = 0.0              # requests completed but waiting for an earlier transaction
    progress = env.event()
    bursts_for = router.bursts_for
    set_state = state.set
    plane_bytes = {}         # txn kind -> its key in ``stats``

    def on_complete(txn):
        def fire(_ev):
            nonlocal inflight, early
            txn.completed = True
            early += txn.nbytes / req_bytes
            now = env.now
            while pending and pending[0].completed:
                t = pending.popleft()
                r = t.nbytes / req_bytes
                early -= r
                inflight -= r
                t.log.append(("reorder", now))
                t.done.succeed()
            if not progress.triggered:
                progress.succeed()
        return fire

    issue_free = 0.0   # the request port is busy issuing the previous transaction until then
    for txn in txns:
        log = txn.log
        for ev, cause in txn.waits:
            if not ev.processed:
                log.append(("fetch", env.now))
                set_state("starved", cause)
                yield ev
                log.append((cause, env.now))
        bursts = bursts_for(txn)
        nbytes = len(bursts) * burst
        txn.bursts = bursts
        txn.nbytes = nbytes
        txn.hold = nbytes
        buf = txn.buffer
        req = buf.reserve(nbytes)
        if req is not None:
            log.append(("fetch", env.now))
            cause = f"{buf.name}_buffer_full"
            set_state("blocked", cause)
            yield req
            log.append((cause, env.now))
        # limits count requests (fetch.request_bytes each), not simulated transactions,
        # so the engine's grain does not change the hardware being modelled
        nreq = nbytes / req_bytes
        while pending and (inflight + nreq > inflight_cap or early >= reorder_cap):
            cause = "inflight_limit" if inflight + nreq > inflight_cap else "reorder_full"
            log.append(("fetch", env.now))
            set_state("blocked", cause)
            if progress.triggered:
                progress = env.event()
            yield progress
            log.append((cause, env.now))
        now = env.now
        if now < issue_free:  # nothing else to wait for: the port is still issuing
            yield env.timeout(issue_free - now)
            now = env.now
        log.append(("fetch", now))
        pending.append(txn)
        inflight += nreq
        pool.submit(txn).callbacks.append(on_complete(txn))
        txn.bursts = None
        key = plane_bytes.get(txn.kind)
        if key is None:
            key = plane_bytes[txn.kind] = f"bytes_{txn.kind}"
        stats["bytes"] += nbytes
        stats[key] += nbytes
        stats["transactions"] += 1
        stats["requests"] += nreq
        # one request issued per cycle; no event unless the next transaction is ready before
        issue_free = now + nreq
        state.busy_until(issue_free)
    if env.now < issue_free:
        yield env.timeout(issue_free - env.now)
    state.set("idle")
