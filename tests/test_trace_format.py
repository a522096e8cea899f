"""Trace format: both encodings, round trips, and refusal of bad traces."""

import copy
import json
import os
import zipfile

import numpy as np
import pytest
import yaml

from sim.errors import TraceError
from sim.trace.format import FORMAT_VERSION, Trace, make_step, new_header
from sim.trace.files import load_trace, save_trace
from sim.trace.npz import to_arrays

HERE = os.path.dirname(os.path.abspath(__file__))
TRACES = os.path.join(os.path.dirname(HERE), "traces")


def bundled(name):
    return os.path.join(TRACES, name)


def base_doc():
    """A small valid YAML trace document: 2 prefill layers, 1 decode pass."""
    return {
        "header": {"format": "attnsim-trace", "version": 1, "name": "t",
                   "provenance": {"method": "hand"},
                   "model": {"layers": 2, "heads": 3, "head_dim": 16}},
        "steps": [
            {"layer": 0, "stage": "prefill", "head_dim": 16, "heads": [0, 1, 2], "q_rows": 6,
             "kv_rows": 6, "kept_k": 6, "kept_v": [6, 6, 6], "lsb_rows": [0, 2, 0],
             "token_scores": [3.0, 1.0, 4.0, 0.5, 5.0, 4.5], "head_scores": [1.0, 0.2, 2.0]},
            {"layer": 1, "stage": "prefill", "head_dim": 16, "heads": [0, 2], "q_rows": 4,
             "kv_rows": 6, "kept_k": [0, 2, 4, 5], "kept_v": [4, 4], "lsb_rows": [1, 0]},
            {"layer": 0, "stage": "decode", "head_dim": 16, "heads": [0, 1, 2], "q_rows": 1,
             "kv_rows": 7, "kept_k": 7, "kept_v": [3, 2, 3], "lsb_rows": [0, 0, 1],
             "kept_v_idx": [[0, 4, 6], [2, 6], [1, 5, 6]]},
            {"layer": 1, "stage": "decode", "head_dim": 16, "heads": [0, 2], "q_rows": 1,
             "kv_rows": 7, "kept_k": [0, 2, 4, 5, 6], "kept_v": [5, 5], "lsb_rows": [0, 0]},
        ],
    }


def write_yaml(tmp_path, doc, name="t.yaml"):
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


def refused(tmp_path, doc):
    with pytest.raises(TraceError) as err:
        load_trace(write_yaml(tmp_path, doc))
    return err.value


# --------------------------------------------------------------------------
# Round trips


@pytest.mark.parametrize("name", ["demo_prefill.yaml", "demo_decode.yaml",
                                  "synth_prefill.npz", "synth_decode.npz"])
def test_bundled_round_trip_keeps_the_digest(tmp_path, name):
    t = load_trace(bundled(name))
    d = t.digest()
    save_trace(t, tmp_path / "a.npz")
    a = load_trace(tmp_path / "a.npz")
    save_trace(a, tmp_path / "b.yaml")
    b = load_trace(tmp_path / "b.yaml")
    save_trace(b, tmp_path / "c.npz")
    c = load_trace(tmp_path / "c.npz")
    assert a.digest() == b.digest() == c.digest() == d
    assert len(c.steps) == len(t.steps)
    for s0, s1 in zip(t.steps, c.steps):
        assert (s0.layer, s0.stage, s0.q_rows, s0.kv_rows) == (s1.layer, s1.stage, s1.q_rows, s1.kv_rows)
        np.testing.assert_array_equal(s0.kept_k, s1.kept_k)
        np.testing.assert_array_equal(s0.kept_v, s1.kept_v)
        np.testing.assert_array_equal(s0.lsb_rows, s1.lsb_rows)
        assert (s0.kept_v_idx is None) == (s1.kept_v_idx is None)
        assert (s0.token_scores is None) == (s1.token_scores is None)
        assert (s0.head_scores is None) == (s1.head_scores is None)


def test_yaml_round_trip_of_a_written_trace(tmp_path):
    t = load_trace(write_yaml(tmp_path, base_doc()))
    save_trace(t, tmp_path / "x.npz")
    save_trace(load_trace(tmp_path / "x.npz"), tmp_path / "x.yaml")
    back = load_trace(tmp_path / "x.yaml")
    assert back.digest() == t.digest()
    assert back.steps[2].kept_v_idx[1].tolist() == [2, 6]
    assert back.steps[0].token_scores.tolist() == [3.0, 1.0, 4.0, 0.5, 5.0, 4.5]
    assert back.steps[1].head_scores is None


def test_digest_sees_a_change(tmp_path):
    a = load_trace(write_yaml(tmp_path, base_doc()))
    doc = base_doc()
    doc["steps"][1]["lsb_rows"] = [2, 0]
    b = load_trace(write_yaml(tmp_path, doc, "b.yaml"))
    assert a.digest() != b.digest()


