"""Demo benchmark: wall time of ``attnsim demo`` (target: under a minute on this machine).

Runs the demo into a temporary folder and prints the simulation count, the
wall seconds end to end and the share spent writing the report.

    python bench/demo.py
"""

import os
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from sim.demo import run_demo  # noqa: E402


def main():
    with tempfile.TemporaryDirectory() as tmp:
        out = os.path.join(tmp, "demo")
        t0 = time.perf_counter()
        runs, failed, _out, seconds = run_demo(out_dir=out, echo=lambda *_a: None)
        wall = time.perf_counter() - t0
    print(f"attnsim demo: {len(runs)} runs ({len(failed)} failed), {wall:.1f} s wall end to end "
          f"(target < 60 s)")


if __name__ == "__main__":
    main()
