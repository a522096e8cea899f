"""Architecture config: the datapath an architect wants to evaluate.

A config is a YAML mapping of sections (``dram``, ``fetch``, ``buffers``,
``dot``, ``softmax``, ``topk``, ``precision``, ``engine``) plus ``clock_ghz``.
``extends: other.yaml`` starts from another config and overrides it key by key.
Every knob is addressable by a dotted path (``dot.multipliers``), which is how
sweeps and scripts change it.

Validation happens here, once. Errors name the file (the one that set the
value, through ``extends``), its line, the dotted field, the bad value and
what was expected; the engine trusts a loaded :class:`Arch`. A loaded Arch is
immutable: :meth:`Arch.with_overrides` makes a changed copy, validated again.
"""

from __future__ import annotations

import copy
import dataclasses
import math
import numbers
import os
import types
from typing import Any, Mapping

from .errors import NO_VALUE, ConfigError, closest
from .yamlio import guess_kind, read_mapping_doc

MAX_EXTENDS = 32          # configs in one extends chain
MAX_TEXT = 1000           # characters of a text knob


class Field:
    """One config knob: its kind, default, the range its value must lie in and what it means.

    Numbers: ``minimum`` None means "> 0", else ">= minimum"; ``maximum`` is
    inclusive (see :data:`LIMITS`). Whole-number knobs take integers only.
    """

    def __init__(self, kind, default, doc, choices=None, minimum=None, maximum=None):
        self.kind = kind  # 'int', 'float', 'str', 'bool', 'choice', 'map'
        self.default = default
        self.doc = doc
        self.choices = choices
        self.minimum = minimum
        self.maximum = maximum

    def range_text(self) -> str:
        """The accepted range in words, e.g. ``whole number in [1, 4096]``."""
        if self.kind == "int":
            low = 1 if self.minimum is None else self.minimum
            return f"whole number in [{low}, {self.maximum:,}]" if self.maximum is not None else \
                f"whole number >= {low}"
        if self.kind == "float":
            low = "(0" if self.minimum is None else f"[{self.minimum:g}"
            return f"number in {low}, {self.maximum:g}]" if self.maximum is not None else "number"
        if self.kind == "choice":
            return "one of " + ", ".join(map(str, self.choices))
        if self.kind == "bool":
            return "true or false"
        if self.kind == "map":
            return "mapping"
        return "text"

    def check(self, source, path, value):
        if self.kind == "int":
            if isinstance(value, numbers.Integral) and not isinstance(value, bool):
                value = int(value)
            else:
                raise ConfigError(source, path, value, "expected a whole number"
                                  + (" (written without a decimal point or exponent)"
                                     if isinstance(value, float) else ""))
            low = 1 if self.minimum is None else self.minimum
            if value < low:
                raise ConfigError(source, path, value, f"expected a whole number >= {low}")
            if self.maximum is not None and value > self.maximum:
                raise ConfigError(source, path, value, f"expected a whole number <= {self.maximum:,}")
            return value
        if self.kind == "float":
            if isinstance(value, bool) or not isinstance(value, numbers.Real):
                raise ConfigError(source, path, value, "expected a number")
            given = value  # errors show what the user wrote
            try:
                value = float(value)
            except OverflowError:
                value = math.inf
            if not math.isfinite(value):
                raise ConfigError(source, path, given, "expected a finite number")
            low_ok = value > 0 if self.minimum is None else value >= self.minimum
            if not low_ok:
                raise ConfigError(source, path, given, "expected a number > 0" if self.minimum is None
                                  else f"expected a number >= {self.minimum}")
            if self.maximum is not None and value > self.maximum:
                raise ConfigError(source, path, given, f"expected a number <= {self.maximum:g}")
            return value
        if self.kind == "str":
            if not isinstance(value, str):
                raise ConfigError(source, path, value, "expected text")
            if len(value) > MAX_TEXT or not value.isprintable():
                raise ConfigError(source, path, value, f"expected one line of printable text of at most "
                                  f"{MAX_TEXT} characters")
            return value
        if self.kind == "bool":
            if not isinstance(value, bool):
                raise ConfigError(source, path, value, "expected true or false")
            return value
        if self.kind == "choice":
            if not isinstance(value, str) or value not in self.choices:
                raise ConfigError(source, path, value,
                                  f"expected one of {', '.join(map(str, self.choices))}"
                                  + closest(value, self.choices))
            return value
        if self.kind == "map":
            if not isinstance(value, dict):
                raise ConfigError(source, path, value, "expected a mapping")
            return copy.deepcopy(value)
        raise AssertionError(self.kind)


# Refresh modes of each memory standard (all from memory): JESD79-4 DDR4 refreshes all banks;
# JESD79-5 DDR5 adds same-bank refresh (one bank of every bank group); JESD235 HBM2, JESD238
# HBM3, JESD209-5 LPDDR5/5X and JESD250 GDDR6 add per-bank refresh.
REFRESH_MODES = ("all_bank", "per_bank", "same_bank")
STANDARDS = {
    "custom": REFRESH_MODES,
    "ddr4": ("all_bank",),
    "ddr5": ("all_bank", "same_bank"),
    "hbm2": ("all_bank", "per_bank"),
    "hbm3": ("all_bank", "per_bank"),
    "lpddr5x": ("all_bank", "per_bank"),
    "gddr6": ("all_bank", "per_bank"),
}
# Timings the banked model reads in every mode, and those each refresh mode adds.
CORE_TIMINGS = ("t_cl_ns", "t_rcd_ns", "t_rp_ns", "t_ras_ns", "t_rc_ns", "t_rtp_ns", "t_ccd_l_ns",
                "t_rrd_s_ns", "t_rrd_l_ns", "t_faw_ns", "t_cwl_ns", "t_wr_ns", "t_wtr_s_ns",
                "t_wtr_l_ns", "t_rtw_ns")
