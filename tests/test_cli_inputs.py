"""Command line: bad configs and traces give exit 2 and one line naming file and
field, never a traceback; the trace and arch commands work on the bundled files."""

import os
import subprocess
import sys

import numpy as np
import pytest
import yaml

from sim.cli import main
from sim.trace.files import load_trace
from sim.trace.npz import to_arrays
from sim.trace.synth import synth_trace

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def repo(*parts):
    return os.path.join(ROOT, *parts)


def run_cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def one_error_line(err):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith("attnsim: error: ")
    return lines[0]


def write_yaml(tmp_path, name, doc):
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return str(p)


def trace_doc():
    return yaml.safe_load(open(repo("traces", "demo_prefill.yaml")))


# --------------------------------------------------------------------------
# Bad configs


@pytest.mark.parametrize("doc, field, words", [
    ({"dot": {"multiplers": 256}}, "dot.multiplers", "did you mean 'multipliers'"),
    ({"buffers": {"key_kib": 0}}, "buffers.key_kib", "expected a number > 0"),
    ({"dram": {"channels": -2}}, "dram.channels", "expected a whole number >= 1"),
    ({"clock_gz": 1.0}, "clock_gz", "did you mean 'clock_ghz'"),
    ({"dot": {"multipliers": 100, "lanes": 64}}, "dot.multipliers", "multiple of dot.lanes=64"),
])
def test_bad_config_is_one_line_exit_2(tmp_path, capsys, doc, field, words):
    p = write_yaml(tmp_path, "bad.yaml", doc)
    code, out, err = run_cli(capsys, "arch", "check", p)
    assert code == 2
    line = one_error_line(err)
    assert p in line and f" {field} = " in line and words in line
    assert out == ""


def test_extends_cycle_via_cli(tmp_path, capsys):
    write_yaml(tmp_path, "a.yaml", {"extends": "b.yaml"})
    write_yaml(tmp_path, "b.yaml", {"extends": "a.yaml"})
    code, _, err = run_cli(capsys, "arch", "check", str(tmp_path / "a.yaml"))
    assert code == 2
    assert "extends" in one_error_line(err) and "cycle" in err


def test_missing_config_file(tmp_path, capsys):
    p = str(tmp_path / "none.yaml")
    code, _, err = run_cli(capsys, "arch", "check", p)
    assert code == 2
    assert p in one_error_line(err) and "file not found" in err


def test_buffer_too_small_for_one_tile_shows_the_numbers(capsys):
    code, _, err = run_cli(capsys, "run", "--arch", repo("arch_configs", "mid.yaml"),
                           "--trace", repo("traces", "demo_prefill.yaml"),
                           "--set", "buffers.key_kib=0.5")
    assert code == 2
    line = one_error_line(err)
    assert line.startswith("attnsim: error: --set: buffers.key_kib = 0.5: ")  # the value came from --set
    assert "64" in line  # dot.tile_rows of mid.yaml


def test_unknown_override_path(capsys):
    code, _, err = run_cli(capsys, "run", "--arch", repo("arch_configs", "mid.yaml"),
                           "--trace", repo("traces", "demo_prefill.yaml"),
                           "--set", "dot.multiplier=2048")
    assert code == 2
    assert "did you mean 'dot.multipliers'" in one_error_line(err)


def test_arch_check_prints_the_derived_peaks(capsys):
    """One HBM2 stack: 8 x 32 GB/s = 256 GB/s (JEDEC JESD235A)."""
    code, out, err = run_cli(capsys, "arch", "check", repo("arch_configs", "hbm2_stack.yaml"))
    assert code == 0 and err == ""
    assert "valid" in out
    assert "256.0 GB/s" in out
    assert "8 channels x 32 GB/s" in out
    assert "64.00 MAC/byte" in out          # 16384e9 MAC/s / 256e9 B/s
    assert "key 32768 rows" in out           # 1 MiB / (64 x 4 bits)


@pytest.mark.parametrize("name", ["edge.yaml", "mid.yaml", "server.yaml", "hbm2_stack.yaml"])
def test_bundled_configs_check(capsys, name):
    code, out, _ = run_cli(capsys, "arch", "check", repo("arch_configs", name))
    assert code == 0 and "valid" in out


# --------------------------------------------------------------------------
# Bad traces


