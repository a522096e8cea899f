"""Banked DRAM timing, burst by burst: the compiled inner loops of the banked channel model.

A channel's controller keeps one queue per bank, served in order, and issues
commands to other banks while one bank waits (bank-level parallelism). The
loops here fix each burst's commands the moment the pool commits it, in
commit order, against what earlier bursts already hold:

* **bank**: a burst to the row its bank has open is a row hit (a column
  command, no earlier than tRCD after the activate); a burst to a closed bank
  is a miss (activate, no earlier than tRC after the bank's last activate and
  tRP after its precharge); a burst to a bank with another row open is a
  conflict (precharge no earlier than tRAS after the activate, tRTP after its
  last read column or tWR after its last write data, then tRP, then activate).
  A bank's bursts keep their order.
* **activates** of one channel are spaced tRRD_S (other bank group) or tRRD_L
  (same group), and no window of tFAW holds more than four. An activate takes
  the earliest time that keeps every rule with the activates already fixed,
  before or after them.
* **column commands** share the channel's data bus: tCCD_L apart in one bank
  group, one burst time (tCCD_S) otherwise; a read to a write waits tRTW, a
  write to a read waits the write data plus tWTR_S / tWTR_L. A column takes the
  earliest time that keeps every rule with the columns already fixed: a later
  burst whose bank is ready fills a gap an earlier one left while its bank
  opened, but never moves it (older bursts keep their slots).
* **refresh** closes a bank's row at each of its refresh windows (``off +
  k * period``, lasting ``dur``; all banks of a channel share the windows in
  all-bank mode); nothing opens or reads the bank inside a window, and a row
  opened before a window is not read after its start: such a burst opens the
  row again once the window ends.

Data leaves the bus tCL after a read column (tCWL after a write column) for
one burst time. Each channel keeps two sorted timelines, its column commands
(``TL[c, COL]`` times, ``TK[c, COL]`` codes) and its activates (``TL[c, ACT]``,
``TK[c, ACT]`` bank groups), each with the list of gaps between neighbours wide
enough to hold another command (``TG``): a search jumps from gap to gap over
stretches where nothing fits. A channel takes bursts in in time order: none is
seen before the time the last batch was taken in (``CF[c, F_TAKEN]``), so
entries older than that minus the longest spacing rule are dropped to make room.

State layout (the pool owns the arrays; see :class:`sim.engine.dram.ChannelPool`):
``BF[bank, B_*]`` and ``open_row[bank]`` per global bank; ``TL``, ``TK``
``(channels, 2, cap)`` and ``TG`` ``(channels, 2, cap, 2)`` timelines;
``TN[channel, N_*]`` counts; ``CF[channel, F_*]`` per-channel times and the read
queue's counting state; ``H`` the read queue's completion heap; ``acc[A_*]``
counters; ``R`` share records and ``IV`` data-bus intervals; ``NI`` = rows of
``R``, rows of the command log ``LOG``, and whether to log.

Everything here is plain loops over numpy arrays, compiled with numba when it
is installed (``ATTNSIM_NO_JIT=1`` runs the same code as Python, slowly); the
state arrays are updated in place. ``tests/test_dram_timing.py`` holds these
loops to a brute-force reference and to a protocol check of their command log.

The loops the pool calls are compiled for one argument signature each
(:data:`KERNELS`), once per machine: :func:`load_kernels` loads them from
numba's cache, and the first process to find the cache empty compiles them
under a machine-wide lock while any other waits and then loads.
"""

import contextlib
import hashlib
import os
import tempfile
import time
from typing import NamedTuple

import numpy as np

try:  # pragma: no cover - import guard
    from numba import njit as _njit
except ImportError:  # pragma: no cover
    _njit = None

JIT = _njit is not None and os.environ.get("ATTNSIM_NO_JIT", "") in ("", "0")

HIT, MISS, CONFLICT = 0, 1, 2
CMD_ACT, CMD_PRE, CMD_RD, CMD_WR, CMD_REF = 0, 1, 2, 3, 4

# indices into the timing parameter vector (see sim.engine.dram.Timing)
(P_BURST, P_CCD_L, P_RCD, P_RP, P_RAS, P_RC, P_RTP, P_CL, P_CWL, P_WR, P_WTR_S, P_WTR_L, P_RTW,
 P_RRD_S, P_RRD_L, P_FAW, P_CTRL, P_REF_PERIOD, P_REF_DUR, P_COL_REACH, P_ACT_REACH, P_REF_POSTPONE) = range(22)
N_PARAMS = 22

# columns of the per-bank float state: last activate, last column, earliest precharge after
# the last column, close-page precharge time, earliest activate of a closed bank, first
# refresh start, start of the first refresh after the open row's activate; the first bank of
# the bank's refresh domain (the banks refreshed together), and in that bank's row (with
# postponement only) the domain's next refresh not yet decided, refreshes owed, the last
# refresh issued (start, end) and the end of its latest column slot
B_ACT, B_COL, B_PRE_MIN, B_CLOSE, B_PRE_READY, B_REF_OFF, B_ROW_END, B_DOM, B_R_NEXT, B_R_OWED, B_R_START, \
    B_R_END, B_R_LAST = range(13)
N_BANK = 13

# accumulators; A_KIND + HIT / MISS / CONFLICT count the bursts of each kind
(A_REQUESTS, A_REF_DELAY, A_ACTS, A_FAW_ACTS, A_ACT_DELAY, A_RW, A_WR, A_READ_BURSTS,
 A_WRITE_BURSTS, A_KIND) = range(10)
A_REFS = 13          # refreshes issued, with postponement (decided as bursts come)
N_ACC = 14

# the two timelines of a channel
COL, ACT = 0, 1
# per-channel counts: entries and gaps of each timeline, heap entries, data-bus intervals
N_COL, N_ACT, N_COL_GAPS, N_ACT_GAPS, N_HEAP, N_IV = range(6)
N_COUNTS = 6
# per-channel times: last column, last write column, time bursts were last taken in; the
# read queue's completions counted so far, the ramp being counted (start, done, amount),
# the requests entered so far, and whether the last column command dropped from the timeline
# was a write, plus one (0: none dropped; a command placed before all kept ones follows it)
F_LAST, F_LAST_WRITE, F_TAKEN, F_REL, F_RAMP_START, F_RAMP_DONE, F_RAMP_AMOUNT, F_ENTERED, F_DROPPED = range(9)
N_CHANNEL = 9
# NI: share records, command-log rows, logging on
I_RECORDS, I_LOG, I_LOGGING = range(3)
# a command fits where the rules leave exactly its room, whatever the last bits of the float times
TIME_EPS = 1e-9
# command-log rows kept free beyond three per burst, for the refreshes a batch issues
LOG_SPARE = 256


def _compile(fn):
    return _njit(cache=True, nogil=True)(fn) if JIT else fn


def _leaf(fn):
    """A loop that makes no arrays: compiled without reference counting, so passing it the
    state arrays costs nothing per call (with counting, its calls inside the per-burst loop
    spent as long counting references as placing commands)."""
    return _njit(cache=True, nogil=True, _nrt=False)(fn) if JIT else fn


def _inline(fn):
    """A small helper taking arrays, called inside search loops: compiled into its callers
    (a compiled call passing arrays costs reference counting each time)."""
    return _njit(cache=True, nogil=True, inline="always")(fn) if JIT else fn


# ---------------------------------------------------------------- refresh windows

@_leaf
def ref_after(off, period, dur, x):
    """Start of the first refresh window of a bank after time ``x`` (inf: no refresh)."""
    if dur <= 0.0:
        return np.inf
    if x < off:
        return off
    return off + (np.floor((x - off) / period) + 1.0) * period


@_leaf
def ref_clear(off, period, dur, x):
    """``x``, or the end of the bank's refresh window ``x`` falls in."""
    if dur <= 0.0 or x < off:
        return x
    s = off + np.floor((x - off) / period) * period
    if x < s + dur:
        return s + dur
    return x


@_leaf
def ref_clear2(off, period, dur, rs, rend, x):
    """``x``, or the end of the refresh window it falls in: the periodic ones from ``off``
    or the one issued at ``[rs, rend)``."""
    while True:
        y = rend if rs <= x < rend else x
        y = ref_clear(off, period, dur, y)
        if y == x:
            return x
        x = y


@_leaf
def row_end(off, period, dur, rs, a):
    """Start of the first refresh window after an activate at ``a``: periodic from ``off``,
    or the one issued at ``rs``."""
    s = ref_after(off, period, dur, a)
    if a < rs < s:
        return rs
    return s


# A controller that postpones refresh (``dram.refresh_postpone`` > 0) keeps, per refresh
# domain, the next refresh it has not decided on (due at ``off + k * period``) and the ones
# it owes. A refresh that falls due while a burst of the domain waits is postponed, up to
# the limit; at the limit it is issued when due. Once the domain has no burst waiting the
# owed ones are issued back to back, and a due one on time. So a placement respects the
# last refresh issued and the due ones from where postponing stops (``_forced_from``).