REFRESH_TIMINGS = {"all_bank": ("t_refi_ns", "t_rfc_ns"),
                   "per_bank": ("t_refi_ns", "t_rfc_pb_ns", "t_refi_pb_ns"),
                   "same_bank": ("t_refi_ns", "t_rfc_pb_ns", "t_refi_pb_ns")}


# Section -> field -> Field. Sections own disjoint knobs; other modules read
# them through the loaded Arch, never from raw YAML.
SCHEMA = {
    "": {
        "name": Field("str", "unnamed", "short name shown in reports"),
        "description": Field("str", "", "one line on what this datapath is"),
        "clock_ghz": Field("float", 1.0, "accelerator clock in GHz; all cycles are of this clock"),
    },
    "dram": {
        "channels": Field("int", 8, "independent memory channels in the pool"),
        "channel_gbps": Field("float", 32.0, "peak data rate of one channel, GB/s (1e9 bytes/s)"),
        "burst_bytes": Field("int", 64, "bytes moved by one burst (the smallest access)"),
        "latency_ns": Field("float", 40.0, "fixed access latency, request to first data, ns"),
        "queue_depth": Field("int", 32, "requests one channel can hold queued or in service"),
        "interleave_bytes": Field("int", 256, "consecutive bytes mapped to one channel before the next"),
        # Banked model (sim/engine/dram.py). Defaults are an HBM2 channel in legacy
        # mode, values from memory; sourced presets: arch_configs/memory/*.yaml.
        "model": Field("choice", "banked", "banked: banks, rows and refresh; fixed-latency: a pipelined "
                       "bus with dram.latency_ns per access, no banks", choices=["banked", "fixed-latency"]),
        "bus_bits": Field("int", 128, "data-bus width of one channel in bits"),
        "banks": Field("int", 16, "banks per channel (all bank groups together)"),
        "bank_groups": Field("int", 4, "bank groups per channel; back-to-back columns in one group "
                             "are spaced t_ccd_l_ns"),
        "row_bytes": Field("int", 2048, "bytes of one open row (page) of one bank, as seen by the channel"),
        "rows": Field("int", 16384, "rows per bank"),
        "t_cl_ns": Field("float", 14.0, "column read to first data (CAS latency), ns"),
        "t_rcd_ns": Field("float", 14.0, "activate to column read, ns"),
        "t_rp_ns": Field("float", 14.0, "precharge to activate, ns"),
        "t_ras_ns": Field("float", 33.0, "activate to precharge, at least, ns"),
        "t_rtp_ns": Field("float", 4.0, "column read to precharge, ns", minimum=0),
        "t_ccd_l_ns": Field("float", 4.0, "column to column in the same bank group, ns "
                            "(other groups: one burst time)", minimum=0),
        "t_rc_ns": Field("float", 47.0, "activate to activate in one bank (row cycle), ns; at least "
                         "t_ras_ns + t_rp_ns"),
        "t_rrd_s_ns": Field("float", 4.0, "activate to activate in different bank groups of one channel, ns",
                            minimum=0),
        "t_rrd_l_ns": Field("float", 6.0, "activate to activate in the same bank group, ns", minimum=0),
        "t_faw_ns": Field("float", 16.0, "window in which one channel issues at most four activates, ns "
                          "(0: no window)", minimum=0),
        "t_cwl_ns": Field("float", 4.0, "column write to first write data (write latency), ns", minimum=0),
        "t_wr_ns": Field("float", 16.0, "end of write data to precharge (write recovery), ns", minimum=0),
        "t_wtr_s_ns": Field("float", 3.0, "end of write data to a read in another bank group, ns", minimum=0),
        "t_wtr_l_ns": Field("float", 8.0, "end of write data to a read in the same bank group, ns", minimum=0),
        "t_rtw_ns": Field("float", 14.0, "column read to column write on one channel (read-to-write bus "
                          "turnaround), ns", minimum=0),
        "refresh": Field("choice", "all_bank", "all_bank: the whole channel refreshes for t_rfc_ns every "
                         "t_refi_ns; per_bank: one bank (or bank set) at a time for t_rfc_pb_ns, a command "
                         "every t_refi_pb_ns; same_bank: the same bank of every bank group at once",
                         choices=list(REFRESH_MODES)),
        "t_refi_ns": Field("float", 3900.0, "interval at which every bank is refreshed once, ns"),
        "t_rfc_ns": Field("float", 260.0, "time an all-bank refresh blocks the channel, ns (0: no refresh)",
                          minimum=0),
        "t_rfc_pb_ns": Field("float", 160.0, "time a per-bank or same-bank refresh blocks its banks, ns "
                             "(0: no refresh)", minimum=0),
        "t_refi_pb_ns": Field("float", 243.75, "interval between per-bank or same-bank refresh commands "
                              "of one channel, ns"),
        "refresh_phase": Field("float", 0.0, "where the run starts in the refresh schedule: every "
                               "refresh window moved later by this fraction of t_refi_ns (wrapping "
                               "round); sweep it to see how much a short run depends on where the "
                               "windows fall", minimum=0, maximum=1.0),
        "refresh_postpone": Field("int", 0, "refresh commands the controller may owe: a refresh "
                                  "falling due while a request of its banks waits is postponed, up to "
                                  "this many, and the owed ones are issued back to back once those "
                                  "banks have nothing waiting (0: every refresh when due)",
                                  minimum=0, maximum=8),
        "standard": Field("choice", "custom", "memory standard the timings follow; a named one allows only "
                          "its refresh modes and must give every timing the modes in use need",
                          choices=list(STANDARDS)),
        "controller_ns": Field("float", 0.0, "controller and interconnect time added to every access "
                               "in the banked model, ns", minimum=0),
        "page_policy": Field("choice", "open", "open: a row stays open after access; close: "
                             "precharge once the queued accesses to it are done",
                             choices=["open", "close"]),
        "scheduler": Field("choice", "fcfs", "order a channel serves its queue: first come first "
                           "served, or row hits first", choices=["fcfs", "row_hits_first"]),
        "write_queue": Field("int", 64, "write bursts one channel's write queue holds"),
        "write_high": Field("float", 0.75, "write-queue fill (a fraction) at which the channel turns "
                            "to draining writes"),
        "write_low": Field("float", 0.25, "write-queue fill (a fraction) at which a drain stops",
                           minimum=0),
        "address_bits": Field("str", "auto", "address map, most significant first: comma-separated "
                              "row, bank, group, column, channel, each optionally :BITS; 'auto' "
                              "derives it from interleave_bytes"),
        "layout": Field("choice", "head_regions", "where K/V rows live: head_regions (a region per "
                        "layer, plane and head), head_planes (a head's Q, K, KL, V regions "
                        "adjacent), heads_interleaved (all heads of a plane take turns every few "
                        "rows, whole bursts each); see sim/engine/addrmap.py",
                        choices=["head_regions", "head_planes", "heads_interleaved"]),
        "steering": Field("choice", "address", "address: bursts go to the channel their address "
                          "names; first_free: each request (fetch.request_bytes of one fetch, in "
                          "order) goes to the channel whose data bus frees first (one shared "
                          "queue in front of the channels)",
                          choices=["address", "first_free"]),
    },
    "fetch": {
        "request_bytes": Field("int", 1024, "largest request the fetch unit sends to one channel"),
        "inflight": Field("int", 32, "requests (fetch.request_bytes each) the fetch unit may have issued "
                                     "and not yet handed over, over all channels"),
        "reorder_entries": Field("int", 16, "requests that have arrived and wait in the reorder stage for an "
                                            "earlier one"),
        "issue_window": Field("int", 16, "fetch descriptors (one plane of one head group for one query "
                              "block) the fetch unit may issue past one that waits for a result (a "
                              "top-k, a softmax decision, the previous layer); 0: strict program order",
                              minimum=0),
    },
    "buffers": {
        "query_kib": Field("float", 16.0, "on-chip query buffer, KiB"),
        "key_kib": Field("float", 64.0, "on-chip key buffer, KiB"),
        "value_kib": Field("float", 64.0, "on-chip value buffer, KiB"),
    },
    "dot": {
        "multipliers": Field("int", 512, "multipliers in the dot-product array (MACs per cycle)"),
        "lanes": Field("int", 64, "elements of one dot product consumed per cycle per row of the array"),
        "tile_rows": Field("int", 64, "key or value rows in one hardware tile"),
        "pipeline_cycles": Field("int", 8, "cycles from the last operand in to the result out", minimum=0),
        "arrays": Field("choice", "shared", "one array for q.K and p.V, or a separate array each",
                        choices=["shared", "separate"]),
        "lookahead": Field("int", 4, "query blocks (in decode: head groups) whose q.K the array may "
                           "compute before the p.V of the oldest waiting one; their probabilities "
                           "wait in the score buffer"),
    },
    "softmax": {
        "lanes": Field("int", 16, "score elements processed per cycle"),
        "latency_cycles": Field("int", 12, "pipeline latency of the exponent/normalize path", minimum=0),
    },
    "topk": {
        "comparators": Field("int", 8, "comparisons the selector performs per cycle"),
        "latency_cycles": Field("int", 4, "pipeline latency of one selection", minimum=0),
    },
    "precision": {
        "q_bits": Field("int", 8, "bits per query element"),
        "k_msb_bits": Field("int", 4, "bits per key element in the most-significant plane"),
        "k_lsb_bits": Field("int", 4, "bits per key element in the least-significant plane", minimum=0),
        "v_bits": Field("int", 8, "bits per value element"),
        "score_bits": Field("int", 16, "bits per score / probability element"),
    },
    "engine": {
        "grain_rows": Field("int", 1024, "most key/value rows one simulated transaction carries"),
        "seed": Field("int", 0, "seed of the generator behind data-dependent choices", minimum=0),
    },
    # Cost models (sim/costs/energy.py, sim/costs/area.py): a preset plus overrides.
    "energy": {
        "preset": Field("str", "horowitz45", "energy-per-operation preset: a bundled name or a YAML path"),
        "dram_interface": Field("str", "auto", "which dram_pj_per_bit entry prices DRAM traffic; auto: "
                                "hbm2 when dram.bus_bits >= 128, else ddr4"),
        "overrides": Field("map", {}, "preset values replaced by dotted name, e.g. multiply_pj.int16: 0.7"),
    },
    "area": {
        "preset": Field("str", "proxy45", "area-proxy preset: a bundled name or a YAML path"),
        "overrides": Field("map", {}, "preset values replaced by dotted name, e.g. sram.um2_per_kib: 4000"),
    },
}

