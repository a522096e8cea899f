"""Instructions benchmark: how many machine instructions the base replay executes.

The base case of ``bench/replay.py`` (12 layers x 12 heads, 512-token prefill
plus decode steps, reads only) run once under valgrind's callgrind tool, with
counting switched on only around the timed replay (after a warm-up replay of
the prefill, which loads the compiled memory model). An instruction count does
not move with the machine's load, so it can tell a few percent apart where CPU
times, on a machine whose speed drifts by more than that, cannot. It is not a
time: code that misses the caches more runs slower for the same count, so
quote it beside ``bench/replay.py --against``, not instead of it.

``--against REV`` counts this checkout and revision REV (exported with ``git
archive``) side by side, one process each, and prints the ratio. The split by
where the instructions ran (the Python interpreter, the compiled loops, numpy,
the rest) needs ``callgrind_annotate``, which comes with valgrind. A replay
runs about 50 times slower under callgrind: about 15 minutes for the base case
on these machines (``--decode 16``: about 4).

    python bench/instructions.py [--decode 128] [--arch arch_configs/mid.yaml] [--against REV]

Needs valgrind (Debian: ``apt-get install valgrind``); not part of the test run.
"""

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SHAPE = dict(prompt_tokens=512, layers=12, heads=12, head_dim=64, seed=1)


def child(root, decode, arch_path):
    """Inside callgrind: warm up, count the replay only, print its cycles and transactions."""
    sys.path.insert(0, root)
    import sim
    from sim.trace.synth import synth_trace

    kw = {"writes": False} if "writes" in synth_trace.__code__.co_varnames else {}
    arch = sim.load_arch(arch_path)
    trace = synth_trace(decode_steps=decode, **SHAPE, **kw)
    sim.simulate(arch, synth_trace(decode_steps=0, **SHAPE, **kw))
    pid = str(os.getpid())
    subprocess.run(["callgrind_control", "-i", "on", pid], check=True, stdout=subprocess.DEVNULL)
    doc = sim.simulate(arch, trace).to_dict()
    subprocess.run(["callgrind_control", "-i", "off", pid], check=True, stdout=subprocess.DEVNULL)
    print(f"RESULT {doc['cycles']} {doc['fetch']['transactions']}")


def start(root, decode, arch_path, out_file):
    """Start the count of the code under ``root``; returns the process."""
    cmd = ["valgrind", "--tool=callgrind", "--instr-atstart=no", f"--callgrind-out-file={out_file}",
           sys.executable, os.path.abspath(__file__), "--child", root, "--decode", str(decode),
           "--arch", arch_path]
    env = dict(os.environ, PYTHONPATH=root)
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)


def finish(proc, out_file):
    """Wait for a count; returns (cycles, transactions, instructions, split by object)."""
    out, err = proc.communicate()
    if proc.returncode != 0 or "RESULT" not in out:
        # valgrind's own lines start with ==pid==; the replay's error is among the others
        said = [line for line in err.splitlines() if line.strip() and not line.startswith("==")]
        raise SystemExit(f"callgrind run failed (exit {proc.returncode}): {said[-1] if said else 'no message'}")
    cycles, txns = (int(x) for x in out.split("RESULT", 1)[1].split()[:2])
    total = None
    with open(out_file) as f:
        for line in f:
            if line.startswith("totals:"):
                total = int(line.split()[1])
    return cycles, txns, total, split(out_file)


def split(out_file):
    """Instructions by where they ran, from callgrind_annotate (empty if it is missing)."""
    if shutil.which("callgrind_annotate") is None:
        return {}
    text = subprocess.run(["callgrind_annotate", "--threshold=100", out_file], capture_output=True,
                          text=True).stdout
    parts = {}
    for line in text.splitlines():
        m = re.match(r"\s*([\d,]+) \([\s\d.]+%\)\s+(.*)$", line)
        if not m or "PROGRAM TOTALS" in line:
            continue
        n, where = int(m.group(1).replace(",", "")), m.group(2)
        if where.startswith("???:0x") and where.endswith("[???]"):
            part = "compiled loops"          # code made at run time: the numba kernels
        elif "libpython" in where or where.startswith(("Python/", "Objects/", "Modules/", "./Include")) \
                or "/Python-" in where:
            part = "interpreter"
        elif "numpy" in where:
            part = "numpy"
        else:
            part = "other"
        parts[part] = parts.get(part, 0) + n
    return parts


def report(tag, cycles, txns, total, parts):
    print(f"  {tag}: {total:,} instructions, {total / txns:,.0f} a transaction "
          f"({txns:,} transactions, {cycles:,} cycles)")
    for part, n in sorted(parts.items(), key=lambda kv: -kv[1]):
        print(f"      {part:15s} {n:16,}  {n / total:6.1%}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--decode", type=int, default=128)
    ap.add_argument("--arch", default=os.path.join(ROOT, "arch_configs", "mid.yaml"))
    ap.add_argument("--against", metavar="REV", help="count revision REV too, side by side")
    ap.add_argument("--child", metavar="ROOT", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child, args.decode, args.arch)
        return
    for tool in ("valgrind", "callgrind_control"):
        if shutil.which(tool) is None:
            raise SystemExit(f"{tool} not found: this benchmark needs valgrind (apt-get install valgrind)")
    arch = os.path.abspath(args.arch)
    tmp = tempfile.mkdtemp(prefix="attnsim-instr-")
    sides = [("this checkout", ROOT)]
    try:
        if args.against:
            sys.path.insert(0, HERE)
            from dram_bench import export   # the sibling benchmark's git-archive export

            folder = export(args.against)
            sides.append((args.against, folder))
        print(f"base case under callgrind, {args.decode} decode steps, config {os.path.basename(arch)}")
        runs = []
        for k, (tag, root) in enumerate(sides):
            side_arch = os.path.join(root, os.path.relpath(arch, ROOT)) if k else arch
            out_file = os.path.join(tmp, f"side{k}.out")
            runs.append((tag, out_file, start(root, args.decode, side_arch, out_file)))
        counts = []
        for tag, out_file, proc in runs:
            counts.append(finish(proc, out_file))
            report(tag, *counts[-1])
        if len(counts) == 2:
            print(f"  ratio {counts[0][2] / counts[1][2]:.3f} (this checkout / {args.against})")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        if args.against:
            shutil.rmtree(sides[1][1], ignore_errors=True)


if __name__ == "__main__":
    main()