@_leaf
def _ref_issue(BF, open_row, LOG, NI, acc, lead, c, banks, start, dur, room):
    """Issue a refresh of ``lead``'s domain at ``start``: rows opened before it close then."""
    BF[lead, B_R_START] = start
    BF[lead, B_R_END] = start + dur
    acc[A_REFS] += 1.0
    for x in range(c * banks, (c + 1) * banks):
        if BF[x, B_DOM] == lead and open_row[x] >= 0 and BF[x, B_ACT] < start < BF[x, B_ROW_END]:
            BF[x, B_ROW_END] = start
    if NI[I_LOGGING] > 0 and NI[I_LOG] + room < LOG.shape[0]:
        _log(LOG, NI, start, c, lead - c * banks, CMD_REF, -1)


@_leaf
def _ref_advance(BF, open_row, LOG, NI, acc, lead, c, banks, t, period, dur, limit, room):
    """The refreshes of ``lead``'s domain decided before a burst the controller sees at
    ``t``: owed ones issued once nothing of the domain waits, due ones issued on time when
    nothing waits then (or at the limit), postponed otherwise."""
    while True:
        due = BF[lead, B_R_NEXT]
        owed = BF[lead, B_R_OWED]
        free = BF[lead, B_R_LAST]
        if BF[lead, B_R_END] > free:
            free = BF[lead, B_R_END]
        if owed > 0.0 and free < t and free <= due:
            _ref_issue(BF, open_row, LOG, NI, acc, lead, c, banks, free, dur, room)
            BF[lead, B_R_OWED] = owed - 1.0
        elif due < t:
            start = due if due > BF[lead, B_R_END] else BF[lead, B_R_END]
            if owed < limit and (BF[lead, B_R_LAST] > due or start >= t):
                BF[lead, B_R_OWED] = owed + 1.0
            else:
                _ref_issue(BF, open_row, LOG, NI, acc, lead, c, banks, start, dur, room)
            BF[lead, B_R_NEXT] = due + period
        else:
            return


@_leaf
def _ref_decide(BF, lead, cc, end, period, limit):
    """A burst of ``lead``'s domain got its column at ``cc``, leaving the command slot at
    ``end``: the refreshes falling due while it waited are postponed (those up to the limit;
    it kept the ones after), and none starts before ``end``."""
    due = BF[lead, B_R_NEXT]
    owed = BF[lead, B_R_OWED]
    while owed < limit and cc >= due:
        owed += 1.0
        due += period
    BF[lead, B_R_NEXT] = due
    BF[lead, B_R_OWED] = owed
    if end > BF[lead, B_R_LAST]:
        BF[lead, B_R_LAST] = end


@_leaf
def _forced_from(BF, lead, period, limit):
    """Start of the refreshes of ``lead``'s domain that can no longer be postponed."""
    return BF[lead, B_R_NEXT] + (limit - BF[lead, B_R_OWED]) * period


# ---------------------------------------------------------------- timelines

@_inline
def _lower(a, n, x):
    """First index in ``a[:n]`` (sorted) holding a value >= ``x``."""
    lo = 0
    hi = n
    while lo < hi:
        mid = (lo + hi) >> 1
        if a[mid] < x:
            lo = mid + 1
        else:
            hi = mid
    return lo


@_inline
def _upper(a, n, x):
    """First index in ``a[:n]`` (sorted) holding a value > ``x``."""
    lo = 0
    hi = n
    while lo < hi:
        mid = (lo + hi) >> 1
        if a[mid] <= x:
            lo = mid + 1
        else:
            hi = mid
    return lo


@_leaf
def col_spacing(k1, k2, burst, ccd_l, rtw, w2r_s, w2r_l):
    """Least time from a column command of code ``k1`` to a later one of code ``k2``.

    A code is ``group * 2 + is_write``; ``w2r_s`` / ``w2r_l`` are a write's data
    plus tWTR_S / tWTR_L. Scalars only: this runs for every command a search meets.
    """
    w1 = k1 & 1
    same = (k1 >> 1) == (k2 >> 1)
    if w1 == (k2 & 1):
        return ccd_l if same else burst
    if w1 == 0:
        return rtw
    return w2r_l if same else w2r_s


@_inline
def _gap_after(G, gn, x):
    """First gap of ``G[:gn]`` (sorted, disjoint ``[start, end]`` rows) ending after ``x``."""
    lo = 0
    hi = gn
    while lo < hi:
        mid = (lo + hi) >> 1
        if G[mid, 1] <= x:
            lo = mid + 1
        else:
            hi = mid
    return lo


@_inline
def _gap_remove(TG, TN, c, w, i):
    G = TG[c, w]
    for j in range(i, TN[c, N_COL_GAPS + w] - 1):
        G[j, 0] = G[j + 1, 0]
        G[j, 1] = G[j + 1, 1]
    TN[c, N_COL_GAPS + w] -= 1


@_inline
def _gap_add(TG, TN, c, w, s, e):
    G = TG[c, w]
    k = TN[c, N_COL_GAPS + w]
    p = _gap_after(G, k, s)
    j = k
    while j > p:
        G[j, 0] = G[j - 1, 0]
        G[j, 1] = G[j - 1, 1]
        j -= 1
    G[p, 0] = s
    G[p, 1] = e
    TN[c, N_COL_GAPS + w] = k + 1


@_leaf
def _insert(TL, TK, TG, TN, c, w, x, k, width):
    """Insert ``(x, k)`` into channel ``c``'s timeline ``w`` and keep its list of gaps at
    least ``width`` wide (no narrower gap can hold a command). Returns the entry's index."""
    T = TL[c, w]
    K = TK[c, w]
    n = TN[c, w]
    p = n if n == 0 or x >= T[n - 1] else _upper(T, n, x)
    prev = T[p - 1] if p > 0 else -np.inf
    nxt = T[p] if p < n else np.inf
    j = n
    while j > p:
        T[j] = T[j - 1]
        K[j] = K[j - 1]
        j -= 1
    T[p] = x
    K[p] = k
    TN[c, w] = n + 1
    if p > 0 and p < n:
        G = TG[c, w]
        i = _gap_after(G, TN[c, N_COL_GAPS + w], prev)
        if i < TN[c, N_COL_GAPS + w] and G[i, 0] == prev:
            _gap_remove(TG, TN, c, w, i)
    if p > 0 and x - prev >= width - TIME_EPS:
        _gap_add(TG, TN, c, w, prev, x)
    if p < n and nxt - x >= width - TIME_EPS:
        _gap_add(TG, TN, c, w, x, nxt)
    return p


@_inline
def _stretch(T, n, G, gn, x):
    """``(x, limit)``: ``x`` moved to where a command may fit (the start of the first listed
    gap ending after it, or the last entry), and the end of that stretch."""
    if x < T[0]:
        return x, T[0]
    gi = _gap_after(G, gn, x)
    if gi < gn:
        if x < G[gi, 0]:
            x = G[gi, 0]
        return x, G[gi, 1]
    if x < T[n - 1]:
        x = T[n - 1]
    return x, np.inf


@_inline
def _col_fit(T, K, n, code, x, limit, reach, P):
    """Earliest time >= ``x`` keeping the spacing rules with every column command within
    ``reach`` of it; stops early (returning a time >= ``limit``) once it passes ``limit``."""
    bu, cl, rtw = P[P_BURST], P[P_CCD_L], P[P_RTW]
    ws, wl = P[P_CWL] + bu + P[P_WTR_S], P[P_CWL] + bu + P[P_WTR_L]
    i = _lower(T, n, x - reach)
    while i < n:
        e = T[i]
        if e >= x + reach:
            break
        k = K[i]
        if e <= x:
            need = e + col_spacing(k, code, bu, cl, rtw, ws, wl)
            if need > x:
                x = need
        elif x + col_spacing(code, k, bu, cl, rtw, ws, wl) > e + TIME_EPS:
            # no room before this command: go after it, then keep the rules with the ones before
            x = e + col_spacing(k, code, bu, cl, rtw, ws, wl)
            j = i - 1
            while j >= 0 and T[j] > x - reach:
                need = T[j] + col_spacing(K[j], code, bu, cl, rtw, ws, wl)
                if need > x:
                    x = need
                j -= 1
        if x >= limit:
            return x
        i += 1
    return x


@_leaf
def col_place(TL, TK, TG, TN, CF, c, code, x, P):
    """Earliest time >= ``x`` for a column command of ``code`` on channel ``c``'s bus, found
    gap by gap (:func:`place_bursts` handles the common case, after every command, itself).
    With no write on the channel within reach, a read only keeps tCCD from the reads."""
    n = TN[c, COL]
    if n == 0:
        return x
    T = TL[c, COL]
    reach = P[P_COL_REACH]
    if code & 1 == 0 and CF[c, F_LAST_WRITE] <= x - reach:
        reach = P[P_CCD_L]
    while True:
        x, limit = _stretch(T, n, TG[c, COL], TN[c, N_COL_GAPS], x)
        y = _col_fit(T, TK[c, COL], n, code, x, limit, reach, P)
        if y < limit:
            return y
        x = y