# The knobs named in the design notes; sweeps most often use these.
MAIN_KNOBS = ("clock_ghz", "dram.channels", "dram.channel_gbps", "dot.multipliers",
              "buffers.key_kib", "buffers.value_kib", "softmax.lanes", "topk.comparators")

# Upper limits (inclusive) of the numeric knobs: far beyond any real datapath,
# low enough that no count, size or latency can overflow the engine's integer
# arithmetic or make it allocate absurd tables. Knobs not listed take the
# default of their kind: whole numbers up to 2**31 - 1, and for numbers 1e9
# (a latency in ns: one simulated second).
INT_LIMIT = 2 ** 31 - 1
FLOAT_LIMIT = 1e9
LIMITS = {
    "clock_ghz": 1000.0,
    "dram.channels": 4096, "dram.channel_gbps": 1e6, "dram.burst_bytes": 1 << 16,
    "dram.latency_ns": 1e6, "dram.queue_depth": 1 << 30, "dram.interleave_bytes": 1 << 30,
    "dram.bus_bits": 1 << 14, "dram.banks": 1 << 12, "dram.bank_groups": 1 << 12,
    "dram.row_bytes": 1 << 24, "dram.rows": 1 << 26,
    "dram.t_cl_ns": 1e6, "dram.t_rcd_ns": 1e6, "dram.t_rp_ns": 1e6, "dram.t_ras_ns": 1e6,
    "dram.t_rtp_ns": 1e6, "dram.t_ccd_l_ns": 1e6, "dram.t_refi_ns": 1e9, "dram.t_rfc_ns": 1e6,
    "dram.controller_ns": 1e6,
    "fetch.request_bytes": 1 << 26, "fetch.inflight": 1 << 16, "fetch.reorder_entries": 1 << 16,
    "fetch.issue_window": 1 << 16,
    "buffers.query_kib": float(1 << 24), "buffers.key_kib": float(1 << 24),
    "buffers.value_kib": float(1 << 24),
    "dot.multipliers": 1 << 24, "dot.lanes": 1 << 16, "dot.tile_rows": 1 << 16,
    "dot.pipeline_cycles": 1 << 20, "dot.lookahead": 1 << 16,
    "softmax.lanes": 1 << 16, "softmax.latency_cycles": 1 << 20,
    "topk.comparators": 1 << 16, "topk.latency_cycles": 1 << 20,
    "precision.q_bits": 64, "precision.k_msb_bits": 32, "precision.k_lsb_bits": 32,
    "precision.v_bits": 64, "precision.score_bits": 64,
    "engine.grain_rows": 1 << 24, "engine.seed": 2 ** 63 - 1,
}


