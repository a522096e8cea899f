"""Decode-token sampling (`attnsim run --sample-decode K`, sim.trace.sample, sim.run.estimate_whole).

Sources: which tokens are simulated follows systematic sampling with a
centrally located start, one unit from the middle of each stratum of K
(Cochran, Sampling Techniques, 3rd ed., 1977, ch. 8; from memory), which is
exact for a cost that grows linearly along the decode: the sum of an
arithmetic series, n (first + last) / 2 (handbook formula). Two interleaved
half-samples give two estimates of their own (interpenetrating subsamples,
Mahalanobis 1946; from memory). That a sampled run must not change which of two
designs is faster is the brief's rule (common practice, no source)."""

import csv
import json

import pytest

import sim
from sim.cli import main
from sim.errors import InputError
from sim.run import estimate_whole
from sim.trace.files import load_trace, save_trace
from sim.trace.sample import sample_decode
from sim.trace.synth import synth_trace


def decode_trace(decode=40, layers=2, batch=1, prompt=64):
    return synth_trace(prompt_tokens=prompt, decode_steps=decode, layers=layers, heads=4, kv_heads=2, batch=batch,
                       length_spread=0.5 if batch > 1 else 0.0, causal=True, seed=3)


def token_index(trace):
    """Each step's decode token index at its (request, layer), -1 for prefill (counted here)."""
    seen, out = {}, []
    for s in trace.steps:
        if s.stage != "decode":
            out.append(-1)
            continue
        k = seen.get((s.request, s.layer), 0)
        seen[s.request, s.layer] = k + 1
        out.append(k)
    return out


