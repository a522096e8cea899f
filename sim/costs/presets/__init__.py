"""Technology presets: per-operation energy and per-item area tables.

A preset is a YAML file of groups (``multiply_pj``, ``sram``...) whose entries
are ``{value, origin}``: every number says where it came from. Bundled presets
live in this package and are named without the ``.yaml`` (``horowitz45``);
an architecture config may name one or give the path of its own file, and
override single values by dotted name (``multiply_pj.int16: 0.7``).

This module reads and checks the tables and answers the two questions the
models ask of them: which entry serves an operand of a given width, and what a
buffer of a given size costs per access.
"""

import bisect
import copy
import importlib.resources
import math
import os
import re

from ...errors import NO_VALUE, ConfigError, closest
from ...yamlio import decode_text, guess_kind, locate, parse_text, read_bytes

WIDTH_KEY = re.compile(r"^(int|fp)(\d+)$")
FORMATS = ("int", "fp")


def _number(v, low=0.0):
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        v = float(v)
    except OverflowError:
        return False
    return math.isfinite(v) and low <= v <= 1e12


# kind -> group -> (key rule, value rule, what a value must be, fixed keys or None for open)
_RULES = {
    "energy": {
        "multiply_pj": ("width", _number, "a number of pJ >= 0", None),
        "add_pj": ("width", _number, "a number of pJ >= 0", None),
        "sram_read_64b_pj": ("size", lambda v: _number(v) and v > 0, "a number of pJ > 0", None),
        "sram": ("fixed", _number, "a number >= 0", ("write_factor",)),
        "sram_access": ("fixed", lambda v: _number(v) and v <= 1, "a share between 0 and 1", ("fixed_share",)),
        "leakage_mw_per_mm2": ("fixed", _number, "a number of mW per mm^2 >= 0", ("logic", "sram")),
        "clock": ("fixed", _number, "a number of pJ >= 0", ("pj_per_mm2_busy_cycle",)),
        "dram_pj_per_bit": ("name", _number, "a number of pJ per bit >= 0", None),
        "mac": ("fixed", lambda v: _number(v, 1) and float(v).is_integer(), "a whole number of bits >= 1",
                ("accumulate_bits",)),
        "softmax": ("fixed", _number, "a count >= 0", ("exp_multiplies", "exp_adds")),
        "format": ("fixed", lambda v: v in FORMATS, "int or fp", ("mac", "softmax", "compare")),
    },
    "area": {
        "multiplier_um2": ("width", _number, "a number of um^2 >= 0", None),
        "adder_um2": ("width", _number, "a number of um^2 >= 0", None),
        "sram": ("fixed", _number, "a number of um^2 >= 0", ("um2_per_kib",)),
        "softmax": ("fixed", _number, "a count >= 0",
                    ("multipliers_per_lane", "adders_per_lane", "comparators_per_lane")),
        "mac": ("fixed", lambda v: _number(v, 1) and float(v).is_integer(), "a whole number of bits >= 1",
                ("accumulate_bits",)),
        "format": ("fixed", lambda v: v in FORMATS, "int or fp", ("mac", "softmax", "compare")),
    },
}

DEFAULTS = {"energy": "horowitz45", "area": "proxy45"}
_FILES = {"energy": "energy_{}.yaml", "area": "area_{}.yaml"}
_cache = {}


def bundled(kind):
    """Names of the bundled presets of ``kind`` ('energy' or 'area')."""
    prefix = _FILES[kind].split("{}")[0]
    out = []
    for entry in importlib.resources.files(__name__).iterdir():
        n = entry.name
        if n.startswith(prefix) and n.endswith(".yaml"):
            out.append(n[len(prefix):-5])
    return sorted(out)


def load_preset(kind, spec, source="<config>", field=None):
    """The checked table of preset ``spec`` (a bundled name or a YAML path).

    Returns ``{"name", "description", "source", "file", "groups": {group: {entry:
    {"value", "origin"}}}}``; a fresh copy every call.
    """
    field = field or f"{kind}.preset"
    if not isinstance(spec, str) or not spec:
        raise ConfigError(source, field, spec, f"expected a bundled {kind} preset name "
                          f"({', '.join(bundled(kind))}) or the path of a preset YAML file")
    key = (kind, spec)
    if key not in _cache:
        names = bundled(kind)
        if spec in names:
            res = importlib.resources.files(__name__).joinpath(_FILES[kind].format(spec))
            where = f"{kind} preset {spec}"
            data = res.read_bytes()
        elif spec.endswith((".yaml", ".yml")):
            path = spec if os.path.isabs(spec) or os.path.exists(spec) else os.path.join(
                os.path.dirname(str(source)), spec)
            try:
                data = read_bytes(path, ConfigError, f"{kind} preset")
            except ConfigError as exc:
                raise ConfigError(source, field, spec, f"{exc.expected} ({path})") from None
            where = path
        else:
            raise ConfigError(source, field, spec, f"expected a bundled {kind} preset "
                              f"({', '.join(names)}) or a .yaml path" + closest(spec, names))
        doc = parse_text(decode_text(data, where, ConfigError, f"{kind} preset"), where, ConfigError)
        try:
            _cache[key] = _check_preset(kind, doc.data, where)
        except ConfigError as exc:
            raise locate(exc, doc) from None
    return copy.deepcopy(_cache[key])


