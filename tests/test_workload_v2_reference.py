"""Reference checks of the engine on trace format version 2 workloads.

This first part holds what does not depend on the engine: the refusals of
issue 12's "Bad input" section (one line naming the file, the dotted field,
the value and what was expected; exit status 2), and the fixture of the
results every bundled version-1 trace gave on every bundled config before the
engine learned version 2 (tests/data; its note names the commit).
"""

import functools
import json
import os
import subprocess
import sys

import pytest
import yaml

from sim.trace.format import load_trace

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
FIXTURE = os.path.join(HERE, "data", "v1_results_before_v2_engine.json")


# --------------------------------------------------------------------------
# Version-1 traces: the results measured before the engine learned version 2


def _fixture():
    with open(FIXTURE, encoding="utf-8") as fh:
        return json.load(fh)


def _pairs():
    runs = _fixture()["runs"]
    return [(t, c) for t in sorted(runs) for c in sorted(runs[t])]


@functools.lru_cache(maxsize=None)
def _bundled_trace(name):
    return load_trace(os.path.join(ROOT, "traces", name))


def test_fixture_covers_every_bundled_version_1_trace_and_config():
    """The fixture holds every version-1 trace in traces/ on every bundled config."""
    import sim.bundled

    runs = _fixture()["runs"]
    names = sorted(f for f in os.listdir(os.path.join(ROOT, "traces"))
                   if f.endswith((".npz", ".yaml")) and f != "shapes.yaml")
    v1 = [n for n in names if _bundled_trace(n).file_version == 1]
    assert sorted(runs) == v1
    for t in v1:
        assert sorted(runs[t]) == sim.bundled.config_names()


# --------------------------------------------------------------------------
# Bad input (issue 12): one line naming the file, the dotted field, the value and
# what was expected; exit status 2. Checked through the command line.


def bad_input_doc():
    """A valid version-2 trace: 4 query heads on 2 KV heads, a causal prefill of 6
    tokens (layers 0 and 1) and two decode tokens of request 0, a second request."""
    common = {"head_dim": 16, "heads": [0, 1, 2, 3], "kv_heads": [0, 0, 1, 1]}
    return {
        "header": {"format": "attnsim-trace", "version": 2, "provenance": {"method": "hand"},
                   "model": {"layers": 2, "heads": 4, "kv_heads": 2, "head_dim": 16}},
        "steps": [
            dict(common, layer=0, stage="prefill", q_rows=6, kv_rows=6, causal=True, window=4,
                 new_kv_rows=6, out_rows=6),
            dict(common, layer=1, stage="prefill", q_rows=6, kv_rows=6, causal=True, new_kv_rows=6, out_rows=6),
            dict(common, layer=0, stage="decode", q_rows=1, kv_rows=7, new_kv_rows=1, out_rows=1),
            dict(common, layer=1, stage="decode", q_rows=1, kv_rows=7, new_kv_rows=1, out_rows=1),
            dict(common, layer=0, stage="decode", q_rows=1, kv_rows=8, new_kv_rows=1, out_rows=1),
            dict(common, layer=1, stage="decode", q_rows=1, kv_rows=8, new_kv_rows=1, out_rows=1),
            dict(common, layer=0, stage="prefill", q_rows=3, kv_rows=3, request=1),
        ],
    }


BAD_INPUTS = {
    # name: (step, field, new value, dotted field reported, value shown, words of what was expected);
    # a mapping in place of the field sets several fields of the step
    "kv head outside the model": (0, "kv_heads", [0, 0, 1, 2], "steps[0].kv_heads", "[2]",
                                  "< header.model.kv_heads=2"),
    "query head without a kv head": (2, "kv_heads", [0, 0, 1], "steps[2].kv_heads", "[0, 0, 1]",
                                     "one KV head per active query head"),
    "negative window": (0, "window", -3, "steps[0].window", "-3", "whole number >= 1"),
    "fractional window": (0, "window", 2.5, "steps[0].window", "2.5", "whole numbers"),
    "causal decode": (2, "causal", True, "steps[2].causal", "True", "prefill only"),
    "prompt reused with another length": (1, {"kv_rows": 9, "kept_k": 6}, None, "steps[1].kv_rows", "9",
                                          "share one kv_rows"),
    "decode context shorter than its prompt": (4, "kv_rows", 5, "steps[4].kv_rows", "5",
                                               "shorter than its prompt"),
    "decode context shrinks": (4, "kv_rows", 6, "steps[4].kv_rows", "6", "cannot shrink"),
    "layers of one token disagree": (3, "kv_rows", 8, "steps[3].kv_rows", "8",
                                     "one context at every layer: expected 7"),
    "more cache rows than new rows": (0, "new_kv_rows", 7, "steps[0].new_kv_rows", "7", "q_rows=6"),
    "more output rows than query rows": (2, "out_rows", 2, "steps[2].out_rows", "2", "q_rows=1"),
}


def test_bad_input_base_document_is_valid(tmp_path):
    from sim.cli import main

    path = tmp_path / "ok.yaml"
    path.write_text(yaml.safe_dump(bad_input_doc(), sort_keys=False))
    assert main(["trace", "check", str(path)]) == 0


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_bad_version_2_input_is_refused_in_one_line(tmp_path, capsys, case):
    """Issue 12, "Bad input": exit 2 and one line `attnsim: error: FILE:LINE: FIELD = VALUE: EXPECTED`."""
    from sim.cli import main

    step, key, value, field, shown, words = BAD_INPUTS[case]
    doc = bad_input_doc()
    doc["steps"][step].update(key if isinstance(key, dict) else {key: value})
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    code = main(["trace", "check", str(path)])
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and not out, (code, out, err)
    assert lines[0].startswith(f"attnsim: error: {path}:")
    assert f" {field} = {shown}: " in lines[0]
    assert words in lines[0]


def test_bad_input_through_python_dash_m(tmp_path):
    """The same through `python -m sim.cli trace check` in its own process (exit status 2)."""
    doc = bad_input_doc()
    doc["steps"][3]["kv_rows"] = 8
    path = tmp_path / "bad.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False))
    proc = subprocess.run([sys.executable, "-m", "sim.cli", "trace", "check", str(path)],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [proc.stderr.strip()]
    assert "steps[3].kv_rows = 8" in proc.stderr
