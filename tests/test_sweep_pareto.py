"""The one Pareto implementation against the definition, computed by brute force.

Reference: Pareto dominance as defined in K. Deb, *Multi-Objective
Optimization using Evolutionary Algorithms*, Wiley 2001, ch. 2 (from memory):
with every objective minimized, a point is dominated when another point is no
worse in every objective and strictly better in at least one; the front is
the set of points nothing dominates. The brute force below applies that
sentence to every pair with plain loops, without the code under test.
Hypothesis draws small integer values so ties and duplicates are frequent.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sim.sweep.pareto import Front, FrontScan, dominated, front_indices, lex_order, pareto_mask


def brute(points):
    """Indices of the points no other point dominates (the definition, O(n^2))."""
    out = []
    for i, a in enumerate(points):
        beaten = False
        for j, b in enumerate(points):
            if j != i and all(y <= x for x, y in zip(a, b)) and any(y < x for x, y in zip(a, b)):
                beaten = True
                break
        if not beaten:
            out.append(i)
    return out


def point_sets(max_k=4, max_value=6):
    return st.integers(1, max_k).flatmap(lambda k: st.lists(
        st.tuples(*[st.integers(0, max_value)] * k), min_size=0, max_size=60).map(lambda p: (k, p)))


@settings(max_examples=400, deadline=None)
@given(point_sets())
def test_mask_equals_brute_force(kp):
    k, points = kp
    want = brute(points)
    mask = pareto_mask(np.array(points, dtype=float).reshape(-1, k))
    assert list(np.flatnonzero(mask)) == want
    assert sorted(front_indices(np.array(points, dtype=float).reshape(-1, k))) == want


@settings(max_examples=300, deadline=None)
@given(point_sets(), st.lists(st.integers(1, 7), min_size=1, max_size=20))
def test_streamed_blocks_equal_brute_force(kp, cuts):
    """The store feeds the scan sorted blocks of any size: the result must not depend on the cuts."""
    k, points = kp
    m = np.array(points, dtype=float).reshape(-1, k)
    order = lex_order(m)
    scan = FrontScan(k)
    on, i, c = [], 0, 0
    while i < len(m):
        n = cuts[c % len(cuts)]
        on.extend(scan.take(m[order[i:i + n]]))
        i, c = i + n, c + 1
    got = sorted(int(order[j]) for j, flag in enumerate(on) if flag)
    assert got == brute(points)


@settings(max_examples=300, deadline=None)
@given(point_sets(max_k=3))
def test_incremental_front_equals_brute_force(kp):
    """Points joining in any order end with the front of their set."""
    k, points = kp
    f = Front(k)
    for p in points:
        f.add(p)
    want = brute(points)
    assert set(map(tuple, f.points.tolist())) == {tuple(map(float, points[i])) for i in want}
    on = {tuple(points[i]) for i in want}
    for p in points:             # a point off the front is dominated by a member, a front point is not
        assert dominated(p, f.points) == (tuple(p) not in on)


def test_large_random_fronts_match_brute_force_on_a_sample():
    """2 and 3 objectives, 3,000 random points with ties: the fast scan agrees with the definition."""
    rng = np.random.default_rng(7)
    for k in (2, 3):
        m = rng.integers(0, 200, size=(3000, k)).astype(float)
        assert list(np.flatnonzero(pareto_mask(m))) == brute(m.tolist())


def test_order_and_values_are_checked():
    scan = FrontScan(2)
    scan.take([[1, 5], [2, 3]])
    with pytest.raises(ValueError, match="lexicographic"):
        scan.take([[1, 9]])
    with pytest.raises(ValueError, match="finite"):
        pareto_mask([[1.0, float("nan")]])