@_leaf
def act_place(TL, TK, TG, TN, c, g, x, P):
    """Earliest activate time >= ``x`` for bank group ``g`` on channel ``c``.

    Returns ``(time, faw)``: ``faw`` is True when the four-activate window moved it.
    """
    faw = False
    rs = P[P_RRD_S]
    rl = P[P_RRD_L]
    F = P[P_FAW]
    n = TN[c, ACT]
    if n == 0 or (rl <= 0.0 and F <= 0.0):
        return x, faw
    T = TL[c, ACT]
    G = TK[c, ACT]
    gaps = TG[c, ACT]
    while True:
        x, limit = _stretch(T, n, gaps, TN[c, N_ACT_GAPS], x)
        p = _upper(T, n, x)                 # activates [0, p) are at or before x
        need = x
        j = p - 1
        while j >= 0 and T[j] + rl > x:
            r = rl if G[j] == g else rs
            if T[j] + r > need:
                need = T[j] + r
            j -= 1
        if F > 0.0 and p >= 4 and T[p - 4] + F > need:
            need = T[p - 4] + F
            faw = True
        if need > x:
            x = need
            continue
        if p == n:
            return x, faw
        ok = True
        q = p
        while q < n and T[q] < x + rl:
            r = rl if G[q] == g else rs
            if T[q] < x + r - TIME_EPS:
                ok = False
                break
            q += 1
        if ok and F > 0.0:
            # the windows of five activates that would hold x
            f = F - TIME_EPS
            if (p >= 3 and T[p] - T[p - 3] < f) or (p >= 2 and p + 1 < n and T[p + 1] - T[p - 2] < f) \
                    or (p >= 1 and p + 2 < n and T[p + 2] - T[p - 1] < f):
                ok = False
                faw = True
                # no activate can ever go between T[p - 1] and T[p]: forget the gap
                if p >= 1:
                    gi = _gap_after(gaps, TN[c, N_ACT_GAPS], T[p - 1])
                    if gi < TN[c, N_ACT_GAPS] and gaps[gi, 0] == T[p - 1]:
                        _gap_remove(TG, TN, c, ACT, gi)
            elif p + 3 < n and T[p + 3] - x < F - TIME_EPS:
                ok = False
                faw = True
        if ok:
            return x, faw
        x = T[p]                            # no room before the next activate: try after it


@_leaf
def act_slot(TL, TK, TG, TN, c, g, a, off, period, dur, rs, rend, P):
    """Earliest activate time >= ``a`` for bank group ``g`` of channel ``c`` that keeps the
    activation limits and falls outside the bank's refresh windows (periodic from ``off``,
    and ``[rs, rend)``). Returns ``(time, faw)``."""
    a = ref_clear2(off, period, dur, rs, rend, a)
    faw = False
    while True:
        a2, f = act_place(TL, TK, TG, TN, c, g, a, P)
        faw = faw or f
        a3 = ref_clear2(off, period, dur, rs, rend, a2)
        if a3 == a:
            return a, faw
        a = a3


@_leaf
def _room(TL, TK, TG, TN, CF, c, w, m, keep_from):
    """Room for ``m`` more entries in channel ``c``'s timeline ``w``, dropping those before
    ``keep_from``. False when even then it would be more than half full (the caller grows it)."""
    cap = TL.shape[2]
    n = TN[c, w]
    if n + m <= cap and TN[c, N_COL_GAPS + w] + m <= cap:
        return True
    T = TL[c, w]
    K = TK[c, w]
    d = _lower(T, n, keep_from)
    if w == COL and d > 0:
        CF[c, F_DROPPED] = (K[d - 1] & 1) + 1
    for j in range(n - d):
        T[j] = T[d + j]
        K[j] = K[d + j]
    TN[c, w] = n - d
    G = TG[c, w]
    gn = TN[c, N_COL_GAPS + w]
    gi = 0
    if n - d > 0:
        while gi < gn and G[gi, 0] < T[0]:
            gi += 1
    else:
        gi = gn
    for j in range(gi, gn):
        G[j - gi, 0] = G[j, 0]
        G[j - gi, 1] = G[j, 1]
    TN[c, N_COL_GAPS + w] = gn - gi
    return TN[c, w] + m <= cap // 2 and TN[c, N_COL_GAPS + w] + m <= cap // 2


@_leaf
def compact(TL, TK, TG, TN, CF, P):
    """Drop from every timeline what no later burst can reach (kept: from the time bursts were
    last taken in, minus the longest spacing rule)."""
    for c in range(TL.shape[0]):
        _room(TL, TK, TG, TN, CF, c, COL, TL.shape[2] + 1, CF[c, F_TAKEN] - P[P_COL_REACH])
        _room(TL, TK, TG, TN, CF, c, ACT, TL.shape[2] + 1, CF[c, F_TAKEN] - P[P_ACT_REACH])


@_leaf
def _log(LOG, NI, t, c, bank, kind, row):
    k = NI[I_LOG]
    LOG[k, 0] = t
    LOG[k, 1] = c
    LOG[k, 2] = bank
    LOG[k, 3] = kind
    LOG[k, 4] = row
    NI[I_LOG] = k + 1


# ---------------------------------------------------------------- bursts

@_leaf
def _after_all(TL, TK, c, n, x, code, w, last_write, reach, burst, ccd_l, rtw, w2r_s, w2r_l):
    """Column time >= ``x`` after all ``n`` columns of a timeline with no usable gap after
    ``x``: only the rules with the commands just before count, and x only grows, so one
    pass back over them is enough. With no write within reach, a read keeps tCCD only."""
    if x < TL[c, COL, n - 1]:
        x = TL[c, COL, n - 1]
    rr = reach if (w or last_write > x - reach) else ccd_l
    j = n - 1
    while j >= 0 and TL[c, COL, j] > x - rr:
        need = TL[c, COL, j] + col_spacing(TK[c, COL, j], code, burst, ccd_l, rtw, w2r_s, w2r_l)
        if need > x:
            x = need
        j -= 1
    return x


