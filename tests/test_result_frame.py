"""`Result.to_frame()` and `Result.unit_frame()` hold the document's numbers under the
store's column names. Expected values are read from the result document with
plain dictionary lookups (not through the flattening code); the state fractions
of a unit sum to 1 by the design's definition of unit states.
"""

import pytest

import sim


@pytest.fixture(scope="module")
def result():
    return sim.simulate(sim.load_arch("arch_configs/mid.yaml"), sim.load_trace("traces/demo_decode.yaml"))


def test_to_frame_is_one_row_of_the_document(result):
    doc = result.to_dict()
    df = result.to_frame()
    assert len(df) == 1
    row = df.iloc[0]
    assert row["cycles"] == doc["cycles"] and row["seconds"] == doc["seconds"]
    assert row["energy.total_pj"] == doc["energy"]["total_pj"] and row["area.total_mm2"] == doc["area"]["total_mm2"]
    assert row["dram.bytes"] == doc["dram"]["bytes"] and row["trace"] == doc["trace"]["name"]
    for unit, u in doc["units"].items():
        for state in ("busy", "starved", "blocked", "idle"):
            assert row[f"units.{unit}.{state}"] == u[state]
        ranked = sorted(u["stalls"].items(), key=lambda kv: (-kv[1], kv[0]))   # largest; ties by name
        if ranked:
            assert row[f"units.{unit}.stall1"] == ranked[0][0]
            assert row[f"units.{unit}.stall1_fraction"] == ranked[0][1]
    for section, knobs in doc["arch"]["config"].items():
        if isinstance(knobs, dict):
            for k, v in knobs.items():
                if not isinstance(v, (dict, list)):
                    assert row[f"config.{section}.{k}"] == v
    # the sweep table's names: every figure column of the store appears here too
    from sim.columns import figure_columns
    present = set(doc["units"])
    for name, _kind in figure_columns():
        parts = name.split(".")
        if parts[0] != "units" or parts[1] in present:
            assert name in df.columns


def test_unit_frame_rows_and_stalls(result):
    doc = result.to_dict()
    uf = result.unit_frame()
    assert list(uf.index) == list(doc["units"])
    for unit, u in doc["units"].items():
        r = uf.loc[unit]
        assert r[["busy", "starved", "blocked", "idle"]].sum() == pytest.approx(1.0, abs=1e-9)
        for cause in [c[len("stall."):] for c in uf.columns if c.startswith("stall.")]:
            assert r[f"stall.{cause}"] == u["stalls"].get(cause, 0.0)


def test_dram_stall_classification_does_not_depend_on_its_block_size(monkeypatch):
    """The pool's non-busy time is classified a block of fetch intervals at a time (so a
    long run's temporaries stay small); blocks of 3 give the fractions of one block, to
    the rounding of a sum taken in pieces (arithmetic: a sum does not depend on grouping)."""
    import sim.engine.stats as stats_mod

    arch, trace = sim.load_arch("arch_configs/mid.yaml"), sim.load_trace("traces/synth_decode.npz")
    whole = sim.simulate(arch, trace).to_dict()["units"]["dram"]
    monkeypatch.setattr(stats_mod, "STALL_BLOCK", 3)
    blocks = sim.simulate(arch, trace).to_dict()["units"]["dram"]
    assert set(blocks["stalls"]) == set(whole["stalls"]) and list(blocks["stalls"])[:1] == list(whole["stalls"])[:1]
    for state in ("busy", "starved", "blocked", "idle"):
        assert blocks[state] == pytest.approx(whole[state], rel=1e-9, abs=1e-12)
    for cause, frac in whole["stalls"].items():
        assert blocks["stalls"][cause] == pytest.approx(frac, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("model", ["banked", "fixed-latency"])
def test_bus_time_handed_over_during_the_run_gives_the_same_stall_split(monkeypatch, model):
    """Without a timeline the channel pool hands its final data-bus intervals to a fold
    during the run instead of keeping them all (memory bounded on long runs); the memory's
    state fractions and stall split equal those computed from every interval kept, to the
    rounding of a sum taken in pieces (arithmetic: a sum does not depend on grouping)."""
    import sim.engine.dram as dram_mod
    import sim.engine.stats as stats_mod
    from sim.trace.synth import synth_trace

    monkeypatch.setattr(dram_mod, "FOLD_INTERVALS", 1024)
    folds = []
    real = stats_mod.BusyFold.__call__
    monkeypatch.setattr(stats_mod.BusyFold, "__call__", lambda self: (folds.append(1), real(self))[1])
    arch = sim.load_arch("arch_configs/mid.yaml").with_overrides({"dram.model": model})
    trace = synth_trace(prompt_tokens=1024, decode_steps=2, shape="dec-8b", layers=1, causal=True, seed=1)
    kept = sim.simulate(arch, trace, keep_intervals=True).to_dict()
    assert not folds                          # a timeline keeps every interval
    folded = sim.simulate(arch, trace, keep_intervals=False).to_dict()
    assert len(folds) >= 3                    # and this run handed intervals over several times
    assert folded["cycles"] == kept["cycles"]
    a, b = kept["units"]["dram"], folded["units"]["dram"]
    for state in ("busy", "starved", "blocked", "idle"):
        assert b[state] == pytest.approx(a[state], rel=1e-9, abs=1e-12)
    assert list(b["stalls"]) == list(a["stalls"])
    for cause, frac in a["stalls"].items():
        assert b["stalls"][cause] == pytest.approx(frac, rel=1e-9, abs=1e-12)
