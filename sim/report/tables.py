"""The comparison table: one row per run, the numbers a reviewer reads first.

Each column says where its number comes from in the result document, so the
CSV (exact values) and the Markdown / HTML tables (rounded for reading) show
the same quantities.
"""


def _get(doc, path):
    node = doc
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return None
        node = node[part]
    return node


def _scaled(path, scale):
    def f(doc):
        v = _get(doc, path)
        return None if v is None else v * scale
    return f


def _busiest(doc):
    u = doc["units"]
    return max(u, key=lambda k: u[k]["busy"])


class Column:
    """One column: CSV name, Markdown header, value getter, display format."""

    def __init__(self, key, header, get, fmt, doc_path=None, scale=1.0):
        self.key = key
        self.header = header
        self.get = get
        self.fmt = fmt
        self.doc_path = doc_path
        self.scale = scale

    def show(self, doc):
        v = self.get(doc)
        if v is None:
            return "-"
        return self.fmt.format(v) if self.fmt else str(v)


def _col(key, header, path, scale, fmt):
    return Column(key, header, _scaled(path, scale), fmt, path, scale)


COLUMNS = [
    _col("cycles", "cycles", "cycles", 1, "{:,}"),
    _col("latency_us", "latency (us)", "seconds", 1e6, "{:,.3f}"),
    Column("bound", "bound", lambda d: d["bounds"]["bound"], None, "bounds.bound"),
    _col("roofline_pct", "of roofline (%)", "verdict.roofline_fraction", 100, "{:.1f}"),
    Column("limiting_unit", "limiting unit", _busiest, None),
    Column("limiting_busy_pct", "its busy (%)", lambda d: d["units"][_busiest(d)]["busy"] * 100, "{:.1f}"),
    _col("dram_mb", "DRAM (MB)", "dram.bytes", 1e-6, "{:,.4f}"),
    _col("dram_gbps", "DRAM (GB/s)", "dram.achieved_gbps", 1, "{:,.2f}"),
    _col("macs", "MACs", "compute.macs", 1, "{:,}"),
    _col("energy_uj", "energy (uJ)", "energy.total_pj", 1e-6, "{:,.4f}"),
    _col("power_w", "avg power (W)", "energy.average_power_w", 1, "{:,.4f}"),
    _col("nj_per_token", "nJ / token", "energy.pj_per_token", 1e-3, "{:,.3f}"),
    _col("area_mm2", "area proxy (mm^2)", "area.total_mm2", 1, "{:,.4f}"),
]


def table_rows(runs):
    """``(header, rows)`` of exact values for the CSV."""
    header = ["run", "config", "trace", "simulator_version", "trace_digest"] + [c.key for c in COLUMNS]
    rows = [[r.label, r.config_label, r.trace_label, r.version, r.digest] + [c.get(r.doc) for c in COLUMNS]
            for r in runs]
    return header, rows


def display_rows(runs):
    """``(header, rows)`` of display strings for Markdown and HTML."""
    header = ["config", "trace"] + [c.header for c in COLUMNS]
    rows = [[r.config_label, r.trace_label] + [c.show(r.doc) for c in COLUMNS] for r in runs]
    return header, rows


def markdown_table(header, rows):
    def esc(s):
        return str(s).replace("|", "\\|")
    out = ["| " + " | ".join(esc(h) for h in header) + " |",
           "|" + "|".join("---" if i < 2 else "---:" for i in range(len(header))) + "|"]
    out += ["| " + " | ".join(esc(c) for c in row) + " |" for row in rows]
    return "\n".join(out)
