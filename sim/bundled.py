"""Where the bundled configs, traces, texts and policies are, in a checkout or an install.

In a source checkout they live at the repository's top level (``arch_configs/``,
``traces/``); an installed package carries copies as package data under
``sim/_data/`` (see ``setup.cfg``). :func:`root` finds whichever is there, so
``attnsim demo`` and ``attnsim arch check edge`` work from any directory.
"""

from __future__ import annotations

import os

_PACKAGE = os.path.dirname(os.path.abspath(__file__))


def root() -> str | None:
    """The folder holding ``arch_configs/`` and ``traces/``, or None when neither copy is there."""
    checkout = os.path.dirname(_PACKAGE)
    installed = os.path.join(_PACKAGE, "_data")
    for cand in (checkout, installed):
        if os.path.isdir(os.path.join(cand, "arch_configs")) and os.path.isdir(os.path.join(cand, "traces")):
            return cand
    return None


def path(*parts: str) -> str | None:
    """A bundled file or folder (``path("arch_configs", "edge.yaml")``), or None."""
    base = root()
    if base is None:
        return None
    p = os.path.join(base, *parts)
    return p if os.path.exists(p) else None


def config(name: str) -> str | None:
    """The bundled architecture config called ``name`` (``edge``, ``memory/hbm2``), or None."""
    if not isinstance(name, str) or not name or name.startswith(("/", ".")) or ".." in name:
        return None
    stem = name[:-5] if name.endswith(".yaml") else name
    return path("arch_configs", *stem.split("/")[:-1], stem.split("/")[-1] + ".yaml")


def config_names() -> list[str]:
    """Names :func:`config` resolves."""
    base = path("arch_configs")
    if base is None:
        return []
    out = []
    for dirpath, _dirs, files in os.walk(base):
        rel = os.path.relpath(dirpath, base)
        if rel.split(os.sep)[0] == "sweeps":
            continue
        for f in files:
            if f.endswith(".yaml"):
                out.append(os.path.normpath(os.path.join(rel, f[:-5])).replace(os.sep, "/"))
    return sorted(out)