def expected_tokens(n, k, warmup=32):
    """First ``warmup`` tokens, then the middle of each stratum of k (the last may be
    shorter; of an even one's two middles the lower in even strata, the upper in odd ones), with
    the stratum's size: worked out by hand from the strata's bounds."""
    kept = [(t, 1) for t in range(min(n, warmup))]
    start, odd = warmup, False
    while start < n:
        size = min(k, n - start)
        kept.append((start + (size // 2 if odd else (size - 1) // 2), size))
        start, odd = start + k, not odd
    return kept


@pytest.mark.parametrize("n,k,warmup", [(80, 8, None), (77, 8, None), (40, 8, 8), (37, 8, 8), (19, 6, 6),
                                         (10, 3, 3), (40, 8, 20), (40, 4, 0)])
def test_sampled_tokens_are_the_middles_of_the_strata(n, k, warmup):
    whole = decode_trace(decode=n)
    sample = sample_decode(whole, k, warmup)
    warmup = 32 if warmup is None else warmup          # the documented default
    idx = token_index(whole)
    kept = [(i, s) for i, s in zip(idx, whole.steps)
            if s.stage == "prefill" or any(i == t for t, _ in expected_tokens(n, k, warmup))]
    assert len(sample.part.steps) == len(kept)
    sizes = dict(expected_tokens(n, k, warmup))
    for (i, orig), got, w in zip(kept, sample.part.steps, sample.weights):
        assert (got.stage, got.layer, got.request, got.kv_rows, list(got.kept_k)) == \
            (orig.stage, orig.layer, orig.request, orig.kv_rows, list(orig.kept_k))
        assert w == (1 if i < 0 else sizes[i])
    # the weights of each (request, layer)'s decode steps cover its n tokens once
    assert sum(w for w, s in zip(sample.weights, sample.part.steps) if s.stage == "decode") == n * 2
    assert sample.decode_tokens == n * 2
    assert sample.part.header["provenance"]["decode_sample"]["every"] == k


def fake_doc(per_step, seconds_per_cycle=1e-9):
    cycles = round(sum(per_step))
    return {"per_step_cycles": per_step, "cycles": cycles, "seconds": cycles * seconds_per_cycle}


def test_estimate_is_exact_for_a_linear_decode_cost():
    n, k, a, b = 77, 8, 1000.0, 3.0          # token t costs a + b t; prefill steps cost 500
    whole = decode_trace(decode=n, layers=1)
    sample = sample_decode(whole, k, 8)
    idx = token_index(whole)
    kept = [i for i, s in zip(idx, whole.steps)
            if s.stage == "prefill" or any(i == t for t, _ in expected_tokens(n, k, 8))]
    per_step = [500.0 if i < 0 else a + b * i for i in kept]
    est = estimate_whole(fake_doc(per_step), sample)
    prefill = sum(1 for s in whole.steps if s.stage == "prefill")
    exact = 500.0 * prefill + n * (a + (a + b * (n - 1))) / 2       # arithmetic series
    # 77 - 8 = 69 = 8 strata of 8, whose lower and upper middles' offsets of -b/2 and +b/2 a
    # token cancel in pairs, and one of 5, whose middle is exact
    assert est["cycles"] == round(exact)
    assert est["simulated_cycles"] == round(sum(per_step))
    # both half-samples see the same line; they differ by the slope over their interleaving only
    assert abs(est["half_cycles"][0] - est["half_cycles"][1]) <= b * k * n / 2
    flat = estimate_whole(fake_doc([500.0 if i < 0 else a for i in kept]), sample)
    assert flat["half_cycles"] == [flat["cycles"], flat["cycles"]] and flat["half_sample_spread"] == 0.0


def test_estimate_refuses_a_document_of_another_part():
    sample = sample_decode(decode_trace(), 8)
    with pytest.raises(ValueError, match="expected the run of this sample's part"):
        estimate_whole(fake_doc([1.0, 2.0]), sample)


@pytest.mark.parametrize("arch", ["mid", "server"])
def test_sampled_estimate_is_close_to_the_whole_run(arch):
    # tokens long against the refresh interval (see test_noisy_tokens_are_flagged)
    whole = decode_trace(decode=48, batch=2, prompt=1024)
    full = sim.simulate(arch, whole, keep_intervals=False).to_dict()
    sample = sample_decode(whole, 8, 8)
    est = estimate_whole(sim.simulate(arch, sample.part, keep_intervals=False).to_dict(), sample)
    assert est["simulated_decode_steps"] < est["decode_steps"] / 2
    assert abs(est["cycles"] - full["cycles"]) <= 0.01 * full["cycles"]
    assert est["half_sample_spread"] <= 0.02


def test_sampling_keeps_which_design_is_faster():
    # a decode-heavy trace on two designs the full runs tell apart by far more than the 2 % margin
    whole = decode_trace(decode=48, batch=2, prompt=1024)
    sample = sample_decode(whole, 8, 8)
    mid = sim.load_arch("mid")
    designs = [mid, mid.with_overrides({"dram.channels": mid.dram.channels // 2}, "test")]
    full = [sim.simulate(a, whole, keep_intervals=False).to_dict()["cycles"] for a in designs]
    est = [estimate_whole(sim.simulate(a, sample.part, keep_intervals=False).to_dict(), sample)["cycles"]
           for a in designs]
    assert abs(full[1] / full[0] - 1) > 0.02          # premise: the designs differ
    assert (full[1] > full[0]) == (est[1] > est[0])
    assert abs(est[1] / est[0] - full[1] / full[0]) <= 0.02


def test_noisy_tokens_are_flagged(tmp_path, capsys):
    # on server short decode tokens (a few hundred cycles against a refresh interval of
    # thousands) meet a refresh window or not: the sample's tokens stand for neighbours unlike
    # them, and the half-samples say so
    whole = decode_trace(decode=72, batch=2)
    full = sim.simulate("server", whole, keep_intervals=False).to_dict()
    path = tmp_path / "t.npz"
    save_trace(whole, str(path))
    out = tmp_path / "r.json"
    assert main(["run", "--arch", "server", "--trace", str(path), "--sample-decode", "8", "--sample-warmup", "8",
                 "--json", str(out)]) == 0
    ds = json.loads(out.read_text())["decode_sample"]
    assert abs(ds["cycles"] - full["cycles"]) > 0.02 * full["cycles"]     # premise: the estimate is off
    assert ds["half_sample_spread"] > 0.01
    assert "cannot be told apart" in capsys.readouterr().out


def test_the_default_warmup_covers_the_prefill_writes_draining():
    # with a write queue of 16 bursts the prefill's cache writes drain into the first decode tokens;
    # a warm-up of 8 leaves that drain to sampled tokens that stand for 8 each (and the half-samples
    # do not see it); the default warm-up runs through it
    whole = synth_trace(prompt_tokens=1024, decode_steps=128, layers=2, heads=16, head_dim=64, seed=0)
    arch = sim.load_arch("mid").with_overrides({"dram.write_queue": 16}, "test")
    full = sim.simulate(arch, whole, keep_intervals=False).to_dict()["cycles"]
    est = {}
    for warmup in (8, None):
        sample = sample_decode(whole, 8, warmup)
        est[warmup] = estimate_whole(sim.simulate(arch, sample.part, keep_intervals=False).to_dict(), sample)
    assert abs(est[8]["cycles"] / full - 1) > 0.02                   # premise: a short warm-up is off
    assert est[None]["warmup_tokens"] == 32 and abs(est[None]["cycles"] / full - 1) <= 0.01


def test_cli_run_sampled(tmp_path, capsys):
    path = tmp_path / "t.npz"
    save_trace(decode_trace(decode=40), str(path))
    out = tmp_path / "r.json"
    assert main(["run", "--arch", "mid", "--trace", str(path), "--sample-decode", "8", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    doc = json.loads(out.read_text())
    ds = doc["decode_sample"]
    assert ds["every"] == 8 and ds["simulated_cycles"] == doc["cycles"] and ds["cycles"] > doc["cycles"]
    assert doc["trace"]["name"].endswith("-sampled")
    assert f"the whole trace estimated at {ds['cycles']:,} cycles" in text
    assert "on 2 layers such estimates have come up to 2.2 % off" in text     # fewer than 8 layers
    whole = load_trace(str(path))
    assert (ds["whole_trace_name"], ds["whole_trace_digest"]) == (whole.name, whole.digest())
    # a report ranks it by the whole trace's estimate, never by the part's figures
    assert main(["report", str(out), "--out", str(tmp_path / "rep")]) == 0
    row = next(csv.DictReader(open(tmp_path / "rep" / "comparison.csv", encoding="utf-8")))
    assert int(row["whole_cycles"]) == ds["cycles"] and int(row["simulated_cycles"]) == doc["cycles"]
    assert row["trace"] == whole.name and float(row["reach"]) == 0.022   # 2 layers: the few-layers reach


def test_no_few_layers_caution_from_eight_layers():
    from sim.result import format_summary

    whole = decode_trace(decode=40, layers=8)
    sample = sample_decode(whole, 8)
    doc = sim.simulate("mid", sample.part, keep_intervals=False).to_dict()
    doc["decode_sample"] = estimate_whole(doc, sample)
    text = format_summary(doc)
    assert "the whole trace estimated at" in text and "such estimates have come" not in text


@pytest.mark.parametrize("value", ["1", "0", "x", "4097"])
def test_cli_refuses_a_bad_count(tmp_path, capsys, value):
    path = tmp_path / "t.npz"
    save_trace(decode_trace(decode=12), str(path))
    assert main(["run", "--arch", "mid", "--trace", str(path), "--sample-decode", value]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--sample-decode" in err[0] and "expected a whole number" in err[0]


def test_warmup_alone_or_bad_is_refused(tmp_path, capsys):
    path = tmp_path / "t.npz"
    save_trace(decode_trace(decode=12), str(path))
    for args in (["--sample-warmup", "4"], ["--sample-decode", "4", "--sample-warmup", "-1"]):
        assert main(["run", "--arch", "mid", "--trace", str(path)] + args) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "--sample-warmup" in err[0], err
    with pytest.raises(InputError, match="warmup"):
        sample_decode(decode_trace(decode=12), 4, 2.5)


def test_a_trace_with_nothing_to_leave_out_is_refused(tmp_path, capsys):
    path = tmp_path / "t.npz"
    save_trace(decode_trace(decode=9), str(path))
    assert main(["run", "--arch", "mid", "--trace", str(path), "--sample-decode", "8"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(path) in err[0] and "--sample-decode = 8" in err[0] and "at most 9" in err[0]
    with pytest.raises(InputError, match="every"):
        sample_decode(decode_trace(decode=9), True)
