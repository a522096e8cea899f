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
    assert cmds[0].startswith("pip install") and "attnsim" in cmds[0]


def test_ci_runs_the_readme_test_command_verbatim():
    test_cmd = _quick_start_commands()[1]
    ci = open(os.path.join(ROOT, ".ci", "run"), encoding="utf-8").read().splitlines()
    assert test_cmd in ci
