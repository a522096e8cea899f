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
row once (numpy) and sorted by channel, one *share* per channel. The column
command times follow ``c[i] = max(c[i-1] + spacing[i], row_ready[i])``, walked
burst by burst in service order by :func:`sim.engine.dram_timing.serve` (a
compiled loop), which also takes refreshes on the way and updates the bank
state. :func:`column_times` is the same recurrence solved for a whole batch at
once with a segmented running maximum, in numpy; the tests hold the loop to
it. Events: one per transaction (its completion), plus one per scheduling
decision of a channel under ``row_hits_first`` -- never one per burst or per
cycle.

Interface used by the fetch unit (stable): ``submit(txn) -> simpy event``
fired when the last byte has arrived, with the transaction's log marked
``memory_queue``, ``memory_latency``, ``memory_transfer`` (non-decreasing);
``report(total_cycles)`` for the result's ``dram`` section; ``busy_intervals``
per channel (merged data-bus busy intervals).

Simplifications, on purpose: reads only; no tRRD / tFAW activate-rate limit;
no command-bus contention; refresh is taken on schedule (never postponed) and
does not wait for tRAS of open rows; every ``dram.refresh`` mode is served as
all-bank refresh (``t_rfc_ns`` every ``t_refi_ns``).
"""

import numpy as np

from ..errors import SimulationStalled
from .addrmap import BurstDecoder
from .dram_timing import (CONFLICT, HIT, MISS, decode_sorted, serve_addresses, serve_and_book,
                          serve_fixed, slots_add, slots_room_at, timing_vector)

OCCUPANCY_BINS = 32


def burst_cycles(arch):
    """Data-bus cycles (accelerator clock) to move one burst on one channel."""
    bytes_per_cycle = arch.dram.channel_gbps / arch.clock_ghz
    return arch.dram.burst_bytes / bytes_per_cycle


def latency_cycles(arch):
    """The fixed-latency model's access latency in cycles."""
    return arch.dram.latency_ns * arch.clock_ghz


# A serve call that asks for room gets its tables grown (each growth at least
# doubles them); a call that still asks after this many growths never will.
MAX_ROOM_TRIES = 64


def _room_or_stall(tries, where):
    if tries >= MAX_ROOM_TRIES:
        raise SimulationStalled(f"dram: the {where} asked for table room {tries} times in a row without "
                                "progress (timings out of range?)", unit="dram", cause="table_room")


