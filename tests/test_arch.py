"""Architecture configs: loading, extends, validation, dotted paths, derived peaks."""

import os

import pytest
import yaml

from sim.arch import MAIN_KNOBS, SCHEMA, field_for, knob_paths, load_arch
from sim.errors import ConfigError, InputError

HERE = os.path.dirname(os.path.abspath(__file__))
CONFIGS = os.path.join(os.path.dirname(HERE), "arch_configs")
BUNDLED = ["edge.yaml", "mid.yaml", "server.yaml", "hbm2_stack.yaml"]


def cfg(name):
    return os.path.join(CONFIGS, name)


def write(tmp_path, name, doc):
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(yaml.safe_dump(doc) if not isinstance(doc, str) else doc)
    return str(path)


# --------------------------------------------------------------------------
# Bundled configs


@pytest.mark.parametrize("name", BUNDLED)
def test_bundled_configs_load_and_name_themselves(name):
    arch = load_arch(cfg(name))
    assert arch.name == os.path.splitext(name)[0]
    assert arch.description
    assert "extends" not in arch.to_dict()


def test_hbm2_stack_peak_is_256_gbps():
    """JEDEC JESD235A (HBM2): 8 channels per stack, each a 128-bit DDR bus at
    2.0 Gb/s per pin -> 128 * 2.0 / 8 = 32 GB/s; 8 * 32 = 256 GB/s per stack."""
    arch = load_arch(cfg("hbm2_stack.yaml"))
    assert arch.dram.channels == 8
    assert arch.dram.channel_gbps == 128 * 2.0 / 8
    assert arch.peak_gbps == 256.0
    pk = arch.peaks(64)
    assert pk["gbps"] == 256.0
    # hand arithmetic: 16384 multipliers at 1 GHz, 256 bytes per cycle
    assert pk["macs_per_s"] == 16384 * 1e9
    assert pk["bytes_per_cycle"] == 256.0
    assert pk["machine_balance_mac_per_byte"] == pytest.approx(16384e9 / 256e9)  # 64
    # 1024 KiB of 64-wide keys at 4 MSB bits = 32 B per row -> 32768 rows
    assert pk["key_buffer_rows"] == 1024 * 1024 // (64 * 4 // 8)
    # 1024 KiB of 64-wide values at 8 bits = 64 B per row -> 16384 rows
    assert pk["value_buffer_rows"] == 1024 * 1024 // 64


def test_mid_channel_is_a_ddr4_3200_channel():
    """JEDEC JESD79-4: a 64-bit DDR4-3200 channel moves 3200e6 * 8 B = 25.6 GB/s,
    burst length 8 on 64 bits = 64 B."""
    arch = load_arch(cfg("mid.yaml"))
    assert arch.dram.channel_gbps == pytest.approx(3200e6 * 64 / 8 / 1e9)
    assert arch.dram.burst_bytes == 8 * 64 // 8
    assert arch.peak_gbps == pytest.approx(4 * 25.6)
    assert arch.peak_macs_per_s == 1024 * 1.0e9
    assert arch.machine_balance == pytest.approx(1024e9 / 102.4e9)  # 10 MAC per byte
    # 16 KiB of 64-wide 8-bit queries = 256 rows
    assert arch.query_rows(64) == 16 * 1024 // 64


def test_edge_peaks_by_hand():
    arch = load_arch(cfg("edge.yaml"))
    assert arch.peak_macs_per_s == pytest.approx(128 * 0.8e9)
    assert arch.peak_gbps == pytest.approx(2 * 8.5)
    assert arch.bytes_per_cycle == pytest.approx(17.0 / 0.8)
    # 16 KiB key buffer, head_dim 32, 4-bit MSB plane = 16 B per row -> 1024 rows
    assert arch.key_rows(32) == 16 * 1024 // 16


def test_server_extends_mid():
    mid = load_arch(cfg("mid.yaml")).to_dict()
    server = load_arch(cfg("server.yaml")).to_dict()
    # overridden
    assert server["dot"]["multipliers"] == 8192
    assert server["dot"]["arrays"] == "separate"
    assert server["dram"]["channels"] == 16
    # inherited from mid.yaml, key by key within a section
    assert server["dot"]["tile_rows"] == mid["dot"]["tile_rows"]
    assert server["dram"]["interleave_bytes"] == mid["dram"]["interleave_bytes"]
    assert server["precision"] == mid["precision"]
    assert server["softmax"]["latency_cycles"] == mid["softmax"]["latency_cycles"]
    # two HBM2-class stacks: 16 x 32 GB/s (JEDEC JESD235A per-channel rate)
    assert load_arch(cfg("server.yaml")).peak_gbps == 16 * 32.0


# --------------------------------------------------------------------------
# extends