@_leaf
def place_bursts(gb, row, ch, pos, k0, k1, w, now, out, agg, by_request, P, groups, banks, close_page,
                 open_row, BF, TL, TK, TG, TN, CF, acc, LOG, NI, IV, busy, H, FS, FI, FF, RX, RT, depth,
                 rq, gdepth, stream, chq):
    """Fix the commands of bursts ``k0 .. k1-1`` (global bank ``gb``, row ``row``, channel
    ``ch``, sorted by channel), writes if ``w``; update all state, the data-bus intervals
    ``IV`` and busy time. ``out[k]`` is burst ``k``'s column time; ``agg[c]`` gets
    channel ``c``'s start (its first command), first data, last data (each after the
    controller's delay) and bursts.

    In one go (not ``by_request``): each channel's bursts in order, seen by the
    controller from ``now``. ``by_request``: reads in address order (``pos[k]``: where
    the ``k``-th is in the sorted arrays), a request at a time, each seen from when it
    has room (see :func:`serve_and_book`) and then booked (:func:`_book_requests`).
    One call for the whole batch: a compiled call costs the reference counts of
    every array passed, and a call per request made that most of the loop's time."""
    burst = P[P_BURST]
    ccd_l = P[P_CCD_L]
    rcd = P[P_RCD]
    rp = P[P_RP]
    ras = P[P_RAS]
    rc = P[P_RC]
    rtw = P[P_RTW]
    w2r_s = P[P_CWL] + burst + P[P_WTR_S]
    w2r_l = P[P_CWL] + burst + P[P_WTR_L]
    reach = P[P_COL_REACH]
    rrd_s = P[P_RRD_S]
    rrd_l = P[P_RRD_L]
    faw_t = P[P_FAW]
    period = P[P_REF_PERIOD]
    dur = P[P_REF_DUR]
    limit = P[P_REF_POSTPONE]
    after_col = P[P_CWL] + burst + P[P_WR] if w else P[P_RTP]   # earliest precharge after a column
    logging = NI[I_LOGGING] > 0
    gmask = groups - 1                          # bank groups come in powers of two
    lat = P[P_CWL] if w else P[P_CL]
    ctrl = P[P_CTRL]
    c = 0
    begin = np.inf
    first = np.inf
    last = -np.inf
    t = np.inf
    kq = k0                                      # by request: the next burst in address order
    e = k0                                      # and the end of its run on one channel
    i0 = k0
    i1 = k1
    take = 0
    while kq < k1:
        if by_request:
            if kq >= e:
                c = ch[pos[kq]]
                e = _run_end(ch, pos, kq, k1)
            take = _to_request(CF[c, F_ENTERED], rq, e - kq)
            t = level_time(H, TN, CF, c, now, CF[c, F_ENTERED] + take / rq - depth) if chq else now
            tg = fslots_level_time(FS, FI, FF, now, FF[1] + take / rq - gdepth)
            if tg > t:
                t = tg
            tr = room_time(RX, RT, kq + take)
            if tr > t:
                t = tr
            i0 = pos[kq]
            i1 = i0 + take
            kq += take
            begin = np.inf
            first = np.inf
            last = -np.inf
        else:
            c = ch[kq]
            i0 = kq
            while kq < k1 and ch[kq] == c:
                kq += 1
            i1 = kq
            t = now
            begin = np.inf
            first = np.inf
            last = -np.inf
        # the channel takes bursts in in time order: none is seen before the last one taken in
        if t < CF[c, F_TAKEN]:
            t = CF[c, F_TAKEN]
        else:
            CF[c, F_TAKEN] = t
        for k in range(i0, i1):
            b = gb[k]
            r = row[k]
            g = b & gmask
            code = g * 2 + w
            lead = 0
            if limit > 0.0:
                lead = int(BF[b, B_DOM])
                _ref_advance(BF, open_row, LOG, NI, acc, lead, c, banks, t, period, dur, limit, 3 * (i1 - k))
                off = _forced_from(BF, lead, period, limit)
                rs = BF[lead, B_R_START]
                rend = BF[lead, B_R_END]
            else:
                off = BF[b, B_REF_OFF]
                rs = -np.inf
                rend = -np.inf
            # a row hit placed after every column (the common case) skips the general search
            fast = False
            if open_row[b] == r and BF[b, B_CLOSE] > t and BF[b, B_ROW_END] > t:
                cc = BF[b, B_ACT] + rcd
                if t > cc:
                    cc = t
                if BF[b, B_COL] + ccd_l > cc:
                    cc = BF[b, B_COL] + ccd_l
                n = TN[c, N_COL]
                gn = TN[c, N_COL_GAPS]
                if n > 0 and cc >= TL[c, COL, 0] and (gn == 0 or TG[c, COL, gn - 1, 1] <= cc):
                    cc = _after_all(TL, TK, c, n, cc, code, w, CF[c, F_LAST_WRITE], reach, burst, ccd_l, rtw,
                                    w2r_s, w2r_l)
                    fast = cc < BF[b, B_ROW_END]
            act = BF[b, B_ACT]
            pre_ready = BF[b, B_PRE_READY]
            shut = -1.0                              # a close-page precharge to log
            first_cc = -1.0
            kind = HIT
            a = act
            p = -np.inf
            a_lo = 0.0
            faw = False
            s = BF[b, B_ROW_END]
            if not fast:
                o = open_row[b]
                if o >= 0:
                    s = BF[b, B_ROW_END]
                    if BF[b, B_CLOSE] <= t and BF[b, B_CLOSE] < s:
                        shut = BF[b, B_CLOSE]        # closed by its close-page precharge
                        o = -1
                    elif s <= t:                     # a refresh closed the row
                        o = -1
                        if s + dur > pre_ready:
                            pre_ready = s + dur
                for _ in range(64):
                    if o == r:
                        kind = HIT
                        a = act
                        lo = act + rcd
                        if t > lo:
                            lo = t
                        s = BF[b, B_ROW_END]
                    else:
                        if o < 0:
                            kind = MISS
                            a0 = pre_ready if pre_ready > t else t
                        else:
                            kind = CONFLICT
                            p = BF[b, B_PRE_MIN]
                            if act + ras > p:
                                p = act + ras
                            if t > p:
                                p = t
                            if BF[b, B_ROW_END] <= p:  # the refresh closes the row first
                                o = -1
                                if BF[b, B_ROW_END] + dur > pre_ready:
                                    pre_ready = BF[b, B_ROW_END] + dur
                                continue
                            a0 = p + rp
                        if act + rc > a0:
                            a0 = act + rc
                        a_lo = ref_clear2(off, period, dur, rs, rend, a0)
                        a = a_lo
                        faw = False
                        na = TN[c, N_ACT]
                        gna = TN[c, N_ACT_GAPS]
                        if na > 0 and a >= TL[c, ACT, 0] and (gna == 0 or TG[c, ACT, gna - 1, 1] <= a):
                            # no gap ahead: after every activate (the common case); keep tRRD with
                            # those just before and tFAW with the fourth before
                            if a < TL[c, ACT, na - 1]:
                                a = TL[c, ACT, na - 1]
                            x = a
                            j = na - 1
                            while j >= 0 and TL[c, ACT, j] + rrd_l > a:
                                need = TL[c, ACT, j] + (rrd_l if TK[c, ACT, j] == g else rrd_s)
                                if need > x:
                                    x = need
                                j -= 1
                            if faw_t > 0.0 and na >= 4 and TL[c, ACT, na - 4] + faw_t > x:
                                x = TL[c, ACT, na - 4] + faw_t
                                faw = True
                            if ref_clear2(off, period, dur, rs, rend, x) != x:
                                a, f = act_slot(TL, TK, TG, TN, c, g, x, off, period, dur, rs, rend, P)
                                faw = faw or f
                            else:
                                a = x
                        elif na > 0:
                            a, faw = act_slot(TL, TK, TG, TN, c, g, a, off, period, dur, rs, rend, P)
                        lo = a + rcd
                        s = row_end(off, period, dur, rs, a)
                    if BF[b, B_COL] + ccd_l > lo:    # a bank's bursts keep their order
                        lo = BF[b, B_COL] + ccd_l
                    n = TN[c, N_COL]
                    gn = TN[c, N_COL_GAPS]
                    if n == 0:
                        cc = lo
                    elif lo >= TL[c, COL, 0] and (gn == 0 or TG[c, COL, gn - 1, 1] <= lo):
                        cc = _after_all(TL, TK, c, n, lo, code, w, CF[c, F_LAST_WRITE], reach, burst, ccd_l,
                                        rtw, w2r_s, w2r_l)
                    else:
                        cc = col_place(TL, TK, TG, TN, CF, c, code, lo, P)
                    if cc < s:
                        break
                    # a refresh window starts before the column: the row closes, open it again after
                    if first_cc < 0.0:
                        first_cc = cc
                    o = -1
                    if s + dur > pre_ready:
                        pre_ready = s + dur
            bank = b - c * banks
            if kind != HIT:
                if logging:
                    if kind == CONFLICT:
                        _log(LOG, NI, p, c, bank, CMD_PRE, open_row[b])
                    elif shut >= 0.0:
                        _log(LOG, NI, shut, c, bank, CMD_PRE, open_row[b])
                    _log(LOG, NI, a, c, bank, CMD_ACT, r)
                na = TN[c, N_ACT]
                if na == 0 or a >= TL[c, ACT, na - 1]:       # appended (the common case)
                    # a gap another activate could use later: wide enough for tRRD on both sides,
                    # and not inside a full four-activate window
                    if na > 0 and a - TL[c, ACT, na - 1] >= 2.0 * rrd_s - TIME_EPS and \
                            (faw_t <= 0.0 or na < 3 or a >= TL[c, ACT, na - 3] + faw_t):
                        _gap_add(TG, TN, c, ACT, TL[c, ACT, na - 1], a)
                    TL[c, ACT, na] = a
                    TK[c, ACT, na] = g
                    TN[c, N_ACT] = na + 1
                else:
                    _insert(TL, TK, TG, TN, c, ACT, a, g, 2.0 * rrd_s)
                BF[b, B_ACT] = a
                BF[b, B_ROW_END] = s
                BF[b, B_PRE_MIN] = -np.inf
                open_row[b] = r
                acc[A_ACTS] += 1.0
                if faw:
                    acc[A_FAW_ACTS] += 1.0
                acc[A_ACT_DELAY] += a - a_lo
            if logging:
                _log(LOG, NI, cc, c, bank, CMD_WR if w else CMD_RD, r)
            n = TN[c, N_COL]
            if n == 0 or cc >= TL[c, COL, n - 1]:             # appended (the common case)
                # read/write direction changes between neighbours on the bus
                pw = int(CF[c, F_DROPPED]) - 1
                if n > 0:
                    if cc - TL[c, COL, n - 1] >= 2.0 * burst - TIME_EPS:
                        _gap_add(TG, TN, c, COL, TL[c, COL, n - 1], cc)
                    pw = TK[c, COL, n - 1] & 1
                if pw >= 0 and pw != w:
                    acc[A_RW if pw == 0 else A_WR] += 1.0
                TL[c, COL, n] = cc
                TK[c, COL, n] = code
                TN[c, N_COL] = n + 1
            else:
                q = _insert(TL, TK, TG, TN, c, COL, cc, code, 2.0 * burst)
                # read/write direction changes between neighbours on the bus
                nw = TK[c, COL, q + 1] & 1
                if nw != w:
                    acc[A_RW if w == 0 else A_WR] += 1.0
                pw = TK[c, COL, q - 1] & 1 if q > 0 else int(CF[c, F_DROPPED]) - 1
                if pw >= 0:
                    if pw != w:
                        acc[A_RW if pw == 0 else A_WR] += 1.0
                    if pw != nw:
                        acc[A_RW if pw == 0 else A_WR] -= 1.0
            if cc > CF[c, F_LAST]:
                CF[c, F_LAST] = cc
            if w and cc > CF[c, F_LAST_WRITE]:
                CF[c, F_LAST_WRITE] = cc
            BF[b, B_COL] = cc
            if cc + after_col > BF[b, B_PRE_MIN]:
                BF[b, B_PRE_MIN] = cc + after_col
            if close_page:
                sh = BF[b, B_PRE_MIN]
                if BF[b, B_ACT] + ras > sh:
                    sh = BF[b, B_ACT] + ras
                BF[b, B_CLOSE] = sh
                pre_ready = sh + rp
            BF[b, B_PRE_READY] = pre_ready
            acc[A_KIND + kind] += 1.0
            if first_cc >= 0.0:
                acc[A_REF_DELAY] += cc - first_cc
            if limit > 0.0:
                _ref_decide(BF, lead, cc, cc + burst, period, limit)
            out[k] = cc
            b0 = p if kind == CONFLICT else (a if kind == MISS else cc)
            if b0 < begin:
                begin = b0
            d0 = cc + lat
            if d0 < first:
                first = d0
            if d0 + burst > last:
                last = d0 + burst
            # the data bus is busy [d0, d0 + burst]: join the channel's last interval if they touch
            m = TN[c, N_IV]
            if m > 0 and IV[c, m - 1, 0] <= d0 <= IV[c, m - 1, 1] + 1e-9:
                if d0 + burst > IV[c, m - 1, 1]:
                    IV[c, m - 1, 1] = d0 + burst
            else:
                IV[c, m, 0] = d0
                IV[c, m, 1] = d0 + burst
                TN[c, N_IV] = m + 1
        busy[c] += (i1 - i0) * burst
        acc[A_WRITE_BURSTS if w else A_READ_BURSTS] += i1 - i0
        if by_request:
            _book_requests(out, i0, i1, c, rq, P, H, TN, CF, FS, FI, FF, stream, chq)
            acc[A_REQUESTS] += take / rq
            agg[c, 0] = min(agg[c, 0], begin)
            agg[c, 1] = min(agg[c, 1], first + ctrl)
            agg[c, 2] = max(agg[c, 2], last + ctrl)
            agg[c, 3] += take
        else:
            agg[c, 0] = begin
            agg[c, 1] = first + ctrl
            agg[c, 2] = last + ctrl
            agg[c, 3] = i1 - i0


