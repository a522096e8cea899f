"""Errors raised at the boundary (configs, traces, policies, sweep specs, options).

Every input error names the file, the field, the bad value and what was
expected, so the command line can print it as one line and exit 2.
"""

from __future__ import annotations

import difflib
from typing import Any, Iterable


class _NoValue:
    """Marks an error with no single bad value to show (a YAML syntax error, a missing file kind)."""

    def __repr__(self):
        return "<no value>"


NO_VALUE: Any = _NoValue()


class InputError(ValueError):
    """A user-supplied file or value is malformed or inconsistent.

    The message is a single line: ``FILE[:LINE]: FIELD = VALUE: EXPECTED``
    (``= VALUE`` left out when there is no single value to show).
    """

    def __init__(self, source: Any, field: str, value: Any, expected: str, line: int | None = None):
        self.source = source or "<input>"
        self.field = field
        self.value = value
        self.expected = expected
        self.line = line
        super().__init__(self._text())

    def _text(self) -> str:
        where = f"{self.source}:{self.line}" if self.line else f"{self.source}"
        shown = "" if self.value is NO_VALUE else f" = {_short(self.value)}"
        return _one_line(f"{where}: {self.field}{shown}: {self.expected}")

    def located(self, source: Any = None, line: int | None = None) -> "InputError":
        """The same error, attributed to ``source`` (the file that set the value) and ``line``."""
        if source is not None:
            self.source = source
        if line is not None:
            self.line = line
        self.args = (self._text(),)
        return self

    def __str__(self) -> str:
        return self.args[0] if self.args else self._text()


class ConfigError(InputError):
    """An architecture config is malformed or inconsistent."""


class TraceError(InputError):
    """An attention trace is malformed or inconsistent."""


class SweepError(InputError):
    """A sweep spec, its output folder or its backend is unusable."""


class OptionError(InputError):
    """A command-line option or output path is unusable (``--out = 'x': exists ...``)."""

    def _text(self) -> str:
        if self.source == self.field:
            shown = "" if self.value is NO_VALUE else f" = {_short(self.value)}"
            return _one_line(f"{self.field}{shown}: {self.expected}")
        return super()._text()


class SimulationStalled(RuntimeError):
    """The simulated datapath stopped making progress before the trace ended.

    ``unit`` names the unit that could not go on and ``cause`` what it waited for.
    """

    def __init__(self, message: str, unit: str | None = None, cause: str | None = None):
        super().__init__(message)
        self.unit = unit
        self.cause = cause


def closest(name: Any, candidates: Iterable[Any]) -> str:
    """Return a ' (did you mean X?)' hint for an unknown key, or ''."""
    match = difflib.get_close_matches(str(name), [str(c) for c in candidates], n=1, cutoff=0.5)
    if match:
        return f" (did you mean '{match[0]}'?)"
    return ""


def _short(value: Any, limit: int = 80) -> str:
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) >= 10 ** 30:
        return f"{'-' if value < 0 else ''}<{abs(value).bit_length()}-bit whole number>"
    try:
        text = repr(value)
    except Exception:  # a value whose repr fails still gets a one-line error
        text = f"<{type(value).__name__}>"
    if len(text) > limit:
        # keep both ends: a long path's file name is at its end
        head = (limit - 3) // 2
        text = text[:head] + "..." + text[-(limit - 3 - head):]
    return text


def _one_line(text: str) -> str:
    """Control characters (newlines from a value or a library message) shown escaped."""
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)
