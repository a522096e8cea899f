"""The banked model's command scheduler against an independent reference, against the
JEDEC timing rules, and compiled against the same code run as plain Python.

* Reference: the scheduling policy the pool documents (per-bank order; each command at
  the earliest time that keeps every rule with the commands already fixed; refresh
  windows closing rows; with ``dram.refresh_postpone``, the controller's refresh decisions
  and windows from every refresh issued) written again here without the pool's search
  shortcuts: every candidate time is tried against every command fixed so far. Internal
  consistency of our own policy, found by a second, brute-force method.
* Protocol: the command log of busy random traffic checked rule by rule against the
  timing rules the JEDEC standards define for every device of the presets (JESD79-4,
  JESD235A, JESD238, JESD209-5B, JESD250 use the same rules): tRCD, tRAS, tRP, tRC, tRTP,
  tWR, tRRD_S/L, at most four activates in any tFAW window, tCCD_S/L, tWTR_S/L, tRTW, no
  command inside a refresh window, and data bursts that never overlap on the bus; with
  postponement, the logged refreshes as the windows, never more owed than allowed (JESD79-4
  lets a DDR4 controller postpone 8; from memory) and none before it is due.
"""

import os

import numpy as np
import pytest
import simpy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import sim
from sim.engine import dram_timing as T
from sim.engine.dram import ChannelPool
from sim.engine.dram import arrival_profile as dram_arrival_profile
from sim.engine.txn import Txn

HERE = os.path.dirname(os.path.abspath(__file__))
CONFIGS = os.path.join(os.path.dirname(HERE), "arch_configs")
PRESETS = os.path.join(CONFIGS, "memory")
EPS = 1e-9


def cycles(arch):
    """The preset's timings in clock cycles, with the rules' least values made explicit."""
    d, ghz = arch.dram, arch.clock_ghz
    t = {k[:-3]: getattr(d, k) * ghz for k in vars(d) if k.startswith("t_") and k.endswith("_ns")}
    t["burst"] = d.burst_bytes / (d.channel_gbps / ghz)
    t["ccd_l"] = max(t["t_ccd_l"], t["burst"])          # a burst occupies the bus for its length
    t["rc"] = max(t["t_rc"], t["t_ras"] + t["t_rp"])
    # read data leaves the bus before the write data after it starts
    t["rtw"] = max(t["t_rtw"], t["t_cl"] - t["t_cwl"] + t["burst"], t["burst"])
    return t


def refresh_windows(arch):
    """Each bank's refresh windows ``(first starts, period, length)`` as the pool documents
    them: all-bank refresh, channels staggered evenly over one interval; per-bank refresh,
    a command every tREFIpb with bank b in turn b mod (tREFI / tREFIpb); same-bank, turn
    b div bank_groups; channels staggered within one command interval; all of it later by
    ``refresh_phase`` of tREFI, modulo tREFI."""
    d, ghz = arch.dram, arch.clock_ghz
    refi = d.t_refi_ns * ghz
    ch = np.arange(d.channels) + 1
    if d.refresh == "all_bank":
        first, length = np.repeat(ch * refi / d.channels, d.banks), d.t_rfc_ns * ghz
    else:
        pb = d.t_refi_pb_ns * ghz
        local = np.arange(d.banks)
        turn = local % round(d.t_refi_ns / d.t_refi_pb_ns) if d.refresh == "per_bank" else local // d.bank_groups
        first, length = ((ch * pb / d.channels)[:, None] + turn[None, :] * pb).reshape(-1), d.t_rfc_pb_ns * ghz
    # a later phase: the same windows, the run starting further into the schedule
    first = np.array([f + d.refresh_phase * refi - (refi if f + d.refresh_phase * refi > refi else 0.0)
                      for f in first])
    return first, refi, length


