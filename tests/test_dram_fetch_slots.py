"""The banked pool's fetch slots against Little's law (J. D. C. Little, "A proof for the
queuing formula L = lambda W", Operations Research 9(3), 1961).

A read request holds one of the fetch unit's ``fetch.inflight`` slots at least from its
entry to its first data: the controller's delay and the CAS latency (``dram.controller_ns``
+ ``dram.t_cl_ns``) later at the least. With at most N held at once, a run that issues R
requests lasts at least R x that / N cycles. Checked under either ``dram.scheduler`` on a
prefill whose transactions hold many requests each: row hits first commits a
transaction's shares when each channel decides, and must hold the limit all the same.
"""

import os

import pytest

import sim
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture(scope="module")
def prefill():
    return synth_trace(prompt_tokens=256, decode_steps=2, layers=1, heads=2, head_dim=64, seed=1)


@pytest.mark.parametrize("scheduler", ["fcfs", "row_hits_first"])
@pytest.mark.parametrize("inflight", [1, 2])
def test_requests_in_flight_bound_the_run_by_littles_law(prefill, scheduler, inflight):
    arch = sim.load_arch(os.path.join(ROOT, "arch_configs", "mid.yaml")).with_overrides(
        {"dram.scheduler": scheduler, "fetch.inflight": inflight, "dram.controller_ns": 500.0})
    doc = sim.simulate(arch, prefill, keep_intervals=False).to_dict()
    # the config's own values, not the pool's
    least = (arch.dram.controller_ns + arch.dram.t_cl_ns) * arch.clock_ghz
    requests = doc["fetch"]["requests"]
    assert doc["fetch"]["transactions"] * 4 < requests      # transactions of many requests
    assert doc["cycles"] >= requests * least / inflight * (1 - 1e-9), (doc["cycles"], requests)
