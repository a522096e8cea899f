"""`attnsim trace cut` / sim.trace.cut: a part of a trace as a trace of its own.

The cut keeps the original steps (only layers and requests numbered again), so
its work is exactly the sum of the kept steps' work (arithmetic; no outside
source needed). Runs of a request's layers add up to the run of the whole
(the layers of one request depend on each other in order, a serial chain;
common practice, no source): checked within 3 % on every bundled datapath."""

import os

import numpy as np
import pytest

import sim
from sim.bundled import config, config_names
from sim.cli import main
from sim.errors import InputError
from sim.trace.cut import cut_trace, parse_ids
from sim.trace.files import load_trace, save_trace
from sim.trace.synth import synth_trace

FIELDS = ("stage", "head_dim", "q_rows", "kv_rows", "causal", "window", "new_kv_rows", "out_rows")
ARRAYS = ("heads", "kv_heads", "kept_k", "kept_v", "lsb_rows")


def batch_trace():
    return synth_trace(prompt_tokens=96, decode_steps=5, layers=4, heads=4, kv_heads=2, batch=2, causal=True,
                       token_keep=0.8, lsb_fraction=0.5, seed=7)


def same_step(a, b):
    for f in FIELDS:
        assert getattr(a, f) == getattr(b, f), f
    for f in ARRAYS:
        assert np.array_equal(getattr(a, f), getattr(b, f)), f


def test_parse_ids():
    assert parse_ids("0,2,5-7", "layers") == [0, 2, 5, 6, 7]
    assert parse_ids(" 3 , 1-2,2", "layers") == [1, 2, 3]
    for bad in ("", "a", "3-1", "-1", "1-"):
        with pytest.raises(InputError, match="layers"):
            parse_ids(bad, "layers")


def test_cut_keeps_the_original_steps_with_layers_and_requests_numbered_again():
    whole = batch_trace()
    part = cut_trace(whole, layers=[1, 3], requests=[1], decode_tokens=2)
    want = []
    seen = {}
    for s in whole.steps:
        if s.layer in (1, 3) and s.request == 1:
            k = seen.get(s.layer, 0) if s.stage == "decode" else -1
            if s.stage == "decode":
                seen[s.layer] = k + 1
            if k < 2:
                want.append(s)
    assert len(part.steps) == len(want) == 2 * (1 + 2)
    for got, orig in zip(part.steps, want):
        same_step(got, orig)
        assert got.layer == {1: 0, 3: 1}[orig.layer] and got.request == 0
    cut = part.header["provenance"]["cut"]
    assert cut == {"from": whole.name, "digest": whole.digest(), "layers": "1,3", "requests": "1",
                   "decode_tokens": 2, "prefill": True}
    assert whole.header["provenance"].get("cut") is None          # the original is untouched


def test_ids_asked_in_any_order_keep_the_original_order():
    whole = batch_trace()
    a = cut_trace(whole, layers=[3, 1, 1], requests=[1, 0])
    b = cut_trace(whole, layers=[1, 3])
    assert a.digest() == b.digest()
    assert a.header["provenance"]["cut"]["layers"] == "1,3"


@pytest.mark.parametrize("ext", [".npz", ".yaml"])
def test_a_cut_saves_and_loads_as_a_valid_trace(tmp_path, ext):
    part = cut_trace(batch_trace(), layers=[0, 2], prefill=False)
    path = tmp_path / f"part{ext}"
    save_trace(part, str(path))
    back = load_trace(str(path))
    assert back.digest() == part.digest()
    assert {s.stage for s in back.steps} == {"decode"}


def test_work_of_a_partition_by_layer_adds_up_to_the_whole():
    whole = batch_trace()
    parts = [cut_trace(whole, layers=[layer]) for layer in range(4)]
    total = whole.work()
    for field in ("macs", "pv_macs", "softmax", "lsb_softmax"):
        assert sum(getattr(p.work(), field) for p in parts) == getattr(total, field), field


@pytest.mark.parametrize("arch_name", config_names())
def test_runs_of_single_layers_add_up_to_the_run_of_the_whole(arch_name):
    arch = sim.load_arch(config(arch_name))
    whole = synth_trace(prompt_tokens=512, decode_steps=8, layers=3, heads=8, kv_heads=2, causal=True, seed=4)
    full = sim.simulate(arch, whole, keep_intervals=False).to_dict()["cycles"]
    parts = sum(sim.simulate(arch, cut_trace(whole, layers=[layer]), keep_intervals=False).to_dict()["cycles"]
                for layer in range(3))
    assert abs(parts / full - 1) < 0.03, (parts, full)


def test_cuts_that_cannot_be_made_name_what_is_wrong():
    whole = batch_trace()
    with pytest.raises(InputError, match=r"layers = '4-5': expected ids the trace has: 0-3"):
        cut_trace(whole, layers=[4, 5])
    with pytest.raises(InputError, match=r"requests = '2': expected ids the trace has: 0-1"):
        cut_trace(whole, requests=[2])
    with pytest.raises(InputError, match="at least one step"):
        cut_trace(whole, prefill=False, decode_tokens=0)
    with pytest.raises(InputError, match="decode_tokens = -1"):
        cut_trace(whole, decode_tokens=-1)


def test_cli_cut_and_info(tmp_path, capsys):
    src, out = tmp_path / "whole.npz", tmp_path / "part.npz"
    save_trace(batch_trace(), str(src))
    assert main(["trace", "cut", str(src), "--out", str(out), "--layers", "0-1", "--tokens", "1"]) == 0
    said = capsys.readouterr().out
    assert "2 of 4 layers" in said and f"{out}:" in said
    assert main(["trace", "info", str(out)]) == 0
    assert "cut from" in capsys.readouterr().out
    # an existing output is kept without --force; bad ids and empty cuts: one line, exit 2
    for argv in (["--layers", "0"], ["--layers", "9", "--force"], ["--layers", "x", "--force"],
                 ["--no-prefill", "--tokens", "0", "--force"]):
        assert main(["trace", "cut", str(src), "--out", str(out), *argv]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("attnsim: error: "), err
    assert main(["trace", "cut", str(src), "--out", str(tmp_path / "part.txt")]) == 2
    assert "expected a .npz or .yaml file name" in capsys.readouterr().err
    assert os.path.exists(out)
