"""Objectives of a sweep (all minimized) and their screening bounds.

An objective reads one number from a finished point (the mean over its runs
when the spec runs each point at several refresh phases): from its result and
config (``measure``), or from the column of the store's table that holds the
same number (``column``). ``energy`` and ``area`` come from the result
document's ``energy.total_pj`` and ``area.total_mm2``; when the results carry
no such section, ``energy`` falls back to ``cycles`` and
``area`` to the config's multiplier count and total buffer KiB, and the summary
says so.

Screening needs, for a point not yet run, a number that its measured value can
never fall below: the closed-form roofline for cycles; the compulsory bytes for
DRAM traffic; for energy, the energy model priced at the least work the run
must do (every MAC at the cheapest MAC kind, the compulsory DRAM bytes, nothing
else); the exact value for quantities of the config alone (area, multipliers,
buffer KiB); 0 where nothing better is known (such an objective never lets a
point be skipped). Bounds pass through the result document's own rounding,
which is monotone, so a bound never exceeds the value the document will show.
"""

import math

from ..columns import PHASE_MEANS
from .constraints import DERIVED


def _get(doc, *keys):
    for k in keys:
        if not isinstance(doc, dict) or k not in doc:
            return None
        doc = doc[k]
    return doc if isinstance(doc, (int, float)) and not isinstance(doc, bool) else None


_MEANS = dict(PHASE_MEANS)


def _mean(doc, column):
    """Figure ``column`` of a finished point: the mean over its refresh phases when it was run at
    several (its ``refresh_phases`` section, as the store's table holds it, :mod:`sim.columns`),
    else the document's own."""
    if isinstance(doc, dict) and isinstance(doc.get("refresh_phases"), dict):
        return _get(doc, "refresh_phases", _MEANS[column])
    return _get(doc, *column.split("."))


def _energy_floor(cf, c):
    """Energy no run of config ``c`` can go below (see the module docstring)."""
    try:
        from ..costs import energy as en
    except ImportError:
        return 0.0
    table = en.resolve_table(c)
    floors = []
    for kind in ("macs_qk", "macs_lsb_recompute", "macs_pv"):
        counts = {"macs_qk": 0, "macs_lsb_recompute": 0, "macs_pv": 0, kind: cf["macs"],
                  "softmax_elements": 0, "topk_comparisons": 0,
                  "dram_bytes": cf["compulsory_bytes"], "buffers": {}}
        floors.append(sum(op["pj"] for op in en.operation_energy(c, counts, table).values()))
    return min(floors)


def _area_exact(cf, c):
    """The area proxy depends on the config alone: its exact value."""
    try:
        from ..costs.area import area_section
    except ImportError:
        return 0.0
    return area_section(c)["total_mm2"]


class Objective:
    """One minimized quantity: how to read it and how to bound it before running."""

    def __init__(self, name, doc, column, measure, bound, fallback=()):
        self.name = name
        self.doc = doc
        self.column = column        # the store's table column holding it
        self.measure = measure      # (result, config) -> number or None
        self.bound = bound          # (closed_form dict, config) -> lower bound
        self.fallback = fallback    # names used when ``measure`` finds nothing

    def __repr__(self):
        return f"Objective({self.name})"


OBJECTIVES = {o.name: o for o in (
    Objective("cycles", "simulated cycles", "cycles", lambda r, c: _mean(r, "cycles"),
              lambda cf, c: math.floor(cf["roofline_cycles"] * (1 - 1e-12))),
    Objective("energy", "energy of the run, pJ (result energy.total_pj)", "energy.total_pj",
              lambda r, c: _mean(r, "energy.total_pj"), _energy_floor,
              fallback=("cycles",)),
    Objective("area", "area proxy, mm2 (result area.total_mm2)", "area.total_mm2",
              lambda r, c: _get(r, "area", "total_mm2"), _area_exact,
              fallback=("multipliers", "buffer_kib")),
    Objective("dram_bytes", "bytes moved from DRAM", "dram.bytes", lambda r, c: _get(r, "dram", "bytes"),
              lambda cf, c: cf["compulsory_bytes"]),
    Objective("multipliers", "dot.multipliers of the config", "config.dot.multipliers",
              lambda r, c: c["dot"]["multipliers"], lambda cf, c: c["dot"]["multipliers"]),
    Objective("buffer_kib", "query + key + value buffer KiB of the config", "derived.buffer_kib",
              lambda r, c: DERIVED["derived.buffer_kib"][1](c),
              lambda cf, c: DERIVED["derived.buffer_kib"][1](c)),
)}


def resolve(requested, results):
    """The objectives actually used, given finished ``[(result, config)]``.

    Returns ``(names, notes)``. An objective whose quantity is missing from any
    finished result is replaced by its fallbacks; ``notes`` says which.
    """
    return resolve_by(requested, bool(results),
                      lambda name: any(OBJECTIVES[name].measure(r, c) is None for r, c in results))


def resolve_by(requested, have_results, missing):
    """:func:`resolve` where ``missing(name)`` says whether any finished point lacks objective ``name``."""
    used, notes = [], []
    for name in requested:
        obj = OBJECTIVES[name]
        if obj.fallback and (not have_results or missing(name)):
            if not have_results:
                names = [name]  # nothing to judge by yet
            else:
                names = list(obj.fallback)
                notes.append(f"{name}: not in the results (no {name} model in this build); "
                             f"used {' and '.join(names)} instead")
        else:
            names = [name]
        for n in names:
            if n not in used:
                used.append(n)
    return used, notes


def row_values(names, row):
    """Objective vector of one store row (a dict of table columns); None when a quantity is missing."""
    out = []
    for n in names:
        v = row.get(OBJECTIVES[n].column)
        if v is None:
            return None
        out.append(float(v))
    return out


def values(names, result, config):
    """Objective vector of one finished point (None when a quantity is missing)."""
    out = []
    for n in names:
        v = OBJECTIVES[n].measure(result, config)
        if v is None:
            return None
        out.append(float(v))
    return out


def lower_bounds(names, closed, config):
    """Vector no run of this point can beat, one entry per objective (0 where unknown)."""
    from ..result import _round

    out = []
    for n in names:
        try:
            b = float(_round(float(OBJECTIVES[n].bound(closed, config))))
        except Exception:  # a model that cannot price this config bounds nothing
            b = 0.0
        out.append(b if math.isfinite(b) else 0.0)
    return out
