"""The comparison table: one row per run, the numbers a reviewer reads first.

Each column says where its number comes from in the result document and
which quantity of :mod:`sim.formats` it is, so the CSV (exact values, the
unit in the column name) and the Markdown / HTML tables (rounded for reading,
the unit in the header) show the same quantities, as the terminal does.
What limits a run comes from :func:`sim.limits.verdict_of`, the one
classification the verdicts and figures read too.
"""

from operator import attrgetter

from .. import formats as fm
from ..limits import verdict_of


def _get(doc, path):
    node = doc
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return None
        node = node[part]
    return node


def limit_label(doc):
    return verdict_of(doc)["label"]


def critical_busy(doc):
    v = verdict_of(doc)
    unit = v["resource"] if v["limit"] in ("compute", "unit") else v["critical_unit"]
    return doc["units"][unit]["busy"]


def useful_macs(doc):
    """Useful MACs / (multipliers x cycles) of the array the classification names (else q.K's)."""
    v = verdict_of(doc)
    lanes = v.get("lanes")
    if not lanes:
        return None
    array = v["resource"] if v["limit"] == "compute" else "dot"
    return lanes["utilization"].get(array, lanes["utilization"]["dot"])


def static_share(doc):
    e = doc.get("energy") or {}
    return e["static_pj"] / e["total_pj"] if e.get("total_pj") and "static_pj" in e else None


class Column:
    """One column: CSV key, header title, value getter of a document (document units; None for a
    column read from the run, see :func:`columns_for`), quantity (or None: text)."""

    def __init__(self, key, title, get, quantity=None, doc_path=None):
        self.key = key
        self.get = get
        self.quantity = quantity
        self.doc_path = doc_path
        self.header = fm.header(title, quantity) if quantity else title

    def exact(self, v):
        """The CSV value of ``v`` (document units): the number in the shown unit, unrounded."""
        if v is None or self.quantity is None:
            return v
        return v * fm.QUANTITIES[self.quantity].scale

    def show(self, v):
        """``v`` (document units) for reading."""
        if v is None:
            return "-"
        return fm.value(v, self.quantity) if self.quantity else str(v)


def _col(key, title, path, quantity):
    return Column(key, title, lambda d: _get(d, path), quantity, path)


COLUMNS = [
    _col("cycles", "cycles", "cycles", "cycles"),
    _col("latency_us", "latency", "seconds", "latency"),
    Column("limit", "limited by", limit_label),
    Column("critical_busy_pct", "its busy", critical_busy, "share"),
    Column("useful_macs_pct", "useful MACs", useful_macs, "share"),
    _col("bound", "roofline bound", "bounds.bound", None),
    Column("roofline_pct", "of roofline", lambda d: verdict_of(d)["roofline_fraction"], "share"),
    _col("dram_mb", "DRAM", "dram.bytes", "bytes"),
    _col("dram_gbps", "DRAM", "dram.achieved_gbps", "bandwidth"),
    Column("dram_peak_pct", "of DRAM peak", lambda d: verdict_of(d)["dram_share_of_peak"], "share"),
    _col("macs", "MACs", "compute.macs", "macs"),
    _col("energy_uj", "energy", "energy.total_pj", "energy"),
    Column("static_energy_pct", "static energy", static_share, "share"),
    _col("power_w", "avg power", "energy.average_power_w", "power"),
    _col("nj_per_token", "energy / token", "energy.pj_per_token", "energy_per_token"),
    _col("area_mm2", "area proxy", "area.total_mm2", "area"),
]


# after the latency, where any run of the report was measured at several refresh phases
MEAN_LATENCY = Column("latency_mean_us", "mean over refresh phases", None, "latency")


def columns_for(runs):
    """``[(column, value(run))]`` of the table for ``runs``: :data:`COLUMNS`, and
    :data:`MEAN_LATENCY` after the latency when any run has a mean over refresh phases."""
    cols = [(c, lambda r, c=c: c.get(r.doc)) for c in COLUMNS]
    if any(r.phase_mean_s is not None for r in runs):
        at = next(i for i, (c, _v) in enumerate(cols) if c.key == "latency_us") + 1
        cols.insert(at, (MEAN_LATENCY, attrgetter("phase_mean_s")))
    return cols


def table_rows(runs):
    """``(header, rows)`` of exact values for the CSV."""
    cols = columns_for(runs)
    header = ["run", "config", "trace", "simulator_build", "grain_rows", "issue_window", "seed",
              "trace_digest"] + [c.key for c, _v in cols]
    rows = [[r.label, r.config_label, r.trace_label, r.build, *r.engine_settings, r.digest]
            + [c.exact(v(r)) for c, v in cols] for r in runs]
    return header, rows


def display_rows(runs):
    """``(header, rows)`` of display strings for Markdown and HTML."""
    cols = columns_for(runs)
    header = ["config", "trace"] + [c.header for c, _v in cols]
    rows = [[r.config_label, r.trace_label] + [c.show(v(r)) for c, v in cols] for r in runs]
    return header, rows


def markdown_table(header, rows, text_columns=2):
    def esc(s):
        return str(s).replace("|", "\\|")
    out = ["| " + " | ".join(esc(h) for h in header) + " |",
           "|" + "|".join("---" if i < text_columns else "---:" for i in range(len(header))) + "|"]
    out += ["| " + " | ".join(esc(c) for c in row) + " |" for row in rows]
    return "\n".join(out)
