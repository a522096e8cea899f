"""Progress of a run while it goes on: what the engine exposes and the line `attnsim run`
prints. Internal consistency checks (no outside source): the counts a reader sees only
grow, and at the end they are the result document's own."""

import os
import re
import threading
import time

import pytest

import sim
from sim.cli import _Ticker, main, progress_text
from sim.engine.progress import RunProgress, Snapshot
from sim.trace.files import save_trace
from sim.trace.synth import synth_trace

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")


def test_progress_read_during_a_run_only_grows_and_ends_at_the_documents_counts():
    trace = synth_trace(prompt_tokens=256, decode_steps=16, layers=4, heads=4, seed=3)
    progress = RunProgress()
    assert progress.snapshot() == Snapshot(0, 0, 0, 0.0)
    seen, stop = [], threading.Event()

    def watch():
        while not stop.is_set():
            seen.append(progress.snapshot())
            time.sleep(0.001)

    reader = threading.Thread(target=watch)
    reader.start()
    try:
        doc = sim.simulate(MID, trace, progress=progress).to_dict()
    finally:
        stop.set()
        reader.join()
    end = progress.snapshot()
    assert end.steps == end.steps_done == len(trace.steps)
    assert end.transactions == doc["fetch"]["transactions"]
    assert end.cycles > 0
    for a, b in zip(seen, seen[1:] + [end]):
        assert b.steps_done >= a.steps_done and b.transactions >= a.transactions and b.cycles >= a.cycles


def test_progress_does_not_change_the_result():
    trace = synth_trace(prompt_tokens=128, decode_steps=8, layers=2, heads=4, seed=5)
    with_progress = sim.simulate(MID, trace, keep_intervals=False, progress=RunProgress()).to_dict()
    without = sim.simulate(MID, trace, keep_intervals=False).to_dict()
    for doc in (with_progress, without):
        doc["simulator"].pop("build", None)
    assert with_progress == without


def test_progress_that_is_not_one_is_refused_before_the_run():
    with pytest.raises(TypeError, match=r"progress: expected a sim.engine.progress.RunProgress or None, got 3"):
        sim.simulate(MID, synth_trace(prompt_tokens=64, decode_steps=1, layers=1, heads=2), progress=3)


def test_progress_text():
    assert progress_text("simulating", Snapshot(0, 0, 0, 0.0), 100, 3.2) == "simulating: 0:00:03, setting up"
    line = progress_text("simulating", Snapshot(3, 10, 250, 1e6), 1000, 3725.0)
    # 250 of 1,000 in 3,725 s: 750 more at the same rate take 11,175 s = 3:06:15
    assert line == ("simulating: 1:02:05, step 3 of 10 done, 250 transactions of at most about 1,000, "
                    "at most about 3:06:15 left")
    # past the estimate, or no estimate: no time left is claimed
    assert "left" not in progress_text("simulating", Snapshot(3, 10, 1200, 1e6), 1000, 10.0)
    assert "about" not in progress_text("simulating", Snapshot(3, 10, 5, 1e6), 0, 10.0)


def test_run_command_logs_progress_lines_when_not_on_a_terminal(tmp_path, capsys, monkeypatch):
    trace = tmp_path / "t.npz"
    save_trace(synth_trace(prompt_tokens=512, decode_steps=48, layers=8, heads=8, seed=1), str(trace))
    monkeypatch.setattr(_Ticker, "LOG_EVERY", 0.05)
    monkeypatch.setattr(_Ticker, "FIRST_LOG", 0.0)   # a line at once, however fast the machine
    assert main(["run", "--arch", MID, "--trace", str(trace)]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.startswith("simulating: ")]
    assert lines, err
    pattern = re.compile(r"simulating: \d+:\d\d:\d\d, (setting up|step [\d,]+ of 392 done, "
                         r"[\d,]+ transactions of at most about [\d,]+(, at most about \d+:\d\d:\d\d left)?)$")
    for ln in lines:
        assert pattern.match(ln), ln


def test_a_log_gets_a_first_line_soon_then_one_per_period(tmp_path, capsys, monkeypatch):
    """Not on a terminal: one line FIRST_LOG seconds in (here at once), the next only after
    LOG_EVERY (here never, in a run of seconds)."""
    trace = tmp_path / "t.npz"
    save_trace(synth_trace(prompt_tokens=512, decode_steps=48, layers=8, heads=8, seed=1), str(trace))
    monkeypatch.setattr(_Ticker, "FIRST_LOG", 0.0)
    monkeypatch.setattr(_Ticker, "LOG_EVERY", 10**6)
    assert main(["run", "--arch", MID, "--trace", str(trace)]) == 0
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("simulating: ")]
    assert len(lines) == 1


def test_quiet_run_prints_no_progress(tmp_path, capsys, monkeypatch):
    trace = tmp_path / "t.npz"
    save_trace(synth_trace(prompt_tokens=512, decode_steps=48, layers=8, heads=8, seed=1), str(trace))
    monkeypatch.setattr(_Ticker, "LOG_EVERY", 0.05)
    monkeypatch.setattr(_Ticker, "FIRST_LOG", 0.0)   # would print at once but for --quiet
    assert main(["run", "--arch", MID, "--trace", str(trace), "--quiet"]) == 0
    assert "simulating" not in capsys.readouterr().err


def test_no_progress_line_comes_after_the_command_has_ended(tmp_path, capsys, monkeypatch):
    """A line being made as the run ends is printed before `attnsim run` returns, never later
    into whatever comes next (seen as a stray line in the next test's output)."""
    import sim.cli as cli

    trace = tmp_path / "t.npz"
    save_trace(synth_trace(prompt_tokens=16, decode_steps=1, layers=1, heads=2, seed=1), str(trace))
    monkeypatch.setattr(_Ticker, "FIRST_LOG", 0.0)
    monkeypatch.setattr(_Ticker, "LOG_EVERY", 10**6)

    def slow_text(*a):
        time.sleep(0.5)                   # the line is still being made when the run ends
        return "simulating: slow line"

    monkeypatch.setattr(cli, "progress_text", slow_text)
    assert main(["run", "--arch", MID, "--trace", str(trace)]) == 0
    during = capsys.readouterr().err
    time.sleep(1.0)
    after = capsys.readouterr().err
    assert "slow line" not in after, (during, after)
