"""One regression test per reproducer of the "every bad input refused in one
line" report: each bad input gives exit status 2 and one ``attnsim: error:``
line naming the file (or option), never a traceback or a hang; outputs are
checked before any work and never replace an input or an existing file
without --force. Common practice, no source: that is how a command-line tool
treats bad input. The inputs are our own, derived from the bundled files.
"""

import io
import json
import os
import subprocess
import sys
import zipfile

import numpy as np
import pytest
import yaml

from sim.cli import main
from sim.trace.files import load_trace, save_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")
NPZ = os.path.join(ROOT, "traces", "synth_prefill.npz")
DEMO = os.path.join(ROOT, "traces", "demo_prefill.yaml")


def cli(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def refused(capsys, *argv, words=()):
    code, out, err = cli(capsys, *argv)
    lines = err.strip().splitlines()
    assert code == 2, (code, out, err)
    assert len(lines) == 1 and lines[0].startswith("attnsim: error: "), err
    assert "Traceback" not in err
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


def text(path, data):
    mode = "wb" if isinstance(data, bytes) else "w"
    with open(path, mode) as fh:
        fh.write(data)
    return str(path)


def trace_doc():
    with open(DEMO, encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def bad_trace(tmp_path, change):
    doc = trace_doc()
    change(doc)
    return text(tmp_path / "t.yaml", yaml.safe_dump(doc, sort_keys=False))


# --------------------------------------------------------------------------
# Reading files


def test_non_utf8_config_names_the_byte(tmp_path, capsys):
    p = text(tmp_path / "a.yaml", b"name: caf\xe9\n")
    refused(capsys, "arch", "check", p, words=(p, "byte 9", "0xe9", "UTF-8"))


def test_npz_given_as_the_config(capsys):
    refused(capsys, "run", "--arch", NPZ, "--trace", MID, words=("zip archive", "not an architecture config"))


def test_config_given_as_the_trace(capsys):
    refused(capsys, "run", "--arch", MID, "--trace", MID, words=("architecture config", "not an attention trace"))


def test_extends_a_binary_file(tmp_path, capsys):
    text(tmp_path / "b.yaml", bytes(range(256)))
    p = text(tmp_path / "a.yaml", "extends: b.yaml\n")
    refused(capsys, "arch", "check", p, words=(f"{p}:1: extends", "binary"))


def test_sweep_base_that_is_an_npz(tmp_path, capsys):
    spec = text(tmp_path / "s.yaml", yaml.safe_dump({"base": NPZ, "traces": [DEMO],
                                                     "axes": {"dot.multipliers": [512]}}))
    refused(capsys, "sweep", spec, "--out", tmp_path / "o", words=("base", "zip archive"))


@pytest.mark.parametrize("where", ["config", "keep_if", "policy", "preset"])
def test_3000_nested_brackets(tmp_path, capsys, where):
    deep = "[" * 3000 + "]" * 3000
    if where == "config":
        argv = ["arch", "check", text(tmp_path / "a.yaml", f"name: {deep}\n")]
    elif where == "keep_if":
        spec = text(tmp_path / "s.yaml", f"base: {MID}\ntraces: [{DEMO}]\naxes: {{dot.multipliers: [512]}}\n"
                                         f"keep_if: {deep}\n")
        argv = ["sweep", spec, "--out", tmp_path / "o"]
    elif where == "policy":
        pol = text(tmp_path / "p.yaml", f"tokens: {{schedule: {deep}}}\n")
        argv = ["trace", "capture", "--text", text(tmp_path / "t.txt", "words"), "--policy", pol,
                "--out", tmp_path / "o.npz"]
    else:
        pre = text(tmp_path / "e.yaml", f"name: x\nmultiply_pj: {deep}\n")
        argv = ["arch", "check", text(tmp_path / "a.yaml", yaml.safe_dump({"energy": {"preset": pre}}))]
    refused(capsys, *argv, words=("nested deeper than 64 levels",))


@pytest.mark.parametrize("extends", ["", "."])
def test_extends_empty_or_a_folder(tmp_path, capsys, extends):
    p = text(tmp_path / "a.yaml", yaml.safe_dump({"extends": extends}))
    refused(capsys, "arch", "check", p, words=(f"{p}:1: extends",))


def test_a_folder_as_the_config(capsys):
    refused(capsys, "run", "--arch", os.path.join(ROOT, "arch_configs"), "--trace", DEMO, words=("is a folder",))


def test_non_utf8_preset(tmp_path, capsys):
    pre = text(tmp_path / "e.yaml", b"name: caf\xe9\n")
    p = text(tmp_path / "a.yaml", yaml.safe_dump({"energy": {"preset": pre}}))
    refused(capsys, "arch", "check", p, words=(f"{pre}:1: byte 9", "UTF-8"))


def test_duplicate_key_is_refused_with_both_lines(tmp_path, capsys):
    p = text(tmp_path / "a.yaml", "dot:\n  multipliers: 512\n  multipliers: 1024\n")
    refused(capsys, "arch", "check", p, words=(f"{p}:3: multipliers", "first on line 2"))


# --------------------------------------------------------------------------
# Trace values: trace check and run agree


@pytest.mark.parametrize("change, words", [
    (lambda d: d["header"]["model"].__setitem__("layers", None), ("header.model.layers",)),
    (lambda d: d["header"]["model"].__setitem__("heads", [4, 4]), ("header.model.heads",)),
    (lambda d: d["steps"][0].__setitem__("kept_k", 100000000000), ("steps[0].kept_k", "count")),
    (lambda d: d["steps"][0].__setitem__("heads", 10000000000), ("steps[0].heads", "count")),
    (lambda d: d["steps"][0].__setitem__("kept_k", [0, 2 ** 63]), ("steps[0].kept_k",)),
    (lambda d: d["steps"][0].__setitem__("heads", [0, 2 ** 63]), ("steps[0].heads",)),
    (lambda d: d["steps"][0].__setitem__("lsb_rows", [0, 0, 0, 2 ** 63]), ("steps[0].lsb_rows",)),
    (lambda d: d["steps"][3].__setitem__("q_rows", 10 ** 19), ("steps[3].q_rows",)),
    (lambda d: d["steps"][3].update(q_rows=10 ** 12, kv_rows=10 ** 12), ("steps[3].q_rows", "GiB")),
    (lambda d: d["steps"][3].__setitem__("kv_rows", 2 ** 62), ("steps[3].kv_rows",)),
    (lambda d: d["steps"][3].__setitem__("layer", 2 ** 62), ("steps[3].layer",)),
])
def test_trace_check_and_run_agree(tmp_path, capsys, change, words):
    p = bad_trace(tmp_path, change)
    a = refused(capsys, "trace", "check", p, words=words)
    b = refused(capsys, "run", "--arch", MID, "--trace", p, words=words)
    assert a == b


def test_position_2_63_in_kept_v_idx(tmp_path, capsys):
    doc = yaml.safe_load(open(os.path.join(ROOT, "traces", "demo_decode.yaml")))
    doc["steps"][0]["kept_v_idx"][0][1] = 2 ** 63
    p = text(tmp_path / "t.yaml", yaml.safe_dump(doc))
    refused(capsys, "trace", "check", p, words=("steps[0].kept_v_idx",))


# --------------------------------------------------------------------------
# npz files


def npz_members(tmp_path):
    p = tmp_path / "base.npz"
    save_trace(load_trace(DEMO), p)
    with np.load(p) as z:
        return {k: z[k] for k in z.files}


def write_npz(path, arrays, extra=()):
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        for k, a in arrays.items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, a, allow_pickle=False)
            zf.writestr(k + ".npy", buf.getvalue())
        for name, data in extra:
            zf.writestr(name, data)
    return str(path)


@pytest.mark.parametrize("extra, words", [
    ([("notes.txt", b"hello")], ("notes.txt", "unexpected member")),
    ([("sub/", b"")], ("sub/", "unexpected member")),
    ([("junk.npy", b"\x93NUMPX" + bytes(40))], ("junk.npy", "unknown array")),
    ([("extra.npy", b"")], ("extra.npy", "unknown array")),
])
def test_npz_with_a_foreign_member(tmp_path, capsys, extra, words):
    p = write_npz(tmp_path / "t.npz", npz_members(tmp_path), extra)
    refused(capsys, "trace", "check", p, words=words)


def test_npz_unknown_extra_array_is_refused(tmp_path, capsys):
    arrays = npz_members(tmp_path)
    arrays["notes"] = np.zeros(1000, np.int64)
    refused(capsys, "trace", "check", write_npz(tmp_path / "t.npz", arrays), words=("notes.npy", "unknown array"))


def test_npz_bomb_is_refused_before_inflating(tmp_path, capsys):
    """A member that declares more than the budget: refused from its header, not inflated.
    The member is written with its true size (the zip's sizes match), as a real bomb would be."""
    from sim.trace import npz

    arrays = npz_members(tmp_path)
    arrays.pop("kept_k")
    n = npz.MAX_ARRAY_BYTES // 8 + 1
    p = str(tmp_path / "bomb.npz")
    with zipfile.ZipFile(p, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
        for k, a in arrays.items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, a, allow_pickle=False)
            zf.writestr(k + ".npy", buf.getvalue())
        head = io.BytesIO()
        np.lib.format.write_array_header_1_0(head, {"descr": "<i8", "fortran_order": False, "shape": (n,)})
        with zf.open("kept_k.npy", "w", force_zip64=True) as fh:
            fh.write(head.getvalue())
            chunk = bytes(1 << 22)
            left = n * 8
            while left:
                fh.write(chunk[:min(left, len(chunk))])
                left -= min(left, len(chunk))
    assert os.path.getsize(p) < 20 << 20   # small on disk
    line = refused(capsys, "trace", "check", p, words=("kept_k", "refused before inflating"))
    assert "GiB" in line


# --------------------------------------------------------------------------
# Configs


@pytest.mark.parametrize("doc, field", [
    ({"precision": {"k_lsb_bits": 1099511627776}}, "precision.k_lsb_bits"),
    ({"dot": {"pipeline_cycles": 10 ** 20}}, "dot.pipeline_cycles"),
    ({"softmax": {"latency_cycles": 10 ** 20}}, "softmax.latency_cycles"),
    ({"topk": {"latency_cycles": 10 ** 20}}, "topk.latency_cycles"),
    ({"dram": {"controller_ns": 1e30}}, "dram.controller_ns"),
    ({"dram": {"channels": 1e300}}, "dram.channels"),
    ({"dot": {"multipliers": 1024.0}}, "dot.multipliers"),
])
def test_absurd_config_values(tmp_path, capsys, doc, field):
    p = text(tmp_path / "a.yaml", yaml.safe_dump(doc))
    refused(capsys, "run", "--arch", p, "--trace", DEMO, words=(f"{p}:2: {field}",))


def test_every_unknown_key_at_once(tmp_path, capsys):
    p = text(tmp_path / "a.yaml", "clock_gz: 1\ndot:\n  multiplers: 4\nbuffers:\n  kye_kib: 3\n")
    refused(capsys, "arch", "check", p, words=("clock_gz", "dot.multiplers (line 3)", "buffers.kye_kib (line 5)"))


def test_yaml_1_2_numbers(tmp_path, capsys):
    p = text(tmp_path / "a.yaml", "dram:\n  t_refi_ns: 3.9e3\n  channel_gbps: 2e1\n")
    code, out, _ = cli(capsys, "arch", "check", p, "--json")
    assert code == 0
    knobs = json.loads(out)["knobs"]
    assert knobs["dram.t_refi_ns"]["value"] == 3900.0 and knobs["dram.channel_gbps"]["value"] == 20.0
    refused(capsys, "arch", "check", MID, "--set", "name=no" + "\x00", words=("--set",))
    code, out, _ = cli(capsys, "arch", "check", MID, "--set", "name=no", "--json")
    assert json.loads(out)["name"] == "no"   # YAML 1.2: text, not false


# --------------------------------------------------------------------------
# Sweep specs


def spec_file(tmp_path, **over):
    doc = {"base": MID, "traces": [DEMO], "axes": {"dot.multipliers": [512]}, **over}
    return text(tmp_path / "s.yaml", yaml.safe_dump(doc))


@pytest.mark.parametrize("over, words", [
    ({"objectives": [["cycles"]]}, ("objectives[0]",)),
    ({"axes": {"dot.multipliers": {"from": 1, "to": 2, "step": 5e-324}}}, ("axes.dot.multipliers",)),
    ({"keep_if": [{"ge": [{"add": [1e308, 1e308]}, 1]}]}, ("keep_if[0]", "at most 1e300")),
    ({"keep_if": [{"ge": [{"mul": ["dot.multipliers", 1e300, 1e300]}, 1]}]}, ("keep_if[0]", "mul gives inf")),
    ({"keep_if": [{"eq": [{"mul": [{"literal": "abc"}, 10 ** 12]}, 1]}]}, ("keep_if[0]", "takes numbers")),
])
def test_bad_sweep_specs(tmp_path, capsys, over, words):
    refused(capsys, "sweep", spec_file(tmp_path, **over), "--out", tmp_path / "o", words=words)
    assert not (tmp_path / "o").exists()


def test_invalid_point_is_said_before_running_and_fails_the_sweep(tmp_path, capsys):
    spec = spec_file(tmp_path, axes={"dot.multipliers": [512, 100]})
    code, out, err = cli(capsys, "sweep", spec, "--out", tmp_path / "o", "--jobs", "1", "--quiet")
    assert code == 1
    assert "invalid point" in err and "dot.multipliers=100" in err and "multiple of dot.lanes" in err
    assert "1 point(s) failed" in err


def test_sweep_refused_folder_gets_no_lock(tmp_path, capsys):
    out = tmp_path / "full"
    out.mkdir()
    (out / "mine.txt").write_text("not a sweep")
    refused(capsys, "sweep", spec_file(tmp_path), "--out", out, words=("holds no sweep.json",))
    assert sorted(os.listdir(out)) == ["mine.txt"]


# --------------------------------------------------------------------------
# Command line


@pytest.mark.parametrize("value", ["dot.multipliers=[1", "x=*alias", "clock_ghz=`1`",
                                   "name=!!python/object/apply:os.system [true]", "dot.multipliers="])
def test_bad_set_values_name_set(capsys, value):
    refused(capsys, "run", "--arch", MID, "--trace", DEMO, "--set", value, words=("--set",))


@pytest.mark.parametrize("argv, words", [
    (["trace", "synth", "--out", "x.npz", "--prompt", "9999999999999999999999"], ("--prompt",)),
    (["dram", "probe", MID, "--stride", "99999999999999999999"], ("--stride",)),
    (["dram", "probe", MID, "--seed", "-1"], ("--seed",)),
    (["dram", "probe", MID, "--loads", "1e-300"], ("--loads", "0.001")),
    (["dram", "probe", MID, "--requests", "1000000000"], ("--requests",)),
    (["dram", "probe", MID, "--patterns", ""], ("--patterns",)),
    (["run", "--arch", MID, "--trace", DEMO, "--json", ""], ("--json",)),
    (["run", "--arch", MID], ("--trace",)),
    (["run", "--arch", MID, "--trace", DEMO, "--jsn", "x"], ("unrecognized", "--jsn")),
])
def test_command_line_misuse_is_one_line(tmp_path, capsys, monkeypatch, argv, words):
    monkeypatch.chdir(tmp_path)
    refused(capsys, *argv, words=words)
    assert os.listdir(tmp_path) == []


# --------------------------------------------------------------------------
# Outputs


@pytest.mark.parametrize("kind", ["missing_folder", "folder", "dev_full", "too_long"])
@pytest.mark.parametrize("option", ["--json", "--timeline"])
def test_unusable_output_is_refused_before_the_run(tmp_path, capsys, kind, option):
    target = {"missing_folder": tmp_path / "no" / "r.json", "folder": tmp_path,
              "dev_full": "/dev/full", "too_long": tmp_path / ("x" * 300)}[kind]
    refused(capsys, "run", "--arch", MID, "--trace", DEMO, option, target, words=(option,))
    assert os.path.exists("/dev/full") and not os.path.isfile("/dev/full")  # the device is untouched


@pytest.mark.parametrize("argv_of", [
    lambda p: ["dram", "probe", MID, "--requests", "20", "--loads", "0.5", "--csv", p],
    lambda p: ["trace", "synth", "--out", p, "--prompt", "8", "--decode", "1", "--layers", "1", "--heads", "1"],
])
def test_other_outputs_refuse_an_existing_file(tmp_path, capsys, argv_of):
    p = tmp_path / "old.npz"
    p.write_bytes(b"precious")
    refused(capsys, *argv_of(str(p)), words=("exists", "--force"))
    assert p.read_bytes() == b"precious"


def test_run_trace_x_json_x_refuses_and_leaves_x(tmp_path, capsys):
    t = tmp_path / "t.yaml"
    t.write_bytes(open(DEMO, "rb").read())
    before = t.read_bytes()
    for extra in ([], ["--force"]):
        refused(capsys, "run", "--arch", MID, "--trace", t, "--json", t, *extra, words=("--trace",))
        assert t.read_bytes() == before


def test_timeline_over_the_config_and_two_outputs_in_one_file(tmp_path, capsys):
    a = tmp_path / "a.yaml"
    a.write_text(f"extends: {MID}\n")
    refused(capsys, "run", "--arch", a, "--trace", DEMO, "--timeline", a, "--force", words=("--arch",))
    assert a.read_text() == f"extends: {MID}\n"
    p = tmp_path / "same.json"
    refused(capsys, "run", "--arch", MID, "--trace", DEMO, "--json", p, "--timeline", p, words=("--json",))
    assert not p.exists()


def test_run_writes_only_its_named_outputs(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code, out, err = cli(capsys, "run", "--arch", MID, "--trace", DEMO, "--json", "r.json", "--timeline", "tl.json")
    assert code == 0, err
    assert sorted(os.listdir(tmp_path)) == ["r.json", "tl.json"]
    assert json.load(open("r.json"))["cycles"] > 0
    code, out, err = cli(capsys, "run", "--arch", MID, "--trace", DEMO, "--json", "-", "--quiet")
    assert code == 0 and json.loads(out)["cycles"] > 0 and err == ""   # --json - parses
    refused(capsys, "run", "--arch", MID, "--trace", DEMO, "--json", "r.json", words=("exists",))
    assert cli(capsys, "run", "--arch", MID, "--trace", DEMO, "--json", "r.json", "--force", "-q")[0] == 0


@pytest.mark.parametrize("argv", [
    ["run", "--arch", MID, "--trace", DEMO],
    ["arch", "check", MID, "--resolved"],
    ["trace", "info", DEMO],
    ["trace", "check", DEMO],
    ["dram", "probe", MID, "--requests", "200", "--loads", "0.5"],
])
def test_closed_pipe_is_quiet(argv):
    """`attnsim ... | head -n 1`: no traceback, status 0 or 141 (like other Unix tools)."""
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    cmd = " ".join([f"'{sys.executable}'", "-m", "sim.cli", *(f"'{a}'" for a in argv)]) + " | head -n 1"
    proc = subprocess.run(["bash", "-o", "pipefail", "-c", cmd], capture_output=True, text=True, env=env,
                          timeout=300)
    assert "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr, proc.stderr
    assert proc.returncode in (0, 141), proc.stderr
    assert len(proc.stdout.splitlines()) == 1


# --------------------------------------------------------------------------
# The API


def test_loaded_config_cannot_be_mutated():
    import dataclasses

    import sim

    arch = sim.load_arch(MID)
    with pytest.raises(dataclasses.FrozenInstanceError, match="with_overrides"):
        arch.dot.multipliers = 64
    with pytest.raises(AttributeError, match="with_overrides"):
        arch.clock_ghz = 2.0
    with pytest.raises(sim.ConfigError, match="dot.multipliers = -64"):
        arch.with_overrides({"dot.multipliers": -64})
    faster = arch.with_overrides({"dot.multipliers": 2048})
    assert faster.dot.multipliers == 2048 and arch.dot.multipliers == 1024
    result = sim.simulate(faster, DEMO)
    assert result.to_dict()["arch"]["config"]["dot"]["multipliers"] == 2048


def test_short_reprs():
    import sim

    arch = sim.load_arch(MID)
    trace = sim.load_trace(os.path.join(ROOT, "traces", "synth_decode.npz"))
    result = sim.simulate(arch, DEMO)
    for obj in (arch, trace, result):
        assert len(repr(obj)) < 200 and "\n" not in repr(obj)
        assert obj._repr_html_().startswith("<div>")


def test_key_plane_split_warning(capsys):
    """A trace captured with a 6+4-bit key split run on a 4+4-bit datapath: the run says what it does."""
    trace = os.path.join(ROOT, "traces", "captured_short_moderate.npz")
    code, out, err = cli(capsys, "run", "--arch", MID, "--trace", trace)
    assert code == 0
    assert "attnsim: warning:" in err and "6+4" in err and "4+4" in err
    code, out, err = cli(capsys, "run", "--arch", MID, "--trace", trace, "--set", "precision.k_lsb_bits=0")
    assert code == 0 and "k_lsb_bits is 0" in err
    code, out, err = cli(capsys, "run", "--arch", MID, "--trace", trace, "--quiet")
    assert code == 0 and err == "" and out == ""


def test_trace_info_counts_kept_keys_against_dense_with_pruned_heads(capsys):
    """Dense = every head of the model over every context row; counted from the file by hand."""
    doc = trace_doc()
    heads = doc["header"]["model"]["heads"]
    dense = kept = 0
    for s in doc["steps"]:
        rows = s["kept_k"] if isinstance(s["kept_k"], list) else list(range(s["kept_k"]))
        n_heads = len(s["heads"]) if isinstance(s["heads"], list) else s["heads"]
        dense += s["kv_rows"] * heads
        kept += len(rows) * n_heads
    code, out, _ = cli(capsys, "trace", "info", "--json", DEMO)
    sm = json.loads(out)
    assert (sm["dense_key_rows"], sm["kept_key_rows"]) == (dense, kept)
    assert sm["kept_key_fraction"] == pytest.approx(kept / dense)
    code, out, _ = cli(capsys, "trace", "info", DEMO)
    assert f"{kept:,} of {dense:,} head-rows" in out


def test_arch_check_json_and_inherited_names(tmp_path, capsys):
    child = tmp_path / "c.yaml"
    child.write_text(f"extends: {MID}\ndot:\n  multipliers: 2048\n")
    code, out, err = cli(capsys, "arch", "check", child)
    assert code == 0 and "[inherited from" in out
    code, out, err = cli(capsys, "arch", "check", child, "--json")
    doc = json.loads(out)
    assert doc["valid"] and doc["knobs"]["dot.multipliers"]["set_in"] == f"{child}:3"
    assert doc["inherited"]["name"].endswith("mid.yaml")
    code, out, _ = cli(capsys, "arch", "check", child, "--resolved")
    assert "dot.multipliers = 2048  # multipliers in the dot-product array" in out


def test_arch_check_one_tile_rules(tmp_path, capsys):
    """Key buffer of 1 KiB with 64-row tiles at 4-bit keys: one tile at head_dim 16 takes 64 x 16 x 4 / 8
    = 512 B (fits), at head_dim 64 it takes 2 KiB (a warning); at 0.25 KiB even head_dim 16 fails (an error)."""
    warn = cli(capsys, "arch", "check", MID, "--set", "buffers.key_kib=1")
    assert warn[0] == 0 and "attnsim: warning:" in warn[2] and "head_dim 64" in warn[2]
    refused(capsys, "arch", "check", MID, "--set", "buffers.key_kib=0.25", words=("--set", "buffers.key_kib",
                                                                                  "head_dim 16"))