def test_extends_chain_and_precedence(tmp_path):
    write(tmp_path, "base/c.yaml", {"name": "c", "dot": {"multipliers": 256, "lanes": 32},
                                    "dram": {"channels": 2}})
    write(tmp_path, "base/b.yaml", {"extends": "c.yaml", "name": "b", "dram": {"channels": 4}})
    a = write(tmp_path, "a.yaml", {"extends": "base/b.yaml", "name": "a", "dot": {"lanes": 64}})
    arch = load_arch(a)
    assert arch.name == "a"
    assert arch.dram.channels == 4          # from b, over c
    assert arch.dot.multipliers == 256      # from c
    assert arch.dot.lanes == 64             # from a
    assert arch.buffers.key_kib == SCHEMA["buffers"]["key_kib"].default


def test_extends_cycle_is_refused(tmp_path):
    write(tmp_path, "x.yaml", {"extends": "y.yaml"})
    write(tmp_path, "y.yaml", {"extends": "z.yaml"})
    write(tmp_path, "z.yaml", {"extends": "x.yaml"})
    with pytest.raises(ConfigError) as err:
        load_arch(str(tmp_path / "x.yaml"))
    assert err.value.field == "extends"
    assert "cycle" in err.value.expected


def test_extends_itself_is_refused(tmp_path):
    p = write(tmp_path, "self.yaml", {"extends": "self.yaml"})
    with pytest.raises(ConfigError, match="cycle"):
        load_arch(p)


def test_extends_missing_parent_names_it_and_the_referencing_file(tmp_path):
    p = write(tmp_path, "child.yaml", {"name": "c", "extends": "nowhere.yaml"})
    with pytest.raises(ConfigError) as err:
        load_arch(p)
    assert err.value.source == p and err.value.line is not None and err.value.field == "extends"
    assert "nowhere.yaml" in str(err.value) and "not found" in err.value.expected


def test_extends_in_a_mapping_is_resolved_from_the_working_directory(monkeypatch):
    monkeypatch.chdir(CONFIGS)
    arch = load_arch({"extends": "mid.yaml", "name": "tweak", "dot": {"multipliers": 2048}})
    assert arch.dot.multipliers == 2048
    assert arch.dram.channels == 4


# --------------------------------------------------------------------------
# Validation


@pytest.mark.parametrize("doc, field, hint", [
    ({"dot": {"multiplers": 4}}, "dot.multiplers", "multipliers"),
    ({"clock_gz": 1.0}, "clock_gz", "clock_ghz"),
    ({"buffer": {"key_kib": 8}}, "buffer", "buffers"),
    ({"dram": {"chanels": 2}}, "dram.chanels", "channels"),
    ({"softmax": {"lane": 8}}, "softmax.lane", "lanes"),
])
def test_unknown_key_names_the_closest(tmp_path, doc, field, hint):
    p = write(tmp_path, "bad.yaml", doc)
    with pytest.raises(ConfigError) as err:
        load_arch(p)
    assert err.value.field == field
    assert f"did you mean '{hint}'" in str(err.value)
    assert err.value.source == p


@pytest.mark.parametrize("path, value", [
    ("buffers.key_kib", 0), ("buffers.value_kib", -4), ("dram.channels", 0),
    ("dot.multipliers", 0), ("clock_ghz", 0), ("dram.channel_gbps", -1.0),
    ("dram.burst_bytes", 0), ("fetch.inflight", 0), ("topk.comparators", -2),
])
def test_non_positive_sizes_are_refused(tmp_path, path, value):
    section, _, key = path.rpartition(".")
    doc = {section: {key: value}} if section else {key: value}
    if path == "dot.multipliers":
        doc["dot"]["lanes"] = 1  # so the size rule, not the lanes rule, is what fires
    p = write(tmp_path, "bad.yaml", doc)
    with pytest.raises(ConfigError) as err:
        load_arch(p)
    assert err.value.field == path
    assert err.value.value == value
    assert ">" in err.value.expected


def test_zero_latency_is_allowed_where_the_schema_says_so():
    arch = load_arch({"dot": {"pipeline_cycles": 0}, "softmax": {"latency_cycles": 0}})
    assert arch.dot.pipeline_cycles == 0
    with pytest.raises(ConfigError, match=">= 0"):
        load_arch({"dot": {"pipeline_cycles": -1}})


@pytest.mark.parametrize("doc, field", [
    ({"dram": {"channels": "two"}}, "dram.channels"),
    ({"dram": {"channels": True}}, "dram.channels"),
    ({"dram": {"channels": 2.5}}, "dram.channels"),
    ({"clock_ghz": "fast"}, "clock_ghz"),
    ({"clock_ghz": float("inf")}, "clock_ghz"),
    ({"dot": {"arrays": "shard"}}, "dot.arrays"),
    ({"dot": 5}, "dot"),
    ({"name": 7}, "name"),
])
def test_wrong_kinds_are_refused(doc, field):
    with pytest.raises(ConfigError) as err:
        load_arch(doc)
    assert err.value.field == field