def _check_preset(kind, raw, where):
    if not isinstance(raw, dict):
        raise ConfigError(where, "<root>", raw if not isinstance(raw, (list, dict)) else type(raw).__name__,
                          "expected a mapping of preset groups")
    guessed = guess_kind(raw)
    if guessed not in (None, "a technology preset"):
        raise ConfigError(where, "<file>", NO_VALUE, f"this looks like {guessed}, not a {kind} preset")
    if "kind" in raw and raw["kind"] != kind:
        raise ConfigError(where, "kind", raw["kind"], f"expected {kind} (this is the {kind}.preset)")
    rules = _RULES[kind]
    meta = ("name", "kind", "description", "source")
    for m in ("name", "description", "source"):
        if m in raw and not isinstance(raw[m], str):
            raise ConfigError(where, m, raw[m], "expected text")
    groups = {}
    for g, entries in raw.items():
        if g in meta:
            continue
        if g not in rules:
            raise ConfigError(where, str(g), entries, "unknown group" + closest(g, list(rules) + list(meta)))
        if not isinstance(entries, dict):
            raise ConfigError(where, g, entries, "expected a mapping of entries")
        groups[g] = {}
        for k, e in entries.items():
            if not isinstance(e, dict) or set(e) != {"value", "origin"}:
                raise ConfigError(where, f"{g}.{k}", e, "expected {value: ..., origin: '...'}")
            if not isinstance(e["origin"], str):
                raise ConfigError(where, f"{g}.{k}.origin", e["origin"], "expected text saying where the value is from")
            groups[g][_check_key(kind, g, k, where, f"{g}.{k}")] = {
                "value": _check_value(kind, g, e["value"], where, f"{g}.{k}"), "origin": e["origin"]}
    for g, (_rule, _ok, _what, fixed) in rules.items():
        for k in fixed or ():
            if k not in groups.get(g, {}):
                raise ConfigError(where, f"{g}.{k}", None, "missing entry (every preset of this kind has it)")
        if not groups.get(g):
            raise ConfigError(where, g, None, "missing group (every preset of this kind has it)")
    if kind == "energy" and not raw.get("source"):
        raise ConfigError(where, "source", raw.get("source"), "expected the source of the values")
    return {"name": str(raw.get("name", where)), "description": str(raw.get("description", "")),
            "source": str(raw.get("source", "")), "file": where, "groups": groups}


def _check_key(kind, group, key, where, field):
    rule, _ok, _what, fixed = _RULES[kind][group]
    if rule == "width":
        if not isinstance(key, str) or not WIDTH_KEY.match(key):
            raise ConfigError(where, field, key, "expected an entry named int<BITS> or fp<BITS>, e.g. int8")
        return key
    if rule == "size":
        try:
            size = -1.0 if isinstance(key, bool) else float(key)
        except (TypeError, ValueError, OverflowError):
            size = -1.0
        if not math.isfinite(size) or size <= 0 or size > 2 ** 30:
            raise ConfigError(where, field, key, "expected a buffer size in KiB > 0")
        return int(size) if size.is_integer() else size
    if rule == "fixed" and key not in fixed:
        raise ConfigError(where, field, key, "unknown entry" + closest(key, fixed))
    if not isinstance(key, str) or not key.isprintable() or len(key) > 100:
        raise ConfigError(where, field, key, "expected a short name")
    return key


def _check_value(kind, group, value, where, field):
    _rule, ok, what, _fixed = _RULES[kind][group]
    if not ok(value):
        raise ConfigError(where, field, value, f"expected {what}")
    return value


def apply_overrides(kind, table, overrides, source="<config>"):
    """``table`` with ``{"group.entry": value}`` overrides applied and checked."""
    field = f"{kind}.overrides"
    if not isinstance(overrides, dict):
        raise ConfigError(source, field, overrides, "expected a mapping of group.entry: value")
    rules = _RULES[kind]
    for path, value in overrides.items():
        g, _, k = str(path).partition(".")
        if g not in rules or not k:
            raise ConfigError(source, f"{field}.{path}", value,
                              "expected group.entry with group one of " + ", ".join(rules)
                              + closest(g, rules))
        k = _check_key(kind, g, k, source, f"{field}.{path}")
        value = _check_value(kind, g, value, source, f"{field}.{path}")
        table["groups"].setdefault(g, {})[k] = {"value": value, "origin": "override in the architecture config"}
    return table


def nearest_width(group, fmt, bits):
    """``(entry, {value, origin})`` of the entry of format ``fmt`` nearest to ``bits``.

    Nearest by absolute difference in bits; a tie goes to the wider entry
    (it never underestimates). An operand pair of different widths is looked
    up by the wider one.
    """
    cands = []
    for k, e in group.items():
        m = WIDTH_KEY.match(k)
        if m and m.group(1) == fmt:
            cands.append((abs(int(m.group(2)) - bits), -int(m.group(2)), k))
    if not cands:
        return None, None
    _d, _w, k = min(cands)
    return k, group[k]


def sram_per_access(group, kib):
    """pJ of one 64-bit access to an SRAM of ``kib`` KiB, and how it was found.

    Between table sizes: a power law through the two neighbours (straight in
    log energy against log size; the table's own points follow roughly the
    square root of size). Outside: the end segment's law continued; a single
    entry is used as it is.
    """
    sizes = sorted(group)
    vals = [float(group[s]["value"]) for s in sizes]
    if kib in group:
        return vals[sizes.index(kib)], f"table entry {kib:g} KiB"
    if len(sizes) == 1:
        return vals[0], f"only table entry {sizes[0]:g} KiB"
    i = bisect.bisect_left(sizes, kib)
    lo = min(max(i - 1, 0), len(sizes) - 2)
    s0, s1, e0, e1 = sizes[lo], sizes[lo + 1], vals[lo], vals[lo + 1]
    p = math.log(e1 / e0) / math.log(s1 / s0)
    how = "interpolated" if s0 < kib < s1 else "extrapolated"
    return e0 * (kib / s0) ** p, f"{how} as a power law (exponent {p:.3f}) from {s0:g} and {s1:g} KiB"