def test_npz_header_is_json_bytes_and_arrays_are_plain(tmp_path):
    """The .npz holds only plain numeric arrays (NumPy .npy format, no object dtype)."""
    t = load_trace(bundled("synth_decode.npz"))
    p = save_trace(t, tmp_path / "t.npz")
    with np.load(p, allow_pickle=False) as z:
        for key in z.files:
            assert z[key].dtype != object
        header = json.loads(z["header"].tobytes().decode("utf-8"))
    assert header["version"] == FORMAT_VERSION
    assert header["provenance"]["method"] == "synth"


def test_save_is_validated_and_atomic(tmp_path):
    t = load_trace(write_yaml(tmp_path, base_doc()))
    t.steps[1].kept_k = np.array([0, 2, 4, 9])  # out of range
    target = tmp_path / "out.npz"
    with pytest.raises(TraceError):
        save_trace(t, target)
    assert not target.exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".tmp-")] == []


# --------------------------------------------------------------------------
# allow_pickle=False


class _Boom:
    """Unpickling this would create a marker file: the loader must never do it."""

    marker = None

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_pickled_npz_is_refused_without_unpickling(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_prefill.npz")))
    marker = tmp_path / "unpickled"
    _Boom.marker = str(marker)
    arrays["kept_v"] = np.array([_Boom()] * len(arrays["kept_v"]), dtype=object)
    p = tmp_path / "evil.npz"
    np.savez(p, **arrays)  # np.save pickles object arrays
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert "plain-array" in err.value.expected
    assert not marker.exists()


def test_damaged_npz_is_refused(tmp_path):
    p = tmp_path / "bad.npz"
    p.write_bytes(b"PK\x03\x04 this is not a zip archive")
    with pytest.raises(TraceError, match="cannot read"):
        load_trace(p)


# --------------------------------------------------------------------------
# Versions


@pytest.mark.parametrize("version", [3, 0, "2", True, None])
def test_unknown_version_is_refused_in_yaml(tmp_path, version):
    doc = base_doc()
    doc["header"]["version"] = version
    err = refused(tmp_path, doc)
    assert err.field == "header.version"
    assert err.value == version
    assert "reads version 1 or 2" in err.expected and f"writes {FORMAT_VERSION}" in err.expected


def test_unknown_version_is_refused_in_npz(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_prefill.npz")))
    hdr = json.loads(arrays["header"].tobytes())
    hdr["version"] = 99
    arrays["header"] = np.frombuffer(json.dumps(hdr).encode(), dtype=np.uint8)
    del arrays["kept_k"]  # refused on the version before the layout is looked at
    p = tmp_path / "v99.npz"
    np.savez(p, **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert err.value.field == "header.version"
    assert err.value.value == 99


def test_wrong_format_name_is_refused(tmp_path):
    doc = base_doc()
    doc["header"]["format"] = "something-else"
    assert refused(tmp_path, doc).field == "header.format"


# --------------------------------------------------------------------------
# Out-of-range indices


@pytest.mark.parametrize("step, key, value, field", [
    (1, "kept_k", [0, 2, 4, 6], "steps[1].kept_k"),          # kv_rows = 6
    (1, "kept_k", [-1, 2, 4, 5], "steps[1].kept_k"),
    (1, "kept_k", [0, 4, 2, 5], "steps[1].kept_k"),          # not sorted
    (1, "kept_k", [0, 2, 2, 5], "steps[1].kept_k"),          # repeated
    (2, "kept_v", [3, 8, 3], "steps[2].kept_v"),             # more than kept_k
    (3, "kept_v", [0, 5], "steps[3].kept_v"),
    (1, "lsb_rows", [5, 0], "steps[1].lsb_rows"),            # more than q_rows
    (1, "lsb_rows", [-1, 0], "steps[1].lsb_rows"),
    (0, "heads", [0, 1, 3], "steps[0].heads"),               # model has 3 heads
    (0, "heads", [0, 1, 1], "steps[0].heads"),
    (3, "layer", 2, "steps[3].layer"),                       # model has 2 layers
])
def test_out_of_range_values_are_refused(tmp_path, step, key, value, field):
    doc = base_doc()
    doc["steps"][step][key] = value
    err = refused(tmp_path, doc)
    assert err.field == field
    assert err.source.endswith("t.yaml")


def test_kept_v_idx_outside_kept_k_is_refused(tmp_path):
    doc = base_doc()
    doc["steps"][3]["kept_v"] = [2, 2]
    doc["steps"][3]["kept_v_idx"] = [[0, 2], [1, 6]]  # row 1 was pruned at layer 1
    err = refused(tmp_path, doc)
    assert err.field == "steps[3].kept_v_idx[1]"
    assert "drawn from kept_k" in err.expected


def test_kept_v_idx_unsorted_is_refused(tmp_path):
    doc = base_doc()
    doc["steps"][2]["kept_v_idx"] = [[0, 4, 6], [6, 2], [1, 5, 6]]
    assert refused(tmp_path, doc).field == "steps[2].kept_v_idx[1]"


def test_prefill_query_rows_follow_the_live_tokens(tmp_path):
    doc = base_doc()
    doc["steps"][1]["q_rows"] = 6
    err = refused(tmp_path, doc)
    assert err.field == "steps[1].q_rows"
    assert "expected 4" in err.expected


def test_head_dim_must_match_the_model(tmp_path):
    doc = base_doc()
    doc["steps"][0]["head_dim"] = 32
    assert refused(tmp_path, doc).field == "steps[0].head_dim"


# --------------------------------------------------------------------------
# Head counts that disagree


@pytest.mark.parametrize("step, key, value, field", [
    (0, "kept_v", [6, 6], "steps[0].kept_v"),
    (0, "lsb_rows", [0, 0, 0, 0], "steps[0].lsb_rows"),
    (0, "head_scores", [1.0, 2.0], "steps[0].head_scores"),
    (2, "kept_v_idx", [[0, 4, 6], [2, 6]], "steps[2].kept_v_idx"),
    (2, "kept_v_idx", [[0, 4, 6], [2, 6, 5], [1, 5, 6]], "steps[2].kept_v_idx[1]"),  # kept_v[1] = 2
    (0, "token_scores", [1.0, 2.0], "steps[0].token_scores"),
])
def test_per_head_lengths_must_agree(tmp_path, step, key, value, field):
    doc = base_doc()
    doc["steps"][step][key] = value
    err = refused(tmp_path, doc)
    assert err.field == field


def test_npz_head_arrays_that_disagree_are_refused(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_prefill.npz")))
    arrays["kept_v"] = arrays["kept_v"][:-1]
    p = tmp_path / "short.npz"
    np.savez(p, **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert err.value.field == "kept_v"
    assert "one per head-step" in err.value.expected


def test_npz_offsets_that_overrun_are_refused(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_decode.npz")))
    arrays["kept_v_idx_off"] = arrays["kept_v_idx_off"] + 5
    p = tmp_path / "off.npz"
    np.savez(p, **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert err.value.field == "kept_v_idx_off"


def test_npz_float_indices_are_refused(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_prefill.npz")))
    arrays["kept_k"] = arrays["kept_k"].astype(np.float64) + 0.5
    p = tmp_path / "float.npz"
    np.savez(p, **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert err.value.field == "kept_k"


# --------------------------------------------------------------------------
# Cascade


def test_cascade_token_violation_is_refused(tmp_path):
    doc = base_doc()
    # layer 1 pruned row 3; a third prefill layer brings it back
    doc["header"]["model"]["layers"] = 3
    doc["steps"].insert(2, {"layer": 2, "stage": "prefill", "head_dim": 16, "heads": [0],
                            "q_rows": 2, "kv_rows": 6, "kept_k": [3, 4],
                            "kept_v": [2], "lsb_rows": [0]})
    err = refused(tmp_path, doc)
    assert err.field == "steps[2].kept_k"
    assert err.value == [3]
    assert "cascade" in err.expected


def test_cascade_head_violation_is_refused(tmp_path):
    doc = base_doc()  # layer 1 pruned head 1; a third layer brings it back
    doc["header"]["model"]["layers"] = 3
    doc["steps"].insert(2, {"layer": 2, "stage": "prefill", "head_dim": 16, "heads": [1],
                            "q_rows": 4, "kv_rows": 6, "kept_k": [0, 2, 4, 5],
                            "kept_v": [4], "lsb_rows": [0]})
    err = refused(tmp_path, doc)
    assert err.field == "steps[2].heads"
    assert err.value == [1]


def test_decode_may_attend_to_more_rows_than_the_last_prefill_layer(tmp_path):
    # a new pass (decode) is not a cascade continuation
    load_trace(write_yaml(tmp_path, base_doc()))


# --------------------------------------------------------------------------
# Missing fields and unknown keys


@pytest.mark.parametrize("key", ["layer", "stage", "head_dim", "heads", "q_rows", "kv_rows"])
def test_missing_required_step_field(tmp_path, key):
    doc = base_doc()
    del doc["steps"][1][key]
    err = refused(tmp_path, doc)
    assert err.field == f"steps[1].{key}"
    assert "missing" in err.expected


def test_missing_provenance(tmp_path):
    doc = base_doc()
    del doc["header"]["provenance"]
    assert refused(tmp_path, doc).field == "header.provenance"
    doc["header"]["provenance"] = {"seed": 1}
    assert refused(tmp_path, doc).field == "header.provenance"


def test_missing_steps(tmp_path):
    doc = base_doc()
    doc["steps"] = []
    assert refused(tmp_path, doc).field == "steps"
    del doc["steps"]
    assert refused(tmp_path, doc).field == "steps"


def test_missing_npz_array(tmp_path):
    arrays = to_arrays(load_trace(bundled("synth_prefill.npz")))
    del arrays["lsb_rows"]
    p = tmp_path / "missing.npz"
    np.savez(p, **arrays)
    with pytest.raises(TraceError) as err:
        load_trace(p)
    assert err.value.field == "lsb_rows"


@pytest.mark.parametrize("where, key, hint", [
    ("step", "kept_kk", "kept_k"),
    ("step", "lsb_row", "lsb_rows"),
    ("step", "token_score", "token_scores"),
    ("header", "provenence", "provenance"),
    ("root", "step", "steps"),
])
def test_unknown_keys_name_the_closest(tmp_path, where, key, hint):
    doc = base_doc()
    target = {"step": doc["steps"][0], "header": doc["header"], "root": doc}[where]
    target[key] = 1
    err = refused(tmp_path, doc)
    assert f"did you mean '{hint}'" in err.expected


def test_unknown_stage_names_the_closest(tmp_path):
    doc = base_doc()
    doc["steps"][0]["stage"] = "prefil"
    err = refused(tmp_path, doc)
    assert err.field == "steps[0].stage"
    assert "did you mean 'prefill'" in err.expected


@pytest.mark.parametrize("key, value", [("layer", 1.5), ("q_rows", "6"), ("kept_v", [6, 6.5, 6]),
                                        ("heads", [0, True, 2]), ("kept_k", "six")])
def test_wrong_kinds_are_refused(tmp_path, key, value):
    doc = base_doc()
    doc["steps"][0][key] = value
    err = refused(tmp_path, doc)
    assert err.field.startswith("steps[0]")


def test_file_level_errors(tmp_path):
    with pytest.raises(TraceError, match="file not found"):
        load_trace(tmp_path / "nope.yaml")
    (tmp_path / "t.csv").write_text("x")
    with pytest.raises(TraceError, match=r"\.npz or \.yaml"):
        load_trace(tmp_path / "t.csv")
    (tmp_path / "b.yaml").write_text("header: [unclosed\n")
    with pytest.raises(TraceError, match="not valid YAML"):
        load_trace(tmp_path / "b.yaml")
    (tmp_path / "l.yaml").write_text("- 1\n")
    with pytest.raises(TraceError, match="'header' and 'steps'"):
        load_trace(tmp_path / "l.yaml")


def test_error_message_is_one_line(tmp_path):
    doc = base_doc()
    doc["steps"][1]["kept_k"] = [0, 2, 4, 60]
    err = refused(tmp_path, doc)
    assert "\n" not in str(err)
    assert err.line is not None  # the line of the key in the file
    assert str(err).startswith(f"{err.source}:{err.line}: steps[1].kept_k = [60]: ")


# --------------------------------------------------------------------------
# In-memory building


def test_make_step_defaults_and_macs():
    """q.K is n_q * n_kv * d MACs per head and p.V is n_q * n_kept_v * d
    (shared/references.md, common practice)."""
    s = make_step(0, "decode", 64, 4, 1, 100, kept_k=80, kept_v=[40, 40, 80, 20])
    assert s.heads.tolist() == [0, 1, 2, 3]
    assert s.kept_k.tolist() == list(range(80))
    qk, pv = s.macs()
    assert qk == 4 * 1 * 80 * 64
    assert pv == 1 * (40 + 40 + 80 + 20) * 64
    t = Trace(new_header("hand"), [s], "<test>")
    from sim.trace.format import validate
    validate(t)
    assert t.summary()["kept_value_fraction"] == pytest.approx(180 / 320)


def test_header_is_not_shared_between_loads(tmp_path):
    p = write_yaml(tmp_path, base_doc())
    a = load_trace(p)
    a.header["name"] = "changed"
    assert load_trace(p).header["name"] == "t"
    assert copy.deepcopy(a.header) == a.header


def test_npz_is_a_zip_of_npy_members(tmp_path):
    """NumPy's .npz is a zip archive of .npy members (numpy.savez documentation)."""
    p = save_trace(load_trace(bundled("demo_prefill.yaml")), tmp_path / "d.npz")
    with zipfile.ZipFile(p) as z:
        names = set(z.namelist())
    assert {"header.npy", "layer.npy", "kept_k.npy", "kept_k_lo.npy", "kept_k_hi.npy", "kv_heads.npy",
            "request.npy", "causal.npy", "window.npy", "new_kv_rows.npy", "out_rows.npy"} <= names