# ---------------------------------------------------------------- queue slots
# A channel's read queue: requests entered so far ``CF[c, F_ENTERED]``; the completions not
# yet counted as a min-heap ``H[c, :TN[c, N_HEAP]]`` of ramps ``(done, start, amount)``
# (``amount`` requests completing linearly from ``start`` to ``done``); the ramp being counted
# ``CF[c, F_RAMP_*]`` and the completions counted before it ``CF[c, F_REL]``.
# :class:`sim.engine.dram.RequestSlots` owns the arrays and says what they model.

PIECES = 64          # a share's completion ramp is cut into at most this many heap entries


@_inline
def _heap_push(H, TN, c, d, s, a):
    k = TN[c, N_HEAP]
    H[c, k, 0] = d
    H[c, k, 1] = s
    H[c, k, 2] = a
    TN[c, N_HEAP] = k + 1
    while k > 0:
        up = (k - 1) >> 1
        if H[c, up, 0] <= H[c, k, 0]:
            break
        for f in range(3):
            H[c, up, f], H[c, k, f] = H[c, k, f], H[c, up, f]
        k = up


@_inline
def _heap_pop(H, TN, c):
    d = H[c, 0, 0]
    s = H[c, 0, 1]
    a = H[c, 0, 2]
    n = TN[c, N_HEAP] - 1
    TN[c, N_HEAP] = n
    if n > 0:
        for f in range(3):
            H[c, 0, f] = H[c, n, f]
        k = 0
        while True:
            lo = 2 * k + 1
            if lo >= n:
                break
            if lo + 1 < n and H[c, lo + 1, 0] < H[c, lo, 0]:
                lo += 1
            if H[c, k, 0] <= H[c, lo, 0]:
                break
            for f in range(3):
                H[c, lo, f], H[c, k, f] = H[c, k, f], H[c, lo, f]
            k = lo
    return d, s, a


@_inline
def level_time(H, TN, CF, c, now, level):
    """Earliest time from ``now`` at which ``c``'s completions reach ``level`` requests.

    Completions are counted in the order they happen, wherever their request
    sits in the queue; ramps that finished by ``now`` are counted on the way.
    A level beyond every completion entered is taken as reached now.
    """
    rel = CF[c, F_REL]
    s = CF[c, F_RAMP_START]
    d = CF[c, F_RAMP_DONE]
    a = CF[c, F_RAMP_AMOUNT]
    if a > 0.0 and d <= now:                      # done: counted, no ramp left to read
        rel += a
        a = 0.0
        d = -np.inf
    while TN[c, N_HEAP] > 0 and H[c, 0, 0] <= now:
        rel += _heap_pop(H, TN, c)[2]
    t = now
    if level > 1e-9:
        x = level - 1e-9
        while rel + a < x and TN[c, N_HEAP] > 0:
            rel += a
            d, s, a = _heap_pop(H, TN, c)
        if rel + a >= x:
            t = s + (level - rel) / a * (d - s) if a > 0 else d
    CF[c, F_REL] = rel
    CF[c, F_RAMP_START] = s
    CF[c, F_RAMP_DONE] = d
    CF[c, F_RAMP_AMOUNT] = a
    return t if t > now else now


@_leaf
def slots_room_at(H, TN, CF, c, now, need, depth):
    """Earliest time from ``now`` at which ``need`` more requests (one at most) fit in ``c``'s queue."""
    return level_time(H, TN, CF, c, now, CF[c, F_ENTERED] + min(need, 1.0) - depth)


@_inline
def slots_add(H, TN, CF, c, first, done, amount):
    """``amount`` requests enter ``c``'s queue, completing linearly from ``first`` to ``done``.

    The ramp is cut at whole requests (at most :data:`PIECES` pieces), so it
    interleaves with other ramps in completion order.
    """
    p0 = CF[c, F_ENTERED]
    p1 = p0 + amount
    CF[c, F_ENTERED] = p1
    if amount <= 0.0:
        return
    step = amount / PIECES
    x = p0
    while x < p1 - 1e-12:
        y = np.floor(x) + 1.0
        if y - x < step:
            y = x + step
        if y > p1 - 1e-12:
            y = p1
        _heap_push(H, TN, c, first + (y - p0) / amount * (done - first),
                   first + (x - p0) / amount * (done - first), y - x)
        x = y


# The fetch unit's request slots, over all channels: each request's completion ramp
# (done, start, amount) in ``FS[:FI[1]]`` sorted by done; those before ``FI[0]`` are
# counted in ``FF[0]``; ``FF[1]``: requests entered; ``FF[2 + s]``: when stream ``s``'s
# last request's slot frees (query, key, value buffers). Completions of different channels come
# out of order, so they are kept sorted (a late one goes in its place, near the end)
# rather than consumed by a search that could pass one still to come. The levels asked
# for rise, so a search resumes where the last one stopped: ``FI[2]``, with the amounts
# before it in ``FF[5]``.

@_inline
def fslots_add(FS, FI, FF, start, done, amount):
    """``amount`` requests (one at most) enter, completing from ``start`` to ``done``."""
    FF[1] += amount
    if amount <= 0.0:
        return
    k = FI[1]
    while k > FI[0] and FS[k - 1, 0] > done:
        FS[k, 0] = FS[k - 1, 0]
        FS[k, 1] = FS[k - 1, 1]
        FS[k, 2] = FS[k - 1, 2]
        k -= 1
    FS[k, 0] = done
    FS[k, 1] = start
    FS[k, 2] = amount
    FI[1] += 1
    if k < FI[2]:
        FI[2] += 1
        FF[5] += amount


@_inline
def fslots_book(FS, FI, FF, stream, start, done, amount):
    """``amount`` requests of ``stream`` (a buffer: query, key, value) take fetch slots that
    free from ``start`` to ``done``, and none before the last slot of the same stream
    (data is handed over in order)."""
    last = FF[2 + stream]
    if start < last:
        start = last
    if done < last:
        done = last
    FF[2 + stream] = done
    fslots_add(FS, FI, FF, start, done, amount)


@_inline
def fslots_compact(FS, FI, FF):
    """Drop the fetch slots' completions counted already (the table's rows before ``FI[0]``)."""
    p = FI[0]
    if p == 0:
        return
    n = FI[1]
    for j in range(n - p):
        FS[j, 0] = FS[p + j, 0]
        FS[j, 1] = FS[p + j, 1]
        FS[j, 2] = FS[p + j, 2]
    q = FI[2]
    if q < p:
        q = p
        FF[5] = FF[0]
    FI[0] = 0
    FI[1] = n - p
    FI[2] = q - p


@_inline
def fslots_level_time(FS, FI, FF, now, level):
    """Earliest time from ``now`` at which the slots' completions reach ``level`` requests
    (a level beyond every completion entered is taken as reached now)."""
    p = FI[0]
    n = FI[1]
    rel = FF[0]
    while p < n and FS[p, 0] <= now:
        rel += FS[p, 2]
        p += 1
    FI[0] = p
    FF[0] = rel
    if level <= rel + 1e-9:
        return now
    x = level - 1e-9
    q = FI[2]
    if q >= p and FF[5] < x:        # the answer is at or past the last one's
        rel = FF[5]
    else:
        q = p
    for k in range(q, n):
        a = FS[k, 2]
        if rel + a >= x:
            FI[2] = k
            FF[5] = rel
            t = FS[k, 1] + (level - rel) / a * (FS[k, 0] - FS[k, 1])
            return t if t > now else now
        rel += a
    FI[2] = n
    FF[5] = rel
    return now


