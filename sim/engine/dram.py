"""DRAM channel pool: where fetched bytes come from, and how long they take.

Two models, chosen by ``dram.model``:

``banked`` (default) models what a DRAM channel's controller does with a
stream of reads. Each channel has ``dram.banks`` banks in ``dram.bank_groups``
groups, each bank with at most one open row. A read to the open row is a *row
hit* (one column command); a read to a closed bank is a *miss* (activate, then
tRCD to the column); a read to a bank with another row open is a *conflict*
(precharge, no earlier than tRAS after that row's activate and tRTP after its
last column, then tRP, then activate). The controller keeps each bank's
requests in order and opens rows in other banks while one bank waits
(bank-level parallelism), within the activation limits: activates tRRD_S apart
(tRRD_L in one bank group), at most four in any tFAW window, tRC between two
of one bank. Column commands share the data bus: one burst time apart, tCCD_L
within a bank group; data arrives tCL after the column. A burst whose bank is
ready may use a bus slot an earlier burst left free while its row opened, but
never takes one from it: each burst's commands are fixed, in arrival order, at
the earliest times that keep every rule with those fixed before (see
:mod:`sim.engine.dram_timing`). Refresh (``dram.refresh``): all-bank refresh
closes a channel's rows for tRFC every tREFI (channels staggered so the pool
never refreshes all at once); per-bank refresh closes one bank (or bank set)
at a time for tRFCpb, a command every tREFIpb in turn, so the other banks go
on; same-bank refresh does that for one bank index of every group at once.
The page policy keeps rows open, or closes a row once the reads queued for it
are served (a read queued before the precharge issues still finds the row
open). A channel's queue holds ``dram.queue_depth`` requests (see
:class:`RequestSlots`); the channel serves them first come first served (per
bank, in order), or lets row hits go first.

Requests in flight. A read transaction is a run of requests (``fetch.request_bytes``
each, per channel). They enter in address order, each once its channel's queue
has room for it and the fetch unit has a free request slot (``fetch.inflight``
over all channels); a slot frees once the request's data has arrived and the
earlier requests of the same buffer's stream have theirs (the fetch unit hands
data over in order). A transaction that fits whole when it arrives enters at
once; a larger one enters request by request as room frees, so it never holds
more than the limits allow -- exactly what the same bytes cut into small
transactions get. Under ``row_hits_first`` each channel commits its share of a
transaction at its own decisions, as far as the fetch slots reach: a burst
goes in once the requests before it in the stream of reads (in the order they
were submitted, ``fetch.request_bytes`` of it a request) have left room, so a
channel that decides first cannot take the slots the others' earlier bursts
need; the rest waits for a later decision.

Writes (``txn.is_write``) are posted: each channel's share enters the
channel's write queue of ``dram.write_queue`` bursts as there is room (a
burst needs the one that many places ahead to have left), after the shares
that came before it, and the transaction's event fires when every share is
in -- the write is then accepted, not yet in the array. A share that does not
fit enters in steps, each at the time room comes for enough of it to bring
the queue to its high mark (or for all of it), or when the channel idles; so
reads that arrive meanwhile are placed first, and only a queue's worth of
writes is ever fixed ahead of time.
A channel drains its oldest writes when ``dram.write_high`` of the queue is
full, down to ``dram.write_low``, and all of them once it has no read left to
serve (a watermark drain; common practice, no single source). Drained writes
are timed like reads with the write rules: data tCWL after the column, the
row's precharge tWR after the write data, a read tWTR_S / tWTR_L after it, a
write tRTW after a read.

Transaction grain: cutting a stream into more transactions must not change
the answer, so nothing here depends on how bursts are grouped, only on their
order: queue room and fetch slots are counted request by request, spacing
across share boundaries is the same as inside a share, and under row hits first a held share keeps the
time it arrived (the controller could open its row from then; only the order
is decided later). Row hits first itself reorders whole shares, so a finer
grain gives it more to reorder.

``fixed-latency`` is the first, simple model: one pipelined bus per channel,
a fixed ``dram.latency_ns`` per access, no banks. Its requests enter the
channel queues and the fetch slots a request at a time as the banked pool's do,
and a transaction's bursts give it an arrival profile, so its answers do not
depend on the grain either.

How time is computed: a transaction's bursts are decoded to channel, bank and
row and sorted by channel, one *share* per channel; a compiled loop
(:func:`sim.engine.dram_timing.serve_and_book`) enters each share into its
channel's queue and fixes its bursts' commands against the channel's command
timelines. Events: one per transaction (its completion), plus one per
scheduling decision of a channel under ``row_hits_first`` -- never one per
burst or per cycle.

Interface used by the fetch unit (stable): ``submit(txn) -> simpy event``
fired when the last byte has arrived (a write: when the write queue took it
in), with the transaction's log marked ``memory_queue``, ``memory_latency``,
``memory_transfer`` (non-decreasing) and ``txn.mem_times`` set to the same
three times before the event fires, at which moment ``txn.on_timed(txn)`` is
called when set (the fetch unit streams the data to its consumer from there);
``txn.prof``, its arrival profile in address order
(:func:`sim.engine.dram_timing.arrival_profile`; under row hits first
:func:`arrival_profile`, from all its parts' bursts);
``report(total_cycles)`` for the result's ``dram`` section; ``busy_arrays()``
per channel (merged data-bus busy intervals); ``share_records()``.

Simplifications, on purpose: no command-bus contention (commands of different
banks may issue in the same cycle); refresh is taken on schedule (never
postponed) and does not wait for tRAS of open rows; a per-bank refresh blocks
only its banks (no spacing rule between it and other banks' activates); a read
never takes its data from a write still queued; a drain cannot move a read
fixed before it (reads keep their slots, the writes go where the bus is free);
the fixed-latency model moves writes on its bus like reads and takes them in
when their bus slot starts.
"""

from collections import deque

import numpy as np

from ..errors import SimulationStalled
from . import dram_timing as T
from .addrmap import BurstDecoder
from .dram_timing import (B_ACT, B_CLOSE, B_COL, B_PRE_MIN, B_PRE_READY, B_REF_OFF, decode_sorted,
                          serve_addresses, serve_and_book, serve_fixed)
from .spill import LatencyLog, OccupancyLog

OCCUPANCY_BINS = 32
# the fetch unit's streams, one per buffer: data is handed over in order within each
_STREAM = {"Q": 0, "V": 2}            # the rest (K, KL) fill the key buffer: 1


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


def _grown(a, need, axis):
    """``a`` with its ``axis`` doubled until it holds ``need`` entries (contents kept)."""
    cap = a.shape[axis]
    new = cap
    while new < need:
        new *= 2
    shape = list(a.shape)
    shape[axis] = new
    out = np.zeros(shape, dtype=a.dtype)
    out[tuple(slice(0, n) for n in a.shape)] = a
    return out


FOLD_INTERVALS = 1 << 16  # data-bus intervals a channel keeps before it hands the final ones over


