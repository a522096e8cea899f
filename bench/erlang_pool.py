"""Erlang C, measured on the channel pool itself at every (c, rho) of the DRAM issue.

The test suite checks the pool directly at the two cases a few tens of
thousands of requests settle, and request by request against the c-server
FCFS recursion elsewhere (see tests/test_dram_queueing.py). This benchmark
runs the pool itself long enough for all six cases and prints the mean
queueing delay against Erlang C (Erlang 1917; Kleinrock, Queueing Systems
Vol. 1), with the wall time per request.

    python bench/erlang_pool.py [--requests 1500000] [--seeds 1]
"""

import argparse
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "tests"))

from test_dram_queueing import CASES, erlang_c_wait, mmc_sample, pool_waits  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--requests", type=int, default=1_500_000)
    ap.add_argument("--seeds", type=int, default=1)
    args = ap.parse_args()
    n = args.requests
    print(f"M/M/c on the pool (first_free steering, one open row, refresh off): "
          f"{n:,} requests per run, first 5 % dropped")
    print(f"{'c':>3} {'rho':>4} {'seed':>4} {'measured':>10} {'Erlang C':>10} {'ratio':>7} {'us/req':>7}")
    for c, rho in CASES:
        for seed in range(args.seeds):
            arrivals, sizes, lam, mu = mmc_sample(c, rho, n, seed=50_000 + 1000 * c + int(rho * 10) + seed)
            t0 = time.perf_counter()
            wait = pool_waits(c, arrivals, sizes)
            dt = time.perf_counter() - t0
            measured = wait[n // 20:].mean()
            expected = erlang_c_wait(c, lam, mu)
            print(f"{c:>3} {rho:>4} {seed:>4} {measured:>10.3f} {expected:>10.3f} "
                  f"{measured / expected:>7.3f} {dt / n * 1e6:>7.1f}", flush=True)


if __name__ == "__main__":
    main()