# ---------------------------------------------------------------- whole batches

@_leaf
def fslots_level_at(FS, FI, FF, now, level):
    """:func:`fslots_level_time` called from Python (a call that counts no references)."""
    return fslots_level_time(FS, FI, FF, now, level)


@_leaf
def decode_into(b, burst, lut_ch, lut_gb, low_bits, low_mask, channels, SI):
    """Channel, global bank and row of burst addresses ``b``, stably sorted by channel, into
    rows 2-4 of the scratch ``SI`` (first ``len(b)`` columns), and where each burst of ``b``
    went in the sorted arrays into row 5 (rows 0 and 1: counts and low bits)."""
    n = len(b)
    cnt = SI[0]
    low = SI[1]
    ch = SI[2]
    gb = SI[3]
    row = SI[4]
    pos = SI[5]
    for c in range(channels + 1):
        cnt[c] = 0
    for i in range(n):
        x = b[i] // burst
        low[i] = x & low_mask
        cnt[lut_ch[low[i]] + 1] += 1
    for c in range(channels):
        cnt[c + 1] += cnt[c]
    for i in range(n):
        c = lut_ch[low[i]]
        k = cnt[c]
        cnt[c] = k + 1
        ch[k] = c
        gb[k] = lut_gb[low[i]]
        row[k] = (b[i] // burst) >> low_bits
        pos[i] = k


@_compile
def decode_sorted(b, burst, lut_ch, lut_gb, low_bits, low_mask, channels):
    """:func:`decode_into` into new arrays: ``(channel, global bank, row, pos)``."""
    n = len(b)
    SI = np.empty((6, max(n, channels + 1)), dtype=np.int64)
    decode_into(b, burst, lut_ch, lut_gb, low_bits, low_mask, channels, SI)
    return SI[2, :n].copy(), SI[3, :n].copy(), SI[4, :n].copy(), SI[5, :n].copy()


@_leaf
def _fits(ch, CF, H, TN, R, NI, IV, TL, TK, TG, LOG, P):
    """Whether every table has room for the batch (making room in the timelines)."""
    n = len(ch)
    if NI[I_RECORDS] + n > R.shape[0]:
        return False
    if NI[I_LOGGING] > 0 and NI[I_LOG] + 3 * n + LOG_SPARE > LOG.shape[0]:
        return False
    i = 0
    while i < n:
        c = ch[i]
        j = i
        while j < n and ch[j] == c:
            j += 1
        m = j - i
        if TN[c, N_HEAP] + m + PIECES + 1 > H.shape[1] or TN[c, N_IV] + m > IV.shape[1]:
            return False
        cap = TL.shape[2]
        for w in range(2):
            if TN[c, w] + m > cap or TN[c, N_COL_GAPS + w] + m > cap:
                keep = CF[c, F_TAKEN] - (P[P_COL_REACH] if w == COL else P[P_ACT_REACH])
                if not _room(TL, TK, TG, TN, CF, c, w, m, keep):
                    return False
        i = j
    return True


@_inline
def _to_request(ent, rq, left):
    """Bursts from a queue's ``ent`` requests entered to its next whole request, at most
    ``left`` and at least one: the piece a request-by-request entry takes next."""
    take = int((np.floor(ent + 1e-9) + 1.0 - ent) * rq + 0.5)
    if take < 1:
        take = 1
    return left if take > left else take


@_inline
def _book_requests(out, s0, s1, c, rq, P, H, TN, CF, FS, FI, FF, stream, chq):
    """Enter bursts ``s0 .. s1-1`` of channel ``c`` (column times ``out``, address order)
    into the channel's queue slots (if ``chq``, else only counted) and the fetch unit's, a
    request at a time, so the counts do not depend on how bursts were batched. A request
    leaves the channel's queue from its first data to its last; its fetch slot frees no
    earlier than the slot of the request before it in the same buffer's stream (data is
    handed over in order)."""
    lat = P[P_CL] + P[P_CTRL]
    burst = P[P_BURST]
    k = s0
    while k < s1:
        take = _to_request(CF[c, F_ENTERED], rq, s1 - k)
        lo = np.inf
        hi = -np.inf
        for x in range(k, k + take):
            if out[x] < lo:
                lo = out[x]
            if out[x] > hi:
                hi = out[x]
        lo += lat
        hi += lat + burst
        if chq:
            slots_add(H, TN, CF, c, lo, hi, take / rq)
        else:
            CF[c, F_ENTERED] += take / rq
        fslots_book(FS, FI, FF, stream, lo, hi, take / rq)
        k += take


@_inline
def _run_end(ch, pos, k, n):
    """End of the run of bursts from ``k`` (address order) on one channel, side by side in
    the sorted arrays."""
    e = k + 1
    while e < n and pos[e] == pos[e - 1] + 1 and ch[pos[e]] == ch[pos[k]]:
        e += 1
    return e


@_inline
def _all_fit(ch, n, now, depth, rq, H, TN, CF, gdepth, FS, FI, FF, chq):
    """Whether the whole batch fits now: every share in its channel's queue (if ``chq``), all
    of it in the fetch unit's request slots."""
    if n / rq > gdepth or fslots_level_time(FS, FI, FF, now, FF[1] + n / rq - gdepth) > now:
        return False
    if not chq:
        return True
    i = 0
    while i < n:
        c = ch[i]
        j = i
        while j < n and ch[j] == c:
            j += 1
        if (j - i) / rq > depth or level_time(H, TN, CF, c, now, CF[c, F_ENTERED] + (j - i) / rq - depth) > now:
            return False
        i = j
    return True


@_inline
def room_time(RX, RT, x):
    """When the buffer has room for the batch's first ``x`` bursts: ``RT`` at ``RX``
    (cumulative bursts, rising), linear in between, ``RT[0]`` before the first point."""
    n = len(RX)
    if x <= RX[0]:
        return RT[0]
    for k in range(1, n):
        if x <= RX[k]:
            return RT[k - 1] + (x - RX[k - 1]) / (RX[k] - RX[k - 1]) * (RT[k] - RT[k - 1])
    return RT[n - 1]


PROFILE_POINTS = 16   # most points a batch's arrival profile keeps (see arrival_profile)


@_inline
def arrival_profile(out, pos, n, lag, parts, SF, prof):
    """How a consumer reading a batch in address order sees it arrive; returns the points kept.

    The batch is ``parts`` equal parts (one per burst at most) that a consumer uses one at
    a time, in address order, as a reorder stage hands them over: part ``g`` is on chip
    once its bursts and every earlier part's are (burst ``k`` in address order lands
    ``lag`` after its column, ``out[pos[k]]``), and leaves ``(parts - g) / parts`` of the
    consumer's work to do. So a consumer with work ``W`` ends no earlier than the largest
    ``on_chip[g] + left[g] * W``. Only the parts that give that maximum for some
    ``W >= 0`` are kept (the upper envelope of those lines): ``prof[0, :m]`` their times,
    ``prof[1, :m]`` their shares left, the first part first and the last part last. When
    more than ``prof.shape[1]`` parts would be kept, neighbours merge into a point with the
    first one's share and the last one's time, which bounds them all: the end is never
    early. ``SF[n:3n]`` is scratch.
    """
    g_n = parts if parts < n else n
    if g_n < 1:
        g_n = 1
    xs = SF[n:2 * n]
    ys = SF[2 * n:3 * n]
    m = 0
    a = -np.inf
    k = 0
    for g in range(g_n):
        e = ((g + 1) * n + g_n - 1) // g_n
        while k < e:
            d = out[pos[k]] + lag
            if d > a:
                a = d
            k += 1
        if m > 0 and a <= ys[m - 1]:
            continue      # no later than the part before it, and less work left: never the bound
        x = (g_n - g) / g_n
        # the point before is dropped when it lies on or below the chord from its own
        # predecessor to this one (it is then never the maximum)
        while m >= 2 and ((ys[m - 1] - ys[m - 2]) * (x - xs[m - 2])
                          >= (a - ys[m - 2]) * (xs[m - 1] - xs[m - 2])):
            m -= 1
        xs[m] = x
        ys[m] = a
        m += 1
    cap = prof.shape[1]
    if m <= cap:
        for i in range(m):
            prof[0, i] = ys[i]
            prof[1, i] = xs[i]
        return m
    for j in range(cap):        # point j bounds points lo .. hi-1 of the envelope
        lo = j * m // cap
        hi = (j + 1) * m // cap
        prof[0, j] = ys[hi - 1]
        prof[1, j] = xs[lo]
    return cap


@_leaf
def serve_and_book(ch, gb, row, pos, now, arrival, times, parts, prof, depth, rq, groups, banks, close_page,
                   P, open_row, BF, TL, TK, TG, TN, CF, H, R, IV, busy, acc, LOG, NI, gdepth, FS, FI, FF,
                   stream, RX, RT, SF, AGG):
    """Queue, serve and book one batch of reads (sorted by channel; ``pos[k]``: where the
    batch's ``k``-th burst in address order is) arriving at ``now``.

    Requests enter a channel's read queue once it has room for them (``depth``
    requests per channel) and the fetch unit has a free request slot
    (``gdepth`` over all channels, :func:`_book_requests` says when one frees).
    When the whole batch fits now, each channel's share is placed in
    one go; otherwise the batch goes in address order a request at a time, each
    waiting for its room, so a large batch never holds more than the limits
    allow -- the same as the same bytes cut into small batches. A request also
    waits for room in its buffer: the batch's first ``x`` bursts have room from
    :func:`room_time` (``RX``, ``RT``: the buffer's known releases, see
    :meth:`sim.engine.buffers.Buffer.reserve`). Bursts are
    placed by :func:`place_bursts`; each share then enters the share records
    (``R`` rows: channel, arrival, start, first data, last data, bursts), the
    data-bus intervals (``IV``) and the busy cycles. ``times`` holds the batch's
    start, first data and last data, raised here, then the number of points of its
    arrival profile, written to ``prof`` for a consumer using ``parts`` parts of it one at
    a time (:func:`arrival_profile`). ``SF`` (at least three times as long as the batch)
    and ``AGG`` (a row per channel) are scratch. Returns the number of channels served,
    or -1 without changing any timing state if a table is full.
    """
    n = len(ch)
    if FI[1] + n + 1 > FS.shape[0]:
        fslots_compact(FS, FI, FF)
    if not _fits(ch, CF, H, TN, R, NI, IV, TL, TK, TG, LOG, P) or FI[1] + n + 1 > FS.shape[0]:
        return -1
    # A request is in its channel's queue no longer than in a fetch slot (it leaves the
    # queue at its data, the slot at handover), so with no more fetch slots than queue
    # entries the queue can never be the one that waits: it is not kept then.
    chq = gdepth > depth
    out = SF[:n]
    nc = TN.shape[0]
    agg = AGG                       # per channel: start, first data, last data, bursts
    agg[:, 0] = np.inf
    agg[:, 1] = np.inf
    agg[:, 2] = -np.inf
    agg[:, 3] = 0.0
    in_one_go = room_time(RX, RT, n) <= now and _all_fit(ch, n, now, depth, rq, H, TN, CF, gdepth, FS, FI,
                                                         FF, chq)
    place_bursts(gb, row, ch, pos, 0, n, 0, now, out, agg, not in_one_go, P, groups, banks, close_page,
                 open_row, BF, TL, TK, TG, TN, CF, acc, LOG, NI, IV, busy, H, FS, FI, FF, RX, RT, depth, rq,
                 gdepth, stream, chq)
    if in_one_go:
        k = 0
        while k < n:                         # in address order, run by run
            e = _run_end(ch, pos, k, n)
            _book_requests(out, pos[k], pos[k] + e - k, ch[pos[k]], rq, P, H, TN, CF, FS, FI, FF, stream,
                           chq)
            k = e
        acc[A_REQUESTS] += n / rq
    t_start = times[0]
    t_first = times[1]
    t_done = times[2]
    nch = 0
    for c in range(nc):
        if agg[c, 3] == 0.0:
            continue
        r = NI[I_RECORDS]
        R[r, 0] = c
        R[r, 1] = arrival
        R[r, 2] = agg[c, 0]
        R[r, 3] = agg[c, 1]
        R[r, 4] = agg[c, 2]
        R[r, 5] = agg[c, 3]
        NI[I_RECORDS] = r + 1
        if agg[c, 0] > t_start:
            t_start = agg[c, 0]
        if agg[c, 1] > t_first:
            t_first = agg[c, 1]
        if agg[c, 2] > t_done:
            t_done = agg[c, 2]
        nch += 1
    times[0] = t_start
    times[1] = t_first
    times[2] = t_done
    times[3] = arrival_profile(out, pos, n, P[P_CL] + P[P_BURST] + P[P_CTRL], parts, SF, prof)
    return nch


@_leaf
def serve_writes(gb, row, c, t, out, groups, banks, close_page, P, open_row, BF, TL, TK, TG, TN, CF, H,
                 R, IV, busy, acc, LOG, NI, SI, AGG, FS0, FI0, FF0):
    """Drain write bursts ``gb``/``row`` (oldest first) of channel ``c``'s write queue from
    time ``t``: their commands are fixed like reads' (:func:`place_bursts`), with write
    timing (tCWL, tWR, tWTR, tRTW). ``out[k]`` is burst ``k``'s column command: when it
    leaves the write queue. ``SI`` and ``AGG`` are the pool's scratch (see
    :func:`serve_addresses`); ``FS0``, ``FI0``, ``FF0`` stand in for the fetch slots, which
    writes do not take. Returns 1, or -1 without changing anything if a table is full."""
    m = len(gb)
    if NI[I_LOGGING] > 0 and NI[I_LOG] + 3 * m + LOG_SPARE > LOG.shape[0]:
        return -1
    if TN[c, N_IV] + m > IV.shape[1]:
        return -1
    ch = SI[2, :m]
    for k in range(m):
        ch[k] = c
    if not _fits(ch, CF, H, TN, R, NI, IV, TL, TK, TG, LOG, P):
        return -1
    place_bursts(gb, row, ch, ch, 0, m, 1, t, out, AGG, False, P, groups, banks, close_page, open_row, BF,
                 TL, TK, TG, TN, CF, acc, LOG, NI, IV, busy, H, FS0, FI0, FF0, FF0, FF0, 1, 1, 1, 0, False)
    return 1


@_leaf
def serve_fixed(b, interleave, now, free_at, t_burst, t_lat, depth, rq, H, TN, CF, IV, busy, acc,
                counts, times, parts, prof, SF, SI, AGG, gdepth, FS, FI, FF, stream):
    """The fixed-latency model: each channel's bursts on one pipelined bus after the ones before.

    The batch goes in address order a request at a time, each once its channel's queue
    (``depth`` requests) and, for a read, the fetch unit's request slots (``gdepth`` over all
    channels, freed in order per stream as in :func:`_book_requests`; ``stream`` -1: a write,
    which takes none) have room for it, as the same bytes cut into small batches would; a
    burst's data is on chip ``t_lat`` after its bus slot. ``times`` gets the latest start and
    first data over the channels, the last data, then the number of points of the batch's
    arrival profile (:func:`arrival_profile`, in ``prof``, for a consumer of ``parts`` parts).
    ``SF`` (three times the batch), ``SI`` (a row of the batch) and ``AGG`` (a row per
    channel) are scratch. Returns 1, or -1 without touching anything if a table is full.
    """
    n = len(b)
    nch = len(free_at)
    for c in range(nch):
        counts[c] = 0
    for i in range(n):
        counts[(b[i] // interleave) % nch] += 1
    if FI[1] + n + 1 > FS.shape[0]:
        fslots_compact(FS, FI, FF)
    if FI[1] + n + 1 > FS.shape[0]:
        return -1
    for c in range(nch):
        # a request, or the part of one in a run of the channel's bursts, at most a burst each:
        # a queue entry or two (slots_add), a bus interval
        if counts[c] and (TN[c, N_HEAP] + 2 * counts[c] > H.shape[1]
                          or TN[c, N_IV] + counts[c] > IV.shape[1]):
            return -1
    out = SF[:n]
    order = SI[:n]
    agg_start = AGG[:, 0]
    for c in range(nch):
        agg_start[c] = np.inf
    k = 0
    while k < n:                                # in address order, a request at a time
        c = (b[k] // interleave) % nch
        e = k + 1
        while e < n and (b[e] // interleave) % nch == c:
            e += 1
        take = _to_request(CF[c, F_ENTERED], rq, e - k)
        t = level_time(H, TN, CF, c, now, CF[c, F_ENTERED] + take / rq - depth)
        if stream >= 0:
            tg = fslots_level_time(FS, FI, FF, now, FF[1] + take / rq - gdepth)
            if tg > t:
                t = tg
        start = free_at[c] if free_at[c] > t else t
        end = start + take * t_burst
        free_at[c] = end
        m = TN[c, N_IV]
        if m > 0 and IV[c, m - 1, 1] >= start:
            if end > IV[c, m - 1, 1]:
                IV[c, m - 1, 1] = end
        else:
            IV[c, m, 0] = start
            IV[c, m, 1] = end
            TN[c, N_IV] = m + 1
        busy[c] += end - start
        lo = start + t_burst + t_lat
        hi = end + t_lat
        slots_add(H, TN, CF, c, lo, hi, take / rq)
        if stream >= 0:
            fslots_book(FS, FI, FF, stream, lo, hi, take / rq)
        for j in range(take):
            out[k + j] = start + (j + 1) * t_burst + t_lat
            order[k + j] = k + j
        if start < agg_start[c]:
            agg_start[c] = start
        k += take
    acc[A_REQUESTS] += n / rq
    t_start = -np.inf
    t_first = -np.inf
    t_done = -np.inf
    for c in range(nch):
        if counts[c] == 0:
            continue
        if agg_start[c] > t_start:
            t_start = agg_start[c]
        if agg_start[c] + t_burst + t_lat > t_first:
            t_first = agg_start[c] + t_burst + t_lat
        if free_at[c] + t_lat > t_done:
            t_done = free_at[c] + t_lat
    times[0] = t_start
    times[1] = t_first
    times[2] = t_done
    times[3] = arrival_profile(out, order, n, 0.0, parts, SF, prof)
    return 1


@_leaf
def serve_addresses(b, burst, lut_ch, lut_gb, low_bits, low_mask, now, times, parts, prof, depth, rq, groups,
                    banks, close_page, P, open_row, BF, TL, TK, TG, TN, CF, H, R, IV, busy, acc, LOG, NI,
                    gdepth, FS, FI, FF, stream, RX, RT, SI, SF, AGG):
    """:func:`decode_into` then :func:`serve_and_book` for reads arriving now; ``SI``, ``SF``
    and ``AGG`` are scratch (``SI`` columns at least ``len(b)`` and the channels plus one,
    ``SF`` three times ``len(b)``)."""
    n = len(b)
    decode_into(b, burst, lut_ch, lut_gb, low_bits, low_mask, len(busy), SI)
    return serve_and_book(SI[2, :n], SI[3, :n], SI[4, :n], SI[5, :n], now, now, times, parts, prof, depth, rq,
                          groups, banks, close_page, P, open_row, BF, TL, TK, TG, TN, CF, H, R, IV, busy, acc,
                          LOG, NI, gdepth, FS, FI, FF, stream, RX, RT, SF, AGG)


# ---------------------------------------------------------------- compile once, load once
# The channel pool calls the six loops below from Python, always with these argument types
# (ints and floats as int64 / float64, arrays C-contiguous): one compiled version each,
# made once per machine and loaded by every process before its first run.

KERNELS = ("serve_addresses", "serve_and_book", "decode_sorted", "serve_writes", "compact", "serve_fixed")
# kernels compiled together, each group under its own lock: serve_addresses calls
# serve_and_book and the decoding decode_sorted wraps (compiling it compiles them); the
# groups share little, so processes starting on an empty cache compile different groups
# side by side
GROUPS = (("serve_addresses", "serve_and_book", "decode_sorted"), ("serve_writes",), ("compact",),
          ("serve_fixed",))


def signatures():
    """``{kernel name: argument types}`` the channel pool calls each of :data:`KERNELS` with."""
    from numba import types as nt

    i, f, b = nt.int64, nt.float64, nt.boolean

    def a(dtype, ndim):
        return nt.Array(dtype, ndim, "C")

    # depth, rq, groups, banks, close_page, P, open_row, BF, TL, TK, TG, TN, CF, H, R, IV, busy, acc, LOG, NI
    state = (i, i, i, i, b, a(f, 1), a(i, 1), a(f, 2), a(f, 3), a(i, 3), a(f, 4), a(i, 2), a(f, 2),
             a(f, 3), a(f, 2), a(f, 3), a(f, 1), a(f, 1), a(f, 2), a(i, 1))
    # the fetch unit's request slots: gdepth, FS, FI, FF, the stream a batch belongs to, and
    # when its buffer has room for it (RX, RT)
    slots = (i, a(f, 2), a(i, 1), a(f, 1), i, a(f, 1), a(f, 1))
    # scratch: the decoded batch (SI), burst times (SF), per-channel sums (AGG)
    scratch = (a(f, 1), a(f, 2))
    return {
        "serve_addresses": (a(i, 1), i, a(i, 1), a(i, 1), i, i, f, a(f, 1), i, a(f, 2)) + state + slots
        + (a(i, 2),) + scratch,
        "serve_and_book": (a(i, 1), a(i, 1), a(i, 1), a(i, 1), f, f, a(f, 1), i, a(f, 2)) + state + slots
        + scratch,
        # the pool's SI and AGG, then stand-ins for the fetch slots (FS, FI, FF) writes do not take
        "serve_writes": (a(i, 1), a(i, 1), i, f, a(f, 1)) + state[2:] + (a(i, 2), a(f, 2))
        + (a(f, 2), a(i, 1), a(f, 1)),
        # ... counts, then times, parts, the arrival profile, scratch (SF, a row of SI, AGG) and the
        # fetch slots (gdepth, FS, FI, FF, stream)
        "serve_fixed": (a(i, 1), i, f, a(f, 1), f, f, i, i, a(f, 3), a(i, 2), a(f, 2), a(f, 3), a(f, 1),
                        a(f, 1), a(i, 1), a(f, 1), i, a(f, 2), a(f, 1), a(i, 1), a(f, 2), i, a(f, 2),
                        a(i, 1), a(f, 1), i),
        "decode_sorted": (a(i, 1), i, a(i, 1), a(i, 1), i, i, i),
        "compact": (a(f, 3), a(i, 3), a(f, 4), a(i, 2), a(f, 2), a(f, 1)),
    }


class KernelLoad(NamedTuple):
    """What readying compiled kernels did in this process."""

    seconds: float          # wall time, numba's start-up and any waiting included
    waited: float           # of which waiting for other processes' compilations
    compiled: tuple         # kernels compiled here (numba's cache had none), in the order done
    loaded: tuple           # kernels loaded from the cache (or ready in this process already)


_loaded = None


def load_kernels():
    """Make the compiled loops ready in this process; returns a :class:`KernelLoad`.

    Loads each kernel of :data:`KERNELS` from numba's cache for its one
    signature; those the cache lacks are compiled and cached under
    machine-wide locks, so processes that start together compile each once
    and load the rest. Called again, it returns the first call's figures at no
    cost. Without numba (or with ``ATTNSIM_NO_JIT=1``) there is nothing to load.
    """
    global _loaded
    if _loaded is None:
        if JIT:
            sigs = signatures()
            _loaded = compile_or_load({name: (globals()[name], sigs[name]) for name in KERNELS}, GROUPS)
        else:
            _loaded = KernelLoad(0.0, 0.0, (), ())
    return _loaded


def compile_or_load(kernels, groups=None):
    """Ready ``{name: (numba dispatcher, signature)}`` in this process; returns a :class:`KernelLoad`.

    Each kernel is loaded from numba's cache or, when the cache has none,
    compiled and cached. ``groups`` (tuples of names; default one group per
    kernel) are readied each under its own lock (:func:`lock_path`): a process
    first takes the groups no other process holds, then waits for the rest
    and loads what the holder compiled.
    """
    t0 = time.perf_counter()
    _init_numba()      # numba's own start-up (~1 s), outside the locks
    todo = [tuple(g) for g in (groups or [(name,) for name in kernels])]
    compiled, waited = [], 0.0
    while todo:
        for group in todo:
            with _machine_lock(group[0], wait=False) as held:
                if held:
                    compiled += _ready(kernels, group)
                    break
        else:              # every group left is being compiled elsewhere: wait for the first
            group = todo[0]
            w0 = time.perf_counter()
            with _machine_lock(group[0]):
                waited += time.perf_counter() - w0
                compiled += _ready(kernels, group)
        todo.remove(group)
    loaded = tuple(name for name in kernels if name not in compiled)
    return KernelLoad(time.perf_counter() - t0, waited, tuple(compiled), loaded)


def _ready(kernels, group):
    """Compile or load the kernels of ``group``; the names of those compiled here."""
    # a kernel may be compiled as part of another that calls it: count misses after all
    misses = {name: _misses(kernels[name][0]) for name in group}
    for name in group:
        kernel, sig = kernels[name]
        kernel.compile(sig)
    return [name for name in group if _misses(kernels[name][0]) > misses[name]]


def _misses(kernel):
    return sum(kernel.stats.cache_misses.values())


def _init_numba():
    """Numba's one-time set-up (type registries, which import scipy when present), done before
    taking a lock so that processes loading side by side do not queue for it."""
    try:
        from numba.core.registry import cpu_target

        cpu_target.target_context.refresh()
    except (ImportError, AttributeError):  # pragma: no cover - another numba layout: the first load does it
        pass


def lock_path(name, cache_dir=None):
    """The lock file of kernel (group) ``name`` of this source file and numba cache folder
    (default: numba's configured one): one per machine, in the temporary folder."""
    import numba

    if cache_dir is None:
        cache_dir = getattr(numba.config, "CACHE_DIR", "") or ""
    tag = f"{os.path.abspath(__file__)}|{cache_dir}|{numba.__version__}|{name}"
    return os.path.join(tempfile.gettempdir(),
                        f"attnsim-kernel-{hashlib.sha256(tag.encode()).hexdigest()[:16]}.lock")


@contextlib.contextmanager
def _machine_lock(name, wait=True):
    """Hold an exclusive lock on ``lock_path(name)``; yields whether it is held (with
    ``wait=False``, False at once when another process holds it).

    Where no lock can be had (no ``fcntl``, a lock file that cannot be opened),
    this yields True without one: processes then may compile side by side,
    which costs time but changes nothing else."""
    try:
        import fcntl
    except ImportError:
        yield True
        return
    fd = _open_lock(lock_path(name))
    if fd is None:
        yield True
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
        except BlockingIOError:
            yield False
            return
        yield True
    finally:
        os.close(fd)      # closing the descriptor releases the lock


def _open_lock(path):
    for flags in (os.O_RDWR | os.O_CREAT, os.O_RDONLY):   # a lock file of another user: read-only
        try:
            return os.open(path, flags, 0o666)
        except OSError:
            continue
    return None
