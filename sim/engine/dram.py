"""DRAM channel pool: where fetched bytes come from, and how long they take.

Two models, chosen by ``dram.model``:

``banked`` (default) models what a DRAM channel does with a stream of reads.
Each channel has ``dram.banks`` banks in ``dram.bank_groups`` groups, each
bank with at most one open row. A read to the open row is a *row hit* (one
column command); a read to a closed bank is a *miss* (activate, then tRCD to
the column); a read to a bank with another row open is a *conflict*
(precharge, no earlier than tRAS after that row's activate and tRTP after its
last column, then tRP, then activate). Column commands on one channel are
spaced by one burst time on the data bus, or by tCCD_L when back to back in
the same bank group; data arrives tCL after the column command. All-bank
refresh blocks a channel for tRFC every tREFI and closes its rows (channels
are staggered so the pool never refreshes all at once). The page policy keeps
rows open, or closes a row once the reads queued for it are served (a read
queued before the precharge issues still finds the row open). A channel's
queue holds ``dram.queue_depth`` requests, entered in order (see
:class:`RequestSlots`), and is served first come first served, or row hits
first.

Transaction grain: cutting a stream into more transactions must not change
the answer, so nothing here depends on how bursts are grouped, only on their
order: queue room is counted by request position, spacing across share
boundaries is the same as inside a share, and under row hits first a held
share keeps the time it arrived (the controller could open its row from then;
only the order is decided later). Row hits first itself reorders whole
shares, so a finer grain gives it more to reorder.

``fixed-latency`` is the first, simple model: one pipelined bus per channel,
a fixed ``dram.latency_ns`` per access, no banks.

How time is computed: a transaction's bursts are decoded to channel, bank and
row once (numpy), split into one *share* per channel, and each share's column
command times come from the recurrence
``c[i] = max(c[i-1] + spacing[i], row_ready[i])`` solved for all bursts at once
with a segmented running maximum (see :func:`column_times`). Row-ready times
depend on earlier column times of the same bank inside the share, so the
solve is repeated until nothing moves; that takes one pass more than the
largest number of row changes of one bank inside the share. Under first come
first served the same arithmetic runs on a cached :class:`ShareShape` (the
address-only part, shared by every transaction with the same burst pattern up
to a whole stripe of the map) over run heads only, in plain Python; the array
path above remains for refresh cuts, row hits first and first_free steering,
and gives the same numbers. Events: one per
transaction (its completion), plus one per scheduling decision of a channel
under ``row_hits_first`` -- never one per burst or per cycle.

Interface used by the fetch unit (stable): ``submit(txn) -> simpy event``
fired when the last byte has arrived, with the transaction's log marked
``memory_queue``, ``memory_latency``, ``memory_transfer`` (non-decreasing);
``report(total_cycles)`` for the result's ``dram`` section; ``busy_intervals``
per channel (merged data-bus busy intervals).

Simplifications, on purpose: reads only; no tRRD / tFAW activate-rate limit;
no command-bus contention; refresh is taken on schedule (never postponed) and
does not wait for tRAS of open rows.
"""

from bisect import bisect_left, bisect_right
import numpy as np

from .addrmap import BurstDecoder

HIT, MISS, CONFLICT = 0, 1, 2
OCCUPANCY_BINS = 32


def burst_cycles(arch):
    """Data-bus cycles (accelerator clock) to move one burst on one channel."""
    bytes_per_cycle = arch.dram.channel_gbps / arch.clock_ghz
    return arch.dram.burst_bytes / bytes_per_cycle


def latency_cycles(arch):
    """The fixed-latency model's access latency in cycles."""
    return arch.dram.latency_ns * arch.clock_ghz


