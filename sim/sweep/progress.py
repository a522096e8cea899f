"""Progress line on stderr: done/total, failures, screened-out points, ETA.

Drawn in place with a carriage return, at most a few times a second, and
only when the stream is a terminal (and not ``--quiet``), so logs and pipes
stay clean.
"""

import sys
import time

REFRESH_S = 0.2
WIDTH = 24


def _clock(seconds):
    s = int(round(seconds))
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


class Progress:
    """A one-line bar over ``total`` points, ``already`` of them finished before this run."""

    def __init__(self, total, already=0, stream=None, quiet=False):
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = not quiet and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.total = total
        self.already = already
        self.ran = 0
        self.failed = 0
        self.skipped = 0
        self._t0 = time.monotonic()
        self._last = 0.0
        self._drawn = False

    def update(self, ran=0, failed=0, skipped=0, force=False):
        self.ran += ran
        self.failed += failed
        self.skipped += skipped
        now = time.monotonic()
        if self.enabled and (force or now - self._last >= REFRESH_S):
            self._last = now
            self.stream.write("\r" + self.line(now) + "\x1b[K")
            self.stream.flush()
            self._drawn = True

    def line(self, now=None):
        now = time.monotonic() if now is None else now
        done = self.already + self.ran + self.skipped
        frac = done / self.total if self.total else 1.0
        fill = int(round(frac * WIDTH))
        left = self.total - done
        if self.ran and left:
            eta = _clock((now - self._t0) / self.ran * left)
        else:
            eta = "--:--" if left else "0:00"
        text = f"[{'#' * fill}{'.' * (WIDTH - fill)}] {done}/{self.total} points"
        text += f"  {self.failed} failed"
        if self.skipped:
            text += f"  {self.skipped} screened out"
        return text + f"  ETA {eta}"

    def close(self):
        if self.enabled and self._drawn:
            self.update(force=True)
            self.stream.write("\n")
            self.stream.flush()
