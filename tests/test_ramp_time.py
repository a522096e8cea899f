"""``ramp_time``: when releases spread linearly over intervals reach an amount.

The fetch unit asks it when enough of its requests are handed over, a buffer when
enough of its rows are freed. Expected values come from the arithmetic of linear
ramps (common practice, no source): a single ramp releasing ``left`` from ``a`` to
``t1`` has released ``x`` at ``a + x / left * (t1 - a)``, and a sum of ramps is found
here by bisection on the summed releases, written out on its own.
"""

import random

import pytest

from sim.engine.buffers import ramp_time


def released(now, ramps, t):
    """What ``ramps`` have released by ``t`` (each from max(now, t0) to t1)."""
    out = 0.0
    for t0, t1, left in ramps:
        a = max(now, t0)
        if t >= t1 or t1 <= a:
            out += left if t >= a else 0.0
        elif t > a:
            out += left * (t - a) / (t1 - a)
    return out


def test_all_of_one_ramp_comes_at_its_end_whatever_the_rounding():
    # sums of the ramp's pieces may come out a rounding short of the whole: that must not
    # read as "never" (a fetch unit that waited on it would look again at once, for ever)
    rng = random.Random(1)
    for _ in range(20_000):
        t0 = rng.uniform(0, 1000)
        t1 = t0 + rng.uniform(0.1, 5000)
        left = rng.choice([1.0, 2.0, 3.3, 7.875, 8.0])
        assert ramp_time(0.0, left, [(t0, t1, left)]) == pytest.approx(t1, rel=1e-9)
    assert ramp_time(8.0, 8.0, [(527.5, 4408.75, 8.0)]) == pytest.approx(4408.75)


def test_part_of_one_ramp():
    assert ramp_time(0.0, 2.0, [(10.0, 90.0, 8.0)]) == pytest.approx(10.0 + 2.0 / 8.0 * 80.0)
    # a ramp under way at ``now`` releases what it has left from now on
    assert ramp_time(50.0, 2.0, [(10.0, 90.0, 8.0)]) == pytest.approx(50.0 + 2.0 / 8.0 * 40.0)


def test_more_than_the_ramps_hold_is_never_reached():
    assert ramp_time(0.0, 9.0, [(10.0, 90.0, 8.0)]) is None


def test_overlapping_ramps_against_bisection():
    rng = random.Random(7)
    for _ in range(2_000):
        now = rng.uniform(0, 100)
        ramps = [(t0, t0 + rng.uniform(0, 300), rng.uniform(0.1, 4))
                 for t0 in (rng.uniform(0, 400) for _ in range(rng.randint(1, 5)))]
        total = released(now, ramps, 1e9)
        amount = rng.uniform(0.01, 1.0) * total
        lo, hi = now, 1e4
        for _ in range(200):
            mid = (lo + hi) / 2
            if released(now, ramps, mid) >= amount:
                hi = mid
            else:
                lo = mid
        assert ramp_time(now, amount, ramps) == pytest.approx(hi, abs=1e-6), (now, amount, ramps)