def _apply_limits():
    for section, fields in SCHEMA.items():
        for key, f in fields.items():
            path = f"{section}.{key}" if section else key
            if f.maximum is None and f.kind in ("int", "float"):
                f.maximum = LIMITS.get(path, INT_LIMIT if f.kind == "int" else FLOAT_LIMIT)


_apply_limits()


def knob_paths() -> list[str]:
    """Every valid dotted path, in schema order."""
    out = []
    for section, fields in SCHEMA.items():
        for key in fields:
            out.append(key if not section else f"{section}.{key}")
    return out


def field_for(path: str) -> Field | None:
    """The :class:`Field` behind a dotted path, or None."""
    if not isinstance(path, str):
        return None
    section, _, key = path.rpartition(".")
    return SCHEMA.get(section, {}).get(key)


# --------------------------------------------------------------------------
# The loaded, immutable config


def _make_section_class(section: str, fields: Mapping[str, Field]):
    name = "".join(p.title() for p in section.split("_")) + "Section"
    cls = dataclasses.make_dataclass(name, [(k, Any) for k in fields], frozen=True)
    cls.__module__ = __name__

    def refuse(self, key, value):
        raise dataclasses.FrozenInstanceError(
            f"{section}.{key} is read-only; use arch.with_overrides({{'{section}.{key}': {value!r}}}), "
            "which validates and returns a new Arch")

    setattr(cls, "__setattr__", refuse)
    cls.__doc__ = f"The resolved ``{section}`` section (read-only; see Arch.with_overrides)."
    return cls


SECTION_CLASSES = {section: _make_section_class(section, fields) for section, fields in SCHEMA.items() if section}
globals().update({cls.__name__: cls for cls in SECTION_CLASSES.values()})


def _frozen_value(value):
    if isinstance(value, dict):
        return types.MappingProxyType({k: _frozen_value(v) for k, v in value.items()})
    if isinstance(value, list):
        return tuple(_frozen_value(v) for v in value)
    return value