def channel_of(bursts, arch):
    """Channel index of each burst address (bytes), fixed-latency model."""
    return (bursts // arch.dram.interleave_bytes) % arch.dram.channels


class RequestSlots:
    """The requests of one channel's queue, in the order they entered it.

    Amounts are in requests of ``fetch.request_bytes`` and may be fractional:
    a share smaller than a request holds part of one. Requests enter in order,
    each once the request ``depth`` places ahead of it has completed, so a
    share may start as soon as its first request fits; the rest of it follows
    as the requests ahead complete. A share's requests complete one after
    another while its data streams out, linearly from ``first`` (first data)
    to ``done`` (last data). Counting by position, not by share, is what makes
    the wait independent of how a stream is cut into shares.
    """

    __slots__ = ("beg", "end", "first", "done", "head", "total")

    def __init__(self):
        self.beg = []       # requests entered before each share
        self.end = []       # ... and up to and including it
        self.first = []
        self.done = []
        self.head = 0       # shares before this are complete for every later query
        self.total = 0.0    # requests entered so far

    def room_at(self, now, need, depth):
        """Earliest time from ``now`` at which ``need`` more requests (one at most) fit."""
        level = self.total + min(need, 1.0) - depth   # completions needed first
        if level <= 1e-9:
            return now
        end = self.end
        i = bisect_left(end, level - 1e-9, self.head)
        if i >= len(end):
            return now
        if i > 4096:        # levels only grow: drop what no later query can reach
            for a in (self.beg, end, self.first, self.done):
                del a[:i]
            i = 0
        self.head = i
        lo, hi = self.beg[i], end[i]
        f, d = self.first[i], self.done[i]
        t = f + (level - lo) / (hi - lo) * (d - f) if hi > lo else d
        return t if t > now else now

    def add(self, first, done, amount):
        self.beg.append(self.total)
        self.total += amount
        self.end.append(self.total)
        self.first.append(first)
        self.done.append(done)


class Timing:
    """The banked model's timings in accelerator cycles (config holds ns)."""

    def __init__(self, arch):
        d, ghz = arch.dram, arch.clock_ghz
        self.burst = burst_cycles(arch)
        self.cl = d.t_cl_ns * ghz
        self.rcd = d.t_rcd_ns * ghz
        self.rp = d.t_rp_ns * ghz
        self.ras = d.t_ras_ns * ghz
        self.rtp = d.t_rtp_ns * ghz
        self.ccd_l = max(d.t_ccd_l_ns * ghz, self.burst)
        self.refi = d.t_refi_ns * ghz
        self.rfc = d.t_rfc_ns * ghz
        self.ctrl = d.controller_ns * ghz
        self.rc = self.ras + self.rp
        # how far ahead of its bus slot a queued share is committed under row_hits_first:
        # enough to hide a precharge and an activate behind the previous share's data
        self.lookahead = self.rp + self.rcd


class BankState:
    """Open rows and command history of every bank of every channel."""

    def __init__(self, channels, banks):
        n = channels * banks
        self.open_row = np.full(n, -1, dtype=np.int64)   # -1: bank precharged
        self.act = np.full(n, -np.inf)                   # last activate
        self.last_col = np.full(n, -np.inf)              # last column command
        self.pre_ready = np.zeros(n)                     # closed bank may activate from here
        # close page: when the open row's precharge issues; a read queued before then is
        # still served from the open row (the controller saw it waiting). Open page: never.
        self.close_at = np.full(n, np.inf)


def run_structure(gb, row, order):
    """Runs of bursts to one bank and row, with the bursts taken in ``order`` (bank-sorted).

    Returns ``(sb, rs, newbank, hpos, runid, slot)``: bank and row of each
    sorted burst, whether it starts its bank, the sorted positions of run heads,
    the run of each sorted position and the run of each burst in service order.
    """
    sb = gb[order]
    rs = row[order]
    n = len(sb)
    newbank = np.empty(n, dtype=bool)
    newbank[0] = True
    np.not_equal(sb[1:], sb[:-1], out=newbank[1:])
    newrun = newbank.copy()
    newrun[1:] |= rs[1:] != rs[:-1]
    hpos = np.flatnonzero(newrun)                  # run heads, in bank-sorted positions
    runid = np.cumsum(newrun) - 1
    slot = np.empty(n, dtype=np.int64)
    slot[order] = runid
    return sb, rs, newbank, hpos, runid, slot


def column_times(gb, row, group, seg_len, t0, base_col, base_group, st, tm):
    """Column-command times of a batch of bursts, one segment per channel.

    ``gb`` global bank, ``row`` DRAM row and ``group`` bank group of each burst
    in service order, the bursts of one channel together (``seg_len`` of them
    per channel, in order); ``t0`` the earliest command time (a number, or
    one per burst); ``base_col`` / ``base_group`` the last column time and its
    group of each segment's channel; ``st`` the :class:`BankState` before the
    batch; ``tm`` the :class:`Timing`.

    Returns ``(c, sol)``: the column time of each burst, and a dict with the
    run structure (bank-sorted ``order``, ``runid`` per sorted position,
    ``slot`` = run of each burst, ``act`` / ``kind`` per run, ``newbank``) for
    the state update. Plain numpy, no simpy, so the closed-form side and the
    tests can call it.
    """
    n = len(gb)
    order = np.argsort(gb, kind="stable")
    sb, rs, newbank, hpos, runid, slot = run_structure(gb, row, order)
    hb = sb[hpos]
    ht0 = t0 if np.isscalar(t0) else t0[order[hpos]]
    fob = newbank[hpos]                            # first run of its bank in the batch
    orow = st.open_row[hb]
    closed = (orow < 0) | (st.close_at[hb] <= ht0)
    hit = fob & ~closed & (orow == rs[hpos])
    s_act = st.act[hb]
    # from the bank state (exact for first runs, a lower bound for later runs of a bank)
    act = np.where(closed, np.maximum(st.pre_ready[hb], ht0),
                   np.maximum(np.maximum(st.last_col[hb] + tm.rtp, s_act + tm.ras), ht0) + tm.rp)
    act = np.where(hit, s_act, act)
    ready = act + tm.rcd
    np.maximum(ready, ht0, out=ready)
    kind = np.where(hit, HIT, np.where(fob & closed, MISS, CONFLICT))
    inside = np.flatnonzero(~fob)                  # a bank changing rows inside the batch
    # spacing of column commands: one burst time, or tCCD_L back to back in one group;
    # D is each burst's offset from its segment's first column command
    single = len(seg_len) == 1
    if not single:
        starts = np.cumsum(seg_len) - seg_len
    if tm.ccd_l > tm.burst:
        prev_group = np.empty(n, dtype=np.int64)
        prev_group[1:] = group[:-1]
        if single:
            prev_group[0] = base_group[0]
        else:
            prev_group[starts] = base_group
        d = np.where(group == prev_group, tm.ccd_l, tm.burst)
        D = np.cumsum(d)
        if single:
            D -= d[0]
            base = base_col[0] + d[0]
        else:
            D -= np.repeat(D[starts], seg_len)
            base = np.repeat(base_col + d[starts], seg_len)
    elif single:
        D = np.arange(n) * tm.burst
        base = base_col[0] + tm.burst
    else:
        D = (np.arange(n) - np.repeat(starts, seg_len)) * tm.burst
        base = np.repeat(base_col + tm.burst, seg_len)
    segid = None if single else np.repeat(np.arange(len(seg_len)), seg_len)
    if len(inside):
        prev_last = order[hpos[inside] - 1]
        prev_run = inside - 1
        in_t0 = ht0 if np.isscalar(ht0) else ht0[inside]
    for _ in range(n + 2):  # converges in (row changes of one bank in the batch) + 1 passes
        v = ready[slot] - D
        if segid is None:
            np.maximum.accumulate(v, out=v)
        else:
            span = float(v.max() - v.min()) + 1.0
            off = segid * span
            v += off
            np.maximum.accumulate(v, out=v)
            v -= off
        c = D + np.maximum(base, v)
        if not len(inside):
            break
        pre = np.maximum(c[prev_last] + tm.rtp, act[prev_run] + tm.ras)
        a_new = np.maximum(pre, in_t0) + tm.rp
        if np.array_equal(a_new, act[inside]):
            break
        act[inside] = a_new
        ready[inside] = a_new + tm.rcd
    else:
        raise AssertionError("column-time passes did not converge")
    return c, {"order": order, "sb": sb, "rs": rs, "newbank": newbank, "runid": runid,
               "slot": slot, "act": act, "kind": kind}


class ShareShape:
    """What the timing of a batch of bursts needs that depends only on their addresses.

    The batch is one transaction's bursts, sorted by channel (one *segment* per
    channel). Built once per address pattern and cached: the same rows are read
    at every decode step, and a pattern shifted by a whole stripe of the address
    map (every bit below the row) has the same shape with rows moved by
    ``shift``. Holds the bank/row runs, each burst's offset ``D`` from its
    segment's first column command, and the few burst positions whose column
    time the commit needs (segment ends, each bank's last burst, the burst before
    a bank changes row, and where the data bus may break).

    Why positions suffice: column times obey ``c[i] = max(c[i-1] + spacing[i],
    ready[run of i])`` and are non-decreasing, so a run's ready time binds only
    at its first burst; ``c[i] = D[i] + max(base, max over runs r starting at or
    before i of ready[r] - D[first[r]])``, the same arithmetic as
    :func:`column_times` restricted to run heads.
    """

    SMALL = 32     # up to this many bursts, building from Python lists beats numpy calls

    def __init__(self, ch, gb, row, n_chan, groups, tm):
        n = len(gb)
        if n <= self.SMALL:
            self._build_small(ch, gb, row, groups, tm)
            return
        self.ch, self.gb, self.row = ch, gb, row      # for the general path (refresh cuts)
        self.n = n
        if n_chan > 1:
            cnt = np.bincount(ch, minlength=n_chan)
            chans = np.flatnonzero(cnt)
            lens = cnt[chans]
        else:
            chans = np.array([int(ch[0])])
            lens = np.array([n])
        S = len(chans)
        self.chans, self.chans_l, self.lens, self.lens_l = chans, chans.tolist(), lens, lens.tolist()
        ends = np.cumsum(lens)
        begins = ends - lens
        group = gb % groups
        self.first_group = group[begins]
        self.last_group = group[ends - 1]
        if n == 1 or (gb[1:] >= gb[:-1]).all():
            order = np.arange(n)
        else:
            order = np.argsort(gb, kind="stable")
        sb, rs, newbank, hpos, runid, slot = run_structure(gb, row, order)
        self.nr = len(hpos)
        self.hb = sb[hpos]
        self.hrow = rs[hpos]
        self.fob = newbank[hpos]
        fp = order[hpos]                 # stable sort: a run's first burst in service order
        segid = np.repeat(np.arange(S), lens)
        self.rseg = segid[fp]
        inside = np.flatnonzero(~self.fob)
        self.inside = inside if len(inside) else None
        self.prev_run = inside - 1
        prev_last = order[hpos[inside] - 1]
        lastbank = np.empty(n, dtype=bool)
        lastbank[-1] = True
        lastbank[:-1] = newbank[1:]
        lp = np.flatnonzero(lastbank)
        self.lg = sb[lp]
        self.lrun = runid[lp]
        self.lrow = rs[lp]
        lpos = order[lp]
        self.begin_run = slot[begins]
        self.single_run = self.nr == 1
        if tm.ccd_l > tm.burst:
            same = np.zeros(n, dtype=bool)
            same[1:] = group[1:] == group[:-1]
            same[begins] = False
            d = np.where(same, tm.ccd_l, tm.burst)
            d[begins] = 0.0
            cs = np.cumsum(d)
            D = cs - np.repeat(cs[begins], lens)
            ccd = np.flatnonzero(same)
        else:
            D = (np.arange(n) - np.repeat(begins, lens)) * tm.burst
            ccd = np.zeros(0, dtype=np.int64)
        self.step_same = None
        rk = np.argsort(fp, kind="stable")
        fps = fp[rk]
        self.rk = rk
        self.Dfp = D[fps]
        sseg = self.rseg[rk]
        seg_starts = [0] + (np.flatnonzero(sseg[1:] != sseg[:-1]) + 1).tolist() if S > 1 else [0]
        cand = np.unique(np.concatenate((begins, fps, ccd)))
        self.cand_begin = np.searchsorted(cand, begins)
        is_begin = np.zeros(len(cand), dtype=bool)
        is_begin[self.cand_begin] = True
        self.is_begin = is_begin
        I, L, C = len(inside), len(lp), len(cand)
        q = np.concatenate((begins, ends - 1, prev_last, lpos, cand, np.maximum(cand - 1, 0)))
        self.o = (S, 2 * S, 2 * S + I, 2 * S + I + L, 2 * S + I + L + C)
        self.Dq = D[q]
        self.kq = np.searchsorted(fps, q, side="right") - 1
        self.D = D
        self.segid = segid
        self.fps = fps
        self.segq = segid[q]
        # the solve runs on Python lists: a few dozen runs cost less than numpy calls
        self.L = (self.fob.tolist(), self.hrow.tolist(), self.rseg.tolist(), rk.tolist(),
                  self.Dfp.tolist(), self.Dq.tolist(), self.kq.tolist(), self.segq.tolist(),
                  inside.tolist(), self.first_group.tolist(), self.is_begin.tolist(),
                  self.cand_begin.tolist(), self.lrun.tolist(), self.begin_run.tolist(),
                  seg_starts)

    def _build_small(self, ch, gb, row, groups, tm):
        """The same fields as the numpy build, from Python lists (same IEEE operations)."""
        n = len(gb)
        self.ch, self.gb, self.row = ch, gb, row
        self.n = n
        chl, gbl, rowl = ch.tolist(), gb.tolist(), row.tolist()
        chans, lens, begins = [], [], []
        for i, c in enumerate(chl):      # sorted by channel: one segment per channel
            if not chans or c != chans[-1]:
                chans.append(c)
                lens.append(0)
                begins.append(i)
            lens[-1] += 1
        S = len(chans)
        ends = [b + m for b, m in zip(begins, lens)]
        self.chans, self.chans_l = np.array(chans, dtype=np.int64), chans
        self.lens, self.lens_l = np.array(lens, dtype=np.int64), lens
        group = [g % groups for g in gbl]
        first_group = [group[b] for b in begins]
        self.first_group = np.array(first_group, dtype=np.int64)
        self.last_group = np.array([group[e - 1] for e in ends], dtype=np.int64)
        if all(gbl[i] <= gbl[i + 1] for i in range(n - 1)):
            order = list(range(n))
        else:
            order = sorted(range(n), key=gbl.__getitem__)     # stable
        sb = [gbl[i] for i in order]
        rs = [rowl[i] for i in order]
        newbank = [True] + [sb[i] != sb[i - 1] for i in range(1, n)]
        hpos = [i for i in range(n) if newbank[i] or rs[i] != rs[i - 1]]
        nr = len(hpos)
        runid = [0] * n
        r = -1
        hset = set(hpos)
        for i in range(n):
            if i in hset:
                r += 1
            runid[i] = r
        slot = [0] * n
        for i, o in enumerate(order):
            slot[o] = runid[i]
        self.nr = nr
        hb = [sb[i] for i in hpos]
        hrow = [rs[i] for i in hpos]
        fob = [newbank[i] for i in hpos]
        self.hb = np.array(hb, dtype=np.int64)
        self.hrow = np.array(hrow, dtype=np.int64)
        self.fob = np.array(fob, dtype=bool)
        fp = [order[i] for i in hpos]
        segid = []
        for k, m in enumerate(lens):
            segid += [k] * m
        rseg = [segid[i] for i in fp]
        self.rseg = np.array(rseg, dtype=np.int64)
        inside = [r for r in range(nr) if not fob[r]]
        self.inside = np.array(inside, dtype=np.int64) if inside else None
        self.prev_run = np.array([r - 1 for r in inside], dtype=np.int64)
        prev_last = [order[hpos[r] - 1] for r in inside]
        lp = [i for i in range(n) if i == n - 1 or newbank[i + 1]]
        self.lg = np.array([sb[i] for i in lp], dtype=np.int64)
        lrun = [runid[i] for i in lp]
        self.lrun = np.array(lrun, dtype=np.int64)
        self.lrow = np.array([rs[i] for i in lp], dtype=np.int64)
        lpos = [order[i] for i in lp]
        begin_run = [slot[b] for b in begins]
        self.begin_run = np.array(begin_run, dtype=np.int64)
        self.single_run = nr == 1
        D = [0.0] * n
        ccd = []
        if tm.ccd_l > tm.burst:
            bset = set(begins)
            cs = 0.0
            b0 = 0.0
            for i in range(n):
                if i in bset:
                    d = 0.0
                elif group[i] == group[i - 1]:
                    d = tm.ccd_l
                    ccd.append(i)
                else:
                    d = tm.burst
                cs = d if i == 0 else cs + d     # running sum, as np.cumsum
                if i in bset:
                    b0 = cs
                D[i] = cs - b0
        else:
            for k, b in enumerate(begins):
                for i in range(b, ends[k]):
                    D[i] = (i - b) * tm.burst
        self.step_same = None
        rk = sorted(range(nr), key=fp.__getitem__)
        fps = [fp[j] for j in rk]
        self.rk = np.array(rk, dtype=np.int64)
        Dfp = [D[i] for i in fps]
        self.Dfp = np.array(Dfp)
        sseg = [rseg[j] for j in rk]
        seg_starts = [0] + [j for j in range(1, nr) if sseg[j] != sseg[j - 1]] if S > 1 else [0]
        cand = sorted(set(begins) | set(fps) | set(ccd))
        where = {x: j for j, x in enumerate(cand)}
        cand_begin = [where[b] for b in begins]
        is_begin = [False] * len(cand)
        for j in cand_begin:
            is_begin[j] = True
        self.cand_begin = np.array(cand_begin, dtype=np.int64)
        self.is_begin = np.array(is_begin, dtype=bool)
        I, L, C = len(inside), len(lp), len(cand)
        q = (begins + [e - 1 for e in ends] + prev_last + lpos + cand
             + [c - 1 if c > 0 else 0 for c in cand])
        self.o = (S, 2 * S, 2 * S + I, 2 * S + I + L, 2 * S + I + L + C)
        Dq = [D[i] for i in q]
        kq = [bisect_right(fps, i) - 1 for i in q]
        segq = [segid[i] for i in q]
        self.Dq, self.kq, self.segq = np.array(Dq), np.array(kq, dtype=np.int64), np.array(segq, dtype=np.int64)
        self.D = np.array(D)
        self.segid = np.array(segid, dtype=np.int64)
        self.fps = np.array(fps, dtype=np.int64)
        self.L = (fob, hrow, rseg, rk, Dfp, Dq, kq, segq, inside, first_group, is_begin,
                  cand_begin, lrun, begin_run, seg_starts)

    @property
    def kpos(self):
        """Index (in first-burst order) of the last run starting at or before each burst."""
        return np.searchsorted(self.fps, np.arange(self.n), side="right") - 1


class ChannelPool:
    """A pool of memory channels: banks, rows, refresh, queues and scheduling."""

    def __init__(self, env, arch):
        self.env = env
        self.arch = arch
        d = arch.dram
        self.model = d.model
        self.n = d.channels
        self.burst = d.burst_bytes
        self.t_burst = burst_cycles(arch)
        self.t_lat = latency_cycles(arch)
        self.depth = d.queue_depth
        self.req_bursts = max(1, arch.fetch.request_bytes // self.burst)
        self.free_at = [0.0] * self.n
        self.outstanding = [RequestSlots() for _ in range(self.n)]
        self.busy_intervals = [[] for _ in range(self.n)]
        self.busy_cycles = np.zeros(self.n)
        self.bytes = 0
        self.bursts = 0
        self.requests = 0
        self.txns = 0
        self.wait_total = 0.0
        self.latency_total = 0.0
        self.latencies = []
        # live occupancy: transactions submitted and not yet complete
        self.in_flight = 0
        self._occ = []                              # (t, +1 / -1) as they happen
        if self.model == "fixed-latency":
            self.submit = self._submit_fixed
            return
        self.banks = d.banks
        self.groups = d.bank_groups
        self.tm = Timing(arch)
        self.close_page = d.page_policy == "close"
        self.rows_first = d.scheduler == "row_hits_first"
        self.first_free = d.steering == "first_free"
        self.decoder = BurstDecoder(arch)
        self.shapes = {}
        # a stripe: every address bit below the row; shifting by stripes only moves rows
        self.stripe = (1 << self.decoder.low_bits) * self.burst if self.decoder.lut is not None else 0
        self.st = BankState(self.n, self.banks)
        self.ch_col = np.full(self.n, -np.inf)
        self.ch_group = np.full(self.n, -1, dtype=np.int64)
        offsets = (np.arange(self.n) + 1) * (self.tm.refi / self.n)
        self.ref_first = offsets.copy()
        self.ref_next = offsets if self.tm.rfc > 0 else np.full(self.n, np.inf)
        self.kinds = np.zeros(3, dtype=np.int64)
        self._prep = np.array([0.0, self.tm.rcd, self.tm.rp + self.tm.rcd])  # by first access kind
        self.refresh_delay = 0.0
        # per-share records (channel, arrival, start, first data, done, bursts)
        self.rec = {k: [] for k in ("channel", "arrival", "start", "first", "done", "bursts")}
        # row_hits_first: shares held per channel until its decision time
        self.held = [[] for _ in range(self.n)]
        self.timer_at = [None] * self.n
        self.submit = self._submit_banked

    # ------------------------------------------------------------------ fixed
    def _submit_fixed(self, txn):
        """Serve ``txn.bursts`` on the fixed-latency model."""
        env = self.env
        now = env.now
        self._arrive(now)
        ch = channel_of(txn.bursts, self.arch)
        counts = np.bincount(ch, minlength=self.n)
        t_start = now
        t_end = now
        for c in np.flatnonzero(counts).tolist():
            nb = int(counts[c])
            nreq = nb / self.req_bursts
            start = self.free_at[c] if self.free_at[c] > now else now
            room_at = self.outstanding[c].room_at(now, nreq, self.depth)
            if room_at > start:  # wait until enough queued requests have completed
                start = room_at
            end = start + nb * self.t_burst
            self.free_at[c] = end
            self._busy(c, start, end)
            self.busy_cycles[c] += end - start
            done_c = end + self.t_lat
            self.outstanding[c].add(start + self.t_lat, done_c, nreq)
            self.requests += nreq
            if start > t_start:
                t_start = start
            if end > t_end:
                t_end = end
        t_first = t_start + self.t_lat
        t_done = max(t_end, t_start) + self.t_lat
        return self._finish(txn, now, t_start, t_first, t_done, None)

    def _busy(self, c, start, end):
        iv = self.busy_intervals[c]
        if iv and iv[-1][1] >= start:
            if end > iv[-1][1]:
                iv[-1][1] = end
        else:
            iv.append([start, end])

    # ----------------------------------------------------------------- banked
    def _submit_banked(self, txn):
        """Serve ``txn.bursts`` on the banked model; the event fires at the last byte."""
        now = self.env.now
        self._arrive(now)
        b = txn.bursts
        if len(b) == 0:
            return self._finish(txn, now, now, now, now, None)
        shape = None
        if not (self.first_free or self.rows_first):
            shape, shift = self._shape_of(b)
        elif self.first_free:
            c = self._first_free_channel(now)
            _, bank, row = self.decoder.decode(b)
            gb = bank + c * self.banks
            ch = np.full(len(b), c, dtype=np.int64)
        if shape is None and not self.first_free:
            ch, gb, row = self.decoder.decode_global(b)
            if self.n > 1:
                order = np.argsort(ch, kind="stable")
                ch, gb, row = ch[order], gb[order], row[order]
        rec = [now, 0, now, now, now, None]   # arrival, shares left, start, first data, done, event
        if shape is not None:
            rec[1] = -1
            self._commit_shape(rec, shape, shift, now)
            return self._finish(txn, now, rec[2], rec[3], rec[4], None)
        if not self.rows_first:
            rec[1] = -1                        # committed in one go
            self._commit(rec, ch, gb, row, now)
            return self._finish(txn, now, rec[2], rec[3], rec[4], None)
        cnt = np.bincount(ch, minlength=self.n)
        chans = np.flatnonzero(cnt).tolist()
        rec[1] = len(chans)
        hold = [c for c in chans if self.held[c] or self.ch_col[c] - self.tm.lookahead > now]
        if hold:
            ends = np.cumsum(cnt)
            for c in hold:
                lo, hi = ends[c] - cnt[c], ends[c]
                self.held[c].append((rec, ch[lo:hi], gb[lo:hi], row[lo:hi]))
                self._arm(c)
            if len(hold) < len(chans):
                keep = ~np.isin(ch, hold)
                self._commit(rec, ch[keep], gb[keep], row[keep], now)
        else:
            self._commit(rec, ch, gb, row, now)
        if rec[1] == 0:
            return self._finish(txn, now, rec[2], rec[3], rec[4], None)
        ev = self.env.event()
        rec[5] = (txn, ev, len(b))
        return ev

    def _shape_of(self, b):
        """The cached :class:`ShareShape` of burst addresses ``b`` and its row shift."""
        n = len(b)
        b0 = int(b[0])
        if self.stripe:
            shift = b0 // self.stripe
            base = shift * self.stripe
        else:
            shift = base = 0
        if int(b[-1]) - b0 == (n - 1) * self.burst:     # sorted distinct: a contiguous run
            key = (b0 - base, n)
        else:
            key = (b - base).tobytes() if base else b.tobytes()
        shape = self.shapes.get(key)
        if shape is None:
            rel = b - base if base else b
            ch, gb, row = self.decoder.decode_global(rel)
            if self.n > 1:
                order = np.argsort(ch, kind="stable")
                ch, gb, row = ch[order], gb[order], row[order]
            if len(self.shapes) >= 20000:   # bound memory on long runs with ever-new patterns
                self.shapes.clear()
            shape = self.shapes[key] = ShareShape(ch, gb, row, self.n, self.groups, self.tm)
        return shape, shift

    def _commit_shape(self, rec, sh, shift, now):
        """First come first served commit of a whole transaction from its shape."""
        t0s = []
        rq = self.req_bursts
        for k, c in enumerate(sh.chans_l):
            t = now
            room_at = self.outstanding[c].room_at(now, sh.lens_l[k] / rq, self.depth)
            if room_at > t:
                t = room_at
            if self.ref_next[c] <= t:
                self._refresh(c, t)
            t0s.append(t)
        rec[2] = rec[3] = rec[4] = -np.inf
        slots = {}
        if sh.single_run:
            c = sh.chans_l[0]
            if self._place_run(rec, c, int(sh.hb[0]), int(sh.hrow[0]) + shift, sh.n, {c: t0s[0]}, slots):
                return
        else:
            got = self._solve_shape(rec, sh, shift, t0s, slots)
            if got is True:
                return
            if got is not None:     # a refresh cuts the batch: column times of every burst
                cm, base = got
                c = sh.D + np.maximum(np.array(base)[sh.segid], np.array(cm)[sh.kpos])
                row = sh.row + shift if shift else sh.row
                self._cut(rec, sh.ch, sh.gb, row, c, c >= self.ref_next[sh.ch],
                          dict(zip(sh.chans_l, t0s)), slots)
                return
        # the general path
        row = sh.row + shift if shift else sh.row
        self._place(rec, sh.ch, sh.gb, row, dict(zip(sh.chans_l, t0s)), slots)

    def _solve_shape(self, rec, sh, shift, t0s, slots):
        """Column times from the shape and the bank state; commit unless a refresh cuts it.

        The arithmetic of :func:`column_times` on run heads and the shape's query
        positions, in plain Python (the same IEEE operations, so the same numbers).
        """
        st, tm = self.st, self.tm
        (fob, hrow, rseg, rk, Dfp, Dq, kq, segq, inside, fgroup, is_begin, cand_begin, lrun,
         begin_run, seg_starts) = sh.L
        chans = sh.chans_l
        hb = sh.hb
        orow = st.open_row[hb].tolist()
        cat = st.close_at[hb].tolist()
        sact = st.act[hb].tolist()
        lcol = st.last_col[hb].tolist()
        prer = st.pre_ready[hb].tolist()
        rtp, ras, rp, rcd = tm.rtp, tm.ras, tm.rp, tm.rcd
        nr = sh.nr
        act = [0.0] * nr
        ready = [0.0] * nr
        kind = [0] * nr
        one_t0 = len(t0s) == 1 or min(t0s) == max(t0s)
        t_all = t0s[0]
        for r in range(nr):
            t = t_all if one_t0 else t0s[rseg[r]]
            o_r = orow[r]
            closed = o_r < 0 or cat[r] <= t
            if fob[r] and not closed and o_r == hrow[r] + shift:
                kind[r] = HIT
                a = sact[r]
                rd = a + rcd
            else:
                if closed:
                    a = prer[r] if prer[r] > t else t
                    kind[r] = MISS if fob[r] else CONFLICT
                else:
                    a = lcol[r] + rtp
                    b = sact[r] + ras
                    if b > a:
                        a = b
                    if t > a:
                        a = t
                    a += rp
                    kind[r] = CONFLICT
                rd = a + rcd
            act[r] = a
            ready[r] = rd if rd > t else t
        cc_l, cg_l = self.ch_col, self.ch_group
        base = [float(cc_l[c]) + (tm.ccd_l if fgroup[k] == cg_l[c] else tm.burst)
                for k, c in enumerate(chans)]
        S, o1, o2, o3, o4 = sh.o
        nseg = len(chans)
        cm = [0.0] * nr
        for _ in range(nr + 2):
            m = -np.inf
            k = 1
            nxt = seg_starts[1] if nseg > 1 else nr
            j = 0
            for rr, df in zip(map(ready.__getitem__, rk), Dfp):
                if j == nxt:
                    m = -np.inf
                    k += 1
                    nxt = seg_starts[k] if k < nseg else nr
                w = rr - df
                if w > m:
                    m = w
                cm[j] = m
                j += 1
            if nseg == 1:
                b0 = base[0]
                cq = [d + (b0 if b0 > v else v) for d, v in zip(Dq, map(cm.__getitem__, kq))]
            else:
                cq = [d + (b if b > v else v)
                      for d, v, b in zip(Dq, map(cm.__getitem__, kq), map(base.__getitem__, segq))]
            if not inside:
                break
            moved = False
            for i, r in enumerate(inside):
                pre = cq[o1 + i] + rtp
                b = act[r - 1] + ras
                if b > pre:
                    pre = b
                t = t_all if one_t0 else t0s[rseg[r]]
                a = (pre if pre > t else t) + rp
                if a != act[r]:
                    act[r] = a
                    ready[r] = a + rcd
                    moved = True
            if not moved:
                break
        else:
            raise AssertionError("column-time passes did not converge")
        c_last = cq[S:o1]
        ref = self.ref_next
        for k, c in enumerate(chans):
            if c_last[k] >= ref[c]:
                return cm, base
        c_first = cq[:S]
        lg = sh.lg
        la = [act[r] for r in lrun]
        lc = cq[o2:o3]
        st.act[lg] = la
        st.last_col[lg] = lc
        st.open_row[lg] = sh.lrow + shift if shift else sh.lrow
        if self.close_page:
            shut = np.maximum(np.array(lc) + rtp, np.array(la) + ras)
            st.close_at[lg] = shut
            st.pre_ready[lg] = shut + rp
        kinds = self.kinds
        n_hit, n_miss = kind.count(HIT), kind.count(MISS)
        kinds[HIT] += n_hit + (sh.n - nr)
        kinds[MISS] += n_miss
        kinds[CONFLICT] += nr - n_hit - n_miss
        self.ch_col[sh.chans] = c_last
        self.ch_group[sh.chans] = sh.last_group
        prep = self._prep
        tail = tm.cl + tm.ctrl
        burst = tm.burst
        start, first, done = [], [], []
        for k in range(S):
            p = c_first[k] - prep[kind[begin_run[k]]]
            start.append(p if p > t0s[k] else t0s[k])
            first.append(c_first[k] + tail)
            done.append(c_last[k] + (burst + tail))
        busy = self.busy_cycles
        for c, m in zip(chans, sh.lens_l):
            busy[c] += m * burst
        cl = tm.cl
        lim = burst * (1 + 1e-9)
        pairs = []
        nb = 0
        seg_at = []
        cc = cq[o3:o4]
        cm1 = cq[o4:]
        for j in range(len(cc)):
            if is_begin[j] or cc[j] - cm1[j] > lim:
                if pairs:
                    pairs[-1][1] = cm1[j] + (cl + burst)
                pairs.append([cc[j] + cl, 0.0])
                nb += 1
            if is_begin[j]:
                seg_at.append(nb - 1)
        pairs[-1][1] = c_last[-1] + (cl + burst)
        self._record(rec, chans, sh.lens_l, start, first, done, pairs, seg_at + [len(pairs)], slots)
        return True

    def _first_free_channel(self, now):
        ready = np.maximum(self.ch_col + self.tm.burst, now)
        return int(np.argmin(ready))

    def _arm(self, c):
        """Schedule channel ``c``'s next decision (row_hits_first)."""
        if self.timer_at[c] is not None:
            return
        t = max(self.env.now, self.ch_col[c] - self.tm.lookahead)
        self.timer_at[c] = t
        ev = self.env.timeout(t - self.env.now)
        ev.callbacks.append(lambda _ev, c=c: self._decide(c))

    def _decide(self, c):
        """Commit channel ``c``'s held shares, row hits first, oldest first among equals."""
        self.timer_at[c] = None
        held, self.held[c] = self.held[c], []
        if not held:
            return
        # the controller sees at most queue_depth requests; the rest wait in arrival order
        n_window, room = 0, self.depth
        for share in held:
            if n_window and room <= 0:
                break
            n_window += 1
            room -= len(share[1]) / self.req_bursts
        window, rest = held[:n_window], held[n_window:]
        st = self.st
        now = self.env.now
        # one at a time, so each share sees the rows the one before it left open
        while window:
            pick = 0
            for k, sh in enumerate(window):
                g0 = sh[2][0]
                if st.open_row[g0] == sh[3][0] and st.close_at[g0] > now:
                    pick = k
                    break
            rec, ch, gb, row = window.pop(pick)
            # the controller saw the share since it arrived and may have opened its row
            # early: only the order is decided now (else a finer grain would lose that)
            self._commit(rec, ch, gb, row, rec[0])
            if rec[1] == 0 and rec[5] is not None:
                txn, ev, nb = rec[5]
                # the fetch unit may have dropped txn.bursts since it submitted
                self._finish(txn, rec[0], rec[2], rec[3], rec[4], ev, nb)
        if rest:
            self.held[c] = rest
            self._arm(c)

    def _commit(self, rec, ch, gb, row, now):
        """Fix the timing of one transaction's bursts ``ch``/``gb``/``row`` (sorted by channel)."""
        cnt = np.bincount(ch, minlength=self.n) if self.n > 1 else np.array([len(ch)])
        chans = np.flatnonzero(cnt).tolist()
        t0 = {}
        for c in chans:
            t = now
            nreq = int(cnt[c]) / self.req_bursts
            room_at = self.outstanding[c].room_at(now, nreq, self.depth)
            if room_at > t:  # the channel's queue is full: wait for requests to complete
                t = room_at
            if self.ref_next[c] <= t:
                self._refresh(c, t)
            t0[c] = t
        if rec[1] > 0:
            rec[1] -= len(chans)
        rec[2] = -np.inf
        rec[3] = -np.inf
        rec[4] = -np.inf if rec[4] == rec[0] else rec[4]
        self._place(rec, ch, gb, row, t0, {})

    def _place(self, rec, ch, gb, row, t0, slots):
        """Solve, cut at refreshes, and commit; ``slots`` maps channel -> its share record."""
        tm = self.tm
        if ch[0] == ch[-1] and gb[0] == gb[-1] and (gb == gb[0]).all() and (row == row[0]).all():
            if self._place_run(rec, int(ch[0]), int(gb[0]), int(row[0]), len(gb), t0, slots):
                return
        cnt = np.bincount(ch, minlength=self.n) if self.n > 1 else np.array([len(ch)])
        chans = np.flatnonzero(cnt).tolist()
        lens = cnt[chans]
        t0s = [t0[c] for c in chans]
        t0_b = t0s[0] if len(set(t0s)) == 1 else np.repeat(np.array(t0s), lens)
        group = gb % self.groups
        c, sol = column_times(gb, row, group, lens, t0_b, self.ch_col[chans], self.ch_group[chans],
                              self.st, tm)
        cross = c >= self.ref_next[ch]
        if cross.any():
            self._cut(rec, ch, gb, row, c, cross, t0, slots)
            return
        self._apply(rec, c, sol, group, chans, lens, t0s, slots)

    def _cut(self, rec, ch, gb, row, c, cross, t0, slots):
        """Bursts from a refresh on (``cross``) wait for it; place the rest, refresh, then them."""
        tm = self.tm
        keep = ~cross
        if keep.any():
            self._place(rec, ch[keep], gb[keep], row[keep], t0, slots)
        late = ch[cross]
        for k in np.flatnonzero(np.bincount(late, minlength=self.n)).tolist():
            r = self.ref_next[k]
            first_late = c[np.flatnonzero(cross & (ch == k))[0]]
            self.refresh_delay += max(0.0, r + tm.rfc - first_late)
            self._refresh(k, r)
            t0[k] = max(t0[k], r + tm.rfc)
        self._place(rec, late, gb[cross], row[cross], t0, slots)

    def _place_run(self, rec, ch, g, r, n, t0, slots):
        """Scalar path for a batch that is one run (one bank, one row): the same
        arithmetic as :func:`column_times`, without arrays. False if a refresh cuts it."""
        st, tm = self.st, self.tm
        t = t0[ch]
        orow = st.open_row[g]
        s_act = st.act[g]
        if orow >= 0 and st.close_at[g] <= t:
            orow = -1     # close page: precharged before this read was queued
        if orow == r:
            kind, act = HIT, s_act
            ready = max(t, s_act + tm.rcd)
        else:
            if orow < 0:
                kind, act = MISS, max(st.pre_ready[g], t)
            else:
                kind = CONFLICT
                act = max(st.last_col[g] + tm.rtp, s_act + tm.ras, t) + tm.rp
            ready = act + tm.rcd
        grp = g % self.groups
        d0 = tm.ccd_l if grp == self.ch_group[ch] else tm.burst
        c0 = max(self.ch_col[ch] + d0, ready)
        step = tm.ccd_l if n > 1 else tm.burst
        c1 = c0 + (n - 1) * step
        if c1 >= self.ref_next[ch]:
            return False
        st.act[g] = act
        st.last_col[g] = c1
        st.open_row[g] = r
        if self.close_page:
            st.close_at[g] = max(c1 + tm.rtp, act + tm.ras)
            st.pre_ready[g] = st.close_at[g] + tm.rp
        self.kinds[kind] += 1
        self.kinds[HIT] += n - 1
        self.ch_col[ch] = c1
        self.ch_group[ch] = grp
        tail = tm.cl + tm.ctrl
        start = max(t, c0 - self._prep[kind])
        first = c0 + tail
        done = c1 + tm.burst + tail
        self.busy_cycles[ch] += n * tm.burst
        nreq = n / self.req_bursts
        self.requests += nreq
        self.outstanding[ch].add(first, done, nreq)
        iv = self.busy_intervals[ch]
        if step > tm.burst * (1 + 1e-9):  # same group back to back: the bus idles between bursts
            s_t = c0 + tm.cl + np.arange(n) * step
            pairs = np.column_stack((s_t, s_t + tm.burst)).tolist()
        else:
            pairs = [[c0 + tm.cl, c1 + tm.cl + tm.burst]]
        if iv and iv[-1][1] >= pairs[0][0] - 1e-9:
            iv[-1][1] = max(iv[-1][1], pairs[0][1])
            pairs = pairs[1:]
        iv.extend(pairs)
        r_arr = self.rec
        slot = slots.get(ch)
        if slot is None:
            slots[ch] = len(r_arr["done"])
            for key, val in (("channel", ch), ("arrival", rec[0]), ("start", start),
                             ("first", first), ("done", done), ("bursts", n)):
                r_arr[key].append(val)
            rec[2] = max(rec[2], start)
            rec[3] = max(rec[3], first)
        else:
            r_arr["done"][slot] = done
            r_arr["bursts"][slot] += n
        rec[4] = max(rec[4], done)
        return True

    def _apply(self, rec, c, sol, group, chans, lens, t0s, slots):
        """Commit solved bursts to bank and channel state, and record the shares."""
        st, tm = self.st, self.tm
        n = len(c)
        order, sb, newbank, runid = sol["order"], sol["sb"], sol["newbank"], sol["runid"]
        lastbank = np.empty(n, dtype=bool)
        lastbank[-1] = True
        lastbank[:-1] = newbank[1:]
        lp = np.flatnonzero(lastbank)
        lg = sb[lp]
        act = sol["act"][runid[lp]]
        lc = c[order[lp]]
        st.act[lg] = act
        st.last_col[lg] = lc
        st.open_row[lg] = sol["rs"][lp]
        if self.close_page:
            shut = np.maximum(lc + tm.rtp, act + tm.ras)
            st.close_at[lg] = shut
            st.pre_ready[lg] = shut + tm.rp
        kind = sol["kind"]
        self.kinds += np.bincount(kind, minlength=3)
        self.kinds[HIT] += n - len(kind)
        ends = np.cumsum(lens)
        begins = ends - lens
        c_first = c[begins]
        c_last = c[ends - 1]
        self.ch_col[chans] = c_last
        self.ch_group[chans] = group[ends - 1]
        prep = self._prep[kind[sol["slot"][begins]]]
        tail = tm.cl + tm.ctrl
        start = np.maximum(np.array(t0s), c_first - prep).tolist()
        first = (c_first + tail).tolist()
        done = (c_last + (tm.burst + tail)).tolist()
        self.busy_cycles[chans] += lens * tm.burst
        # data-bus busy intervals, merged where bursts are back to back
        brk = np.zeros(n, dtype=bool)
        brk[begins] = True
        if n > 1:
            brk[1:] |= np.diff(c) > tm.burst * (1 + 1e-9)
        s_idx = np.flatnonzero(brk)
        e_idx = np.empty_like(s_idx)
        e_idx[:-1] = s_idx[1:] - 1
        e_idx[-1] = n - 1
        pairs = np.column_stack((c[s_idx] + tm.cl, c[e_idx] + (tm.cl + tm.burst))).tolist()
        cut = np.searchsorted(s_idx, begins).tolist() + [len(pairs)]
        self._record(rec, chans, lens.tolist(), start, first, done, pairs, cut, slots)

    def _record(self, rec, chans, lens_l, start, first, done, pairs, cut, slots):
        """Book committed shares: queue slots, bus intervals, share records, the transaction's times."""
        rq = self.req_bursts
        r_arr = self.rec
        r_ch, r_arr_t, r_start, r_first, r_done, r_bursts = (
            r_arr["channel"], r_arr["arrival"], r_arr["start"], r_arr["first"], r_arr["done"],
            r_arr["bursts"])
        outstanding, intervals = self.outstanding, self.busy_intervals
        requests = self.requests
        t_arr, t_start, t_first, t_done = rec[0], rec[2], rec[3], rec[4]
        for k, ch in enumerate(chans):
            m = lens_l[k]
            nreq = m / rq
            requests += nreq
            f_k, d_k = first[k], done[k]
            outstanding[ch].add(f_k, d_k, nreq)
            iv = intervals[ch]
            lo, hi = cut[k], cut[k + 1]
            if iv and iv[-1][1] >= pairs[lo][0] - 1e-9:
                if pairs[lo][1] > iv[-1][1]:
                    iv[-1][1] = pairs[lo][1]
                lo += 1
            iv.extend(pairs[lo:hi])
            slot = slots.get(ch)
            if slot is None:
                slots[ch] = len(r_done)
                r_ch.append(ch)
                r_arr_t.append(t_arr)
                r_start.append(start[k])
                r_first.append(f_k)
                r_done.append(d_k)
                r_bursts.append(m)
                if start[k] > t_start:
                    t_start = start[k]
                if f_k > t_first:
                    t_first = f_k
            else:  # the rest of a share cut by a refresh
                r_done[slot] = d_k
                r_bursts[slot] += m
            if d_k > t_done:
                t_done = d_k
        self.requests = requests
        rec[2], rec[3], rec[4] = t_start, t_first, t_done

    def _refresh(self, c, t):
        """Apply channel ``c``'s refreshes that start at or before ``t``: rows close."""
        tm = self.tm
        k = int((t - self.ref_next[c]) // tm.refi) + 1
        w = self.ref_next[c] + (k - 1) * tm.refi
        lo, hi = c * self.banks, (c + 1) * self.banks
        st = self.st
        st.open_row[lo:hi] = -1
        np.maximum(st.pre_ready[lo:hi], w + tm.rfc, out=st.pre_ready[lo:hi])
        self.ref_next[c] += k * tm.refi

    # ----------------------------------------------------------------- common
    def _finish(self, txn, t_submit, t_start, t_first, t_done, ev, nbursts=None):
        """Mark the transaction's log, count it, and fire (or return) its completion event."""
        env = self.env
        now = env.now
        t_start = max(t_start, t_submit)
        t_first = max(t_first, t_start)
        t_done = max(t_done, t_first)
        if nbursts is None:
            nbursts = len(txn.bursts)
        self.bursts += nbursts
        self.bytes += nbursts * self.burst
        self.txns += 1
        self.wait_total += t_start - t_submit
        self.latency_total += t_done - t_submit
        self.latencies.append(t_done - t_submit)
        txn.mark("memory_queue", t_start)
        txn.mark("memory_latency", t_first)
        txn.mark("memory_transfer", t_done)
        if ev is None:
            out = env.timeout(t_done - now)
            out.callbacks.append(self._left)
            return out
        out = env.timeout(t_done - now)
        out.callbacks.append(lambda _e, ev=ev: (self._left(_e), ev.succeed()))
        return ev

    def _arrive(self, now):
        self.in_flight += 1
        self._occ.append((now, 1))

    def _left(self, _ev):
        self.in_flight -= 1
        self._occ.append((self.env.now, -1))

    def occupancy(self, total_cycles, bins=OCCUPANCY_BINS):
        """Time-average transactions in the pool: overall, per time bin, and the peak."""
        if not self._occ or total_cycles <= 0:
            return {"bins": [0.0] * bins, "bin_cycles": total_cycles / bins if bins else 0.0,
                    "mean": 0.0, "max": 0}
        ev = np.array(self._occ, dtype=float)
        order = np.argsort(ev[:, 0], kind="stable")
        t = ev[order, 0]
        level = np.cumsum(ev[order, 1])
        edges = np.linspace(0.0, total_cycles, bins + 1)
        # integral of the step function up to each edge
        seg_t = np.append(t, max(total_cycles, t[-1]))
        area = np.concatenate(([0.0], np.cumsum(level * np.diff(seg_t))))
        knots = np.concatenate((t, [seg_t[-1]]))
        at = np.interp(edges, knots, area, left=0.0)
        per_bin = np.diff(at) / np.diff(edges)
        return {"bins": per_bin.tolist(), "bin_cycles": float(edges[1] - edges[0]),
                "mean": float(at[-1] / total_cycles), "max": int(level.max())}

    def share_records(self):
        """Per channel share: channel, arrival, start, first data, done, bursts (numpy)."""
        if self.model != "banked":
            raise ValueError("share records exist only for dram.model: banked")
        return {k: np.asarray(v) for k, v in self.rec.items()}

    def report(self, total_cycles):
        """The result document's ``dram`` section (before the engine adds peaks)."""
        seconds = total_cycles / (self.arch.clock_ghz * 1e9) if total_cycles else 0.0
        util = (self.busy_cycles / total_cycles).tolist() if total_cycles else [0.0] * self.n
        lat = np.asarray(self.latencies) if self.latencies else np.zeros(1)
        achieved = (self.bytes / seconds / 1e9) if seconds else 0.0
        out = {
            "model": self.model,
            "bytes": int(self.bytes),
            "bursts": int(self.bursts),
            "requests": float(self.requests),
            "transactions": int(self.txns),
            "achieved_gbps": achieved,
            "peak_gbps": self.arch.peak_gbps,
            "effective_to_peak": achieved / self.arch.peak_gbps if self.arch.peak_gbps else 0.0,
            "channel_utilization": util,
            "mean_queue_cycles": self.wait_total / self.txns if self.txns else 0.0,
            "mean_access_cycles": self.latency_total / self.txns if self.txns else 0.0,
            "p95_access_cycles": float(np.percentile(lat, 95)),
            "queue_occupancy": self.occupancy(total_cycles),
        }
        if self.model != "banked":
            return out
        hits, misses, conflicts = (int(x) for x in self.kinds)
        total = hits + misses + conflicts
        tm = self.tm
        if tm.rfc > 0 and total_cycles > 0:
            # windows scheduled inside the run, clipped to its end
            k = np.floor(np.maximum(total_cycles - self.ref_first, -1) / tm.refi) + 1
            k = np.maximum(k, 0)
            last_start = self.ref_first + (k - 1) * tm.refi
            stolen = np.where(k > 0, (k - 1) * tm.rfc
                              + np.minimum(tm.rfc, total_cycles - last_start), 0.0)
            refresh_share = float(stolen.mean() / total_cycles)
        else:
            refresh_share = 0.0
        out.update({
            "row_hit_rate": hits / total if total else 0.0,
            "row_hits": hits,
            "row_misses": misses,
            "bank_conflicts": conflicts,
            "refresh_share": refresh_share,
            "refresh_delay_cycles": float(self.refresh_delay),
            "scheduler": self.arch.dram.scheduler,
            "page_policy": self.arch.dram.page_policy,
        })
        return out
