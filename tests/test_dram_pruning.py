"""Pruning against the dense case, as a property over kept-row patterns.

Claim: reading only the kept rows of a head never moves more bytes than
reading all of them, and never has a higher row hit rate. Why the second part
holds (common practice, no source): every row hit rides on an activation, an
activation serves at most the bursts of one DRAM row, so with each burst read
once the hit rate is at most 1 - 1/(bursts per DRAM row); the dense read of a
region made of whole DRAM rows reaches exactly that, opening each row once.
Refresh is off here: a refresh closes rows at fixed times, which would make
the longer dense stream pay for more of them.
"""

import numpy as np
import simpy
from hypothesis import given, settings
from hypothesis import strategies as st

import sim
from sim.engine.addrmap import AddressMap
from sim.engine.dram import ChannelPool
from sim.engine.txn import Txn

ROWS = 256            # K rows of the head; 256 x 32 B = 8 KiB = whole DRAM rows of 2 channels
GRAIN = 64            # rows per transaction, as the fetch unit would send them


def arch_for(policy):
    return sim.load_arch({
        "dram": {"model": "banked", "channels": 2, "burst_bytes": 64, "bus_bits": 128,
                 "row_bytes": 1024, "banks": 4, "bank_groups": 2, "interleave_bytes": 256,
                 "t_rfc_ns": 0.0, "page_policy": policy},
        "precision": {"k_msb_bits": 4},
    })


def fetch(arch, kept):
    amap = AddressMap(arch, layers=1, heads=2, max_rows=ROWS, head_dim=64)
    env = simpy.Environment()
    pool = ChannelPool(env, arch)

    def source():
        for lo in range(0, ROWS, GRAIN):
            rows = kept[(kept >= lo) & (kept < lo + GRAIN)]
            if len(rows) == 0:
                continue
            b = amap.bursts(0, "K", 1, rows)
            txn = Txn("K", 0, 1, 0, len(rows), len(b) * 64, env.now, "fetch")
            txn.bursts = b
            yield pool.submit(txn)

    env.process(source())
    env.run()
    return pool.report(env.now)


DENSE = {"open": fetch(arch_for("open"), np.arange(ROWS))}


@settings(max_examples=60, deadline=None, derandomize=True)
@given(mask=st.lists(st.booleans(), min_size=ROWS, max_size=ROWS).filter(any))
def test_pruning_never_adds_bytes_nor_row_hits(mask):
    """Open page: the policy under which the bound above is reached by the dense read."""
    policy = "open"
    kept = np.flatnonzero(mask)
    pruned = fetch(arch_for(policy), kept)
    dense = DENSE[policy]
    assert pruned["bytes"] <= dense["bytes"]
    assert pruned["row_hit_rate"] <= dense["row_hit_rate"] + 1e-12


def test_dense_read_opens_each_row_once():
    """The dense case reaches the bound 1 - 1/(bursts per DRAM row) the property relies on."""
    assert DENSE["open"]["row_hit_rate"] == 1 - 1 / (1024 / 64)
