"""Output files of a command: checked before any work starts, written whole or not at all.

:class:`OutputPlan` collects a command's inputs and outputs and refuses, up
front, everything that would fail or destroy something after the work is done:
an empty name, a missing or unwritable folder, a name the file system cannot
hold, a path that is a folder or a device, an existing file (unless
``--force``), an output that is one of the command's inputs or another of its
outputs. :func:`write_atomic` then writes through a temporary file in the same
folder and renames it over the target, so a reader never sees half a file and
a full disk leaves the old file in place.
"""

from __future__ import annotations

import errno
import os
import stat
import sys
import tempfile
from typing import Callable, IO

from .errors import NO_VALUE, OptionError

STDOUT = "-"


def _same(a: str, b: str) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


class OutputPlan:
    """The inputs and outputs of one command, checked against each other."""

    def __init__(self, force: bool = False):
        self.force = force
        self.inputs: list[tuple[str, str]] = []      # (option, path)
        self.outputs: list[tuple[str, str]] = []

    def input(self, option: str, path) -> None:
        if path is not None:
            self.inputs.append((option, os.fspath(path)))

    def output(self, option: str, path, stdout_ok: bool = False, folder: bool = False) -> str | None:
        """Check one output path now; return it (``-`` for standard output) or None when not given."""
        if path is None:
            return None
        path = os.fspath(path)
        if path == "":
            raise OptionError(option, option, path, "expected a file name, got an empty value")
        if path == STDOUT:
            if not stdout_ok:
                raise OptionError(option, option, path, "this output cannot go to standard output")
            for opt, p in self.outputs:
                if p == STDOUT:
                    raise OptionError(option, option, path, f"{opt} already writes to standard output")
            self.outputs.append((option, path))
            return path
        for opt, p in self.inputs:
            if os.path.exists(path) and _same(path, p) or os.path.realpath(path) == os.path.realpath(p):
                raise OptionError(option, option, path,
                                  f"is the command's input {opt}; refusing to overwrite an input")
        for opt, p in self.outputs:
            if p != STDOUT and os.path.realpath(path) == os.path.realpath(p):
                raise OptionError(option, option, path, f"is also the output of {opt}; give each "
                                  "output its own file")
        if not folder:
            check_file_target(option, path, self.force)
        self.outputs.append((option, path))
        return path


def check_file_target(option: str, path: str, force: bool) -> None:
    """A regular file may be created (or, with ``force``, replaced) at ``path``."""
    name = option
    try:
        st = os.stat(path)
    except FileNotFoundError:
        st = None
    except OSError as exc:
        raise OptionError(option, name, path, f"cannot be used ({exc.strerror or exc})") from None
    if st is not None:
        if stat.S_ISDIR(st.st_mode):
            raise OptionError(option, name, path, "is a folder; expected a file name")
        if not stat.S_ISREG(st.st_mode):
            raise OptionError(option, name, path, "is not a regular file (a device or pipe); expected a file name")
        if not force:
            raise OptionError(option, name, path, "exists; pass --force to replace it")
    check_folder_writable(option, path)


def check_folder_writable(option: str, path: str) -> None:
    """The folder that will hold ``path`` exists and takes a new file of that name's length."""
    name = option
    folder = os.path.dirname(os.path.abspath(path))
    base = os.path.basename(path)
    if not base:
        raise OptionError(option, name, path, "expected a file name, not a folder")
    if not os.path.isdir(folder):
        raise OptionError(option, name, path, f"folder {folder} does not exist")
    try:
        limit = os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError):
        limit = 255
    if len(os.fsencode(base)) > limit:
        raise OptionError(option, name, NO_VALUE, f"file name of {len(os.fsencode(base))} bytes; the folder "
                          f"takes at most {limit}")
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".attnsim-check-")
    except OSError as exc:
        raise OptionError(option, name, path, f"cannot write in {folder} ({exc.strerror or exc})") from None
    os.close(fd)
    os.unlink(tmp)


def write_atomic(path: str, write: Callable[[IO], object], binary: bool = False, option: str = "output") -> str:
    """Write ``path`` through ``write(fh)`` on a temporary file, then rename it into place.

    ``path`` ``-`` writes to standard output instead. An OS error (a full
    disk, a vanished folder) becomes one OptionError line; the old file stays.
    """
    if path == STDOUT:
        if binary:
            write(sys.stdout.buffer)
            sys.stdout.buffer.flush()
        else:
            write(sys.stdout)
            sys.stdout.flush()
        return path
    folder = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".tmp-", suffix=os.path.splitext(path)[1])
        with (os.fdopen(fd, "wb") if binary else os.fdopen(fd, "w", encoding="utf-8")) as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes the file private; give it what open() would
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        reason = "the disk is full" if exc.errno == errno.ENOSPC else (exc.strerror or str(exc))
        raise OptionError(option, option, path, f"could not be written ({reason}); "
                          "nothing was replaced") from None
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)
    return path


def write_text(path: str, text: str, option: str = "output") -> str:
    def put(fh: IO) -> None:
        fh.write(text)
    return write_atomic(path, put, option=option)
