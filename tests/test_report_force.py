"""`report --force` deletes only what an old manifest lists inside the output folder.

A manifest is plain JSON anyone can edit, and folders inside the output can be
symbolic links: the files an old report wrote are removed only after their
folders are resolved through links, never outside the output folder, and an
entry that is itself a link is removed as a link (its target untouched).
Common practice, no source: this is the rule of a tool that cleans its own
output folder.
"""

import json
import os

import pytest

import sim
from sim.cli import main


@pytest.fixture(scope="module")
def result_json(tmp_path_factory):
    d = tmp_path_factory.mktemp("res")
    doc = sim.simulate(sim.load_arch("arch_configs/mid.yaml"), sim.load_trace("traces/demo_decode.yaml")).to_dict()
    p = d / "r.json"
    p.write_text(json.dumps(doc))
    return str(p)


def report(result_json, out, *extra):
    return main(["report", result_json, "--out", str(out), "--no-replay", *extra])


def write_manifest(out, extra):
    man = out / "manifest.json"
    doc = json.loads(man.read_text())
    doc["files"] += extra
    man.write_text(json.dumps(doc))


def test_force_never_deletes_outside_the_output_folder(tmp_path, result_json):
    out = tmp_path / "rep"
    assert report(result_json, out) == 0
    outside = tmp_path / "outside"
    outside.mkdir()
    victims = {name: outside / name for name in ("a.txt", "b.txt", "stall_breakdown.png", "target.txt")}
    for p in victims.values():
        p.write_text("keep me")
    (out / "link.txt").symlink_to(victims["target.txt"])          # a listed link: removed as a link
    (out / "sub").mkdir()
    (out / "sub" / "up").symlink_to(outside, target_is_directory=True)
    write_manifest(out, ["../outside/a.txt", str(victims["b.txt"]), "sub/up/stall_breakdown.png",
                         "link.txt", "figures/../../outside/a.txt", ".", ""])
    assert report(result_json, out, "--force") == 0
    for p in victims.values():
        assert p.read_text() == "keep me", p
    assert not os.path.islink(out / "link.txt")
    man = json.loads((out / "manifest.json").read_text())
    assert all((out / f).is_file() for f in man["files"])


def test_force_refuses_a_figures_folder_linked_outside(tmp_path, result_json, capsys):
    out = tmp_path / "rep"
    assert report(result_json, out) == 0
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "stall_breakdown.png").write_text("keep me")
    real = out / "figures"
    for f in real.iterdir():
        f.unlink()
    real.rmdir()
    real.symlink_to(outside, target_is_directory=True)      # manifest lists figures/stall_breakdown.png
    capsys.readouterr()
    assert report(result_json, out, "--force") == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "symbolic link" in err and "figures" in err
    assert (outside / "stall_breakdown.png").read_text() == "keep me"
