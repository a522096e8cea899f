"""Top-k selector: picks the kept values of a row and the next layer's tokens and heads.

Selection is modelled as quickselect (Hoare's FIND). Its cost is
data-dependent: with the real scores in the trace the selector's comparisons
are counted by running quickselect on them with pivots from a seeded
generator; without scores the expected count for distinct keys is used
(Knuth, TAOCP Vol. 3, 5.2.2, ex. 32). ``topk.comparators`` comparisons per
cycle; the result appears ``latency_cycles`` after the unit is done.
"""

import math

import numpy as np

from .feed import WAIT


def harmonic(n):
    """H_n, the n-th harmonic number (H_0 = 0)."""
    if n <= 0:
        return 0.0
    if n < 64:
        return float(sum(1.0 / k for k in range(1, n + 1)))
    # asymptotic series; error below 1e-12 for n >= 64
    g = 0.5772156649015329
    return math.log(n) + g + 1 / (2 * n) - 1 / (12 * n * n) + 1 / (120 * n ** 4)


def expected_comparisons(n, m):
    """Expected comparisons of quickselect for the m-th smallest of n distinct keys."""
    if n <= 1:
        return 0.0
    if not 1 <= m <= n:
        raise ValueError(f"m must be in [1, n={n}], got {m!r}")
    return 2 * ((n + 1) * harmonic(n) - (n + 3 - m) * harmonic(n + 1 - m)
                - (m + 2) * harmonic(m) + n + 3)


def select_cost(n, keep):
    """Expected comparisons to split ``n`` keys into the top ``keep`` and the rest."""
    if keep <= 0 or keep >= n:
        return 0.0
    # the top `keep` are found by locating the (n - keep + 1)-th smallest
    return expected_comparisons(n, n - keep + 1)


def counted_quickselect(values, keep, rng):
    """Run quickselect for the top ``keep`` of ``values``; return comparisons made.

    Each partition of n keys costs n - 1 comparisons (the pivot against every
    other key); pivots are drawn uniformly from ``rng``. Vectorized per
    partition, so the cost is O(n) numpy work, not a Python loop per key.
    """
    a = np.asarray(values, dtype=np.float64)
    n = len(a)
    if keep <= 0 or keep >= n:
        return 0
    # find the (n - keep)-th smallest (0-based) order statistic
    target = n - keep
    comparisons = 0
    while True:
        size = len(a)
        if size <= 1:
            return comparisons
        pivot = a[int(rng.integers(size))]
        comparisons += size - 1
        less = a[a < pivot]
        equal = int(np.count_nonzero(a == pivot))
        if target < len(less):
            a = less
        elif target < len(less) + equal:
            return comparisons
        else:
            target -= len(less) + equal
            a = a[a > pivot]


def selection_comparisons(scores, n, keep, rng):
    """Comparisons to keep the top ``keep`` of ``n``: counted on ``scores`` when the
    trace has them, else the expected count."""
    if scores is not None:
        return counted_quickselect(scores, keep, rng)
    return select_cost(n, keep)


def service_cycles(comparisons, comparators):
    if comparisons <= 0:
        return 0
    return comparisons / comparators


class TopkOp:
    """One selection: keep ``keep`` of ``n`` (values of a row, or tokens/heads)."""

    __slots__ = ("kind", "step", "head", "n", "keep", "comparisons", "waits", "done")

    def __init__(self, kind, step, head, n, keep, comparisons):
        self.kind = kind          # 'value', 'tokens' or 'heads'
        self.step = step
        self.head = head
        self.n = n
        self.keep = keep
        self.comparisons = comparisons
        self.waits = []           # (Due, cause)
        self.done = None          # when the selection is out (a Due)


def topk_process(env, ops, comparators, latency, state):
    """Run selections in order."""
    while True:
        op = ops.take()
        if op is WAIT:          # the step is not made yet: its selections cannot have started
            yield ops.wait()
            continue
        if op is None:
            break
        # the time spent waiting for the step to be made belongs to what the op waits for
        first = next((cause for due, cause in op.waits if not due.processed), None)
        if first is not None:
            state.relabel("starved", first)
        for due, cause in op.waits:
            if not due.processed:
                state.set("starved", cause)
                yield due.event()
        state.set("busy")
        yield env.timeout(service_cycles(op.comparisons, comparators))
        op.done.fire(latency)
        state.set("starved", None)
    state.relabel("idle", None)     # the unit had nothing left since its last selection
    state.set("idle")