@pytest.mark.parametrize("step, key, value, field", [
    (1, "kept_k", [0, 1, 2, 4, 6, 7, 9, 12], "steps[1].kept_k"),   # kv_rows = 12
    (0, "kept_v", [12, 12, 12], "steps[0].kept_v"),                # 4 heads
    (0, "heads", [0, 1, 2, 7], "steps[0].heads"),                  # model has 4 heads
    (2, "kept_k", [0, 2, 3, 4, 6, 9], "steps[2].kept_k"),          # row 3 pruned at layer 0
    (0, "kept_kk", 12, "steps[0].kept_kk"),
])
def test_bad_trace_is_one_line_exit_2(tmp_path, capsys, step, key, value, field):
    doc = trace_doc()
    doc["steps"][step][key] = value
    p = write_yaml(tmp_path, "bad.yaml", doc)
    for cmd in ("check", "info"):
        code, out, err = run_cli(capsys, "trace", cmd, p)
        assert code == 2
        line = one_error_line(err)
        assert p in line and f" {field} = " in line
        assert out == ""


def test_missing_trace_field(tmp_path, capsys):
    doc = trace_doc()
    del doc["steps"][3]["q_rows"]
    p = write_yaml(tmp_path, "bad.yaml", doc)
    code, _, err = run_cli(capsys, "trace", "check", p)
    assert code == 2
    line = one_error_line(err)
    assert "steps[3].q_rows" in line and "missing" in line


def test_unknown_trace_version(tmp_path, capsys):
    doc = trace_doc()
    doc["header"]["version"] = 7
    p = write_yaml(tmp_path, "v7.yaml", doc)
    code, _, err = run_cli(capsys, "trace", "info", p)
    assert code == 2
    line = one_error_line(err)
    assert "header.version = 7" in line and "reads version 1" in line


def test_bad_npz_trace(tmp_path, capsys):
    arrays = to_arrays(load_trace(repo("traces", "synth_prefill.npz")))
    arrays["heads_off"] = arrays["heads_off"][:-1]
    p = str(tmp_path / "bad.npz")
    np.savez(p, **arrays)
    code, _, err = run_cli(capsys, "trace", "check", p)
    assert code == 2
    assert p in one_error_line(err) and "heads_off" in err


def test_run_refuses_a_bad_trace(tmp_path, capsys):
    doc = trace_doc()
    doc["steps"][0]["lsb_rows"] = [0, 30, 0, 1]  # q_rows = 12
    p = write_yaml(tmp_path, "bad.yaml", doc)
    code, _, err = run_cli(capsys, "run", "--arch", repo("arch_configs", "mid.yaml"), "--trace", p)
    assert code == 2
    assert "steps[0].lsb_rows" in one_error_line(err)


@pytest.mark.parametrize("argv, field", [
    (["--token-keep", "1.5"], "token_keep"),
    (["--token-keep", "0.5,abc"], "token_keep"),
    (["--layers", "3", "--head-keep", "1,0.5"], "head_keep"),
    (["--prompt", "0"], "--prompt"),
    (["--lsb-fraction", "2"], "--lsb-fraction"),
    (["--decode", "0", "--no-prefill"], "decode_steps"),
])
def test_bad_synth_arguments(tmp_path, capsys, argv, field):
    out_path = tmp_path / "t.npz"
    code, _, err = run_cli(capsys, "trace", "synth", "--out", str(out_path), *argv)
    assert code == 2
    line = one_error_line(err)
    assert f" {field} = " in line
    assert not out_path.exists()


def test_synth_size_check_counts_the_rows_the_trace_holds(tmp_path, capsys):
    # decode steps view one kept-key list per request and layer (sim.trace.synth): the README's
    # 32k-token batch of four lists about 4 x 32 x 32,832 positions and is made; value pruning
    # keeps a list per decode step and head, 32 x 32 x 64 x 32,832 x 0.5 here: refused up front
    out_path = tmp_path / "t.npz"
    code, _, err = run_cli(capsys, "trace", "synth", "--out", str(out_path), "--shape", "dec-8b",
                           "--prompt", "32768", "--decode", "64", "--value-keep", "0.5")
    assert code == 2 and "value pruning keeping 0.5 lists about 1,076,889,600 key positions" in one_error_line(err)
    assert not out_path.exists()
    code, out, _ = run_cli(capsys, "trace", "synth", "--out", str(out_path), "--shape", "dec-8b",
                           "--prompt", "32768", "--decode", "64", "--causal", "--batch", "4")
    assert code == 0 and "8320 steps" in out


