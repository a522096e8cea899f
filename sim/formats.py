"""How numbers are shown: one unit and one format per quantity, everywhere.

The terminal summary, the sweep and demo tables, the report's Markdown and
HTML all show a quantity the same way: in the unit :data:`QUANTITIES` gives it,
with the same number of significant digits, thousands separators and never an
exponent. CSV files carry exact values in the same units, the unit in the
column name (``latency_us``). Counts of things (cycles, MACs, requests) are
whole numbers; a fractional count (the engine counts requests of a coarse
grain in fractions) is rounded for display only.
"""

import math


class Quantity:
    """A displayed quantity: its unit, the factor from the document's unit, its kind."""

    __slots__ = ("unit", "scale", "kind", "digits")

    def __init__(self, unit, scale=1.0, kind="real", digits=4):
        self.unit = unit        # shown after the number or in a column header
        self.scale = scale      # document value x scale = shown value
        self.kind = kind        # 'real', 'count', 'percent' or 'ratio'
        self.digits = digits    # significant digits of a real


# document unit -> shown unit; one entry per quantity the outputs show
QUANTITIES = {
    "cycles": Quantity("cycles", 1.0, "count"),
    "latency": Quantity("us", 1e6),                 # seconds -> us
    "energy": Quantity("uJ", 1e-6),                 # pJ -> uJ
    "energy_per_token": Quantity("nJ/token", 1e-3),  # pJ -> nJ
    "power": Quantity("W", 1.0),
    "leakage": Quantity("mW", 1.0),
    "area": Quantity("mm^2", 1.0),
    "bandwidth": Quantity("GB/s", 1.0),
    "bytes": Quantity("MB", 1e-6),                  # bytes -> MB (1e6 bytes)
    "macs": Quantity("MACs", 1.0, "count"),
    "requests": Quantity("requests", 1.0, "count"),
    "ops_rate": Quantity("GOP/s", 1e-9),            # operations per second -> GOP/s
    "share": Quantity("%", 100.0, "percent"),        # a fraction of the run -> percent
    "speedup": Quantity("x", 1.0, "ratio"),
    "bits": Quantity("bits", 1.0, "real", 3),
}


def number(x, digits=4):
    """``x`` with ``digits`` significant digits, thousands separators, no exponent."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if x == 0:
        return "0"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(x)))))
    text = f"{x:,.{decimals}f}"
    return "0" if text.lstrip("-").strip("0.,") == "" else text


def value(x, quantity):
    """The shown number (without unit) of document value ``x`` of ``quantity``."""
    if x is None:
        return "-"
    q = QUANTITIES[quantity]
    v = x * q.scale
    if q.kind == "count":
        return f"{int(round(v)):,}"
    if q.kind == "percent":
        return f"{v:.1f}" if abs(v) < 99.95 or abs(v) >= 100 else f"{v:.2f}"
    if q.kind == "ratio":
        return f"{v:,.2f}"
    return number(v, q.digits)


def show(x, quantity):
    """The shown number with its unit: ``1,234 us``, ``66.5%``, ``1.61x``."""
    text = value(x, quantity)
    if text == "-":
        return text
    q = QUANTITIES[quantity]
    if q.kind == "percent":
        return f"{text}%"
    if q.kind == "ratio":
        return f"{text}x"
    return f"{text} {q.unit}"


def header(title, quantity):
    """A column header naming the unit: ``latency (us)``."""
    q = QUANTITIES[quantity]
    return title if q.kind == "count" and q.unit in title else f"{title} ({q.unit})"


def pct(x):
    """A share of the run in prose: ``66%`` (whole percent; ``<1%`` for a small nonzero share)."""
    if x is None:
        return "-"
    if 0 < x < 0.005:
        return "<1%"
    return f"{x:.0%}"
