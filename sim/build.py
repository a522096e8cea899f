"""Which simulator build made a result: the package version and a hash of its simulating source.

Results from a different build never pass for this one's: the sweep store keys
points by it, remote workers are checked against it, and every result
document names it (``simulator.build``), so a report can tell runs of
different code apart even when the version number is the same.
"""

import hashlib
import os

from .version import __version__

_build = None

# The code a result depends on (the sweep, report and CLI code do not change results).
_BUILD_PARTS = ("__init__.py", "run.py", "version.py", "arch.py", "result.py", "limits.py", "errors.py",
                "engine", "model", "costs", os.path.join("trace", "format.py"), os.path.join("trace", "step.py"),
                os.path.join("trace", "npz.py"))


def build_id():
    """``VERSION+HASH``: the package version and a hash of the simulating source files."""
    global _build
    if _build is None:
        root = os.path.dirname(os.path.abspath(__file__))
        h = hashlib.sha256()
        files = []
        for part in _BUILD_PARTS:
            p = os.path.join(root, part)
            if os.path.isdir(p):
                for d, _subdirs, names in os.walk(p):
                    files += [os.path.join(d, n) for n in names if n.endswith(".py")]
            elif os.path.exists(p):
                files.append(p)
        for f in sorted(files, key=lambda f: os.path.relpath(f, root).replace(os.sep, "/")):
            h.update(os.path.relpath(f, root).replace(os.sep, "/").encode())
            with open(f, "rb") as fh:
                h.update(hashlib.sha256(fh.read()).digest())
        _build = f"{__version__}+{h.hexdigest()[:12]}"
    return _build
