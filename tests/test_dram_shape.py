"""The cached share shape is built two ways (Python lists for small batches, numpy
for large ones); both must give the same fields bit for bit, since the timing
solve reads them. Internal consistency of our own code: no outside source."""

import os

import numpy as np
import pytest

import sim
from sim.engine import dram
from sim.engine.addrmap import BurstDecoder

HERE = os.path.dirname(os.path.abspath(__file__))
CONFIGS = os.path.join(os.path.dirname(HERE), "arch_configs")


def same(x, y):
    if isinstance(x, np.ndarray) or isinstance(y, np.ndarray):
        x, y = np.asarray(x), np.asarray(y)
        return x.shape == y.shape and x.dtype.kind == y.dtype.kind and np.array_equal(x, y)
    if isinstance(x, (list, tuple)):
        return len(x) == len(y) and all(type(a) is type(b) and same(a, b) for a, b in zip(x, y))
    return type(x) is type(y) and x == y


def patterns(arch, rng):
    """Burst address sets like the fetch unit's: contiguous runs, kept-row scatter, strides."""
    burst = arch.dram.burst_bytes
    for _ in range(60):
        n = int(rng.integers(1, 40))
        start = int(rng.integers(0, 1 << 16)) * burst
        kind = rng.integers(3)
        if kind == 0:
            yield start + np.arange(n, dtype=np.int64) * burst
        elif kind == 1:
            rows = np.sort(rng.choice(4 * n, size=n, replace=False))
            yield start + rows.astype(np.int64) * burst
        else:
            yield start + np.arange(n, dtype=np.int64) * burst * int(rng.integers(2, 64))


@pytest.mark.parametrize("name", ["mid", "edge", "server", "hbm2_stack"])
def test_small_and_numpy_builds_agree(name, monkeypatch):
    arch = sim.load_arch(os.path.join(CONFIGS, name + ".yaml"))
    dec = BurstDecoder(arch)
    tm = dram.Timing(arch)
    rng = np.random.default_rng(3)
    checked = 0
    for b in patterns(arch, rng):
        ch, gb, row = dec.decode_global(b)
        order = np.argsort(ch, kind="stable")
        ch, gb, row = ch[order], gb[order], row[order]
        args = (ch, gb, row, arch.dram.channels, arch.dram.bank_groups, tm)
        monkeypatch.setattr(dram.ShareShape, "SMALL", 1 << 30)
        small = dram.ShareShape(*args)
        monkeypatch.setattr(dram.ShareShape, "SMALL", -1)
        big = dram.ShareShape(*args)
        assert set(small.__dict__) == set(big.__dict__)
        for key in big.__dict__:
            assert same(small.__dict__[key], big.__dict__[key]), (name, key, b.tolist())
        assert np.array_equal(small.kpos, big.kpos)
        checked += 1
    assert checked == 60