def refresh_domains(arch):
    """Global index of the first bank of each bank's refresh domain, the banks one refresh
    command closes: all banks of the channel (all-bank), the banks of one turn (per-bank),
    one bank index of every group (same-bank)."""
    d = arch.dram
    local = np.arange(d.banks)
    if d.refresh == "all_bank":
        first = np.zeros(d.banks, dtype=int)
    elif d.refresh == "per_bank":
        first = local % round(d.t_refi_ns / d.t_refi_pb_ns)
    else:
        first = (local // d.bank_groups) * d.bank_groups
    return np.concatenate([c * d.banks + first for c in range(d.channels)])


def in_window(first, period, length, x):
    if length <= 0 or x < first:
        return False
    return x - (first + np.floor((x - first) / period) * period) < length


def next_start(first, period, length, x):
    if length <= 0:
        return np.inf
    if x < first:
        return first
    return first + (np.floor((x - first) / period) + 1) * period


class Reference:
    """The documented policy, every command time found by trying all candidates."""

    def __init__(self, arch):
        self.t = cycles(arch)
        self.groups = arch.dram.bank_groups
        self.close_page = arch.dram.page_policy == "close"
        self.ref = refresh_windows(arch)
        first, _period, length = self.ref
        # refresh postponement: per domain the refresh due next, those owed, those issued
        self.limit = arch.dram.refresh_postpone if length > 0 else 0
        self.lead = refresh_domains(arch)
        self.dom = {d: dict(due=first[d], owed=0, issued=[], last=-np.inf) for d in set(self.lead.tolist())}
        self.postponed = self.caught_up = 0
        nb = arch.dram.channels * arch.dram.banks
        self.bank = [dict(row=-1, act=-np.inf, col=-np.inf, pre_min=-np.inf, close=np.inf, ready=0.0)
                     for _ in range(nb)]
        self.acts = [[] for _ in range(arch.dram.channels)]
        self.cols = [[] for _ in range(arch.dram.channels)]
        self.kinds = [0, 0, 0]

    def spacing(self, k1, k2):
        t = self.t
        same = k1 // 2 == k2 // 2
        if k1 % 2 == k2 % 2:
            return t["ccd_l"] if same else t["burst"]
        if k1 % 2 == 0:
            return t["rtw"]
        return t["t_cwl"] + t["burst"] + (t["t_wtr_l"] if same else t["t_wtr_s"])

    def col_ok(self, c, code, x):
        for e, k in self.cols[c]:
            if e <= x and x < e + self.spacing(k, code) - EPS:
                return False
            if e > x and e < x + self.spacing(code, k) - EPS:
                return False
        return True

    # ------------------------------------------------------------ refresh
    def forced(self, st):
        """Start of the refreshes that can no longer be postponed: periodic from there."""
        return st["due"] + (self.limit - st["owed"]) * self.ref[1]

    def in_refresh(self, b, x):
        first, period, length = self.ref
        if not self.limit:
            return in_window(first[b], period, length, x)
        st = self.dom[self.lead[b]]
        return any(s <= x < s + length for s in st["issued"]) or in_window(self.forced(st), period, length, x)

    def refresh_after(self, b, x):
        """Start of the first refresh of bank ``b`` after ``x``."""
        first, period, length = self.ref
        if not self.limit:
            return next_start(first[b], period, length, x)
        st = self.dom[self.lead[b]]
        return min([s for s in st["issued"] if s > x] + [next_start(self.forced(st), period, length, x)])

    def refresh_ends(self, b, x0):
        """Ends of the refresh windows an activate from ``x0`` may have to wait for."""
        first, period, length = self.ref
        base = first[b]
        ends = set()
        if self.limit:
            st = self.dom[self.lead[b]]
            base = self.forced(st)
            ends = {s + length for s in st["issued"]}
        k0 = max(0.0, np.floor((x0 - base) / period))
        return ends | {base + (k0 + k) * period + length for k in range(4)}

    def advance(self, lead, t0):
        """The controller's refresh decisions before it sees a burst of the domain at ``t0``:
        an owed refresh once nothing of the domain waits, a due one on time if nothing waits
        then (or the limit is reached), postponed if something does."""
        st, period, length = self.dom[lead], self.ref[1], self.ref[2]
        while True:
            end = st["issued"][-1] + length if st["issued"] else -np.inf
            free = max(st["last"], end)
            if st["owed"] > 0 and free < t0 and free <= st["due"]:
                st["issued"].append(free)
                st["owed"] -= 1
                self.caught_up += 1
            elif st["due"] < t0:
                start = max(st["due"], end)
                if st["owed"] < self.limit and (st["last"] > st["due"] or start >= t0):
                    st["owed"] += 1
                    self.postponed += 1
                else:
                    st["issued"].append(start)
                st["due"] += period
            else:
                return

    def waited(self, lead, cc):
        """A burst got its column at ``cc``: refreshes due while it waited are postponed, and
        none starts before its column's slot (one burst time) is over."""
        st = self.dom[lead]
        while st["owed"] < self.limit and cc >= st["due"]:
            st["owed"] += 1
            st["due"] += self.ref[1]
            self.postponed += 1
        st["last"] = max(st["last"], cc + self.t["burst"])

    # ------------------------------------------------------------ commands
    def act_ok(self, c, g, x, b):
        t = self.t
        if self.in_refresh(b, x):
            return False
        for e, ge in self.acts[c]:
            r = t["t_rrd_l"] if ge == g else t["t_rrd_s"]
            if (e <= x and x < e + r - EPS) or (e > x and e < x + r - EPS):
                return False
        if t["t_faw"] > 0:
            ts = sorted([e for e, _ in self.acts[c]] + [x])
            for i in range(len(ts) - 4):
                if ts[i + 4] - ts[i] < t["t_faw"] - EPS:
                    return False
        return True

    def act_time(self, c, g, x0, b):
        t = self.t
        cands = {x0}
        for e, _ in self.acts[c]:
            cands |= {e + t["t_rrd_s"], e + t["t_rrd_l"], e + t["t_faw"], e}
        cands |= self.refresh_ends(b, x0)
        for x in sorted(v for v in cands if v >= x0):
            if self.act_ok(c, g, x, b):
                return x
        raise AssertionError("no activate time found")

    def col_time(self, c, code, lo):
        cands = {lo} | {e + self.spacing(k, code) for e, k in self.cols[c]}
        for x in sorted(v for v in cands if v >= lo):
            if self.col_ok(c, code, x):
                return x
        raise AssertionError("no column time found")

    def place(self, c, b, r, w, t0):
        t = self.t
        length = self.ref[2]
        if self.limit:
            self.advance(self.lead[b], t0)
        st = self.bank[b]
        g = b % self.groups
        code = 2 * g + w
        o, ready = st["row"], st["ready"]
        if o >= 0:
            s = self.refresh_after(b, st["act"])
            if st["close"] <= t0 and st["close"] < s:
                o = -1
            elif s <= t0:
                o, ready = -1, max(ready, s + length)
        while True:
            p = None
            if o == r:
                kind, a, lo = T.HIT, st["act"], max(t0, st["act"] + t["t_rcd"])
            else:
                if o < 0:
                    kind, a0 = T.MISS, max(ready, t0)
                else:
                    kind = T.CONFLICT
                    p = max(st["pre_min"], st["act"] + t["t_ras"], t0)
                    s = self.refresh_after(b, st["act"])
                    if s <= p:
                        o, ready = -1, max(ready, s + length)
                        continue
                    a0 = p + t["t_rp"]
                a0 = max(a0, st["act"] + t["rc"])
                a = self.act_time(c, g, a0, b)
                lo = a + t["t_rcd"]
            cc = self.col_time(c, code, max(lo, st["col"] + t["ccd_l"]))
            s = self.refresh_after(b, a)
            if cc < s:
                break
            o, ready = -1, max(ready, s + length)
        if self.limit:
            self.waited(self.lead[b], cc)
        if kind != T.HIT:
            self.acts[c].append((a, g))
            st.update(act=a, row=r, pre_min=-np.inf)
        self.cols[c].append((cc, code))
        st["col"] = cc
        st["pre_min"] = max(st["pre_min"], cc + (t["t_cwl"] + t["burst"] + t["t_wr"] if w else t["t_rtp"]))
        if self.close_page:
            st["close"] = max(st["pre_min"], st["act"] + t["t_ras"])
            ready = st["close"] + t["t_rp"]
        st["ready"] = ready
        self.kinds[kind] += 1
        begin = p if kind == T.CONFLICT else (a if kind == T.MISS else cc)
        return cc, begin


class Kernel:
    """The pool's compiled placement (``dram_timing.place_bursts``) on a pool's state
    arrays, one burst at a time."""

    def __init__(self, arch, log=False):
        self.pool = p = ChannelPool(simpy.Environment(), arch, log_commands=log)
        p._make_room(4096)
        none = np.zeros(1)
        self.args = (p.P, p.groups, p.banks, p.close_page, p.open_row, p.BF, p.TL, p.TK, p.TG, p.TN,
                     p.CF, p.acc, p.LOG, p.NI, p.IV, p.busy_cycles, p.H, p.FS, p.FI, p.FF, none, none,
                     p.depth, p.req_bursts, p.fetch_depth, 0, False)
        self.out = np.zeros(1)
        self.agg = np.zeros((p.n, 4))

    def place(self, c, b, r, w, t0):
        T.place_bursts(np.array([b]), np.array([r]), np.array([c]), np.array([0]), 0, 1, w, t0, self.out,
                       self.agg, False, *self.args)
        return self.out[0], self.agg[c, 0]


def burst_stream(arch, rng, n, rows=4, writes=0.3, gap=20.0):
    """Random bursts: channel, global bank, one of a few rows per bank, read or write, and
    the time the controller sees each (non-decreasing, with pauses)."""
    d = arch.dram
    t = 0.0
    for _ in range(n):
        c = int(rng.integers(d.channels))
        b = c * d.banks + int(rng.integers(d.banks))
        t += float(rng.exponential(gap)) if rng.random() < 0.3 else 0.0
        yield c, b, int(rng.integers(rows)), int(rng.random() < writes), t


CASES = [("hbm2", "open", 1, "all_bank"), ("hbm2", "close", 2, "all_bank"),
         ("ddr4_3200", "open", 1, "all_bank"), ("ddr4_3200", "close", 1, "all_bank"),
         ("hbm3", "open", 2, "all_bank"), ("hbm3", "open", 2, "per_bank"),
         ("lpddr5x", "open", 1, "per_bank"), ("gddr6", "close", 2, "per_bank"),
         ("gddr6", "open", 1, "all_bank")]


def short_refresh(arch, mode):
    """Refresh every 900 ns so a short stream meets many windows (per-bank: one command
    every 900 ns / turns, 30 ns each)."""
    d = arch.dram
    if mode == "all_bank":
        return {"dram.refresh": mode, "dram.t_refi_ns": 900.0, "dram.t_rfc_ns": 120.0}
    turns = round(d.t_refi_ns / d.t_refi_pb_ns)
    return {"dram.refresh": mode, "dram.t_refi_ns": 900.0, "dram.t_refi_pb_ns": 900.0 / turns,
            "dram.t_rfc_pb_ns": 30.0}


def preset(name, **over):
    return sim.load_arch(os.path.join(PRESETS, f"{name}.yaml")).with_overrides(over)


@pytest.mark.parametrize("name,page,channels,mode", CASES)
def test_placement_equals_the_brute_force_reference(name, page, channels, mode):
    arch = preset(name, **{"dram.page_policy": page, "dram.channels": channels})
    arch = arch.with_overrides(short_refresh(arch, mode))
    rng = np.random.default_rng(sum(map(ord, name + page + mode)))
    ref, ker = Reference(arch), Kernel(arch)
    latest = np.full(channels, -np.inf)
    backfilled = 0
    for c, b, r, w, t0 in burst_stream(arch, rng, 260):
        want = ref.place(c, b, r, w, t0)
        got = ker.place(c, b, r, w, t0)
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-9)
        backfilled += got[0] < latest[c]
        latest[c] = max(latest[c], got[0])
    assert ker.pool.kinds.tolist() == ref.kinds
    # hits, misses, conflicts, and columns placed before ones fixed earlier were all seen
    assert min(ref.kinds) > 0 and backfilled > 0


