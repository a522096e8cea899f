"""The banked model's burst-by-burst loop (``dram_timing.serve``) against the same
recurrence solved for a whole batch at once (``dram.column_times``), and the
compiled loop against the same code run as plain Python. Internal consistency
of our own code: no outside source."""

import os

import numpy as np
import pytest

import sim
from sim.engine import dram, dram_timing
from sim.engine.addrmap import BurstDecoder

HERE = os.path.dirname(os.path.abspath(__file__))
CONFIGS = os.path.join(os.path.dirname(HERE), "arch_configs")


def patterns(arch, rng, count=60):
    """Burst address sets like the fetch unit's: contiguous runs, kept-row scatter, strides."""
    burst = arch.dram.burst_bytes
    for _ in range(count):
        n = int(rng.integers(1, 300))
        start = int(rng.integers(0, 1 << 16)) * burst
        kind = rng.integers(3)
        if kind == 0:
            yield start + np.arange(n, dtype=np.int64) * burst
        elif kind == 1:
            rows = np.sort(rng.choice(4 * n, size=n, replace=False))
            yield start + rows.astype(np.int64) * burst
        else:
            yield start + np.arange(n, dtype=np.int64) * burst * int(rng.integers(2, 64))


def decoded(dec, b):
    ch, gb, row = dec.decode_global(b)
    order = np.argsort(ch, kind="stable")
    return ch[order], gb[order], row[order]


class State:
    """Bank and channel state of a pool, copyable."""

    def __init__(self, arch):
        d = arch.dram
        self.st = dram.BankState(d.channels, d.banks)
        self.ch_col = np.full(d.channels, -np.inf)
        self.ch_group = np.full(d.channels, -1, dtype=np.int64)
        self.ref_next = np.full(d.channels, np.inf)
        self.kinds = np.zeros(3, dtype=np.int64)

    def copy(self, arch):
        out = State(arch)
        for name in ("open_row", "act", "last_col", "pre_ready", "close_at"):
            setattr(out.st, name, getattr(self.st, name).copy())
        out.ch_col, out.ch_group = self.ch_col.copy(), self.ch_group.copy()
        out.ref_next, out.kinds = self.ref_next.copy(), self.kinds.copy()
        return out

    def serve(self, arch, fn, ch, gb, row, t0):
        st = self.st
        return fn(ch, gb, row, t0, arch.dram.bank_groups, arch.dram.banks,
                  arch.dram.page_policy == "close", dram_timing.timing_vector(dram.Timing(arch)),
                  st.open_row, st.act, st.last_col, st.pre_ready, st.close_at,
                  self.ch_col, self.ch_group, self.ref_next, self.kinds)


@pytest.mark.parametrize("name", ["mid", "edge", "server", "hbm2_stack"])
@pytest.mark.parametrize("page", ["open", "close"])
def test_loop_matches_the_batch_solve(name, page):
    arch = sim.load_arch(os.path.join(CONFIGS, name + ".yaml")).with_overrides(
        {"dram.page_policy": page})
    dec = BurstDecoder(arch)
    tm = dram.Timing(arch)
    rng = np.random.default_rng(5)
    state = State(arch)
    now = 0.0
    for b in patterns(arch, rng):
        ch, gb, row = decoded(dec, b)
        now += float(rng.integers(0, 400))
        t0 = now + rng.integers(0, 50, size=arch.dram.channels).astype(float)
        before = state.copy(arch)
        pieces, _iv, delay = state.serve(arch, dram_timing.serve, ch, gb, row, t0)
        # the batch solve on the state before
        cnt = np.bincount(ch, minlength=arch.dram.channels)
        chans = np.flatnonzero(cnt)
        lens = cnt[chans]
        c, sol = dram.column_times(gb, row, gb % arch.dram.bank_groups, lens, np.repeat(t0[chans], lens),
                                   before.ch_col[chans], before.ch_group[chans], before.st, tm)
        ends = np.cumsum(lens)
        assert delay == 0.0 and len(pieces) == len(chans)
        assert pieces[:, 0].tolist() == chans.tolist()
        assert pieces[:, 4].tolist() == lens.tolist()
        np.testing.assert_allclose(pieces[:, 2], c[ends - lens] + tm.cl + tm.ctrl, rtol=1e-12)
        np.testing.assert_allclose(pieces[:, 3], c[ends - 1] + tm.burst + tm.cl + tm.ctrl, rtol=1e-12)
        # bank state: each bank's last column command and its row
        for bank in np.unique(gb):
            last = np.flatnonzero(gb == bank)[-1]
            assert state.st.last_col[bank] == pytest.approx(c[last], rel=1e-12)
            assert state.st.open_row[bank] == row[last]
        kinds = np.bincount(sol["kind"], minlength=3)
        kinds[dram.HIT] += len(gb) - len(sol["kind"])
        assert (state.kinds - before.kinds).tolist() == kinds.tolist()


@pytest.mark.skipif(not dram_timing.JIT, reason="numba not installed: nothing compiled to compare")
def test_compiled_loop_equals_plain_python():
    """Same inputs, refreshes included: the compiled loop and its Python source agree bit for bit."""
    arch = sim.load_arch(os.path.join(CONFIGS, "mid.yaml"))
    dec = BurstDecoder(arch)
    tm = dram.Timing(arch)
    rng = np.random.default_rng(9)
    a, b_ = State(arch), State(arch)
    offsets = (np.arange(arch.dram.channels) + 1) * (tm.refi / arch.dram.channels)
    a.ref_next, b_.ref_next = offsets.copy(), offsets.copy()
    now = 0.0
    cuts = 0
    for b in patterns(arch, rng, 200):
        ch, gb, row = decoded(dec, b)
        now += float(rng.integers(0, 800))
        t0 = np.full(arch.dram.channels, now)
        got = a.serve(arch, dram_timing.serve, ch, gb, row, t0)
        want = b_.serve(arch, dram_timing.serve.py_func, ch, gb, row, t0.copy())
        assert np.array_equal(got[0], want[0]) and np.array_equal(got[1], want[1])
        assert got[2] == want[2]
        cuts += int(got[0][:, 5].sum())
        for name in ("open_row", "act", "last_col", "pre_ready", "close_at"):
            assert np.array_equal(getattr(a.st, name), getattr(b_.st, name))
        assert np.array_equal(a.ch_col, b_.ch_col) and np.array_equal(a.kinds, b_.kinds)
    assert cuts > 0     # the refresh path was taken