class Arch:
    """A validated, fully resolved datapath config (read-only).

    Sections are attributes (``arch.dot.multipliers``); ``to_dict()`` gives the
    resolved mapping, which ``load_arch`` accepts back unchanged. Change a
    knob with ``arch.with_overrides({"dot.multipliers": 2048})``, which
    validates and returns a new Arch. ``origins`` maps each dotted path set
    by a file (or ``--set``) to ``(file, line)``.
    """

    __slots__ = ("_d", "source", "origins", "name", "description", "clock_ghz") + tuple(
        s for s in SCHEMA if s)
    # set once in __init__ (the sections are frozen dataclasses made from SCHEMA)
    _d: dict
    source: Any
    origins: Mapping[str, tuple]
    name: str
    description: str
    clock_ghz: float
    dram: Any
    fetch: Any
    buffers: Any
    dot: Any
    softmax: Any
    topk: Any
    precision: Any
    engine: Any
    energy: Any
    area: Any

    def __init__(self, resolved: dict, source: Any = "<dict>", origins: dict | None = None):
        put = object.__setattr__
        put(self, "_d", resolved)
        put(self, "source", source)
        put(self, "origins", types.MappingProxyType(dict(origins or {})))
        for section, cls in SECTION_CLASSES.items():
            put(self, section, cls(**{k: _frozen_value(v) for k, v in resolved[section].items()}))
        put(self, "name", resolved["name"])
        put(self, "description", resolved["description"])
        put(self, "clock_ghz", resolved["clock_ghz"])

    def __setattr__(self, name, value):
        raise AttributeError(f"Arch is read-only (setting {name!r}); change a knob with "
                             "arch.with_overrides({'dot.multipliers': 2048}), which validates and returns a new Arch")

    def __delattr__(self, name):
        raise AttributeError("Arch is read-only")

    def __reduce__(self):
        return (_rebuild, (self._d, self.source, dict(self.origins)))

    def __eq__(self, other):
        return isinstance(other, Arch) and self._d == other._d

    def __hash__(self):
        return hash(repr(sorted(self.knobs().items())))

    def to_dict(self) -> dict:
        return copy.deepcopy(self._d)

    def knobs(self) -> dict:
        """``{dotted path: value}`` of every knob, in schema order."""
        return {p: self.get(p) for p in knob_paths()}

    def get(self, path: str) -> Any:
        """The value at a dotted path (``dot.multipliers``)."""
        if field_for(path) is None:
            raise ConfigError(self.source, path, NO_VALUE, "no such config knob" + closest(path, knob_paths()))
        node = self._d
        for part in path.split("."):
            node = node[part]
        return copy.deepcopy(node)

    def origin(self, path: str):
        """``(file, line)`` where ``path`` (or its section) was set, or None for a default."""
        while path:
            if path in self.origins:
                return self.origins[path]
            path = path.rpartition(".")[0]
        return None

    def with_overrides(self, overrides: Mapping[str, Any], source: Any = None) -> "Arch":
        """A new Arch with dotted-path overrides applied and validated.

        Errors in an override name ``source`` (default: ``<overrides>``), not
        the config file.
        """
        src = source or "<overrides>"
        if not isinstance(overrides, Mapping):
            raise ConfigError(src, "<overrides>", overrides, "expected a mapping of dotted knob paths to values")
        raw = self.to_dict()
        origins = dict(self.origins)
        for path, value in overrides.items():
            _set_path(raw, path, value, src)
            origins[path] = (src, None)
        return _build(raw, self.source, origins)

    # Derived peaks -------------------------------------------------------
    @property
    def peak_macs_per_s(self) -> float:
        return self.dot.multipliers * self.clock_ghz * 1e9

    @property
    def peak_gbps(self) -> float:
        return self.dram.channels * self.dram.channel_gbps

    @property
    def bytes_per_cycle(self) -> float:
        return self.peak_gbps / self.clock_ghz

    @property
    def machine_balance(self) -> float:
        """MACs the array can do per byte the memory can deliver."""
        return self.peak_macs_per_s / (self.peak_gbps * 1e9)

    def key_rows(self, head_dim: int) -> int:
        return int(self.buffers.key_kib * 1024 // (head_dim * self.precision.k_msb_bits / 8))

    def value_rows(self, head_dim: int) -> int:
        return int(self.buffers.value_kib * 1024 // (head_dim * self.precision.v_bits / 8))

    def query_rows(self, head_dim: int) -> int:
        return int(self.buffers.query_kib * 1024 // (head_dim * self.precision.q_bits / 8))

    def peaks(self, head_dim: int = 64) -> dict:
        return {
            "macs_per_s": self.peak_macs_per_s,
            "gbps": self.peak_gbps,
            "bytes_per_cycle": self.bytes_per_cycle,
            "machine_balance_mac_per_byte": self.machine_balance,
            "head_dim": head_dim,
            "key_buffer_rows": self.key_rows(head_dim),
            "value_buffer_rows": self.value_rows(head_dim),
            "query_buffer_rows": self.query_rows(head_dim),
        }

    def __repr__(self) -> str:
        d = self.dram
        return (f"Arch({self.name!r}: {self.dot.multipliers} multipliers at {self.clock_ghz:g} GHz, "
                f"{d.channels} x {d.channel_gbps:g} GB/s, K/V buffers {self.buffers.key_kib:g}/"
                f"{self.buffers.value_kib:g} KiB; from {self.source})")

    def _repr_html_(self) -> str:
        import html

        rows = "".join(f"<tr><td><code>{html.escape(p)}</code></td><td>{html.escape(str(v))}</td></tr>"
                       for p, v in self.knobs().items() if not isinstance(v, dict))
        return (f"<div><b>Arch {html.escape(str(self.name))}</b> &mdash; {html.escape(self.description)}"
                f"<br>{self.peak_macs_per_s / 1e12:.3f} TMAC/s, {self.peak_gbps:g} GB/s, "
                f"source <code>{html.escape(str(self.source))}</code>"
                f"<details><summary>{len(knob_paths())} knobs</summary><table>{rows}</table></details></div>")


def takes_refresh(dram) -> bool:
    """Whether memory section ``dram`` refreshes at all (a banked pool with a refresh time), so
    where a run starts in the refresh schedule (``dram.refresh_phase``) can move its answer."""
    return dram.model == "banked" and (dram.t_rfc_ns if dram.refresh == "all_bank" else dram.t_rfc_pb_ns) > 0


# A run this many refresh intervals long or shorter can turn on where the windows fell (our choice:
# on the bundled traces a run of about one interval moved by up to 19 % over refresh phases, the
# synthetic decode of about 13 by at most 3.5 %, the long captured traces, 80 to 160, by 0.5 % at most).
SHORT_RUN_INTERVALS = 20


def refresh_intervals(arch, cycles) -> float | None:
    """How many refresh intervals (tREFI) ``cycles`` of ``arch``'s clock last; None when its memory
    does not refresh."""
    if not takes_refresh(arch.dram):
        return None
    return cycles / (arch.dram.t_refi_ns * arch.clock_ghz)


def short_for_refresh(arch, cycles) -> bool:
    """Whether a run of ``cycles`` on ``arch`` is short enough (:data:`SHORT_RUN_INTERVALS`) for
    where it starts in the refresh schedule to decide a comparison."""
    n = refresh_intervals(arch, cycles)
    return n is not None and n <= SHORT_RUN_INTERVALS


def _rebuild(resolved, source, origins):
    return Arch(resolved, source, origins)


# --------------------------------------------------------------------------
# Loading


def load_arch(spec: Any, source: Any = None) -> Arch:
    """Load and validate an architecture from a YAML path or a mapping.

    ``extends`` is resolved relative to the file that names it. The result's
    ``to_dict()`` is fully resolved and round-trips through this function.
    """
    if isinstance(spec, Arch):
        return spec
    if isinstance(spec, (str, os.PathLike)):
        path = os.fspath(spec)
        if not os.path.exists(path) and isinstance(spec, str):
            from . import bundled
            path = bundled.config(path) or path  # a bundled config by name: "edge", "memory/hbm2"
        raw, origins = _load_file(path, chain=())
        return _build(raw, source or path, origins)
    if isinstance(spec, Mapping):
        source = source or "<dict>"
        raw = copy.deepcopy(dict(spec))
        origins = {}
        if "extends" in raw:
            base_dir = os.path.dirname(str(source)) if os.path.exists(str(source)) else "."
            raw, origins = _extend(raw, {}, os.path.join(base_dir, "<dict>"), None, chain=())
        return _build(raw, source, origins)
    raise ConfigError(source, "<root>", spec, "expected a YAML path or a mapping")


def _build(raw: dict, source, origins: dict) -> Arch:
    """Validate ``raw``; an error is attributed to the file and line that set the bad value."""
    try:
        resolved = _validate(raw, source, origins)
    except ConfigError as exc:
        if exc.line is None and exc.source == source:
            where = _origin_of(origins, exc.field)
            if where is not None:
                exc.located(*where)
        raise
    return Arch(resolved, source, origins)


def _origin_of(origins, field):
    path = str(field)
    while path:
        if path in origins:
            return origins[path]
        path = path.rpartition(".")[0]
    return None


def _read_yaml(path):
    doc = read_mapping_doc(path, ConfigError, "expected a mapping of config sections", empty_ok=True,
                           what="architecture config")
    kind = guess_kind(doc.data)
    if kind not in (None, "an architecture config"):
        raise ConfigError(path, "<file>", NO_VALUE, f"this looks like {kind}, not an architecture config")
    return doc


def _load_file(path, chain):
    doc = _read_yaml(path)
    origins = {}
    for key, value in doc.data.items():
        origins[str(key)] = (path, doc.lines.get((key,)))
        if isinstance(value, dict):
            for k in value:
                origins[f"{key}.{k}"] = (path, doc.lines.get((key, k)))
    return _extend(doc.data, origins, path, doc.lines.get(("extends",)), chain)


def _extend(raw, origins, path, line, chain):
    """Resolve ``raw``'s ``extends`` (relative to ``path``); ``(merged raw, merged origins)``."""
    if "extends" not in raw:
        return raw, origins
    parent = raw.pop("extends")
    origins.pop("extends", None)
    if not isinstance(parent, str) or not parent.strip():
        raise ConfigError(path, "extends", parent, "expected the path of another config", line=line)
    parent_path = os.path.normpath(os.path.join(os.path.dirname(path), parent))
    here = os.path.normpath(path)
    if parent_path in chain or parent_path == here:
        raise ConfigError(path, "extends", parent, "configs extend each other in a cycle", line=line)
    if len(chain) >= MAX_EXTENDS:
        raise ConfigError(path, "extends", parent, f"expected at most {MAX_EXTENDS} configs in one extends "
                          "chain", line=line)
    try:
        base, base_origins = _load_file(parent_path, chain + (here,))
    except ConfigError as exc:
        if exc.source == parent_path and exc.field == "<file>":
            # the target itself is unusable: say so at the line that names it
            what = exc.expected if exc.value is NO_VALUE else f"{exc.expected} ({parent_path})"
            raise ConfigError(path, "extends", parent, what, line=line) from None
        raise
    merged_origins = dict(base_origins)
    merged_origins.update(origins)
    return _merge(base, raw), merged_origins


def _merge(base, over):
    out = copy.deepcopy(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def _set_path(raw, path, value, source):
    if field_for(path) is None:
        raise ConfigError(source, path, value, "no such config knob" + closest(path, knob_paths()))
    section, _, key = path.rpartition(".")
    node = raw.setdefault(section, {}) if section else raw
    if not isinstance(node, dict):
        raise ConfigError(source, section, node, "expected a mapping of knobs")
    node[key] = value


def _validate(raw, source, origins=None):
    origins = origins or {}
    out = {}
    top = SCHEMA[""]
    unknown = []
    for key, value in raw.items():
        if isinstance(key, str) and key in SCHEMA and key:
            continue
        if key not in top:
            unknown.append((str(key), value, closest(key, list(SCHEMA) + list(top))))
    sections = {}
    for section, fields in SCHEMA.items():
        if not section:
            continue
        given = raw.get(section, {})
        if given is None:
            given = {}
        if not isinstance(given, dict):
            raise ConfigError(source, section, given, "expected a mapping of knobs")
        sections[section] = given
        for key, value in given.items():
            if key not in fields:
                unknown.append((f"{section}.{key}", value, closest(key, fields)))
    if unknown:
        raise _unknown_keys(source, unknown, origins)
    for key, field in top.items():
        out[key] = field.check(source, key, raw[key]) if key in raw else copy.deepcopy(field.default)
    for section, given in sections.items():
        fields = SCHEMA[section]
        out[section] = {key: (field.check(source, f"{section}.{key}", given[key]) if key in given
                              else copy.deepcopy(field.default))
                        for key, field in fields.items()}
    _check_dram_given(raw.get("dram") or {}, out["dram"], source)
    _check_consistency(out, source)
    _check_cost_models(out, source)
    return out


def _unknown_keys(source, unknown, origins):
    """One error for every unknown key of a config: the first in full, the others by name and line."""
    field, value, hint = unknown[0]
    where = _origin_of(origins, field)
    text = "unknown key" + hint
    if len(unknown) > 1:
        others = []
        for f, _v, h in unknown[1:]:
            o = _origin_of(origins, f)
            at = ""
            if o is not None:
                at = f" (line {o[1]})" if o[0] == (where or (source,))[0] and o[1] else \
                    f" ({o[0]}{':' + str(o[1]) if o[1] else ''})"
            others.append(f"{f}{at}{h}")
        text += f"; also unknown: {', '.join(others)}"
    err = ConfigError(source, field, value, text)
    if where is not None:
        err.located(*where)
    return err


def _check_cost_models(d, source):
    """The energy and area sections against their presets (sim/costs runs nothing)."""
    from .costs import area, energy
    energy.check_config(d, source)
    area.check_config(d, source)


def _check_consistency(d, source):
    """Rules that tie knobs together; each names the field to change."""
    dram, fetch, dot = d["dram"], d["fetch"], d["dot"]
    if dram["interleave_bytes"] % dram["burst_bytes"]:
        raise ConfigError(source, "dram.interleave_bytes", dram["interleave_bytes"],
                          f"expected a multiple of dram.burst_bytes={dram['burst_bytes']}")
    _check_dram(dram, source)
    if fetch["request_bytes"] % dram["burst_bytes"]:
        raise ConfigError(source, "fetch.request_bytes", fetch["request_bytes"],
                          f"expected a multiple of dram.burst_bytes={dram['burst_bytes']}")
    if dot["multipliers"] < dot["lanes"]:
        raise ConfigError(source, "dot.lanes", dot["lanes"],
                          f"expected at most dot.multipliers={dot['multipliers']}")
    if dot["multipliers"] % dot["lanes"]:
        raise ConfigError(source, "dot.multipliers", dot["multipliers"],
                          f"expected a multiple of dot.lanes={dot['lanes']}")


def _check_dram(dram, source):
    """Impossible DRAM timings and address maps; each error names the field."""
    if dram["burst_bytes"] * 8 % dram["bus_bits"]:
        raise ConfigError(source, "dram.burst_bytes", dram["burst_bytes"],
                          f"expected whole beats of the dram.bus_bits={dram['bus_bits']} bus")
    if dram["burst_bytes"] > dram["row_bytes"]:
        raise ConfigError(source, "dram.burst_bytes", dram["burst_bytes"],
                          f"expected at most dram.row_bytes={dram['row_bytes']} (a burst larger than a row)")
    if dram["t_ras_ns"] < dram["t_rcd_ns"]:
        raise ConfigError(source, "dram.t_ras_ns", dram["t_ras_ns"],
                          f"expected at least dram.t_rcd_ns={dram['t_rcd_ns']:g} (a row must open before it may close)")
    if dram["t_rfc_ns"] >= dram["t_refi_ns"]:
        raise ConfigError(source, "dram.t_rfc_ns", dram["t_rfc_ns"],
                          f"expected less than dram.t_refi_ns={dram['t_refi_ns']:g} (the channel would only refresh)")
    if dram["banks"] % dram["bank_groups"]:
        raise ConfigError(source, "dram.bank_groups", dram["bank_groups"],
                          f"expected a divisor of dram.banks={dram['banks']}")
    _check_dram_timings(dram, source)
    _check_write_queue(dram, source)
    _check_refresh(dram, source)
    if dram["model"] != "banked":
        return
    address_slices(dram, source)


def _check_dram_timings(dram, source):
    """Timings that contradict each other (JEDEC defines tRC = tRAS + tRP at least, and four
    activates at tRRD_S spacing inside one tFAW window)."""
    ras, rp = dram["t_ras_ns"], dram["t_rp_ns"]
    if dram["t_rc_ns"] < ras + rp - 1e-9:
        raise ConfigError(source, "dram.t_rc_ns", dram["t_rc_ns"],
                          f"expected at least dram.t_ras_ns + dram.t_rp_ns = {ras + rp:g} (a bank cannot "
                          "open its next row before the last one closed)")
    if dram["t_faw_ns"] and dram["t_faw_ns"] < 4 * dram["t_rrd_s_ns"] - 1e-9:
        raise ConfigError(source, "dram.t_faw_ns", dram["t_faw_ns"],
                          f"expected at least 4 x dram.t_rrd_s_ns = {4 * dram['t_rrd_s_ns']:g} (or 0: no "
                          "window); four activates at tRRD_S spacing already span that")
    for short, long_ in (("t_rrd_s_ns", "t_rrd_l_ns"), ("t_wtr_s_ns", "t_wtr_l_ns")):
        if dram[long_] < dram[short]:
            raise ConfigError(source, f"dram.{long_}", dram[long_],
                              f"expected at least dram.{short}={dram[short]:g} (the same bank group "
                              "waits at least as long as another group)")


def _check_write_queue(dram, source):
    lo, hi = dram["write_low"], dram["write_high"]
    if hi > 1:
        raise ConfigError(source, "dram.write_high", hi, "expected a fraction of dram.write_queue in (0, 1]")
    if lo >= hi:
        raise ConfigError(source, "dram.write_low", lo,
                          f"expected less than dram.write_high={hi:g} (a drain must empty some of the queue)")


def _check_refresh(dram, source):
    """The refresh mode against the standard, and the per-bank cadence against the banks."""
    mode = dram["refresh"]
    _check_refresh_mode(dram, source)
    if mode == "all_bank":
        return
    refi, refi_pb, banks = dram["t_refi_ns"], dram["t_refi_pb_ns"], dram["banks"]
    turns = refi / refi_pb
    want = banks // dram["bank_groups"] if mode == "same_bank" else None
    if (abs(turns - round(turns)) > 1e-6 * turns or round(turns) < 1 or banks % round(turns)
            or (want is not None and round(turns) != want)):
        need = (f"dram.t_refi_ns / {want} = {refi / want:g} (one command per bank of a group)"
                if want is not None else
                f"dram.t_refi_ns={refi:g} divided by a divisor of dram.banks={banks} (each command "
                "refreshes the same number of banks)")
        raise ConfigError(source, "dram.t_refi_pb_ns", refi_pb, f"expected {need}")
    if dram["t_rfc_pb_ns"] >= refi:
        raise ConfigError(source, "dram.t_rfc_pb_ns", dram["t_rfc_pb_ns"],
                          f"expected less than dram.t_refi_ns={refi:g} (a bank would only refresh)")


def _check_refresh_mode(dram, source):
    mode, std = dram["refresh"], dram["standard"]
    if mode not in STANDARDS[std]:
        raise ConfigError(source, "dram.refresh", mode,
                          f"expected {' or '.join(STANDARDS[std])}: dram.standard {std} has no {mode} refresh")


def _check_dram_given(given, dram, source):
    """A config that names its memory standard gives every timing its modes need itself."""
    _check_refresh_mode(dram, source)
    std = dram["standard"]
    if std == "custom" or dram["model"] != "banked":
        return
    for key in CORE_TIMINGS + REFRESH_TIMINGS[dram["refresh"]]:
        if key not in given:
            raise ConfigError(source, f"dram.{key}", None,
                              f"missing: dram.standard {std} with {dram['refresh']} refresh needs it "
                              "(give the value with its source, or set dram.standard: custom for defaults)")


MAP_FIELDS = ("row", "bank", "group", "column", "channel")


def _map_counts(dram, source):
    """Values each address-map field must distinguish, checked to be powers of two."""
    counts = {
        "channel": ("dram.channels", dram["channels"]),
        "group": ("dram.bank_groups", dram["bank_groups"]),
        "bank": ("dram.banks", dram["banks"] // dram["bank_groups"]),
        "column": ("dram.row_bytes", dram["row_bytes"] // dram["burst_bytes"]),
        "row": ("dram.rows", dram["rows"]),
    }
    bits = {}
    for name, (knob, n) in counts.items():
        if n & (n - 1):
            raise ConfigError(source, knob, dram[knob.split(".")[1]],
                              "expected a power of two (the banked model's address map is made of "
                              "bit slices; dram.model: fixed-latency takes any count)")
        bits[name] = n.bit_length() - 1
    return bits


def address_slices(dram, source="<dict>"):
    """The address map as ``[(field, bits), ...]``, most significant first.

    Above the burst offset, a burst index is cut into slices; a field split
    over several slices takes its low bits from the lower slice. ``auto`` puts,
    from the top: row, bank, the high column bits, the high group bits, the
    channel, then inside one ``interleave_bytes`` chunk the low column bits and
    the low group bits, so back-to-back bursts of a chunk alternate bank groups.
    """
    bits = _map_counts(dram, source)
    chunk = dram["interleave_bytes"] // dram["burst_bytes"]
    if chunk & (chunk - 1):
        raise ConfigError(source, "dram.interleave_bytes", dram["interleave_bytes"],
                          "expected dram.burst_bytes times a power of two")
    k = chunk.bit_length() - 1
    text = dram["address_bits"].strip()
    if text == "auto":
        g_low = min(bits["group"], k)
        c_low = k - g_low
        if c_low > bits["column"]:
            raise ConfigError(source, "dram.interleave_bytes", dram["interleave_bytes"],
                              f"expected at most dram.row_bytes x dram.bank_groups = "
                              f"{dram['row_bytes'] * dram['bank_groups']} (a chunk must stay in one row)")
        out = [("row", bits["row"]), ("bank", bits["bank"]), ("column", bits["column"] - c_low),
               ("group", bits["group"] - g_low), ("channel", bits["channel"]),
               ("column", c_low), ("group", g_low)]
        return [(f, b) for f, b in out if b]
    out, open_slot, used = [], {}, dict.fromkeys(MAP_FIELDS, 0)
    for part in text.split(","):
        name, _, width = part.strip().partition(":")
        name = name.strip()
        if name not in MAP_FIELDS:
            raise ConfigError(source, "dram.address_bits", dram["address_bits"],
                              f"unknown field {name!r}, expected {', '.join(MAP_FIELDS)}"
                              + closest(name, MAP_FIELDS))
        if width:
            try:
                w = int(width)
            except ValueError:
                w = -1
            if w < 1:
                raise ConfigError(source, "dram.address_bits", dram["address_bits"],
                                  f"{name}:{width}: expected a whole number of bits >= 1")
            used[name] += w
        else:
            if name in open_slot:
                raise ConfigError(source, "dram.address_bits", dram["address_bits"],
                                  f"{name} appears twice without a bit count; give all but one slice :BITS")
            open_slot[name] = len(out)
            w = None
        out.append([name, w])
    for name in MAP_FIELDS:
        rest = bits[name] - used[name]
        if name in open_slot:
            if rest < 0:
                rest = -1
            out[open_slot[name]][1] = rest
        if rest < 0:
            raise ConfigError(source, "dram.address_bits", dram["address_bits"],
                              f"{name} gets {used[name]} bits, expected {bits[name]}: slices collide "
                              f"with the next field")
        if rest > 0 and name not in open_slot:
            raise ConfigError(source, "dram.address_bits", dram["address_bits"],
                              f"{name} gets {used[name]} bits, expected {bits[name]}: "
                              f"{rest} bits of it are unused")
    out = [(f, b) for f, b in out if b]
    if bits["channel"]:
        below = 0
        for f, b in reversed(out):
            if f == "channel":
                break
            below += b
        if dram["burst_bytes"] << below != dram["interleave_bytes"]:
            raise ConfigError(source, "dram.interleave_bytes", dram["interleave_bytes"],
                              f"expected {dram['burst_bytes'] << below}, the bytes dram.address_bits "
                              f"puts on one channel before the next")
    return out