def test_choice_names_the_closest():
    with pytest.raises(ConfigError, match="did you mean 'shared'"):
        load_arch({"dot": {"arrays": "shard"}})


@pytest.mark.parametrize("value", [4.0, 1e300, 1e3])
def test_a_float_is_not_a_whole_number(value):
    """Whole-number knobs take integers only (YAML 1.2 reads 1e3 as a float)."""
    with pytest.raises(ConfigError, match="expected a whole number"):
        load_arch({"dram": {"channels": value}})


@pytest.mark.parametrize("doc, field", [
    ({"dram": {"burst_bytes": 64, "interleave_bytes": 96}}, "dram.interleave_bytes"),
    ({"dram": {"burst_bytes": 64}, "fetch": {"request_bytes": 100}}, "fetch.request_bytes"),
    ({"dot": {"multipliers": 32, "lanes": 64}}, "dot.lanes"),
    ({"dot": {"multipliers": 100, "lanes": 64}}, "dot.multipliers"),
])
def test_consistency_rules_name_the_field(doc, field):
    with pytest.raises(ConfigError) as err:
        load_arch(doc)
    assert err.value.field == field


def test_file_errors(tmp_path):
    with pytest.raises(ConfigError, match="file not found"):
        load_arch(str(tmp_path / "missing.yaml"))
    bad = write(tmp_path, "broken.yaml", "dot: {multipliers: [1, 2\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_arch(bad)
    lst = write(tmp_path, "list.yaml", "- 1\n- 2\n")
    with pytest.raises(ConfigError, match="mapping"):
        load_arch(lst)
    with pytest.raises(ConfigError):
        load_arch(42)


def test_error_is_one_line_naming_file_field_value():
    with pytest.raises(InputError) as err:
        load_arch({"buffers": {"key_kib": -8}}, source="my.yaml")
    text = str(err.value)
    assert "\n" not in text
    assert text.startswith("my.yaml: buffers.key_kib = -8: ")


def test_empty_file_gives_the_defaults(tmp_path):
    arch = load_arch(write(tmp_path, "empty.yaml", ""))
    for section, fields in SCHEMA.items():
        for key, field in fields.items():
            path = f"{section}.{key}" if section else key
            assert arch.get(path) == field.default


# --------------------------------------------------------------------------
# to_dict, overrides, dotted paths


@pytest.mark.parametrize("name", BUNDLED)
def test_to_dict_round_trips(tmp_path, name):
    arch = load_arch(cfg(name))
    d = arch.to_dict()
    assert load_arch(d).to_dict() == d
    p = write(tmp_path, "copy.yaml", d)
    assert load_arch(p).to_dict() == d
    # fully resolved: every schema knob is present, nothing else
    flat = {f"{s}.{k}" if s else k for s, fields in d.items() if isinstance(fields, dict)
            for k in fields} | {k for k, v in d.items() if not isinstance(v, dict)}
    assert flat == set(knob_paths())


def test_to_dict_is_a_copy():
    arch = load_arch(cfg("mid.yaml"))
    d = arch.to_dict()
    d["dot"]["multipliers"] = 1
    assert arch.dot.multipliers == 1024
    assert arch.to_dict()["dot"]["multipliers"] == 1024


def test_with_overrides():
    base = load_arch(cfg("mid.yaml"))
    new = base.with_overrides({"dot.multipliers": 2048, "buffers.key_kib": 128, "clock_ghz": 2.0})
    assert new.dot.multipliers == 2048
    assert new.peak_macs_per_s == 2048 * 2.0e9
    assert new.key_rows(64) == 128 * 1024 // 32
    assert new.dram.channels == base.dram.channels
    assert base.dot.multipliers == 1024  # the original is untouched
    assert load_arch(new.to_dict()).to_dict() == new.to_dict()


def test_with_overrides_validates():
    base = load_arch(cfg("mid.yaml"))
    with pytest.raises(ConfigError) as err:
        base.with_overrides({"dot.multiplier": 2048})
    assert "did you mean 'dot.multipliers'" in str(err.value)
    with pytest.raises(ConfigError) as err:
        base.with_overrides({"buffers.key_kib": 0})
    assert err.value.field == "buffers.key_kib"
    with pytest.raises(ConfigError):
        base.with_overrides({"dot": {"multipliers": 8}})  # a section is not a knob


def test_main_knobs_are_dotted_paths():
    arch = load_arch(cfg("server.yaml"))
    paths = knob_paths()
    for knob in MAIN_KNOBS:
        assert knob in paths
        assert field_for(knob) is not None
    assert arch.get("dot.multipliers") == arch.dot.multipliers == 8192
    assert arch.get("buffers.key_kib") == 512
    assert arch.get("clock_ghz") == 1.2
    assert arch.get("dram.channels") == 16


def test_get_unknown_path_names_the_closest():
    arch = load_arch(cfg("mid.yaml"))
    with pytest.raises(ConfigError, match="did you mean 'dot.multipliers'"):
        arch.get("dot.multiplers")
