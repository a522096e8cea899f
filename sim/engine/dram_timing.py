"""Banked DRAM timing, burst by burst: the inner loop of the banked channel model.

:func:`serve` takes one batch of bursts (a transaction's, or a held share
under row hits first), already cut into channel, global bank and DRAM row and
sorted by channel, and walks each channel's bursts in service order against
the bank state, the way the controller issues them:

* a burst to the row its bank opened earlier in the batch is a row hit and
  follows the previous column command (one burst time, or tCCD_L in the same
  bank group);
* the first burst of a bank in the batch reads the bank state: a hit on the
  open row, a miss on a closed bank (activate from ``pre_ready`` or from the
  time the batch may start), or a conflict (precharge no earlier than tRTP
  after the last column and tRAS after the activate, then tRP);
* a bank that changes rows inside the batch precharges after its own last
  column of the batch (a conflict);
* the column command waits for the row (activate + tRCD) and for the bus.

When a column command would fall at or after the channel's next refresh, the
channel refreshes first: its banks close, nothing may start before the refresh
ends, and the rest of the channel's bursts are served as a new piece of the
same share (so a transaction's share may come back in several pieces).
Under the close-page policy each bank a piece touched closes its row once
that piece's reads are served.

Everything here is plain loops over numpy arrays, compiled with numba when it
is installed (``ATTNSIM_NO_JIT=1`` runs the same code as Python, slowly); the
state arrays are updated in place. :func:`sim.engine.dram.column_times` is the
same arithmetic written as one vectorized solve, kept as the reference the
tests compare this loop with.
"""

import os

import numpy as np

try:  # pragma: no cover - import guard
    from numba import njit as _njit
except ImportError:  # pragma: no cover
    _njit = None

JIT = _njit is not None and os.environ.get("ATTNSIM_NO_JIT", "") in ("", "0")

HIT, MISS, CONFLICT = 0, 1, 2

# indices into the timing parameter vector
P_BURST, P_CCD_L, P_RCD, P_RP, P_RAS, P_RTP, P_CL, P_CTRL, P_RFC, P_REFI = range(10)


def _compile(fn):
    return _njit(cache=True, nogil=True)(fn) if JIT else fn


def timing_vector(tm):
    """The parameter vector :func:`serve` reads, from a :class:`sim.engine.dram.Timing`."""
    return np.array([tm.burst, tm.ccd_l, tm.rcd, tm.rp, tm.ras, tm.rtp, tm.cl, tm.ctrl, tm.rfc,
                     tm.refi], dtype=np.float64)


@_compile
def _reopen(last_col, act, t, rtp, ras, rp):
    """Activate time of a bank switching rows: precharge no earlier than tRTP after its
    last column, tRAS after its activate and the time the batch may start, then tRP."""
    a = last_col + rtp
    if act + ras > a:
        a = act + ras
    if t > a:
        a = t
    return a + rp


@_compile
def _refresh(c, banks, end, open_row, pre_ready):
    """Channel ``c`` refreshes until ``end``: its rows close and none opens before then."""
    for b in range(c * banks, (c + 1) * banks):
        open_row[b] = -1
        if end > pre_ready[b]:
            pre_ready[b] = end