@pytest.mark.parametrize("seed,gap,limit", [(sum(map(ord, "lpddr5xopenper_bank")) + 4, 40.0, 0),
                                             (5000 + sum(map(ord, "lpddr5xopenper_bank")), 10.0, 4)])
def test_a_slot_exactly_one_command_wide_is_taken(seed, gap, limit):
    """LPDDR5X's burst is 1.8751 cycles here, not a whole number: two columns 3.7501 apart
    leave room for exactly one more between them, and float rounding can make that gap a
    hair narrower than two bursts; likewise an activate exactly tRRD after one and before
    another. The reference (1e-9 tolerance) takes the slot; so must the placement (before:
    the first stream's burst 197 went 9.4 cycles later, the second's burst 195 7.5)."""
    arch = preset("lpddr5x", **{"dram.page_policy": "open", "dram.channels": 1})
    arch = arch.with_overrides(dict(short_refresh(arch, "per_bank"), **{"dram.refresh_postpone": limit}))
    rng = np.random.default_rng(seed)
    ref, ker = Reference(arch), Kernel(arch)
    for c, b, r, w, t0 in burst_stream(arch, rng, 260, gap=gap):
        np.testing.assert_allclose(ker.place(c, b, r, w, t0), ref.place(c, b, r, w, t0), rtol=1e-12, atol=1e-9)