def arrival_profile(on_chip, parts, cap=T.PROFILE_POINTS):
    """The arrival profile of a transaction whose bursts land at ``on_chip`` (address order),
    for a consumer of ``parts`` parts: :func:`sim.engine.dram_timing.arrival_profile` for a
    transaction committed in several calls (row hits first), from all its bursts at once."""
    n = len(on_chip)
    g_n = max(1, min(parts, n))
    g = np.arange(g_n)
    ends = ((g + 1) * n + g_n - 1) // g_n
    at = np.maximum.accumulate(on_chip)[ends - 1]
    # a part no later than the one before it, with less work left, is never the bound
    rise = np.flatnonzero(np.diff(at, prepend=-np.inf) > 0)
    xs, ys = [], []
    for x, a in zip(((g_n - rise) / g_n).tolist(), at[rise].tolist()):
        while len(ys) >= 2 and (ys[-1] - ys[-2]) * (x - xs[-2]) >= (a - ys[-2]) * (xs[-1] - xs[-2]):
            xs.pop()
            ys.pop()
        xs.append(x)
        ys.append(a)
    m = len(ys)
    if m <= cap:
        return [[y, x] for y, x in zip(ys, xs)]
    return [[ys[(j + 1) * m // cap - 1], xs[j * m // cap]] for j in range(cap)]


def _merged(iv):
    """Intervals ``[[begin, end], ...]`` sorted and merged where they overlap or touch."""
    iv = iv[np.argsort(iv[:, 0], kind="stable")]
    ends = np.maximum.accumulate(iv[:, 1])
    new = np.empty(len(iv), dtype=bool)
    new[0] = True
    new[1:] = iv[1:, 0] > ends[:-1] + 1e-9
    starts = np.flatnonzero(new)
    stops = np.append(starts[1:], len(iv)) - 1
    return np.column_stack((iv[starts, 0], ends[stops]))


class RequestSlots:
    """The requests of each channel's queue: a request enters once the queue has room.

    Amounts are in requests of ``fetch.request_bytes`` and may be fractional:
    a share smaller than a request holds part of one. A share's requests
    complete one after another while its data streams out, linearly from
    ``first`` (first data) to ``done`` (last data); a channel holds at most
    ``depth`` requests that have entered and not completed, whichever they are
    (banks finish out of order). A share may start as soon as its first request
    fits; the rest of it follows as requests ahead complete. Counting completed
    requests, not shares, is what makes the wait independent of how a stream is
    cut into shares.

    The state lives in numpy arrays the compiled loops read and extend (see
    :mod:`sim.engine.dram_timing`): the completion heap ``H`` and, shared with
    the rest of the channel pool, the per-channel counts ``TN`` and times ``CF``.
    """

    def __init__(self, channels=1, capacity=256):
        if channels < 1:
            raise ValueError(f"RequestSlots: channels must be >= 1, got {channels!r}")
        self.H = np.zeros((channels, capacity, 3))      # completion ramps (done, start, amount)
        self.TN = np.zeros((channels, T.N_COUNTS), dtype=np.int64)
        self.CF = np.zeros((channels, T.N_CHANNEL))
        self.CF[:, T.F_LAST:T.F_TAKEN + 1] = -np.inf

    def room_at(self, now, need, depth, channel=0):
        """Earliest time from ``now`` at which ``need`` more requests (one at most) fit."""
        return T.slots_room_at(self.H, self.TN, self.CF, channel, float(now), float(need), depth)

    def add(self, first, done, amount, channel=0):
        self.make_room(1)
        T.slots_add(self.H, self.TN, self.CF, channel, float(first), float(done), float(amount))

    def make_room(self, bursts=1):
        """Room for one more share of ``bursts`` bursts per channel, taken in whole or a
        request at a time."""
        need = self.TN[:, T.N_HEAP].max() + bursts + 2 * (T.PIECES + 1)
        if need > self.H.shape[1]:
            self.H = _grown(self.H, need, axis=1)


class Timing:
    """The banked model's timings in accelerator cycles (config holds ns)."""

    def __init__(self, arch):
        d, ghz = arch.dram, arch.clock_ghz
        self.burst = burst_cycles(arch)
        self.cl = d.t_cl_ns * ghz
        self.rcd = d.t_rcd_ns * ghz
        self.rp = d.t_rp_ns * ghz
        self.ras = d.t_ras_ns * ghz
        self.rc = max(d.t_rc_ns * ghz, self.ras + self.rp)
        self.rtp = d.t_rtp_ns * ghz
        self.ccd_l = max(d.t_ccd_l_ns * ghz, self.burst)
        self.cwl = d.t_cwl_ns * ghz
        self.wr = d.t_wr_ns * ghz
        self.wtr_s = d.t_wtr_s_ns * ghz
        self.wtr_l = d.t_wtr_l_ns * ghz
        # a write's data may not start before the read data ahead of it has left the bus
        self.rtw = max(d.t_rtw_ns * ghz, self.cl - self.cwl + self.burst, self.burst)
        self.rrd_s = d.t_rrd_s_ns * ghz
        self.rrd_l = d.t_rrd_l_ns * ghz
        self.faw = d.t_faw_ns * ghz
        self.refi = d.t_refi_ns * ghz
        self.rfc = d.t_rfc_ns * ghz
        self.refresh = d.refresh
        self.refi_pb = d.t_refi_pb_ns * ghz
        self.rfc_pb = d.t_rfc_pb_ns * ghz
        self.phase = d.refresh_phase
        self.postpone = d.refresh_postpone
        # banks per channel refreshed at different times: all at once, one command per
        # bank (or bank set) in turn, or one per bank index of a group (every group at once)
        self.turns = {"all_bank": 1, "per_bank": int(round(d.t_refi_ns / d.t_refi_pb_ns)),
                      "same_bank": d.banks // d.bank_groups}[d.refresh]
        self.banks, self.groups = d.banks, d.bank_groups
        self.ctrl = d.controller_ns * ghz
        # how far ahead of its bus slot a queued share is committed under row_hits_first:
        # enough to hide a precharge and an activate behind the previous share's data
        self.lookahead = self.rp + self.rcd

    def vector(self):
        """The parameter vector the compiled loops read (see ``dram_timing.P_*``)."""
        P = np.zeros(T.N_PARAMS)
        P[T.P_BURST], P[T.P_CCD_L], P[T.P_RCD], P[T.P_RP] = self.burst, self.ccd_l, self.rcd, self.rp
        P[T.P_RAS], P[T.P_RC], P[T.P_RTP], P[T.P_CL] = self.ras, self.rc, self.rtp, self.cl
        P[T.P_CWL], P[T.P_WR], P[T.P_WTR_S], P[T.P_WTR_L] = self.cwl, self.wr, self.wtr_s, self.wtr_l
        P[T.P_RTW], P[T.P_RRD_S], P[T.P_RRD_L], P[T.P_FAW] = self.rtw, self.rrd_s, self.rrd_l, self.faw
        P[T.P_CTRL] = self.ctrl
        P[T.P_REF_PERIOD] = self.refi                 # every bank is refreshed once per tREFI
        P[T.P_REF_DUR] = self.rfc if self.refresh == "all_bank" else self.rfc_pb
        P[T.P_REF_POSTPONE] = self.postpone if P[T.P_REF_DUR] > 0 else 0
        # the longest spacing rule between two column commands, and between activates
        P[T.P_COL_REACH] = max(self.ccd_l, self.rtw, self.cwl + self.burst + self.wtr_l)
        P[T.P_ACT_REACH] = max(self.faw, self.rrd_l)
        return P

    def refresh_offsets(self, channels, banks):
        """Start of each bank's first refresh window.

        All-bank: channel ``c`` at ``(c + 1) / channels`` of tREFI (staggered, so the
        pool never refreshes all at once). Per-bank: a command every tREFIpb, bank
        ``b`` of a channel in turn ``b mod turns`` (with fewer turns than banks, the
        banks of one turn refresh together); same-bank: turn ``b div bank_groups``,
        the same bank of every group at once. Channels are staggered within one
        command interval. ``dram.refresh_phase`` moves every window later by that
        fraction of tREFI, a window pushed past the first interval coming round to
        its start (the run begins at another point of the same schedule).
        """
        if self.refresh == "all_bank":
            chan = (np.arange(channels) + 1) * (self.refi / channels)
            first = np.repeat(chan, banks)
        else:
            local = np.arange(banks)
            turn = local % self.turns if self.refresh == "per_bank" else local // self.groups
            chan = (np.arange(channels) + 1) * (self.refi_pb / channels)
            first = (chan[:, None] + turn[None, :] * self.refi_pb).reshape(-1)
        if self.phase:
            first = first + self.phase * self.refi
            first[first > self.refi] -= self.refi
        return first

    def refresh_domains(self, channels, banks):
        """Global index of the first bank of each bank's refresh domain (the banks one refresh
        command closes together), in the turns of :meth:`refresh_offsets`."""
        local = np.arange(banks)
        if self.refresh == "all_bank":
            lead = np.zeros(banks, dtype=np.int64)
        elif self.refresh == "per_bank":
            lead = local % self.turns
        else:
            lead = (local // self.groups) * self.groups
        return (np.arange(channels)[:, None] * banks + lead[None, :]).reshape(-1)


class ChannelPool:
    """A pool of memory channels: banks, rows, activation limits, refresh, queues and scheduling.

    ``log_commands=True`` keeps every command of the banked model (see
    :meth:`command_log`), for protocol checks; ``keep_records=True`` keeps a
    record of every share (see :meth:`share_records`), for queueing checks. Runs
    leave both off: each grows with the transactions.
    """

    def __init__(self, env, arch, log_commands=False, keep_records=False):
        T.load_kernels()     # compiled once per machine, loaded once per process
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
        # the fetch unit's request slots over all channels (fetch.inflight; a slot frees
        # when its request's data has arrived): a large transaction never has more out
        self.FS = np.zeros((1024, 3))       # see dram_timing.fslots_add
        self.FI = np.zeros(3, dtype=np.int64)
        self.FF = np.full(6, -np.inf)
        self.FF[:2] = 0.0
        self.FF[5] = 0.0
        # (under row hits first a channel commits its share of a transaction when it decides:
        # a share goes in as far as the slots reach, see ChannelPool._decide)
        self.fetch_depth = arch.fetch.inflight
        self._entries = 0         # calls that entered requests into the fetch slots
        self._room_entries, self._room_need, self._room_t = -1, -1.0, 0.0   # the last answer
        self.IV = np.zeros((self.n, 1024, 2))            # data-bus busy intervals per channel
        self.on_full = None       # called when the intervals would outgrow FOLD_INTERVALS (see take_busy)
        self.busy_cycles = np.zeros(self.n)
        self.acc = np.zeros(T.N_ACC)                     # counters, see dram_timing.A_*
        self._counts = np.zeros(self.n, dtype=np.int64)
        # share records (banked): channel, arrival, start, first data, done, bursts
        self.R = np.zeros((1024, 6))
        self.keep_records = keep_records                 # else R is rewritten by each call
        # per-channel counts and times, shared with the read queue (see dram_timing.N_*, F_*)
        self.TN = self.outstanding.TN
        self.CF = self.outstanding.CF
        # share records, command-log rows, logging on
        self.NI = np.array([0, 0, 1 if log_commands else 0], dtype=np.int64)
        self.bytes = 0                                   # read and written
        self.bursts = 0
        self.txns = 0
        self.write_txns = 0
        self.write_bytes = 0
        self.write_wait = 0.0                            # cycles writes waited for queue room
        self.write_end = 0.0                             # when the last write data fixed so far leaves the bus
        self.wait_total = 0.0
        self.latency_total = 0.0
        self.latencies = LatencyLog()                # per read: submit to last data
        self._occ = OccupancyLog()                   # live occupancy: arrivals and departures
        self.interleave = d.interleave_bytes
        # a served batch's start, first and last data and profile points; the profile; scratch
        self._times = np.zeros(4)
        self._prof = np.zeros((2, T.PROFILE_POINTS))   # the arrival profile of the batch served last
        self._SF = np.zeros(0)
        self._scratch(4096)
        if self.model == "fixed-latency":
            self.submit = self._submit_fixed
            self.slot_room_at = self._slot_room_at
            self._bind()
            return
        self.banks = d.banks
        self.groups = d.bank_groups
        self.tm = Timing(arch)
        self.P = self.tm.vector()
        self.close_page = d.page_policy == "close"
        self.rows_first = d.scheduler == "row_hits_first"
        self.first_free = d.steering == "first_free"
        self._open_request = [(0, 0, 0)] * 3   # per stream, first_free: descriptor, channel, bursts left
        self.decoder = BurstDecoder(arch)
        nb = self.n * self.banks
        self.open_row = np.full(nb, -1, dtype=np.int64)      # -1: bank precharged
        self.BF = np.empty((nb, T.N_BANK))                    # per bank, see dram_timing.B_*
        self.BF[:, B_ACT] = -np.inf
        self.BF[:, B_COL] = -np.inf
        self.BF[:, B_PRE_MIN] = -np.inf
        self.BF[:, B_CLOSE] = np.inf
        self.BF[:, B_PRE_READY] = 0.0
        self.BF[:, B_REF_OFF] = self.tm.refresh_offsets(self.n, self.banks)
        self.BF[:, T.B_ROW_END] = np.inf
        # refresh postponement: each domain's state in its first bank's row
        self.BF[:, T.B_DOM] = self.tm.refresh_domains(self.n, self.banks)
        self.BF[:, T.B_R_NEXT] = self.BF[:, B_REF_OFF]
        self.BF[:, T.B_R_OWED] = 0.0
        self.BF[:, T.B_R_START] = -np.inf
        self.BF[:, T.B_R_END] = -np.inf
        self.BF[:, T.B_R_LAST] = -np.inf
        # per channel: column and activate timelines and the gaps in them a command may use
        self.TL = np.zeros((self.n, 2, 256))
        self.TK = np.zeros((self.n, 2, 256), dtype=np.int64)
        self.TG = np.zeros((self.n, 2, 256, 2))
        self.LOG = np.zeros((4096 if log_commands else 0, 5))
        self._no_room = (np.zeros(1), np.full(1, -np.inf))   # room_time: room from the start
        # the fetch slots' arrays for writes, which take none (never read there)
        self._no_slots = (np.zeros((1, 3)), np.zeros(1, dtype=np.int64), np.zeros(1))
        lut = self.decoder.lut
        self._lut = (lut[0], lut[2], self.decoder.low_bits, self.decoder.low_mask) if lut else None
        # write queues: bursts entered and drained so far, those waiting (oldest first), the
        # time each drained burst left (by queue position, from w_base), the idle-drain timer
        self.wq_cap = d.write_queue
        self.wq_high = max(1, int(np.ceil(d.write_high * d.write_queue - 1e-9)))
        self.wq_low = min(self.wq_high - 1, int(np.floor(d.write_low * d.write_queue + 1e-9)))
        self.w_entered = [0] * self.n
        self.w_drained = [0] * self.n
        self.w_pending = [[] for _ in range(self.n)]
        self.w_leave = [np.zeros(0) for _ in range(self.n)]
        self.w_base = [0] * self.n
        self.w_timer = [None] * self.n
        self.w_entering = [deque() for _ in range(self.n)]   # [bursts, rows, job] not all in yet
        self.w_room_timer = [None] * self.n
        self.w_left_by = [0.0] * self.n                     # when every drained write has left
        self.acc_w = [0, 0]                           # drains at the high mark, idle drains
        # row_hits_first: shares held per channel until its decision time; read bursts
        # submitted so far (a burst's place in that stream decides when the fetch slots
        # reach it); channels whose held shares wait for bursts of others to be committed
        self.held = [[] for _ in range(self.n)]
        self.timer_at = [None] * self.n
        self._seq = 0
        self.slot_wait = [False] * self.n
        self._lag = self.tm.cl + self.tm.burst + self.tm.ctrl   # a column to its data on chip
        self.submit = self._submit_banked
        self.slot_room_at = self._slot_room_rows if self.rows_first else self._slot_room_at
        self._bind()

    # ------------------------------------------------------------------ fixed
    def _submit_fixed(self, txn):
        """Serve ``txn.bursts`` on the fixed-latency model."""
        now = self.env.now
        self._arrive(now)
        b = txn.bursts
        if len(b) == 0:
            return self._finish(txn, now, now, now, now, None)
        times = self._times
        self._entries += 1
        self._scratch(len(b))
        for tries in range(MAX_ROOM_TRIES + 1):
            if serve_fixed(b, self.interleave, float(now), self.free_at, *self._fixed_args, times, txn.pieces,
                           self._prof, self._SF, self._SI[0], self._AGG, self.fetch_depth, self.FS, self.FI,
                           self.FF, -1 if txn.is_write else _STREAM.get(txn.kind, 1)) > 0:
                break
            _room_or_stall(tries, "fixed-latency serve")
            self._make_room(2 * len(b))
        t_start, t_first, t_done, points = times.tolist()
        if txn.is_write:                    # posted: taken in when its bus slot starts
            self.write_end = max(self.write_end, t_done - self.t_lat)
            return self._finish(txn, now, t_start, t_start, t_start, None, write=True)
        txn.prof = self._profile(points)
        return self._finish(txn, now, t_start, t_first, t_done, None)

    def _make_room(self, rows):
        """Grow the tables that lack room for ``rows`` more bursts (one share) per channel."""
        self.outstanding.make_room(rows)
        T.fslots_compact(self.FS, self.FI, self.FF)
        if self.FI[1] + rows + 1 > len(self.FS):
            self.FS = _grown(self.FS, self.FI[1] + rows + 1, axis=0)
        self.H = self.outstanding.H
        iv = self.TN[:, T.N_IV].max() + rows
        if iv > self.IV.shape[1] >= FOLD_INTERVALS and self.on_full is not None:
            self.on_full()                      # hand over the final part instead of growing
            iv = self.TN[:, T.N_IV].max() + rows
        if iv > self.IV.shape[1]:
            self.IV = _grown(self.IV, iv, axis=1)
        if self.NI[T.I_RECORDS] + rows > len(self.R):
            self.R = _grown(self.R, self.NI[T.I_RECORDS] + rows, axis=0)
        if self.model == "banked":
            T.compact(self.TL, self.TK, self.TG, self.TN, self.CF, self.P)
            need = 2 * (self.TN[:, T.N_COL:T.N_ACT_GAPS + 1].max() + rows)
            if need > self.TL.shape[2]:
                self.TL = _grown(self.TL, need, axis=2)
                self.TK = _grown(self.TK, need, axis=2)
                self.TG = _grown(self.TG, need, axis=2)
            if self.NI[T.I_LOGGING] and self.NI[T.I_LOG] + 3 * rows + T.LOG_SPARE > len(self.LOG):
                self.LOG = _grown(self.LOG, self.NI[T.I_LOG] + 3 * rows + T.LOG_SPARE, axis=0)
        self._bind()

    def _slot_room_rows(self, now, need):
        """Under row hits first: when the fetch slots reach the next read burst (the batch's
        further bursts go in as the slots reach them, see :meth:`_decide`). While bursts
        before it wait for a channel's decision, the earliest pending decision, when the
        fetch unit looks again."""
        t = self._reach_time(now, self._seq)
        if t == np.inf:
            t = min((x for x in self.timer_at if x is not None), default=now)
        return t if t > now else now

    def _slot_room_at(self, now, need):
        """Earliest time from ``now`` at which ``need`` (one at most) more requests fit in
        the fetch unit's request slots."""
        if need > 1.0:
            need = 1.0
        if self._room_entries == self._entries and self._room_need == need:
            t = self._room_t           # nothing entered since: the same time holds
            return t if t > now else now
        level = float(self.FF[1]) + need - self.fetch_depth
        t = T.fslots_level_at(self.FS, self.FI, self.FF, float(now), level)
        self._room_entries, self._room_need, self._room_t = self._entries, need, t
        return t

    def final_time(self):
        """Before this time the data buses' busy intervals are final: no burst still to come
        can be placed earlier (each channel places from the time it last took bursts in; the
        fixed-latency bus places every burst from the present on)."""
        if self.model != "banked":
            return float(self.env.now)
        return float(self.CF[:, T.F_TAKEN].min())

    def take_busy(self, upto):
        """Remove from the data-bus intervals what lies before ``upto`` (which must not pass
        :meth:`final_time`); returns it per channel, merged (see :meth:`busy_arrays`)."""
        out = []
        for c in range(self.n):
            m = self.TN[c, T.N_IV]
            iv = self.IV[c, :m]
            early = iv[iv[:, 0] < upto]
            if len(early):
                early = early.copy()
                np.minimum(early[:, 1], upto, out=early[:, 1])
                early = _merged(early)
            rest = iv[iv[:, 1] > upto]
            if len(rest):
                rest = rest.copy()
                np.maximum(rest[:, 0], upto, out=rest[:, 0])
            self.IV[c, :len(rest)] = rest
            self.TN[c, T.N_IV] = len(rest)
            out.append(early)
        return out

    def busy_arrays(self):
        """Per channel, the data-bus busy intervals as an array of rows ``begin, end``, in time
        order, overlaps merged."""
        out = []
        for c in range(self.n):
            iv = self.IV[c, :self.TN[c, T.N_IV]]
            if len(iv) > 1 and np.any(iv[1:, 0] < iv[:-1, 1]):
                iv = _merged(iv)
            out.append(iv)
        return out

    def settle_refresh(self, until):
        """With refresh postponement: the refresh decisions the controller makes up to
        ``until`` with no more bursts coming (owed ones issued once idle, due ones on time).
        Returns the refreshes issued so far, over all domains."""
        limit = self.P[T.P_REF_POSTPONE]
        if limit > 0:
            period, dur = self.P[T.P_REF_PERIOD], self.P[T.P_REF_DUR]
            leads = self._refresh_leads()
            if self.NI[T.I_LOGGING]:
                need = len(leads) * (int(until / period) + int(limit) + 2)
                if self.NI[T.I_LOG] + need > len(self.LOG):
                    self.LOG = _grown(self.LOG, self.NI[T.I_LOG] + need, axis=0)
                    self._bind()
            for lead in leads.tolist():
                T._ref_advance(self.BF, self.open_row, self.LOG, self.NI, self.acc, lead, lead // self.banks,
                               self.banks, float(until), period, dur, limit, 0)
        return float(self.acc[T.A_REFS])

    def _refresh_leads(self):
        """The first bank of every refresh domain (where postponement keeps its state)."""
        return np.unique(self.BF[:, T.B_DOM].astype(np.int64))

    @property
    def requests(self):
        return float(self.acc[T.A_REQUESTS])

    @property
    def refresh_delay(self):
        return float(self.acc[T.A_REF_DELAY])

    def command_log(self):
        """Commands issued, burst by burst: rows ``time, channel, bank, kind, row`` (kind:
        ``dram_timing.CMD_ACT``, ``CMD_PRE``, ``CMD_RD``, ``CMD_WR``; bank within the
        channel). A row closed by a refresh has no precharge of its own. With
        ``dram.refresh_postpone`` the refreshes are logged too (``CMD_REF``, the first bank
        of the domain it closes, row -1). Needs
        ``log_commands=True``."""
        if not self.NI[T.I_LOGGING]:
            raise ValueError("the pool was made without log_commands=True")
        return self.LOG[:self.NI[T.I_LOG]].copy()

    @property
    def kinds(self):
        """Bursts served as row hits, misses and conflicts."""
        return self.acc[T.A_KIND:T.A_KIND + 3].astype(np.int64)

    # ----------------------------------------------------------------- banked
    def _submit_banked(self, txn):
        """Serve ``txn.bursts`` on the banked model; the event fires at the last byte (a read)
        or once the write queue took the bursts in (a write)."""
        now = self.env.now
        self._arrive(now)
        b = txn.bursts
        if len(b) == 0:
            return self._finish(txn, now, now, now, now, None)
        if txn.is_write:
            return self._submit_write(txn, b, now)
        if self._lut is not None and not (self.first_free or self.rows_first):
            return self._serve_now(txn, b, now)
        ch, gb, row, pos = self._decode(txn, b, now)
        # arrival, shares left, start, first data, done, event, stream
        rec = [now, 0, now, now, now, None, _STREAM.get(txn.kind, 1)]
        if not self.rows_first:
            rec[1] = -1                        # committed in one go
            txn.prof = self._commit(rec, ch, gb, row, now, pos, txn.room, txn.pieces)
            return self._finish(txn, now, rec[2], rec[3], rec[4], None)
        cnt = np.bincount(ch, minlength=self.n)
        chans = np.flatnonzero(cnt).tolist()
        rec[1] = len(chans)
        seq = np.empty(len(b), dtype=np.int64)          # by sorted position
        seq[pos] = self._seq + np.arange(len(b), dtype=np.int64)
        self._seq += len(b)
        # every share waits for its channel's decision (now, if the channel is free), which
        # commits it as far as the fetch slots reach
        ends = np.cumsum(cnt)
        for c in chans:
            lo, hi = ends[c] - cnt[c], ends[c]
            self.held[c].append((rec, ch[lo:hi], gb[lo:hi], row[lo:hi], seq[lo:hi], now))
            self._arm(c)
        ev = self.env.event()
        rec[5] = (txn, ev, len(b))
        rec.append(np.full(len(b), -np.inf))     # each burst's data on chip, in address order
        rec.append(self._seq - len(b))           # the transaction's first place in the stream
        return ev

    def _decode(self, txn, b, now):
        """Channel, global bank and row of burst addresses ``b`` (of ``txn``), sorted by
        channel, and where each burst of ``b`` went in the sorted arrays."""
        if self.first_free:
            ch = self._steer(txn, len(b), now)
            _, bank, row = self.decoder.decode(b)
            gb = bank + ch * self.banks
        elif self._lut is not None:
            return decode_sorted(b, self.burst, *self._lut, self.n)
        else:
            ch, gb, row = self.decoder.decode_global(b)
        pos = np.arange(len(b), dtype=np.int64)
        if self.n > 1:
            order = np.argsort(ch, kind="stable")
            ch, gb, row = ch[order], gb[order], row[order]
            pos[order] = np.arange(len(b), dtype=np.int64)
        return ch, gb, row, pos

    # ----------------------------------------------------------------- writes
    def _submit_write(self, txn, b, now):
        """Posted writes: each channel's share enters its write queue as there is room (see
        :meth:`_enter_writes`), after any share still entering there; the event fires when
        every share is in. A channel drains its oldest writes when the queue reaches the
        high mark, down to the low mark, and all of them once it has no read left to serve."""
        ch, gb, row, _ = self._decode(txn, b, now)
        cnt = np.bincount(ch, minlength=self.n)
        ends = np.cumsum(cnt)
        chans = np.flatnonzero(cnt).tolist()
        # the transaction, when it arrived, when its last burst entered, shares not in yet,
        # bursts, its event once it must wait
        job = [txn, now, now, len(chans), len(b), None]
        for c in chans:
            self.w_entering[c].append([gb[ends[c] - cnt[c]:ends[c]], row[ends[c] - cnt[c]:ends[c]], job])
            self._enter_writes(c, now)
        if job[3] == 0:
            return self._finish(txn, now, now, now, now, None, len(b), write=True)
        job[5] = self.env.event()
        return job[5]

    def _enter_writes(self, c, at, catch_up=False):
        """Enter channel ``c``'s waiting write shares at ``at`` as far as its queue has room.
        The rest enters in steps, not burst by burst: at the time enough of it has room to
        bring the queue to its high mark (or all of it, if less), or when the channel idles
        (``catch_up``). Only a queue's worth of drained writes is ever fixed ahead of time,
        so the command timelines stay short."""
        if self.w_room_timer[c] is not None and not catch_up:   # a step is due already
            return
        shares = self.w_entering[c]
        while shares:
            share = shares[0]
            k = self._write_room(c, len(share[0]), at)
            if k == 0:
                if self.w_room_timer[c] is None:
                    t = self._write_step_time(c, len(share[0]))
                    self.w_room_timer[c] = t
                    self.env.timeout(t - self.env.now).callbacks.append(
                        lambda _e, c=c, t=t: self._room_due(c, t))
                return
            self.w_pending[c].append((share[0][:k], share[1][:k]))
            self.w_entered[c] += k
            share[0], share[1] = share[0][k:], share[1][k:]
            waiting = self.w_entered[c] - self.w_drained[c]
            if waiting >= self.wq_high:
                self.acc_w[0] += 1                           # drains at the high mark
                self._drain(c, waiting - self.wq_low, at)
            self._arm_idle(c)
            if not len(share[0]):
                shares.popleft()
                job = share[2]
                job[2], job[3] = max(job[2], at), job[3] - 1
                if job[3] == 0 and job[5] is not None:
                    self._finish(job[0], job[1], job[2], job[2], job[2], job[5], job[4], write=True)

    def _room_due(self, c, t):
        self.w_room_timer[c] = None
        self._enter_writes(c, max(self.env.now, t))      # t, not a rounding error before it

    def _write_step_time(self, c, m):
        """When enough of the next ``m`` write bursts of channel ``c`` have room to reach the
        high mark (or all ``m`` of them); the queue is full now."""
        need = min(m, max(1, self.wq_high - (self.w_entered[c] - self.w_drained[c])))
        first = self.w_entered[c] - self.wq_cap - self.w_base[c]
        hi = min(first + need, self.w_drained[c] - self.w_base[c])
        return float(self.w_leave[c][first:hi].max())

    def _write_room(self, c, m, at):
        """How many of the next ``m`` write bursts of channel ``c`` have room at ``at``."""
        first = self.w_entered[c] - self.wq_cap          # the position that must have left first
        if first + m <= 0:
            return m
        if self.w_left_by[c] <= at and self.w_drained[c] > first:   # every drained burst has left
            return min(m, self.w_drained[c] - first)
        free = -first if first < 0 else 0
        lo = first + free
        if lo >= self.w_drained[c]:
            if free:                                     # the rest waits for writes not yet in
                return free
            self._drain(c, lo + 1 - self.w_drained[c], at)   # full of writes not yet drained
        hi = min(first + m, self.w_drained[c]) - self.w_base[c]
        left = np.maximum.accumulate(self.w_leave[c][lo - self.w_base[c]:hi])
        return free + int(np.searchsorted(left, at, side="right"))

    def _drain(self, c, count, t):
        """Fix the commands of channel ``c``'s ``count`` oldest queued writes, seen from ``t``."""
        parts, got = [], 0
        pend = self.w_pending[c]
        while got < count:
            g, r = pend[0]
            take = min(len(g), count - got)
            parts.append((g[:take], r[:take]))
            if take == len(g):
                pend.pop(0)
            else:
                pend[0] = (g[take:], r[take:])
            got += take
        gb = np.concatenate([p[0] for p in parts])
        row = np.concatenate([p[1] for p in parts])
        out = np.empty(count)
        self._scratch(count)
        for tries in range(MAX_ROOM_TRIES + 1):
            if T.serve_writes(gb, row, c, float(t), out, *self._write_args, self._SI, self._AGG,
                              *self._no_slots) > 0:
                break
            _room_or_stall(tries, "write drain")
            self._make_room(count)
        last = float(out.max())
        self.w_left_by[c] = max(self.w_left_by[c], last)
        self.write_end = max(self.write_end, last + self.P[T.P_CWL] + self.P[T.P_BURST])
        # leave times of the drained bursts, by queue position (older positions are no longer read)
        keep = self.w_drained[c] - self.wq_cap - self.w_base[c]
        if keep > 0:
            self.w_leave[c] = self.w_leave[c][keep:]
            self.w_base[c] += keep
        self.w_leave[c] = np.concatenate((self.w_leave[c], out))
        self.w_drained[c] += count

    def _arm_idle(self, c):
        """When channel ``c`` runs out of committed work, drain its write queue."""
        if self.w_timer[c] is not None or self.w_entered[c] == self.w_drained[c]:
            return
        now = self.env.now
        t = max(now, self.CF[c, T.F_LAST])
        if self.rows_first and self.held[c] and not self.slot_wait[c]:
            t = max(t, now + self.tm.burst)          # reads still to be decided go first
        self.w_timer[c] = t
        self.env.timeout(t - now).callbacks.append(lambda _e, c=c: self._idle(c))

    def _idle(self, c):
        if self.w_entering[c]:
            self._enter_writes(c, self.env.now, catch_up=True)   # what has room by now is in
        self.w_timer[c] = None
        waiting = self.w_entered[c] - self.w_drained[c]
        if not waiting:
            return
        if self.CF[c, T.F_LAST] > self.env.now or (self.rows_first and self.held[c] and not self.slot_wait[c]):
            self._arm_idle(c)                        # reads came in meanwhile: wait for them
            return
        self.acc_w[1] += 1                           # drains of an idle channel
        self._drain(c, waiting, self.env.now)

    def _steer(self, txn, n, now):
        """Channel of each of the ``n`` bursts of ``txn`` (address order) under first_free
        steering: a request at a time to the channel whose data bus frees first (of those
        free now, the one free longest), counting the shares held for a row-hits-first
        decision and the requests of this batch sent before it (a burst's bus time each).

        A request is ``fetch.request_bytes`` of one fetch descriptor's bursts in order, cut
        from the descriptor's start: a request one transaction leaves part way is finished
        on its channel by the next transaction of the descriptor (in its stream), so the
        cuts, and the channels, do not depend on the engine's grain. A transaction of no
        descriptor (``desc`` 0: a cache write, a probe) is cut on its own."""
        stream = _STREAM.get(txn.kind, 1)
        carry = txn.desc and not txn.is_write
        desc, c, left = self._open_request[stream] if carry else (0, 0, 0)
        if desc != txn.desc:
            left = 0
        rq, tb = self.req_bursts, self.tm.burst
        # when each channel's bus frees; among channels free now, the one free longest goes
        # first, so the choice does not hang on when the batch is steered
        last = (self.CF[:, T.F_LAST] + tb).tolist()
        for j, held in enumerate(self.held):     # row_hits_first: shares not placed yet
            if held:
                last[j] = max(last[j], now) + sum(len(share[1]) for share in held) * tb
        out = np.empty(n, dtype=np.int64)
        k = 0
        while k < n:
            if left == 0:
                c = min(range(self.n), key=lambda j: (max(last[j], now), last[j]))
                left = rq
            m = min(left, n - k)
            out[k:k + m] = c
            last[c] = max(last[c], now) + m * tb
            left -= m
            k += m
        if carry:
            self._open_request[stream] = (txn.desc, c, left)
        return out

    def _arm(self, c, at=None):
        """Schedule channel ``c``'s next decision (row_hits_first), at ``at`` at the earliest."""
        if self.timer_at[c] is not None:
            return
        t = max(self.env.now, self.CF[c, T.F_LAST] - self.tm.lookahead)
        if at is not None and at > t:
            t = at
        self.timer_at[c] = t
        ev = self.env.timeout(t - self.env.now)
        ev.callbacks.append(lambda _ev, c=c: self._decide(c))

    def _slot_level(self, x):
        """The fetch slots' completions burst ``x`` of the read stream waits for: its request
        (``fetch.request_bytes`` of the stream) goes in whole, as the pool's requests do."""
        return x // self.req_bursts + 1 - self.fetch_depth

    def _reached(self, now, x):
        """Whether the fetch slots reach burst ``x`` of the read stream at ``now``: enough of
        the requests entered before it have completed (those not committed yet cannot)."""
        level = x // self.req_bursts + 1 - self.fetch_depth      # as _slot_level
        if level <= 0:
            return True
        FF = self.FF
        return level <= FF[1] + 1e-9 and T.fslots_level_at(self.FS, self.FI, FF, float(now), float(level)) <= now

    def _reach_time(self, now, x):
        """When the fetch slots reach burst ``x`` of the read stream (after ``now``; inf while
        bursts before it are not committed yet)."""
        level = self._slot_level(x)
        if level > float(self.FF[1]) + 1e-9:
            return np.inf
        return T.fslots_level_at(self.FS, self.FI, self.FF, float(now), level)

    def _reach(self, now, seq):
        """How many of a share's bursts (``seq``: their places in the read stream, rising)
        the fetch slots reach at ``now``."""
        n = len(seq)
        if self._reached(now, seq[-1]):
            return n
        if not self._reached(now, seq[0]):
            return 0
        lo, hi = 1, n - 1                    # seq[lo - 1] reached, seq[hi] not
        while lo < hi:
            mid = (lo + hi) // 2
            if self._reached(now, seq[mid]):
                lo = mid + 1
            else:
                hi = mid
        return lo

    def _decide(self, c):
        """Commit channel ``c``'s held shares, row hits first, oldest first among equals, each
        as far as the fetch slots reach: a share's bursts go in once the requests before
        them in the read stream have left room (the fetch unit issues in that order), so a
        channel deciding first does not take the slots the others' earlier bursts need."""
        self.timer_at[c] = None
        self.slot_wait[c] = False
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
        now = self.env.now
        committed = False
        reach = [self._reach(now, sh[4]) for sh in window]   # bursts of each the slots reach
        # one at a time, so each share sees the rows the one before it left open
        while window:
            pick = self._pick(window, reach, now)
            if pick is None:
                break
            m = reach.pop(pick)
            rec, ch, gb, row, seq, seen = window.pop(pick)
            if m < len(ch):
                window.insert(pick, (rec, ch[m:], gb[m:], row[m:], seq[m:], np.inf))
                reach.insert(pick, 0)
                rec[1] += 1                   # the rest is a share still to commit
            # the controller saw the share since it arrived (or since the slots reached it,
            # which is now at the latest) and may have opened its row early: only the order
            # is decided now (else a finer grain would lose that)
            self._commit(rec, ch[:m], gb[:m], row[:m], seen if seen <= now else now)
            rec[7][seq[:m] - rec[8]] = self._SF[:m] + self._lag
            committed = True
            if rec[1] == 0:
                txn, ev, nb = rec[5]
                txn.prof = arrival_profile(rec[7], txn.pieces)
                # the fetch unit may have dropped txn.bursts since it submitted
                self._finish(txn, rec[0], rec[2], rec[3], rec[4], ev, nb)
        self._hold(c, window, rest, now)
        if committed:                         # the slots may now reach what others wait for
            for j in range(self.n):
                if self.slot_wait[j]:
                    self.slot_wait[j] = False
                    self._arm(j)

    def _pick(self, window, reach, now):
        """The share to commit next among those the slots reach (``reach``: how many bursts of
        each): the oldest whose first burst hits an open row, else the oldest; None if none."""
        open_row, close_at = self.open_row, self.BF[:, B_CLOSE]
        pick = None
        for k, sh in enumerate(window):
            if reach[k] == 0:
                continue
            if pick is None:
                pick = k
            g0 = sh[2][0]
            if open_row[g0] == sh[3][0] and close_at[g0] > now:
                return k
        return pick

    def _hold(self, c, window, rest, now):
        """Keep channel ``c``'s undecided shares and arm its next decision. Shares of the
        window left are those the slots do not reach yet (nor the later ones behind them):
        the controller sees them when the slots do, which is known once every burst before
        them is committed (until then the channel waits for another's commit)."""
        if window:
            window = [sh[:5] + (self._reach_time(now, sh[4][0]),) for sh in window]
            rest = [sh[:5] + (np.inf,) for sh in rest]
        self.held[c] = window + rest
        if window:
            t = min(sh[5] for sh in window)
            if t < np.inf:
                self._arm(c, t)
            else:
                self.slot_wait[c] = True
        elif rest:
            self._arm(c)

    def _serve_now(self, txn, b, now):
        """First come first served with a table address map: decode, serve and book in one call."""
        times = self._times
        times[:] = -np.inf
        tries = 0
        rx, rt = txn.room or self._no_room
        self._entries += 1
        self._scratch(len(b))
        while serve_addresses(b, *self._lut_args, float(now), times, txn.pieces, self._prof,
                              *self._state_args, _STREAM.get(txn.kind, 1), rx, rt, self._SI, self._SF,
                              self._AGG) < 0:
            _room_or_stall(tries, "banked serve")
            tries += 1
            self._make_room(len(b))
        if not self.keep_records:
            self.NI[T.I_RECORDS] = 0
        t_start, t_first, t_done, points = times.tolist()
        txn.prof = self._profile(points)
        return self._finish(txn, now, t_start, t_first, t_done, None)

    def _profile(self, points):
        """The arrival profile of the batch just served: ``[[on chip, share of the work left]]``
        (:func:`sim.engine.dram_timing.arrival_profile`)."""
        return self._prof[:, :int(points)].T.tolist()

    def _scratch(self, bursts):
        """Make sure the kernels' working arrays (``_SI``, ``_SF``, ``_AGG``) hold a batch of
        ``bursts``: made once and grown to the next power of two, so a call allocates nothing."""
        if 3 * bursts <= self._SF.shape[0]:
            return
        cap = 1 << max(12, int(bursts - 1).bit_length())
        self._SI = np.zeros((6, max(cap, self.n + 1)), dtype=np.int64)
        self._SF = np.zeros(3 * cap)   # burst times, then the arrival profile's working space
        self._AGG = np.zeros((self.n, 4))

    def _bind(self):
        """The kernels' argument tuples: the state arrays, bound again when a table grows."""
        self.H = self.outstanding.H
        self._fixed_args = (self.t_burst, self.t_lat, self.depth, self.req_bursts, self.H, self.TN,
                            self.CF, self.IV, self.busy_cycles, self.acc, self._counts)
        if self.model == "fixed-latency":
            return
        self._state_args = (self.depth, self.req_bursts, self.groups, self.banks, self.close_page,
                            self.P, self.open_row, self.BF, self.TL, self.TK, self.TG, self.TN, self.CF,
                            self.H, self.R, self.IV, self.busy_cycles, self.acc, self.LOG, self.NI,
                            self.fetch_depth, self.FS, self.FI, self.FF)
        self._write_args = (self.groups, self.banks, self.close_page, self.P, self.open_row, self.BF,
                            self.TL, self.TK, self.TG, self.TN, self.CF, self.H, self.R, self.IV,
                            self.busy_cycles, self.acc, self.LOG, self.NI)
        if self._lut is not None:
            self._lut_args = (self.burst,) + self._lut

    def _commit(self, rec, ch, gb, row, now, pos=None, room=None, parts=1):
        """Fix the timing of one batch of bursts ``ch``/``gb``/``row`` (sorted by channel;
        ``pos``: where each burst in address order is, by default channel by channel;
        ``room``: when its buffer has room for it, see :meth:`sim.engine.buffers.Buffer.reserve`).
        Returns the batch's arrival profile for a consumer of ``parts`` parts (see
        :meth:`_profile`)."""
        if pos is None:
            pos = np.arange(len(ch), dtype=np.int64)
        rx, rt = room or self._no_room
        times = self._times
        times[0] = -np.inf
        times[1] = -np.inf
        times[2] = -np.inf if rec[4] == rec[0] else rec[4]
        self._entries += 1
        self._scratch(len(ch))
        for tries in range(MAX_ROOM_TRIES + 1):
            nch = serve_and_book(ch, gb, row, pos, float(now), float(rec[0]), times, parts, self._prof,
                                 *self._state_args,
                                 rec[6], rx, rt, self._SF, self._AGG)
            if nch >= 0:
                break
            _room_or_stall(tries, "banked commit")
            self._make_room(len(ch))
        if not self.keep_records:
            self.NI[T.I_RECORDS] = 0
        if rec[1] > 0:
            rec[1] -= nch
        rec[2], rec[3], rec[4], points = times.tolist()
        return self._profile(points)

    # ----------------------------------------------------------------- common
    def _finish(self, txn, t_submit, t_start, t_first, t_done, ev, nbursts=None, write=False):
        """Mark the transaction's log, count it, and fire (or return) its completion event."""
        env = self.env
        now = env.now
        if t_start < t_submit:
            t_start = t_submit
        if t_first < t_start:
            t_first = t_start
        if t_done < t_first:
            t_done = t_first
        if t_done < now:
            # a share held for a row-hits-first decision is placed from its arrival, so its
            # data may be due before the decision was taken: it is handed over at the decision
            t_done = now
            t_first = min(t_first, t_done)
        if nbursts is None:
            nbursts = len(txn.bursts)
        self.bursts += nbursts
        self.bytes += nbursts * self.burst
        self.txns += 1
        if write:
            self.write_txns += 1
            self.write_bytes += nbursts * self.burst
            self.write_wait += t_start - t_submit
        else:
            self.wait_total += t_start - t_submit
            self.latency_total += t_done - t_submit
            self.latencies.append(t_done - t_submit)
        txn.mem_times = (t_start, t_first, t_done)
        txn.log += (("memory_queue", t_start), ("memory_latency", t_first),
                    ("memory_transfer", t_done))
        if txn.on_timed is not None:   # the fetch unit streams data from here
            txn.on_timed(txn)
            if ev is None:             # and waits on no event of ours: leave at t_done, no timer
                occ = self._occ
                occ.t.append(t_done)
                occ.d.append(-1)
                return None
        if ev is None:
            out = env.timeout(t_done - now)
            out.callbacks.append(self._left)
            return out
        out = env.timeout(t_done - now)
        out.callbacks.append(lambda _e, ev=ev: (self._left(_e), ev.succeed()))
        return ev

    @property
    def in_flight(self):
        """Transactions in the pool now: submitted, and their data not all back."""
        return self._occ.in_flight(self.env.now)

    def _arrive(self, now):
        self._occ.arrive(now)

    def _left(self, _ev):
        occ = self._occ
        occ.t.append(self.env.now)
        occ.d.append(-1)

    def occupancy(self, total_cycles, bins=OCCUPANCY_BINS):
        """Time-average transactions in the pool: overall, per time bin, and the peak."""
        got = self._occ.curve(total_cycles, bins) if total_cycles > 0 else None
        if got is None:
            return {"bins": [0.0] * bins, "bin_cycles": total_cycles / bins if bins else 0.0,
                    "mean": 0.0, "max": 0}
        at, edges, peak = got
        per_bin = np.diff(at) / np.diff(edges)
        return {"bins": per_bin.tolist(), "bin_cycles": float(edges[1] - edges[0]),
                "mean": float(at[-1] / total_cycles), "max": int(peak)}

    def share_records(self):
        """Per channel share: channel, arrival, start, first data, done, bursts (numpy)."""
        if self.model != "banked":
            raise ValueError("share records exist only for dram.model: banked")
        if not self.keep_records:
            raise ValueError("the pool was made without keep_records=True")
        R = self.R[:self.NI[T.I_RECORDS]]
        out = {k: R[:, i] for i, k in enumerate(("channel", "arrival", "start", "first", "done", "bursts"))}
        out["channel"] = out["channel"].astype(np.int64)
        out["bursts"] = out["bursts"].astype(np.int64)
        return out

    def report(self, total_cycles):
        """The result document's ``dram`` section (before the engine adds peaks)."""
        seconds = total_cycles / (self.arch.clock_ghz * 1e9) if total_cycles else 0.0
        util = (self.busy_cycles / total_cycles).tolist() if total_cycles else [0.0] * self.n
        reads = self.txns - self.write_txns
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
            "mean_queue_cycles": self.wait_total / reads if reads else 0.0,
            "mean_access_cycles": self.latency_total / reads if reads else 0.0,
            "p95_access_cycles": self.latencies.percentile(95),
            "queue_occupancy": self.occupancy(total_cycles),
            "read_bytes": int(self.bytes - self.write_bytes),
            "write_bytes": int(self.write_bytes),
            "write_transactions": int(self.write_txns),
            "mean_write_wait_cycles": self.write_wait / self.write_txns if self.write_txns else 0.0,
        }
        if self.model != "banked":
            return out
        hits, misses, conflicts = (int(x) for x in self.kinds)
        total = hits + misses + conflicts
        period, dur = self.P[T.P_REF_PERIOD], self.P[T.P_REF_DUR]
        postponing = self.P[T.P_REF_POSTPONE] > 0       # zero when the memory takes no refresh
        issued = self.settle_refresh(total_cycles) if postponing else 0.0
        if postponing and total_cycles > 0:
            # the windows issued before the run's end, over the domains' time
            refresh_share = min(1.0, issued * dur / (len(self._refresh_leads()) * total_cycles))
        elif dur > 0 and total_cycles > 0:
            # each bank's windows inside the run, clipped to its end; the mean over banks
            first = self.BF[:, B_REF_OFF]
            k = np.maximum(np.floor(np.maximum(total_cycles - first, -1) / period) + 1, 0)
            last_start = first + (k - 1) * period
            stolen = np.where(k > 0, (k - 1) * dur + np.minimum(dur, total_cycles - last_start), 0.0)
            refresh_share = float(stolen.mean() / total_cycles)
        else:
            refresh_share = 0.0
        acts = int(self.acc[T.A_ACTS])
        rw, wr, tm = int(self.acc[T.A_RW]), int(self.acc[T.A_WR]), self.tm
        out.update({
            "row_hit_rate": hits / total if total else 0.0,
            "row_hits": hits,
            "row_misses": misses,
            "bank_conflicts": conflicts,
            "refresh_share": refresh_share,
            "refresh_delay_cycles": float(self.refresh_delay),
            "refresh_mode": self.arch.dram.refresh,
            "activates": acts,
            "faw_limited_activates": int(self.acc[T.A_FAW_ACTS]),
            "activation_wait_cycles": float(self.acc[T.A_ACT_DELAY]),
            "write_bursts_drained": int(sum(self.w_drained)),
            "write_bursts_waiting": int(sum(self.w_entered) - sum(self.w_drained)),
            "write_drains": int(self.acc_w[0]),
            "write_idle_drains": int(self.acc_w[1]),
            "read_to_write_turns": rw,
            "write_to_read_turns": wr,
            # bus time the turns cost at least, beyond the bursts themselves (JEDEC tRTW, tWTR_S)
            "turnaround_cycles": float(rw * (tm.rtw - tm.burst) + wr * (tm.cwl + tm.wtr_s)),
            "scheduler": self.arch.dram.scheduler,
            "page_policy": self.arch.dram.page_policy,
        })
        if postponing:
            # refreshes still owed when the run ends: its time does not include them
            out["refreshes_issued"] = int(issued)
            out["refreshes_owed_at_end"] = int(self.BF[self._refresh_leads(), T.B_R_OWED].sum())
        return out
