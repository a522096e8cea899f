"""The README's two Quick start commands are the ones CI and users run (common practice, no source)."""

import os
import re

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _quick_start_commands():
    text = open(os.path.join(ROOT, "README.md"), encoding="utf-8").read()
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return [b.strip() for b in re.findall(r"```sh\n(.*?)```", section, flags=re.S)]


def test_quick_start_has_exactly_two_commands():
    cmds = _quick_start_commands()
    assert len(cmds) == 2
    assert all("\n" not in c for c in cmds)
    # the first command makes and uses a virtual environment, installs, and runs the demo
    assert cmds[0].startswith("python3 -m venv ") and ". .venv/bin/activate" in cmds[0]
    assert "pip install -e ." in cmds[0] and cmds[0].endswith("attnsim demo")
    assert cmds[1].startswith(cmds[0].split(" && pip install")[0])   # the tests run in the same environment


def test_ci_runs_the_readme_test_command_verbatim():
    test_cmd = _quick_start_commands()[1]
    ci = open(os.path.join(ROOT, ".ci", "run"), encoding="utf-8").read().splitlines()
    assert test_cmd in ci