def logged_refreshes(log, arch):
    """Per global bank, the start of every refresh the log holds for its domain."""
    lead = refresh_domains(arch)
    refs = log[log[:, 3] == T.CMD_REF]
    starts = {b: [] for b in range(len(lead))}
    for time, c, bank, _k, _r in refs.tolist():
        for b in np.flatnonzero(lead == int(c) * arch.dram.banks + int(bank)).tolist():
            starts[b].append(time)
    return {b: np.sort(v) for b, v in starts.items()}


def check_protocol(log, arch):
    """Every JEDEC timing rule the model claims, on a command log; returns the violations.
    With refresh postponement the refresh windows are the logged refresh commands."""
    t = cycles(arch)
    first, period, length = refresh_windows(arch)
    d = arch.dram
    issued = logged_refreshes(log, arch) if d.refresh_postpone and length > 0 else None

    def inside(gb, x):
        if issued is None:
            return in_window(first[gb], period, length, x)
        return bool(np.any((issued[gb] <= x) & (x < issued[gb] + length)))

    def refreshed(gb, act, x):
        """A refresh started after the activate at ``act``, by ``x``."""
        if issued is None:
            return next_start(first[gb], period, length, act) <= x
        return bool(np.any((issued[gb] > act) & (issued[gb] <= x)))

    bad = []
    for c in range(d.channels):
        L = log[log[:, 1] == c]
        acts = L[L[:, 3] == T.CMD_ACT]
        acts = acts[np.argsort(acts[:, 0], kind="stable")]
        # tRRD_S / tRRD_L between activates; at most four in any tFAW window
        for i in range(len(acts)):
            for j in range(i + 1, len(acts)):
                gap = acts[j, 0] - acts[i, 0]
                if gap >= t["t_rrd_l"]:
                    break
                same = acts[i, 2] % d.bank_groups == acts[j, 2] % d.bank_groups
                if gap < (t["t_rrd_l"] if same else t["t_rrd_s"]) - EPS:
                    bad.append(("tRRD", c, acts[i, 0], acts[j, 0]))
        if t["t_faw"] > 0:
            for i in range(len(acts) - 4):
                if acts[i + 4, 0] - acts[i, 0] < t["t_faw"] - EPS:
                    bad.append(("tFAW: five activates in one window", c, acts[i, 0], acts[i + 4, 0]))
        # column commands on the shared bus
        cols = L[(L[:, 3] == T.CMD_RD) | (L[:, 3] == T.CMD_WR)]
        cols = cols[np.argsort(cols[:, 0], kind="stable")]
        reach = max(t["ccd_l"], t["rtw"], t["t_cwl"] + t["burst"] + t["t_wtr_l"])
        for i in range(len(cols)):
            for j in range(i + 1, len(cols)):
                gap = cols[j, 0] - cols[i, 0]
                if gap >= reach:
                    break
                w1, w2 = cols[i, 3] == T.CMD_WR, cols[j, 3] == T.CMD_WR
                same = cols[i, 2] % d.bank_groups == cols[j, 2] % d.bank_groups
                if w1 == w2:
                    need, rule = (t["ccd_l"], "tCCD_L") if same else (t["burst"], "tCCD_S")
                elif not w1:
                    need, rule = t["rtw"], "tRTW"
                else:
                    need = t["t_cwl"] + t["burst"] + (t["t_wtr_l"] if same else t["t_wtr_s"])
                    rule = "tWTR_L" if same else "tWTR_S"
                if gap < need - EPS:
                    bad.append((rule, c, cols[i, 0], cols[j, 0]))
        data = np.sort(cols[:, 0] + np.where(cols[:, 3] == T.CMD_WR, t["t_cwl"], t["t_cl"]))
        if np.any(np.diff(data) < t["burst"] - EPS):
            bad.append(("data bursts overlap on the bus", c, None, None))
        # per bank: the command sequence of each bank in time order
        for bank in range(d.banks):
            gb = c * d.banks + bank
            B = L[(L[:, 2] == bank) & (L[:, 3] != T.CMD_REF)]
            B = B[np.lexsort((B[:, 3] != T.CMD_PRE, B[:, 0]))]   # a precharge before an activate at one time
            row, act, pre, last_act = -1, None, -np.inf, -np.inf
            last_rd, last_wr = -np.inf, -np.inf
            for time, _c, _b, kind, r in B.tolist():
                if inside(gb, time) and kind != T.CMD_PRE:
                    bad.append(("command inside a refresh window", c, bank, time))
                if row >= 0 and refreshed(gb, act, time):
                    row = -1                               # the refresh closed the row
                if kind == T.CMD_ACT:
                    if row >= 0:
                        bad.append(("activate on an open bank", c, bank, time))
                    if time < pre + t["t_rp"] - EPS:
                        bad.append(("tRP", c, bank, time))
                    if time < last_act + t["rc"] - EPS:
                        bad.append(("tRC", c, bank, time))
                    row, act, last_act = int(r), time, time
                elif kind == T.CMD_PRE:
                    if row < 0:
                        bad.append(("precharge of a closed bank", c, bank, time))
                    if time < act + t["t_ras"] - EPS:
                        bad.append(("tRAS", c, bank, time))
                    if time < last_rd + t["t_rtp"] - EPS:
                        bad.append(("tRTP", c, bank, time))
                    if time < last_wr + t["t_cwl"] + t["burst"] + t["t_wr"] - EPS:
                        bad.append(("tWR", c, bank, time))
                    row, pre = -1, time
                else:
                    if row != int(r):
                        bad.append(("column to a row that is not open", c, bank, time))
                    elif time < act + t["t_rcd"] - EPS:
                        bad.append(("tRCD", c, bank, time))
                    if kind == T.CMD_RD:
                        last_rd = time
                    else:
                        last_wr = time
    return bad