@_compile
def serve(ch, gb, row, t0, groups, banks, close_page, P,
          open_row, act, last_col, pre_ready, close_at, ch_col, ch_group, ref_next, kinds):
    """Serve bursts ``ch``/``gb``/``row`` (sorted by channel) starting no earlier than ``t0[ch]``.

    Updates the bank state (``open_row`` ... ``close_at``, one entry per
    global bank), the channel state (``ch_col`` last column time, ``ch_group``
    its bank group, ``ref_next`` next refresh) and ``kinds`` (hit, miss and
    conflict counts) in place.

    Returns ``(pieces, intervals, refresh_delay)``. ``pieces`` has one row per
    piece of a channel's share, in service order: channel, earliest start,
    first data, last data, bursts, and 1 if it continues the piece before it
    (cut by a refresh). ``intervals`` has the data-bus busy intervals
    ``[piece, begin, end]``, merged where bursts are back to back.
    ``refresh_delay`` is the cycles bursts waited for refreshes that cut them.
    """
    n = len(gb)
    burst = P[P_BURST]
    ccd_l = P[P_CCD_L]
    rcd = P[P_RCD]
    rp = P[P_RP]
    ras = P[P_RAS]
    rtp = P[P_RTP]
    cl = P[P_CL]
    tail = P[P_CL] + P[P_CTRL]
    rfc = P[P_RFC]
    refi = P[P_REFI]
    lim = burst * (1 + 1e-9)
    pieces = np.empty((n, 6))
    intervals = np.empty((n, 3))
    npc = 0
    niv = 0
    delay = 0.0
    # per bank, for the piece being served: touched, row, activate and last column times
    seen = np.zeros(len(open_row), dtype=np.bool_)
    b_row = np.empty(len(open_row), dtype=np.int64)
    b_act = np.empty(len(open_row))
    b_col = np.empty(len(open_row))
    touched = np.empty(n, dtype=np.int64)
    i = 0
    while i < n:
        c = ch[i]
        hi = i
        while hi < n and ch[hi] == c:
            hi += 1
        t = t0[c]
        if ref_next[c] <= t:  # refreshes due before the share starts: rows closed
            k = int((t - ref_next[c]) // refi) + 1
            _refresh(c, banks, ref_next[c] + (k - 1) * refi + rfc, open_row, pre_ready)
            ref_next[c] += k * refi
        cont = 0.0
        while i < hi:  # one piece: until the bursts end or a refresh cuts them
            nt = 0
            prev_c = ch_col[c]
            prev_g = ch_group[c]
            first_c = 0.0
            first_kind = HIT
            cut = False
            j = i
            while j < hi:
                b = gb[j]
                r = row[j]
                g = b % groups
                d = ccd_l if g == prev_g else burst
                ready = -np.inf
                kind = -1
                if seen[b] and b_row[b] == r:
                    pass                                  # same row: a hit behind its run's head
                elif not seen[b]:
                    o_r = open_row[b]
                    closed = o_r < 0 or close_at[b] <= t
                    if not closed and o_r == r:
                        kind = HIT
                        a = act[b]
                    elif closed:
                        kind = MISS
                        a = pre_ready[b] if pre_ready[b] > t else t
                    else:
                        kind = CONFLICT
                        a = _reopen(last_col[b], act[b], t, rtp, ras, rp)
                    ready = a + rcd
                    if t > ready:
                        ready = t
                else:                                     # the bank changes rows in the batch
                    kind = CONFLICT
                    a = _reopen(b_col[b], b_act[b], t, rtp, ras, rp)
                    ready = a + rcd
                cc = prev_c + d
                if ready > cc:
                    cc = ready
                if cc >= ref_next[c]:
                    cut = True
                    delay += max(0.0, ref_next[c] + rfc - cc)
                    break
                if kind >= 0:
                    kinds[kind] += 1
                    if not seen[b]:
                        seen[b] = True
                        touched[nt] = b
                        nt += 1
                    b_row[b] = r
                    b_act[b] = a
                else:
                    kinds[HIT] += 1
                b_col[b] = cc
                if j == i:
                    first_c = cc
                    first_kind = kind
                    intervals[niv, 0] = npc
                    intervals[niv, 1] = cc + cl
                    niv += 1
                elif cc - prev_c > lim:
                    intervals[niv - 1, 2] = prev_c + (cl + burst)
                    intervals[niv, 0] = npc
                    intervals[niv, 1] = cc + cl
                    niv += 1
                prev_c = cc
                prev_g = g
                j += 1
            if j > i:  # commit the piece: bank and channel state, its record
                intervals[niv - 1, 2] = prev_c + (cl + burst)
                for q in range(nt):
                    b = touched[q]
                    act[b] = b_act[b]
                    last_col[b] = b_col[b]
                    open_row[b] = b_row[b]
                    if close_page:
                        shut = b_col[b] + rtp
                        if b_act[b] + ras > shut:
                            shut = b_act[b] + ras
                        close_at[b] = shut
                        pre_ready[b] = shut + rp
                    seen[b] = False
                ch_col[c] = prev_c
                ch_group[c] = prev_g
                prep = 0.0 if first_kind == HIT else (rcd if first_kind == MISS else rp + rcd)
                start = first_c - prep
                pieces[npc, 0] = c
                pieces[npc, 1] = start if start > t else t
                pieces[npc, 2] = first_c + tail
                pieces[npc, 3] = prev_c + (burst + tail)
                pieces[npc, 4] = j - i
                pieces[npc, 5] = cont
                npc += 1
                cont = 1.0
            if cut:  # the refresh: rows close, the rest waits for it to end
                w = ref_next[c]
                _refresh(c, banks, w + rfc, open_row, pre_ready)
                ref_next[c] += refi
                if w + rfc > t:
                    t = w + rfc
            i = j
    return pieces[:npc], intervals[:niv], delay


# ---------------------------------------------------------------- queue slots
# A channel's queue as rows ``[entered before, entered up to, first data, last data]``
# of ``S[channel]``; ``SI[channel] = (head, count)``; ``ST[channel]`` requests entered.
# :class:`sim.engine.dram.RequestSlots` owns the arrays and says what they model.

@_compile
def slots_room_at(S, SI, ST, c, now, need, depth):
    """Earliest time from ``now`` at which ``need`` more requests (one at most) fit in ``c``'s queue."""
    level = ST[c] + min(need, 1.0) - depth       # completions needed first
    if level <= 1e-9:
        return now
    x = level - 1e-9
    lo = SI[c, 0]
    hi = SI[c, 1]
    while lo < hi:                               # first share whose end reaches the level
        mid = (lo + hi) // 2
        if S[c, mid, 1] < x:
            lo = mid + 1
        else:
            hi = mid
    if lo >= SI[c, 1]:
        return now
    SI[c, 0] = lo                                # levels only grow: nothing before is needed again
    b = S[c, lo, 0]
    e = S[c, lo, 1]
    f = S[c, lo, 2]
    d = S[c, lo, 3]
    t = f + (level - b) / (e - b) * (d - f) if e > b else d
    return t if t > now else now


@_compile
def slots_add(S, SI, ST, c, first, done, amount):
    """``amount`` requests enter ``c``'s queue, completing linearly from ``first`` to ``done``."""
    k = SI[c, 1]
    S[c, k, 0] = ST[c]
    ST[c] += amount
    S[c, k, 1] = ST[c]
    S[c, k, 2] = first
    S[c, k, 3] = done
    SI[c, 1] = k + 1


# ---------------------------------------------------------------- whole batches

@_compile
def decode_sorted(b, burst, lut_ch, lut_gb, low_bits, low_mask, channels):
    """Channel, global bank and row of burst addresses ``b``, stably sorted by channel."""
    n = len(b)
    cnt = np.zeros(channels + 1, dtype=np.int64)
    low = np.empty(n, dtype=np.int64)
    for i in range(n):
        x = b[i] // burst
        low[i] = x & low_mask
        cnt[lut_ch[low[i]] + 1] += 1
    for c in range(channels):
        cnt[c + 1] += cnt[c]
    ch = np.empty(n, dtype=np.int64)
    gb = np.empty(n, dtype=np.int64)
    row = np.empty(n, dtype=np.int64)
    for i in range(n):
        c = lut_ch[low[i]]
        k = cnt[c]
        cnt[c] = k + 1
        ch[k] = c
        gb[k] = lut_gb[low[i]]
        row[k] = (b[i] // burst) >> low_bits
    return ch, gb, row


@_compile
def serve_and_book(ch, gb, row, now, arrival, times, depth, rq, groups, banks, close_page, P,
                   open_row, act, last_col, pre_ready, close_at, ch_col, ch_group, ref_next,
                   kinds, S, SI, ST, R, RN, IV, IVN, busy, acc, t0):
    """Queue, serve and book one batch (sorted by channel) arriving at ``now``.

    Each channel's share starts once its first request fits in the channel's
    queue; :func:`serve` times it; then its pieces enter the queue slots
    (``S``...), the share records (``R``, ``RN`` rows: channel, arrival, start,
    first data, last data, bursts), the data-bus intervals (``IV``, ``IVN``)
    and the busy cycles. ``times`` holds the batch's start, first data and last
    data, raised here. ``acc`` = (requests, refresh delay). Returns the number
    of channels served, or -1 without touching anything if a table is full.
    """
    n = len(ch)
    if RN[0] + n > R.shape[0]:
        return -1
    i = 0
    while i < n:
        c = ch[i]
        if SI[c, 1] + n > S.shape[1] or IVN[c] + n > IV.shape[1]:
            return -1
        while i < n and ch[i] == c:
            i += 1
    nch = 0
    i = 0
    while i < n:
        c = ch[i]
        j = i
        while j < n and ch[j] == c:
            j += 1
        # the channel's queue is full: wait for requests to complete
        t0[c] = slots_room_at(S, SI, ST, c, now, (j - i) / rq, depth)
        nch += 1
        i = j
    pieces, ivs, delay = serve(ch, gb, row, t0, groups, banks, close_page, P, open_row, act,
                               last_col, pre_ready, close_at, ch_col, ch_group, ref_next, kinds)
    burst = P[P_BURST]
    t_start = times[0]
    t_first = times[1]
    t_done = times[2]
    slot = np.empty(len(ch_col), dtype=np.int64)
    for k in range(len(pieces)):
        c = int(pieces[k, 0])
        m = pieces[k, 4]
        first = pieces[k, 2]
        done = pieces[k, 3]
        nreq = m / rq
        acc[0] += nreq
        slots_add(S, SI, ST, c, first, done, nreq)
        busy[c] += m * burst
        if pieces[k, 5] != 0.0:          # the rest of a share cut by a refresh
            R[slot[c], 4] = done
            R[slot[c], 5] += m
        else:
            r = RN[0]
            slot[c] = r
            R[r, 0] = c
            R[r, 1] = arrival
            R[r, 2] = pieces[k, 1]
            R[r, 3] = first
            R[r, 4] = done
            R[r, 5] = m
            RN[0] = r + 1
            if pieces[k, 1] > t_start:
                t_start = pieces[k, 1]
            if first > t_first:
                t_first = first
        if done > t_done:
            t_done = done
    last = -1.0
    for q in range(len(ivs)):
        k = ivs[q, 0]
        c = int(pieces[int(k), 0])
        m = IVN[c]
        if k != last and m > 0 and IV[c, m - 1, 1] >= ivs[q, 1] - 1e-9:   # joins the last one
            if ivs[q, 2] > IV[c, m - 1, 1]:
                IV[c, m - 1, 1] = ivs[q, 2]
        else:
            IV[c, m, 0] = ivs[q, 1]
            IV[c, m, 1] = ivs[q, 2]
            IVN[c] = m + 1
        last = k
    acc[1] += delay
    times[0] = t_start
    times[1] = t_first
    times[2] = t_done
    return nch


@_compile
def serve_fixed(b, interleave, now, free_at, t_burst, t_lat, depth, rq, S, SI, ST, IV, IVN,
                busy, acc, counts):
    """The fixed-latency model: each channel's bursts on one pipelined bus after the ones before.

    Returns ``(status, start, end)``: -1 without touching anything if a table
    is full, else 1 with the latest start and bus end over the channels.
    """
    nch = len(free_at)
    for c in range(nch):
        counts[c] = 0
    for i in range(len(b)):
        counts[(b[i] // interleave) % nch] += 1
    for c in range(nch):
        if counts[c] and (SI[c, 1] + 1 > S.shape[1] or IVN[c] + 1 > IV.shape[1]):
            return -1, 0.0, 0.0
    t_start = now
    t_end = now
    for c in range(nch):
        nb = counts[c]
        if nb == 0:
            continue
        nreq = nb / rq
        start = free_at[c] if free_at[c] > now else now
        room = slots_room_at(S, SI, ST, c, now, nreq, depth)
        if room > start:  # wait until enough queued requests have completed
            start = room
        end = start + nb * t_burst
        free_at[c] = end
        m = IVN[c]
        if m > 0 and IV[c, m - 1, 1] >= start:
            if end > IV[c, m - 1, 1]:
                IV[c, m - 1, 1] = end
        else:
            IV[c, m, 0] = start
            IV[c, m, 1] = end
            IVN[c] = m + 1
        busy[c] += end - start
        slots_add(S, SI, ST, c, start + t_lat, end + t_lat, nreq)
        acc[0] += nreq
        if start > t_start:
            t_start = start
        if end > t_end:
            t_end = end
    return 1, t_start, t_end


@_compile
def serve_addresses(b, burst, lut_ch, lut_gb, low_bits, low_mask, now, times, depth, rq, groups,
                    banks, close_page, P, open_row, act, last_col, pre_ready, close_at, ch_col,
                    ch_group, ref_next, kinds, S, SI, ST, R, RN, IV, IVN, busy, acc, t0):
    """:func:`decode_sorted` then :func:`serve_and_book` for a transaction arriving now."""
    ch, gb, row = decode_sorted(b, burst, lut_ch, lut_gb, low_bits, low_mask, len(ch_col))
    return serve_and_book(ch, gb, row, now, now, times, depth, rq, groups, banks, close_page, P,
                          open_row, act, last_col, pre_ready, close_at, ch_col, ch_group,
                          ref_next, kinds, S, SI, ST, R, RN, IV, IVN, busy, acc, t0)
