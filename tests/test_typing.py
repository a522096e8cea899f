"""The public API is typed (PEP 561 ``py.typed``) and mypy accepts it; a user's
script that calls it wrongly is flagged. mypy is the reference type checker
(PyPI ``mypy``); common practice, no source, for what a typed API promises."""

import os
import subprocess
import sys
import textwrap

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
PUBLIC = ["sim/__init__.py", "sim/run.py", "sim/arch.py", "sim/errors.py", "sim/yamlio.py",
          "sim/outputs.py", "sim/bundled.py", "sim/budget.py", "sim/result.py", "sim/trace/format.py", "sim/sweep/__init__.py"]

pytest.importorskip("mypy", reason="the test extra installs mypy")


def mypy(*args, cwd=ROOT):
    env = dict(os.environ, PYTHONPATH=ROOT)
    proc = subprocess.run([sys.executable, "-m", "mypy", "--config-file", os.path.join(ROOT, "setup.cfg"),
                           "--cache-dir", os.path.join(os.environ.get("TMPDIR", "/tmp"), "attnsim-mypy-cache"),
                           *args], cwd=cwd, env=env, capture_output=True, text=True, timeout=600)
    return proc.returncode, proc.stdout + proc.stderr


def test_py_typed_marker_ships_with_the_package():
    assert os.path.exists(os.path.join(ROOT, "sim", "py.typed"))
    cfg = open(os.path.join(ROOT, "setup.cfg"), encoding="utf-8").read()
    assert "sim = py.typed" in cfg


def test_public_modules_type_check():
    code, out = mypy(*PUBLIC)
    assert code == 0, out


def test_a_user_script_is_checked_against_the_hints(tmp_path):
    good = tmp_path / "good.py"
    good.write_text(textwrap.dedent("""
        import sim
        arch: sim.Arch = sim.load_arch("mid").with_overrides({"dot.multipliers": 2048})
        trace: sim.Trace = sim.load_trace("traces/demo_decode.yaml")
        cycles: int = sim.simulate(arch, trace).cycles
    """))
    bad = tmp_path / "bad.py"
    bad.write_text(textwrap.dedent("""
        import sim
        cycles: str = sim.simulate(sim.load_arch("mid"), 5).cycles
    """))
    code, out = mypy(str(good))
    assert code == 0, out
    code, out = mypy(str(bad))
    assert code == 1, out
    assert "Found 2 errors" in out                          # the int result in a str, and ...
    assert 'expected "Trace | str | PathLike[str]"' in out  # ... 5 where a trace belongs
