"""Errors raised at the boundary (configs, traces, policies, sweep specs).

Every input error names the file, the field, the bad value and what was
expected, so the command line can print it as one line and exit 2.
"""

import difflib


class InputError(ValueError):
    """A user-supplied file or value is malformed or inconsistent.

    The message is a single line: ``FILE: FIELD = VALUE: EXPECTED``.
    """

    def __init__(self, source, field, value, expected):
        self.source = source or "<input>"
        self.field = field
        self.value = value
        self.expected = expected
        shown = _short(value)
        super().__init__(f"{self.source}: {field} = {shown}: {expected}")


class ConfigError(InputError):
    """An architecture config is malformed or inconsistent."""


class TraceError(InputError):
    """An attention trace is malformed or inconsistent."""


class SimulationStalled(RuntimeError):
    """The simulated datapath stopped making progress before the trace ended."""


def closest(name, candidates):
    """Return a ' (did you mean X?)' hint for an unknown key, or ''."""
    match = difflib.get_close_matches(str(name), list(candidates), n=1, cutoff=0.5)
    if match:
        return f" (did you mean '{match[0]}'?)"
    return ""


def _short(value, limit=80):
    text = repr(value)
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return text
