"""The fixed-latency pool against Little's law (J. D. C. Little, "A proof for the queuing
formula L = lambda W", Operations Research 9(3), 1961).

A request holds one of the fetch unit's ``fetch.inflight`` slots at least from its entry
to its data, ``dram.latency_ns`` later; with at most N of them held at once, a run that
issues R requests lasts at least R x latency / N cycles. Checked under either
``dram.scheduler`` (the fixed-latency model has none: the limit must hold under both).
"""

import os

import pytest

import sim

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.mark.parametrize("scheduler", ["fcfs", "row_hits_first"])
@pytest.mark.parametrize("inflight", [1, 2])
def test_requests_in_flight_bound_the_run_by_littles_law(scheduler, inflight):
    arch = sim.load_arch(os.path.join(ROOT, "arch_configs", "mid.yaml")).with_overrides(
        {"dram.model": "fixed-latency", "dram.scheduler": scheduler, "fetch.inflight": inflight,
         "dram.latency_ns": 200.0})
    doc = sim.simulate(arch, os.path.join(ROOT, "traces", "demo_decode.yaml"), keep_intervals=False).to_dict()
    latency_cycles = 200.0 * arch.clock_ghz            # the config's own values, not the pool's
    requests = doc["fetch"]["requests"]
    assert requests > 0
    assert doc["cycles"] >= requests * latency_cycles / inflight * (1 - 1e-9), (doc["cycles"], requests)