def test_synth_refuses_an_unknown_extension(tmp_path, capsys):
    code, _, err = run_cli(capsys, "trace", "synth", "--out", str(tmp_path / "t.csv"))
    assert code == 2
    assert "out = " in one_error_line(err)


# --------------------------------------------------------------------------
# The commands on good input


def test_synth_writes_what_synth_trace_makes(tmp_path, capsys):
    p = str(tmp_path / "s.npz")
    code, out, _ = run_cli(capsys, "trace", "synth", "--out", p, "--prompt", "64", "--decode", "3",
                           "--layers", "3", "--heads", "4", "--head-dim", "32", "--token-keep", "0.5",
                           "--head-keep", "1,0.5,1", "--value-keep", "0.5", "--lsb-fraction", "0.2",
                           "--lsb-rows", "0.5", "--seed", "9", "--name", "cli")
    assert code == 0 and p in out
    want = synth_trace(prompt_tokens=64, decode_steps=3, layers=3, heads=4, head_dim=32,
                       token_keep=0.5, head_keep=[1.0, 0.5, 1.0], value_keep=0.5,
                       lsb_fraction=0.2, lsb_fraction_rows=0.5, seed=9, name="cli")
    assert load_trace(p).digest() == want.digest()


def test_synth_yaml_output(tmp_path, capsys):
    p = str(tmp_path / "s.yaml")
    code, _, _ = run_cli(capsys, "trace", "synth", "--out", p, "--prompt", "8", "--decode", "1",
                         "--layers", "2", "--heads", "2")
    assert code == 0
    assert load_trace(p).summary()["steps"] == 2 + 2


@pytest.mark.parametrize("name", ["demo_prefill.yaml", "demo_decode.yaml", "synth_prefill.npz",
                                  "synth_decode.npz"])
def test_trace_check_and_info_on_bundled(capsys, name):
    p = repo("traces", name)
    t = load_trace(p)
    sm = t.summary()
    code, out, err = run_cli(capsys, "trace", "check", p)
    assert code == 0 and err == ""
    assert out.splitlines()[0] == f"{p}: valid"
    assert f"{sm['steps']} steps ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode)" in out
    code, out, _ = run_cli(capsys, "trace", "info", p)
    assert code == 0
    assert t.digest() in out
    assert f"q.K {sm['macs_qk']:,}" in out


def test_trace_info_demo_counts(capsys):
    """demo_prefill.yaml by hand: q.K = sum over steps of heads * q_rows * kept_k * 64
    = 4*12*12 + 3*8*8 + 2*6*6 + (4*13 + 3*9 + 2*7) * 64-wide rows (common practice)."""
    qk = (4 * 12 * 12 + 3 * 8 * 8 + 2 * 6 * 6 + 1 * (4 * 13 + 3 * 9 + 2 * 7)) * 64
    pv = (4 * 12 * 12 + 3 * 8 * 8 + 2 * 6 * 6 + 1 * (4 * 6 + 3 * 5 + 2 * 4)) * 64
    code, out, _ = run_cli(capsys, "trace", "info", "--json", repo("traces", "demo_prefill.yaml"))
    assert code == 0
    import json
    sm = json.loads(out)
    assert sm["macs_qk"] == qk and sm["macs_pv"] == pv
    assert sm["steps"] == 6 and sm["prefill_steps"] == 3


# --------------------------------------------------------------------------
# A real process: exit status and stderr as a user sees them


def test_subprocess_exit_status_and_no_traceback(tmp_path):
    bad = write_yaml(tmp_path, "bad.yaml", {"buffers": {"value_kib": -1}})
    env = dict(os.environ)
    env["PYTHONPATH"] = ROOT + os.pathsep + env.get("PYTHONPATH", "")
    proc = subprocess.run([sys.executable, "-m", "sim.cli", "arch", "check", bad],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 2
    assert proc.stdout == ""
    assert proc.stderr.count("\n") == 1
    assert "Traceback" not in proc.stderr
    assert f"{bad}:2: buffers.value_kib = -1: expected a number > 0" in proc.stderr  # line of the key