def check_refresh_count(log, arch, until):
    """The refresh commands of each domain up to ``until`` against the refresh interval: never
    more than ``dram.refresh_postpone`` owed at a due time (JEDEC JESD79-4 lets a DDR4
    controller postpone at most 8 REF commands; from memory), none issued before it is due
    (this controller pulls none in), and one domain's refreshes never overlap."""
    first, period, length = refresh_windows(arch)
    limit = arch.dram.refresh_postpone
    starts = logged_refreshes(log, arch)
    bad = []
    for lead in sorted(set(refresh_domains(arch).tolist())):
        s = starts[lead]
        due = first[lead] + period * np.arange(int((until - first[lead]) // period) + 1)
        due = due[due <= until]
        done_by_due = np.searchsorted(s, due + EPS)               # refreshes issued by each due time
        if np.any(done_by_due < np.arange(1, len(due) + 1) - limit):
            bad.append(("more refreshes owed than allowed", lead))
        if np.any(np.searchsorted(due, s + EPS) < np.arange(1, len(s) + 1)):
            bad.append(("a refresh before it was due", lead))
        if np.any(np.diff(s) < length - EPS):
            bad.append(("two refreshes of one domain overlap", lead))
    return bad


def hammer(arch, n=3000, seed=1, span=1 << 26):
    """Random single bursts over a small footprint, all at once: the bank and activate limits
    decide. Returns the pool and its log."""
    env = simpy.Environment()
    pool = ChannelPool(env, arch, log_commands=True)
    rng = np.random.default_rng(seed)
    burst = arch.dram.burst_bytes
    addr = rng.integers(0, span // burst, n) * burst
    for a in addr.tolist():
        txn = Txn("K", 0, 0, 0, 1, burst, 0.0, "test")
        txn.bursts = np.array([a], dtype=np.int64)
        pool.submit(txn)
    env.run()
    pool.settle_refresh(env.now)          # with postponement: the refreshes decided by the end
    return pool, pool.command_log()


@pytest.mark.parametrize("name", ["hbm2", "ddr4_3200", "hbm3", "hbm3e", "lpddr5x", "gddr6"])
@pytest.mark.parametrize("page", ["open", "close"])
def test_hammering_keeps_every_timing_rule(name, page):
    """tFAW included: no window of tFAW holds more than four activates of one channel
    (pseudo-channel for HBM3), and the window did hold activates back. Each preset in its
    own refresh mode (per-bank for HBM3, LPDDR5X, GDDR6), refreshing often."""
    arch = preset(name, **{"dram.page_policy": page, "dram.channels": 2,
                           "fetch.request_bytes": arch_burst(name)})
    arch = arch.with_overrides(short_refresh(arch, arch.dram.refresh))
    pool, log = hammer(arch)
    assert check_protocol(log, arch) == []
    rep = pool.report(pool.env.now)
    assert rep["activates"] == np.count_nonzero(log[:, 3] == T.CMD_ACT) > 1000
    if arch.dram.t_faw_ns > 4 * arch.dram.t_rrd_s_ns:
        assert rep["faw_limited_activates"] > 0


def arch_burst(name):
    return preset(name).dram.burst_bytes


def test_the_protocol_check_catches_a_broken_schedule():
    """The check above can fail: move one activate into its neighbour's tFAW window."""
    arch = preset("ddr4_3200", **{"dram.channels": 1, "fetch.request_bytes": 64})
    pool, log = hammer(arch, n=400)
    assert check_protocol(log, arch) == []
    acts = np.flatnonzero(log[:, 3] == T.CMD_ACT)
    broken = log.copy()
    order = acts[np.argsort(log[acts, 0])]
    broken[order[20], 0] = log[order[19], 0] + 1e-3
    assert any(v[0].startswith("tRRD") or v[0].startswith("tFAW") for v in check_protocol(broken, arch))


def compare_batches(postpone=0):
    """The architecture and read batches the compiled-against-Python check serves."""
    arch = preset("hbm2", **{"dram.channels": 4, "dram.queue_depth": 4, "dram.t_refi_ns": 900.0,
                             "dram.refresh_postpone": postpone})
    rng = np.random.default_rng(9)
    dec = ChannelPool(simpy.Environment(), arch).decoder
    batches = []
    for _ in range(150):
        n = int(rng.integers(1, 60))
        start = int(rng.integers(0, 1 << 22)) * 64
        b = start + (np.sort(rng.choice(8 * n, n, replace=False)) * 64).astype(np.int64)
        ch, gb, row = dec.decode_global(b)
        o = np.argsort(ch, kind="stable")
        batches.append((ch[o], gb[o], row[o]))
    return arch, batches


STATE = ("open_row", "BF", "TL", "TK", "TG", "TN", "CF", "H", "acc", "R", "IV", "busy_cycles")


def drive(path=None, postpone=0):
    """Serve the batches of :func:`compare_batches` on a fresh pool; save the state to ``path``."""
    arch, batches = compare_batches(postpone)
    pool = ChannelPool(simpy.Environment(), arch)
    pool._make_room(4096)
    out = []
    now = 0.0
    for k, (ch, gb, row) in enumerate(batches):
        now += 37.0 * (k % 3)
        times = np.full(4, -np.inf)
        prof = np.zeros((2, T.PROFILE_POINTS))
        pos = np.arange(len(ch), dtype=np.int64)
        assert T.serve_and_book(ch, gb, row, pos, now, now, times, 1 + 5 * k, prof,
                                *pool._state_args, 1, *pool._no_room, np.zeros(3 * len(ch)),
                                np.zeros((pool.n, 4))) >= 0
        out.append(np.concatenate([times, prof.ravel()]))
    state = {name: getattr(pool, name) for name in STATE}
    state["times"] = np.array(out)
    if path:
        np.savez(path, **state)
    return state


@pytest.mark.skipif(not T.JIT, reason="numba not installed: nothing compiled to compare")
@pytest.mark.parametrize("postpone", [0, 3])
def test_compiled_loops_equal_plain_python(tmp_path, postpone):
    """Same batches, refreshes and queue waits included: the compiled loops and the same
    code run as Python (ATTNSIM_NO_JIT=1, in a child process) leave the same state, bit
    for bit; with refresh postponement too."""
    import subprocess
    import sys

    out = tmp_path / "python.npz"
    root = os.path.dirname(HERE)
    env = dict(os.environ, ATTNSIM_NO_JIT="1", PYTHONPATH=root + os.pathsep + HERE)
    subprocess.run([sys.executable, "-c", f"import test_dram_timing as m; m.drive({str(out)!r}, {postpone})"],
                   check=True, env=env, cwd=root)
    want = np.load(out)
    got = drive(postpone=postpone)
    for name in STATE + ("times",):
        assert np.array_equal(got[name], want[name]), name
    assert got["acc"][T.A_ACTS] > 0                                       # activates taken
    if postpone:
        assert got["acc"][T.A_REFS] > 0                                   # refreshes decided
    else:
        assert got["acc"][T.A_REF_DELAY] > 0                              # refresh taken


@pytest.mark.parametrize("name,mode", [("hbm2", "all_bank"), ("ddr4_3200", "all_bank"),
                                       ("hbm3", "per_bank"), ("lpddr5x", "per_bank")])
@pytest.mark.parametrize("phase", [0.37, 0.9])
def test_a_later_refresh_phase_keeps_every_timing_rule(name, mode, phase):
    """``dram.refresh_phase``: the same refresh schedule with the run starting further into
    it. The pool's first windows are the documented ones moved by ``phase`` of tREFI, wrapped
    into the first interval (as ``refresh_windows`` computes them on its own), and
    hammering traffic keeps every rule against the moved windows (a command inside one is a
    violation), with refresh delay seen."""
    arch = preset(name, **{"dram.channels": 2, "fetch.request_bytes": arch_burst(name)})
    arch = arch.with_overrides(dict(short_refresh(arch, mode), **{"dram.refresh_phase": phase}))
    first, period, _length = refresh_windows(arch)
    unmoved = refresh_windows(arch.with_overrides({"dram.refresh_phase": 0.0}))[0]
    off = np.mod(first - unmoved - phase * period, period)
    assert np.all(np.minimum(off, period - off) < 1e-6)      # moved by phase x tREFI, modulo tREFI
    assert np.all((first > 0) & (first <= period + 1e-9))
    pool, log = hammer(arch)
    np.testing.assert_allclose(pool.BF[:, T.B_REF_OFF], first, rtol=1e-12)
    assert check_protocol(log, arch) == []
    assert pool.refresh_delay > 0


def test_a_whole_refresh_interval_of_phase_is_no_change():
    """Phase 1 is phase 0 one interval later: the same run."""
    arch = preset("hbm2", **{"dram.channels": 2, "fetch.request_bytes": 64})
    arch = arch.with_overrides(short_refresh(arch, "all_bank"))
    logs = [hammer(arch.with_overrides({"dram.refresh_phase": p}))[1] for p in (0.0, 1.0)]
    assert np.array_equal(logs[0], logs[1])


def test_same_bank_refresh_closes_one_bank_of_every_group_at_once():
    """Same-bank refresh (DDR5's kind, JEDEC JESD79-5; here on a custom memory): the banks
    of one index in every bank group are refreshed together, the others go on. The log of
    hammering traffic keeps every rule, and activates happen inside another bank index's
    window (the channel did not stop)."""
    arch = sim.load_arch({"dram": {"channels": 1, "refresh": "same_bank", "t_refi_ns": 800.0,
                                   "t_refi_pb_ns": 200.0, "t_rfc_pb_ns": 60.0},
                          "fetch": {"request_bytes": 64}})
    first, period, length = refresh_windows(arch)
    groups = arch.dram.bank_groups
    assert np.all(first.reshape(-1, groups) == first[::groups][:, None])    # one index, all groups
    pool, log = hammer(arch, n=3000)
    assert check_protocol(log, arch) == []
    acts = log[log[:, 3] == T.CMD_ACT]
    busy_elsewhere = [in_window(first[(int(b) + groups) % len(first)], period, length, t)
                      for t, _c, b, _k, _r in acts.tolist()]
    assert any(busy_elsewhere)


def _profile_py():
    """The profile loop as Python (numba's original function where it is compiled)."""
    return getattr(T.arrival_profile, "py_func", T.arrival_profile)


def _consume(on_chip, work):
    """A consumer taking equal parts in order, each once on chip: the end of the last part
    (the recursion end = max(end, on chip) + share, common practice, no source)."""
    end = -np.inf
    for t in on_chip:
        end = max(end, t) + work / len(on_chip)
    return end


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_arrival_profile_gives_the_end_of_an_in_order_consumer(data):
    """For any burst times, order and part count: the kept points' largest ``time + share
    left x work`` equals the end an in-order consumer reaches, part by part, for any work;
    when more points than the profile holds would be needed, it is never earlier."""
    n = data.draw(st.integers(1, 80))
    col = np.array(data.draw(st.lists(st.floats(0, 500, allow_nan=False), min_size=n, max_size=n)))
    pos = np.array(data.draw(st.permutations(range(n))), dtype=np.int64)
    parts = data.draw(st.integers(1, 100))
    lag = data.draw(st.floats(0, 40, allow_nan=False))
    prof = np.zeros((2, data.draw(st.sampled_from([2, 4, T.PROFILE_POINTS]))))
    sf = np.zeros(3 * n)
    sf[:n] = col
    m = _profile_py()(sf[:n], pos, n, lag, parts, sf, prof)
    g_n = min(parts, n)
    # part g is on chip when its bursts (address order) and all earlier ones are
    land = col[pos] + lag
    on_chip = [land[:((g + 1) * n + g_n - 1) // g_n].max() for g in range(g_n)]
    assert 1 <= m <= prof.shape[1]
    assert prof[1, 0] == 1.0 and prof[0, m - 1] == max(on_chip)
    for work in (0.0, 1.0, 37.5, 400.0, 1e5):
        got = max(prof[0, i] + prof[1, i] * work for i in range(m))
        want = _consume(on_chip, work)
        if m < prof.shape[1]:
            assert got == pytest.approx(want, rel=1e-12, abs=1e-9), (work, got, want)
        else:
            assert got >= want - 1e-9 * max(1.0, abs(want)), (work, got, want)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_profile_of_a_transaction_committed_in_parts_gives_the_same_end(data):
    """Under row hits first a transaction's bursts are placed by several decisions and its
    profile is made from all their landing times at once (``dram.arrival_profile``): the
    same contract as above, against the same in-order consumer."""
    n = data.draw(st.integers(1, 80))
    land = np.array(data.draw(st.lists(st.floats(0, 500, allow_nan=False), min_size=n, max_size=n)))
    parts = data.draw(st.integers(1, 100))
    cap = data.draw(st.sampled_from([2, 4, T.PROFILE_POINTS]))
    prof = dram_arrival_profile(land, parts, cap)
    g_n = min(parts, n)
    on_chip = [land[:((g + 1) * n + g_n - 1) // g_n].max() for g in range(g_n)]
    assert 1 <= len(prof) <= cap
    assert prof[0][1] == 1.0 and prof[-1][0] == max(on_chip)
    for work in (0.0, 1.0, 37.5, 400.0, 1e5):
        got = max(t + x * work for t, x in prof)
        want = _consume(on_chip, work)
        if len(prof) < cap:
            assert got == pytest.approx(want, rel=1e-12, abs=1e-9), (work, got, want)
        else:
            assert got >= want - 1e-9 * max(1.0, abs(want)), (work, got, want)


# ---------------------------------------------------------------- refresh postponement

POSTPONE_CASES = [("hbm2", "open", 1, "all_bank", 2), ("ddr4_3200", "close", 1, "all_bank", 8),
                  ("hbm3", "open", 2, "per_bank", 1), ("lpddr5x", "open", 1, "per_bank", 4),
                  ("gddr6", "close", 2, "all_bank", 8)]


@pytest.mark.parametrize("name,page,channels,mode,limit", POSTPONE_CASES)
def test_postponed_refresh_placement_equals_the_brute_force_reference(name, page, channels, mode, limit):
    """``dram.refresh_postpone``: a refresh due while a burst of its banks waits is postponed
    (up to the limit), owed ones are issued once those banks have nothing waiting, due ones
    on time when nothing waits. The reference keeps every refresh issued and finds row ends
    and free activate times from all of them; burst by burst the placements agree, and the
    stream saw refreshes postponed and caught up."""
    arch = preset(name, **{"dram.page_policy": page, "dram.channels": channels})
    arch = arch.with_overrides(dict(short_refresh(arch, mode), **{"dram.refresh_postpone": limit}))
    rng = np.random.default_rng(sum(map(ord, name + page + mode)))
    ref, ker = Reference(arch), Kernel(arch)
    for c, b, r, w, t0 in burst_stream(arch, rng, 260, gap=40.0):
        np.testing.assert_allclose(ker.place(c, b, r, w, t0), ref.place(c, b, r, w, t0), rtol=1e-12, atol=1e-9)
    assert ker.pool.kinds.tolist() == ref.kinds
    assert ker.pool.acc[T.A_REFS] == sum(len(st["issued"]) for st in ref.dom.values()) > 0
    assert ref.postponed > 0 and ref.caught_up > 0


@pytest.mark.parametrize("name,mode", [("hbm2", "all_bank"), ("ddr4_3200", "all_bank"), ("hbm3", "per_bank"),
                                       ("lpddr5x", "per_bank")])
@pytest.mark.parametrize("limit", [1, 8])
def test_postponed_refresh_keeps_every_timing_rule(name, mode, limit):
    """Hammering traffic with refresh postponement: every timing rule against the logged
    refresh commands, at most ``limit`` refreshes owed at any due time and none early, and
    refreshes were postponed (fewer issued by some due time than were due)."""
    arch = preset(name, **{"dram.channels": 2, "fetch.request_bytes": arch_burst(name)})
    arch = arch.with_overrides(dict(short_refresh(arch, mode), **{"dram.refresh_postpone": limit}))
    pool, log = hammer(arch)
    assert check_protocol(log, arch) == []
    assert check_refresh_count(log, arch, pool.env.now) == []
    refs = log[log[:, 3] == T.CMD_REF]
    assert len(refs) == pool.acc[T.A_REFS] > 0
    strict = arch.with_overrides({"dram.refresh_postpone": 0})
    assert check_refresh_count(log, strict, pool.env.now) != []      # some were issued late
    # the result says how many it still owes at the end: those due before it, less those issued
    until = pool.env.now
    first, period, _length = refresh_windows(arch)
    leads = sorted(set(refresh_domains(arch).tolist()))
    due = sum(int(np.ceil((until - first[d]) / period)) for d in leads if first[d] < until)
    rep = pool.report(until)
    assert rep["refreshes_issued"] == len(refs)
    assert rep["refreshes_owed_at_end"] == due - len(refs)


def test_the_refresh_count_check_catches_a_broken_schedule():
    """The count check can fail: drop refreshes until more are owed than allowed, or move one
    before it is due."""
    arch = preset("hbm2", **{"dram.channels": 1, "fetch.request_bytes": 64})
    arch = arch.with_overrides(dict(short_refresh(arch, "all_bank"), **{"dram.refresh_postpone": 2}))
    pool, log = hammer(arch, n=1500)
    until = pool.env.now
    assert check_refresh_count(log, arch, until) == []
    refs = np.flatnonzero(log[:, 3] == T.CMD_REF)
    assert len(refs) > 4
    dropped = np.delete(log, refs[1:4], axis=0)
    assert ("more refreshes owed than allowed", 0) in check_refresh_count(dropped, arch, until)
    early = log.copy()
    early[refs[0], 0] = 1.0
    assert ("a refresh before it was due", 0) in check_refresh_count(early, arch, until)


def test_a_run_owing_refreshes_at_its_end_says_so():
    """A batch-16 decode on server's 16 all-bank channels keeps its channels busy to the end:
    postponing, it ends owing refreshes its time leaves out, and the document and the
    terminal summary say how many; without postponement neither mentions any."""
    from sim.result import format_summary

    arch = sim.load_arch(os.path.join(CONFIGS, "server.yaml"))
    trace = os.path.join(os.path.dirname(HERE), "traces", "decoder_batch", "b16_kv1.npz")
    doc = sim.simulate(arch.with_overrides({"dram.refresh_postpone": 8}), trace, keep_intervals=False).to_dict()
    owed = doc["dram"]["refreshes_owed_at_end"]
    assert 0 < owed <= 8 * arch.dram.channels and doc["dram"]["refreshes_issued"] > 0
    assert f"{owed:,} refreshes still owed at the end" in format_summary(doc)
    plain = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert "refreshes_owed_at_end" not in plain["dram"] and "still owed" not in format_summary(plain)
