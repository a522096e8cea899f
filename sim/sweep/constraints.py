"""Constraints on sweep points, written as data (no ``eval``).

A rule is a one-key mapping. Comparisons take two terms::

    {le: [buffers.key_kib, {mul: [buffers.value_kib, 2]}]}    # key <= 2 x value
    {ge: [derived.buffer_kib, 96]}

``le lt ge gt eq ne`` compare; ``all: [rules]``, ``any: [rules]`` and
``not: rule`` combine. A term is a number, a dotted config path (read from the
point's resolved config), a ``derived.*`` quantity (see :data:`DERIVED`), a
``{literal: X}`` (to compare against text such as ``fcfs``), or arithmetic:
``add`` and ``mul`` over a list, ``sub`` and ``div`` over two terms, ``min`` and
``max`` over a list. A point is kept when every rule of ``keep_if`` holds.
"""

import math
import numbers

from .. import arch as archmod
from ..errors import SweepError, closest

COMPARE = {
    "le": lambda a, b: a <= b, "lt": lambda a, b: a < b,
    "ge": lambda a, b: a >= b, "gt": lambda a, b: a > b,
    "eq": lambda a, b: a == b, "ne": lambda a, b: a != b,
}
LOGIC = ("all", "any", "not")
MAX_ARGS = 64       # terms of one add/mul/min/max
ORDERING = ("le", "lt", "ge", "gt")
ARITH = {
    "add": (2, None, lambda xs: math.fsum(xs)),
    "mul": (2, None, lambda xs: float(math.prod(xs))),
    "sub": (2, 2, lambda xs: xs[0] - xs[1]),
    "div": (2, 2, lambda xs: xs[0] / xs[1]),
    "min": (1, None, min),
    "max": (1, None, max),
}


def _buffer_kib(c):
    b = c["buffers"]
    return b["query_kib"] + b["key_kib"] + b["value_kib"]


# Quantities of a config that are not a single knob (all exact, from the config alone).
DERIVED = {
    "derived.buffer_kib": ("query + key + value buffer, KiB", _buffer_kib),
    "derived.peak_gbps": ("dram.channels x dram.channel_gbps",
                          lambda c: c["dram"]["channels"] * c["dram"]["channel_gbps"]),
    "derived.peak_gmacs": ("dot.multipliers x clock_ghz, GMAC/s",
                           lambda c: c["dot"]["multipliers"] * c["clock_ghz"]),
    "derived.bytes_per_cycle": ("peak DRAM bytes per accelerator cycle",
                                lambda c: c["dram"]["channels"] * c["dram"]["channel_gbps"] / c["clock_ghz"]),
}


def _err(source, field, value, expected):
    return SweepError(source, field, value, expected)


class Rule:
    """A parsed rule; ``holds(config)`` evaluates it on a resolved config mapping."""

    def __init__(self, op, args, field, text):
        self.op = op
        self.args = args
        self.field = field
        self.text = text

    def holds(self, config):
        if self.op == "all":
            return all(r.holds(config) for r in self.args)
        if self.op == "any":
            return any(r.holds(config) for r in self.args)
        if self.op == "not":
            return not self.args[0].holds(config)
        a, b = (t.value(config) for t in self.args)
        return COMPARE[self.op](a, b)

    def paths(self):
        for a in self.args:
            yield from a.paths()


class Term:
    """A parsed term: a constant, a config path, a derived quantity or arithmetic.

    ``of`` is what it evaluates to: "number", "text" or "bool" (checked when
    the rule is parsed, so evaluation never mixes them).
    """

    def __init__(self, kind, payload, of="number"):
        self.kind = kind
        self.payload = payload
        self.of = of

    def value(self, config):
        if self.kind == "const":
            return self.payload
        if self.kind == "path":
            node = config
            for part in self.payload.split("."):
                node = node[part]
            return node
        if self.kind == "derived":
            return DERIVED[self.payload][1](config)
        _lo, _hi, fn = ARITH[self.kind]
        out = fn([t.value(config) for t in self.payload])
        if isinstance(out, float) and not math.isfinite(out):
            raise OverflowError(f"{self.kind} gives {out}")
        return out

    def paths(self):
        if self.kind in ("path", "derived"):
            yield self.payload
        elif self.kind in ARITH:
            for t in self.payload:
                yield from t.paths()


def parse_rules(value, source, field):
    """Parse the ``keep_if`` list into :class:`Rule` objects."""
    if value is None:
        return []
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list):
        raise _err(source, field, value, "expected a list of rules such as {le: [buffers.key_kib, 256]}")
    return [parse_rule(r, source, f"{field}[{i}]") for i, r in enumerate(value)]


