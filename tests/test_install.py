"""A normal (non-editable) install runs the demo and finds the bundled configs
from any folder: the configs, traces, texts and policies ship as package data.

Builds the package from a copy of this checkout into a fresh virtual
environment (reusing this interpreter's installed dependencies, so nothing is
downloaded) and runs its ``attnsim`` from an empty temporary folder with no
PYTHONPATH. Common practice, no source: an installed tool must not depend on
its source tree.
"""

import os
import shutil
import subprocess
import sys
import sysconfig

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SKIP = shutil.ignore_patterns(".git", "build", "dist", "*.egg-info", "__pycache__", ".pytest_cache",
                              ".hypothesis", ".mypy_cache", ".venv", "reports", "bench", "tests")


def _run(cmd, cwd, env, timeout=900):
    proc = subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    return proc.returncode, proc.stdout, proc.stderr


def test_non_editable_install_runs_demo_from_a_temporary_folder(tmp_path):
    src = tmp_path / "src"
    shutil.copytree(ROOT, src, ignore=SKIP)
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=300)
    py, attnsim = str(venv / "bin" / "python"), str(venv / "bin" / "attnsim")
    # this environment's packages (numpy, simpy, pip, setuptools...) seen from the new one through a
    # path entry; .pth files there are not run, so an editable install of the checkout stays invisible
    site = subprocess.run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          capture_output=True, text=True, check=True).stdout.strip()
    # in this interpreter's search order: a virtual environment's packages (a newer setuptools,
    # say) before the base interpreter's
    ours = [p for p in sys.path if p.endswith(("site-packages", "dist-packages"))]
    ours += [p for p in (sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]) if p not in ours]
    with open(os.path.join(site, "outer_env.pth"), "w", encoding="utf-8") as fh:
        fh.write("\n".join(dict.fromkeys(ours)) + "\n")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    code, out, err = _run([py, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
                           "--no-index", str(src)], cwd=tmp_path, env=env)
    assert code == 0, err
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    code, out, err = _run([py, "-c", "import sim; print(sim.__file__)"], cwd=elsewhere, env=env)
    assert code == 0 and out.strip().startswith(str(venv)), (out, err)   # the installed copy, not the checkout
    code, out, err = _run([attnsim, "arch", "check", "edge"], cwd=elsewhere, env=env)
    assert code == 0 and "valid" in out, err
    code, out, err = _run([attnsim, "demo"], cwd=elsewhere, env=env, timeout=1800)
    assert code == 0, err
    assert "Traceback" not in err
    assert (elsewhere / "reports" / "demo" / "report.html").is_file()
    assert "hbm2_stack" in out and "edge" in out           # every bundled datapath ran