class RequestSlots:
    """The requests of each channel's queue, in the order they entered it.

    Amounts are in requests of ``fetch.request_bytes`` and may be fractional:
    a share smaller than a request holds part of one. Requests enter in order,
    each once the request ``depth`` places ahead of it has completed, so a
    share may start as soon as its first request fits; the rest of it follows
    as the requests ahead complete. A share's requests complete one after
    another while its data streams out, linearly from ``first`` (first data)
    to ``done`` (last data). Counting by position, not by share, is what makes
    the wait independent of how a stream is cut into shares.

    The rows live in numpy arrays (see :mod:`sim.engine.dram_timing`) so the
    compiled loops read and extend them directly.
    """

    def __init__(self, channels=1, capacity=1024):
        if channels < 1:
            raise ValueError(f"RequestSlots: channels must be >= 1, got {channels!r}")
        self.S = np.zeros((channels, capacity, 4))     # entered before, up to, first, done
        self.SI = np.zeros((channels, 2), dtype=np.int64)  # head, rows
        self.ST = np.zeros(channels)                   # requests entered so far

    def room_at(self, now, need, depth, channel=0):
        """Earliest time from ``now`` at which ``need`` more requests (one at most) fit."""
        return slots_room_at(self.S, self.SI, self.ST, channel, float(now), float(need), depth)

    def add(self, first, done, amount, channel=0):
        if self.SI[channel, 1] + 1 > self.S.shape[1]:
            self.make_room(1)
        slots_add(self.S, self.SI, self.ST, channel, float(first), float(done), float(amount))

    def make_room(self, rows):
        """Room for ``rows`` more rows per channel: drop what no query reaches, or grow."""
        head, count = self.SI[:, 0], self.SI[:, 1]
        keep = count - head
        cap = self.S.shape[1]
        new_cap = cap
        while keep.max() + rows > new_cap // 2:
            new_cap *= 2
        S = np.zeros((self.S.shape[0], new_cap, 4)) if new_cap != cap else self.S
        for c in range(len(head)):
            S[c, :keep[c]] = self.S[c, head[c]:count[c]]
        self.S = S
        self.SI[:, 0] = 0
        self.SI[:, 1] = keep


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
        self.free_at = np.zeros(self.n)
        self.outstanding = RequestSlots(self.n)
        self.IV = np.zeros((self.n, 1024, 2))            # data-bus busy intervals per channel
        self.IVN = np.zeros(self.n, dtype=np.int64)
        self.busy_cycles = np.zeros(self.n)
        self.acc = np.zeros(2)                           # requests, refresh delay
        self._counts = np.zeros(self.n, dtype=np.int64)
        self.R = np.zeros((1024, 6))                     # share records (banked)
        self.RN = np.zeros(1, dtype=np.int64)
        self.bytes = 0
        self.bursts = 0
        self.txns = 0
        self.wait_total = 0.0
        self.latency_total = 0.0
        self.latencies = []
        # live occupancy: transactions submitted and not yet complete
        self.in_flight = 0
        self._occ = []                              # (t, +1 / -1) as they happen
        self.interleave = d.interleave_bytes
        if self.model == "fixed-latency":
            self.submit = self._submit_fixed
            self._bind()
            return
        self.banks = d.banks
        self.groups = d.bank_groups
        self.tm = Timing(arch)
        self.close_page = d.page_policy == "close"
        self.rows_first = d.scheduler == "row_hits_first"
        self.first_free = d.steering == "first_free"
        self.decoder = BurstDecoder(arch)
        self.st = BankState(self.n, self.banks)
        self.ch_col = np.full(self.n, -np.inf)
        self.ch_group = np.full(self.n, -1, dtype=np.int64)
        offsets = (np.arange(self.n) + 1) * (self.tm.refi / self.n)
        self.ref_first = offsets.copy()
        self.ref_next = offsets if self.tm.rfc > 0 else np.full(self.n, np.inf)
        self.kinds = np.zeros(3, dtype=np.int64)
        self.tvec = timing_vector(self.tm)
        self.t0 = np.zeros(self.n)                  # earliest start per channel of a batch
        # per-share records (channel, arrival, start, first data, done, bursts)
        self._times = np.zeros(3)
        lut = self.decoder.lut
        self._lut = (lut[0], lut[2], self.decoder.low_bits, self.decoder.low_mask) if lut else None
        # row_hits_first: shares held per channel until its decision time
        self.held = [[] for _ in range(self.n)]
        self.timer_at = [None] * self.n
        self.submit = self._submit_banked
        self._bind()

    # ------------------------------------------------------------------ fixed
    def _submit_fixed(self, txn):
        """Serve ``txn.bursts`` on the fixed-latency model."""
        now = self.env.now
        self._arrive(now)
        for tries in range(MAX_ROOM_TRIES + 1):
            ok, t_start, t_end = serve_fixed(txn.bursts, self.interleave, now, self.free_at,
                                             *self._fixed_args)
            if ok > 0:
                break
            _room_or_stall(tries, "fixed-latency serve")
            self._make_room(1)
        t_first = t_start + self.t_lat
        t_done = max(t_end, t_start) + self.t_lat
        return self._finish(txn, now, t_start, t_first, t_done, None)

    def _make_room(self, rows):
        """Grow the queue, interval and share tables so ``rows`` more fit per channel."""
        self.outstanding.make_room(rows)
        if self.IVN.max() + rows > self.IV.shape[1]:
            cap = self.IV.shape[1]
            while self.IVN.max() + rows > cap:
                cap *= 2
            IV = np.zeros((self.n, cap, 2))
            IV[:, :self.IV.shape[1]] = self.IV
            self.IV = IV
        if self.RN[0] + rows > len(self.R):
            cap = len(self.R)
            while self.RN[0] + rows > cap:
                cap *= 2
            R = np.zeros((cap, 6))
            R[:len(self.R)] = self.R
            self.R = R
        self._bind()

    @property
    def busy_intervals(self):
        """Per channel, the merged data-bus busy intervals ``[[begin, end], ...]``."""
        return [self.IV[c, :self.IVN[c]].tolist() for c in range(self.n)]

    @property
    def requests(self):
        return float(self.acc[0])

    @property
    def refresh_delay(self):
        return float(self.acc[1])

    # ----------------------------------------------------------------- banked
    def _submit_banked(self, txn):
        """Serve ``txn.bursts`` on the banked model; the event fires at the last byte."""
        now = self.env.now
        self._arrive(now)
        b = txn.bursts
        if len(b) == 0:
            return self._finish(txn, now, now, now, now, None)
        if self._lut is not None and not (self.first_free or self.rows_first):
            return self._serve_now(txn, b, now)
        if self.first_free:
            c = self._first_free_channel(now)
            _, bank, row = self.decoder.decode(b)
            gb = bank + c * self.banks
            ch = np.full(len(b), c, dtype=np.int64)
        elif self._lut is not None:
            ch, gb, row = decode_sorted(b, self.burst, *self._lut, self.n)
        else:
            ch, gb, row = self.decoder.decode_global(b)
            if self.n > 1:
                order = np.argsort(ch, kind="stable")
                ch, gb, row = ch[order], gb[order], row[order]
        rec = [now, 0, now, now, now, None]   # arrival, shares left, start, first data, done, event
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

    def _serve_now(self, txn, b, now):
        """First come first served with a table address map: decode, serve and book in one call."""
        times = self._times
        times[:] = -np.inf
        tries = 0
        while serve_addresses(b, *self._lut_args, now, times, *self._state_args) < 0:
            _room_or_stall(tries, "banked serve")
            tries += 1
            self._make_room(len(b))
        t_start, t_first, t_done = times.tolist()
        return self._finish(txn, now, t_start, t_first, t_done, None)

    def _bind(self):
        """The kernels' argument tuples: the state arrays, bound again when a table grows."""
        q = self.outstanding
        self._fixed_args = (self.t_burst, self.t_lat, self.depth, self.req_bursts, q.S, q.SI,
                            q.ST, self.IV, self.IVN, self.busy_cycles, self.acc, self._counts)
        if self.model == "fixed-latency":
            return
        st = self.st
        self._state_args = (self.depth, self.req_bursts, self.groups, self.banks,
                            self.close_page, self.tvec, st.open_row, st.act, st.last_col,
                            st.pre_ready, st.close_at, self.ch_col, self.ch_group,
                            self.ref_next, self.kinds, q.S, q.SI, q.ST, self.R, self.RN,
                            self.IV, self.IVN, self.busy_cycles, self.acc, self.t0)
        if self._lut is not None:
            self._lut_args = (self.burst,) + self._lut

    def _commit(self, rec, ch, gb, row, now):
        """Fix the timing of one batch of bursts ``ch``/``gb``/``row`` (sorted by channel)."""
        times = self._times
        times[0] = -np.inf
        times[1] = -np.inf
        times[2] = -np.inf if rec[4] == rec[0] else rec[4]
        for tries in range(MAX_ROOM_TRIES + 1):
            nch = serve_and_book(ch, gb, row, now, rec[0], times, *self._state_args)
            if nch >= 0:
                break
            _room_or_stall(tries, "banked commit")
            self._make_room(len(ch))
        if rec[1] > 0:
            rec[1] -= nch
        rec[2], rec[3], rec[4] = times.tolist()

    # ----------------------------------------------------------------- common
    def _finish(self, txn, t_submit, t_start, t_first, t_done, ev, nbursts=None):
        """Mark the transaction's log, count it, and fire (or return) its completion event."""
        env = self.env
        now = env.now
        if t_start < t_submit:
            t_start = t_submit
        if t_first < t_start:
            t_first = t_start
        if t_done < t_first:
            t_done = t_first
        if nbursts is None:
            nbursts = len(txn.bursts)
        self.bursts += nbursts
        self.bytes += nbursts * self.burst
        self.txns += 1
        self.wait_total += t_start - t_submit
        self.latency_total += t_done - t_submit
        self.latencies.append(t_done - t_submit)
        txn.log += (("memory_queue", t_start), ("memory_latency", t_first),
                    ("memory_transfer", t_done))
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
        R = self.R[:self.RN[0]]
        out = {k: R[:, i] for i, k in enumerate(("channel", "arrival", "start", "first", "done", "bursts"))}
        out["channel"] = out["channel"].astype(np.int64)
        out["bursts"] = out["bursts"].astype(np.int64)
        return out

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