def parse_rule(raw, source, field):
    ops = list(COMPARE) + list(LOGIC)
    if not isinstance(raw, dict) or len(raw) != 1:
        raise _err(source, field, raw, f"expected a mapping with one key, one of {', '.join(ops)}")
    (op, args), = raw.items()
    if op not in ops:
        raise _err(source, f"{field}.{op}", args, f"unknown rule, expected one of {', '.join(ops)}"
                   + closest(op, ops))
    where = f"{field}.{op}"
    if op == "not":
        return Rule(op, [parse_rule(args, source, where)], field, raw)
    if op in ("all", "any"):
        if not isinstance(args, list) or not args:
            raise _err(source, where, args, "expected a list of one or more rules")
        return Rule(op, [parse_rule(a, source, f"{where}[{i}]") for i, a in enumerate(args)], field, raw)
    if not isinstance(args, list) or len(args) != 2:
        raise _err(source, where, args, "expected a list of two terms to compare")
    terms = [parse_term(a, source, f"{where}[{i}]") for i, a in enumerate(args)]
    if op in ORDERING and any(t.of != "number" for t in terms):
        bad = next(i for i, t in enumerate(terms) if t.of != "number")
        raise _err(source, f"{where}[{bad}]", args[bad], f"is {terms[bad].of}; {op} compares numbers "
                   "(eq and ne compare text)")
    if terms[0].of != terms[1].of:
        raise _err(source, where, args, f"compares {terms[0].of} with {terms[1].of}; expected two of one kind")
    return Rule(op, terms, field, raw)


def parse_term(raw, source, field):
    if isinstance(raw, bool):
        raise _err(source, field, raw, "expected a number, a config path or an operation "
                   "(write {literal: true} to compare with true/false)")
    if isinstance(raw, numbers.Real):
        if isinstance(raw, float) and not math.isfinite(raw) or abs(raw) > 1e300:
            raise _err(source, field, raw, "expected a finite number of at most 1e300 in size")
        return Term("const", float(raw) if isinstance(raw, int) and abs(raw) > 2 ** 53 else raw)
    if isinstance(raw, str):
        if raw in DERIVED:
            return Term("derived", raw)
        f = archmod.field_for(raw)
        if f is None:
            names = archmod.knob_paths() + list(DERIVED)
            raise _err(source, field, raw, "no such config knob or derived quantity" + closest(raw, names))
        if f.kind == "map":
            raise _err(source, field, raw, "is a mapping of overrides; a rule reads single knobs")
        of = {"int": "number", "float": "number", "bool": "bool"}.get(f.kind, "text")
        return Term("path", raw, of)
    if isinstance(raw, dict) and len(raw) == 1:
        (op, args), = raw.items()
        if op == "literal":
            if isinstance(args, (dict, list)) or args is None:
                raise _err(source, f"{field}.literal", args, "expected a single value")
            if isinstance(args, bool):
                return Term("const", args, "bool")
            if isinstance(args, str):
                return Term("const", args, "text")
            return parse_term(args, source, f"{field}.literal")
        if op in ARITH:
            lo, hi, _fn = ARITH[op]
            if not isinstance(args, list) or len(args) < lo or (hi is not None and len(args) > hi) \
                    or len(args) > MAX_ARGS:
                want = f"exactly {hi}" if hi == lo else f"{lo} to {MAX_ARGS}"
                raise _err(source, f"{field}.{op}", args, f"expected a list of {want} terms")
            terms = [parse_term(a, source, f"{field}.{op}[{i}]") for i, a in enumerate(args)]
            for i, t in enumerate(terms):
                if t.of != "number":
                    raise _err(source, f"{field}.{op}[{i}]", args[i], f"is {t.of}; {op} takes numbers")
            return Term(op, terms)
        names = list(ARITH) + ["literal"]
        raise _err(source, f"{field}.{op}", args, f"unknown operation, expected one of {', '.join(names)}"
                   + closest(op, names))
    raise _err(source, field, raw, "expected a number, a config path, {literal: X} or an operation "
               "such as {mul: [buffers.value_kib, 2]}")


def keeps(rules, config, source, point):
    """True when every rule holds for ``config``; a rule that cannot be evaluated is an input error."""
    for rule in rules:
        try:
            ok = rule.holds(config)
        except (TypeError, ZeroDivisionError, KeyError, OverflowError, ValueError) as exc:
            raise _err(source, rule.field, rule.text,
                       f"cannot be evaluated at point {point}: {type(exc).__name__}: {exc}") from None
        if not ok:
            return False
    return True


__all__ = ["DERIVED", "Rule", "Term", "keeps", "parse_rule", "parse_rules", "parse_term"]
