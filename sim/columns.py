"""A result document as one flat row: the columns of tables and DataFrames.

A run's headline figures, each under a dotted column name. Most names are
paths into the result document (``cycles``, ``energy.total_pj``,
``units.dot.busy``); a few are computed from it: ``units.<unit>.stall1`` and
``stall2`` name a unit's two largest stall causes, with their fractions in
``stall1_fraction`` and ``stall2_fraction``. Config knobs appear as
``config.<dotted path>``. The sweep store's table, its CSV and
:func:`sim.load_sweep` use these same names; :meth:`sim.result.Result.to_frame`
returns one such row, and :func:`unit_frame` a row per unit.

A sweep point run at several places in the refresh schedule (the spec's
``refresh_phases``) carries a ``refresh_phases`` section; its row's
``cycles``, ``seconds`` and ``energy.total_pj`` are then the means over those
runs (what the sweep ranks by), and ``refresh_phases.runs`` and
``refresh_phases.spread`` say how many and how far apart their cycles came.

A sampled run (a ``decode_sample`` or ``prefill_sample`` section) has the
whole trace's estimated ``cycles`` and ``seconds`` in its row, its area proxy
(the config's alone) and no other figure: every other number of its document
is the simulated part's.

A column has a kind -- ``int``, ``float`` or ``text`` -- which fixes its type
in the store and its dtype in a DataFrame.
"""

# the order units take in a result document, its rows and its tables
UNIT_ORDER = ("dram", "fetch", "dot", "dot_pv", "softmax", "topk")

# (column, kind): paths into the result document
FIGURES = (
    ("cycles", "int"), ("seconds", "float"),
    ("compute.macs", "int"),
    ("dram.bytes", "int"), ("dram.compulsory_bytes", "int"), ("dram.achieved_gbps", "float"),
    ("dram.peak_gbps", "float"), ("dram.row_hit_rate", "float"),
    ("bounds.compute_cycles", "float"), ("bounds.memory_cycles", "float"),
    ("bounds.roofline_cycles", "float"), ("bounds.bound", "text"),
    ("energy.total_pj", "float"), ("area.total_mm2", "float"),
    ("verdict.busiest_unit", "text"),
    ("verdict.largest_stall.unit", "text"), ("verdict.largest_stall.cause", "text"),
    ("verdict.largest_stall.fraction", "float"),
    ("refresh_phases.runs", "int"), ("refresh_phases.spread", "float"),
)
# column -> the ``refresh_phases`` figure it holds when a document has that section
PHASE_MEANS = (("cycles", "mean_cycles"), ("seconds", "mean_seconds"), ("energy.total_pj", "mean_energy_pj"))
STATES = ("busy", "starved", "blocked", "idle")
TOP_STALLS = 2


def unit_columns(units=UNIT_ORDER):
    """``[(column, kind)]`` of the per-unit figures: state fractions, then the largest stalls."""
    out = []
    for u in units:
        out += [(f"units.{u}.{s}", "float") for s in STATES]
        for i in range(1, TOP_STALLS + 1):
            out += [(f"units.{u}.stall{i}", "text"), (f"units.{u}.stall{i}_fraction", "float")]
    return out


def figure_columns(units=UNIT_ORDER):
    """Every figure column of a result document, in table order."""
    return list(FIGURES) + unit_columns(units)


def _at(doc, dotted):
    return _at_parts(doc, dotted.split("."))


def _at_parts(doc, parts):
    node = doc
    for part in parts:
        if not isinstance(node, dict) or part not in node:
            return None
        node = node[part]
    return None if isinstance(node, (dict, list)) else node


_FIGURE_PARTS = [(name, name.split(".")) for name, _kind in FIGURES]


def top_stalls(unit_doc, n=TOP_STALLS):
    """``[(cause, fraction)]``, largest first (ties by name), at most ``n``."""
    stalls = (unit_doc or {}).get("stalls") or {}
    return sorted(stalls.items(), key=lambda cf: (-cf[1], cf[0]))[:n]


def estimate_section(doc):
    """The section of a sampled run's document holding the whole trace's estimate:
    ``decode_sample`` (which, with both samplings, weighs the prefill's estimates), else
    ``prefill_sample`` when the run left query blocks out; None for a run of the whole trace."""
    ds = doc.get("decode_sample")
    if isinstance(ds, dict):
        return ds
    ps = doc.get("prefill_sample")
    return ps if isinstance(ps, dict) and ps.get("sampled_steps") else None


def figure_row(doc, units=UNIT_ORDER):
    """``{column: value}`` of the figures of result document ``doc`` (None where it has none).
    A sampled run's row holds the whole trace's estimated cycles and seconds, the area proxy
    (the config's alone), and no other figure: the rest of its document is the simulated part's."""
    est = estimate_section(doc)
    if est is not None:
        row = {name: None for name, _kind in figure_columns(units)}
        row["cycles"], row["seconds"] = est.get("cycles"), est.get("seconds")
        row["area.total_mm2"] = _at(doc, "area.total_mm2")   # the config's alone
        return row
    row = {name: _at_parts(doc, parts) for name, parts in _FIGURE_PARTS}
    phases = doc.get("refresh_phases")
    if isinstance(phases, dict):
        for name, key in PHASE_MEANS:
            row[name] = phases.get(key)
    all_units = doc.get("units") or {}
    for u in units:
        ud = all_units.get(u)
        for s in STATES:
            row[f"units.{u}.{s}"] = None if ud is None else ud.get(s)
        top = top_stalls(ud)
        for i in range(1, TOP_STALLS + 1):
            cause, frac = top[i - 1] if i <= len(top) else (None, None)
            row[f"units.{u}.stall{i}"] = cause
            row[f"units.{u}.stall{i}_fraction"] = frac
    return row


def config_value(config, path):
    """The value at dotted ``path`` of a resolved config mapping (None when absent)."""
    return _at(config, path) if isinstance(config, dict) else None


def result_row(doc):
    """One run as a flat row: the figures of its units, then every config knob as ``config.<path>``."""
    from .arch import knob_paths

    present = [u for u in UNIT_ORDER if u in (doc.get("units") or {})]
    present += [u for u in (doc.get("units") or {}) if u not in present]
    row = {"arch": _at(doc, "arch.name"), "trace": _at(doc, "trace.name")}
    row.update(figure_row(doc, present))
    config = (doc.get("arch") or {}).get("config") or {}
    for path in knob_paths():
        v = config_value(config, path)
        if v is not None:
            row[f"config.{path}"] = v
    return row


def result_frame(doc):
    """A one-row :class:`pandas.DataFrame` of :func:`result_row`."""
    import pandas as pd

    return pd.DataFrame([result_row(doc)])


def unit_frame(doc):
    """A :class:`pandas.DataFrame` with a row per unit: state fractions, then one column per stall cause.

    Stall columns are named ``stall.<cause>``; a cause a unit never waited on is 0.
    """
    import pandas as pd

    units = doc.get("units") or {}
    names = [u for u in UNIT_ORDER if u in units] + [u for u in units if u not in UNIT_ORDER]
    causes = []
    for u in names:
        causes += [c for c in units[u].get("stalls", {}) if c not in causes]
    rows = []
    for u in names:
        ud = units[u]
        row = {s: ud.get(s) for s in STATES}
        row.update({f"stall.{c}": ud.get("stalls", {}).get(c, 0.0) for c in causes})
        rows.append(row)
    return pd.DataFrame(rows, index=pd.Index(names, name="unit"))
