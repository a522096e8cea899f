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
                        a = last_col[b] + rtp
                        if act[b] + ras > a:
                            a = act[b] + ras
                        if t > a:
                            a = t
                        a += rp
                    ready = a + rcd
                    if t > ready:
                        ready = t
                else:                                     # the bank changes rows in the batch
                    kind = CONFLICT
                    a = b_col[b] + rtp
                    if b_act[b] + ras > a:
                        a = b_act[b] + ras
                    if t > a:
                        a = t
                    a += rp
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
