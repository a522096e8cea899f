"""Pruning policies: numerics against outside references, selection rules, validation.

Softmax and attention rows are checked against ``scipy.special.softmax`` and
a plain float64 numpy reference (see the project's reference list). The
selection rules are checked against brute force over the same definitions.
"""

import math

import numpy as np
import pytest
import scipy.special

from sim.trace.policies import (DENSE, CascadeRule, PolicyError, ValueRule, attend, keep_count,
                                load_policy, softmax, token_importance, head_importance, topk_sorted)

RNG = np.random.default_rng(20240611)


# ---------------------------------------------------------------- softmax


@pytest.mark.parametrize("offset", [0.0, 80.0, -300.0, 1e4])
def test_softmax_matches_scipy(offset):
    """scipy.special.softmax is the reference; large offsets test the max subtraction."""
    x = RNG.normal(0, 4, size=(7, 33)) + offset
    np.testing.assert_allclose(softmax(x), scipy.special.softmax(x, axis=-1), rtol=1e-12, atol=1e-15)


def test_softmax_float32_close_to_float64_reference():
    """float32 rows within float32 rounding of a float64 numpy reference exp(x)/sum(exp(x))."""
    x = RNG.normal(0, 3, size=(12, 64, 64))
    ref = np.exp(x - x.max(-1, keepdims=True))
    ref /= ref.sum(-1, keepdims=True)
    got = softmax(x.astype(np.float32))
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, ref, rtol=2e-6, atol=1e-7)
    np.testing.assert_allclose(got.sum(-1), 1.0, atol=1e-6)


def test_attention_rows_match_float64_reference():
    """attend() with every rule off equals softmax(q k^T / sqrt(d)) computed in float64 with scipy."""
    h, n, d = 4, 50, 32
    q = RNG.normal(size=(h, n, d)).astype(np.float32)
    k = RNG.normal(size=(h, n, d)).astype(np.float32)
    probs, lsb = attend(q, k, DENSE.keys, np.float32(1 / math.sqrt(d)))
    scores = np.einsum("hqd,hkd->hqk", q.astype(np.float64), k.astype(np.float64)) / math.sqrt(d)
    np.testing.assert_allclose(probs, scipy.special.softmax(scores, axis=-1), rtol=1e-5, atol=1e-7)
    assert not lsb.any()


# ---------------------------------------------------------------- selection


def test_topk_sorted_is_brute_force_top_k():
    for n, k in [(10, 3), (57, 57), (57, 1), (200, 31)]:
        s = RNG.permutation(n).astype(float)  # distinct scores
        got = topk_sorted(s, k)
        want = np.sort(np.argsort(-s)[:k])
        assert got.tolist() == want.tolist()
    # ties break toward the earlier position
    assert topk_sorted(np.array([1.0, 2.0, 2.0, 2.0]), 2).tolist() == [1, 2]


def test_keep_count_rounds_up_and_respects_cascade():
    assert keep_count(0.5, 447, 447) == 224
    assert keep_count(0.5, 447, 100) == 100  # never more than are live
    assert keep_count(0.001, 18, 18) == 1  # never zero
    assert keep_count(1.0, 18, 18) == 18


def test_value_count_and_ratio_keep_the_largest():
    p = scipy.special.softmax(RNG.normal(0, 2, size=(3, 9, 40)), axis=-1)
    for rule, k in [(ValueRule("count", 5), 5), (ValueRule("ratio", 0.3), 12)]:
        m = rule.keep_mask(p)
        assert (m.sum(-1) == k).all()
        # brute force: every kept probability >= every dropped one in the row
        kept_min = np.where(m, p, np.inf).min(-1)
        drop_max = np.where(m, -np.inf, p).max(-1)
        assert (kept_min >= drop_max).all()


def test_value_mass_is_the_smallest_sufficient_prefix():
    """Cumulative-mass rule: the fewest largest probabilities whose sum reaches the target."""
    p = scipy.special.softmax(RNG.normal(0, 2, size=(5, 30)), axis=-1)
    m = ValueRule("mass", 0.9).keep_mask(p)
    for row, mask in zip(p, m):
        desc = np.sort(row)[::-1]
        need = int(np.searchsorted(np.cumsum(desc), 0.9 * row.sum() * (1 - 1e-9)) + 1)
        assert mask.sum() == need
        assert row[mask].sum() >= 0.9 * (1 - 1e-9)
        assert row[mask].min() >= row[~mask].max(initial=0)


def test_importance_definitions():
    p = scipy.special.softmax(RNG.normal(size=(3, 6, 6)), axis=-1)
    np.testing.assert_allclose(token_importance(p), p.sum(axis=(0, 1)))
    out = RNG.normal(size=(3, 6, 4))
    np.testing.assert_allclose(head_importance(out), np.abs(out).sum(axis=(1, 2)))


def test_schedule_strength_blends_toward_dense():
    rule = CascadeRule((0.8, 0.5))
    assert rule.ratio(0) == 0.8 and rule.ratio(1) == 0.5 and rule.ratio(5) == 0.5
    assert rule.ratio(1, strength=0.0) == 1.0
    assert rule.ratio(1, strength=0.5) == pytest.approx(0.75)


# ---------------------------------------------------------------- validation


def test_policy_round_trips():
    doc = {"name": "x", "tokens": {"schedule": [1.0, 0.7]}, "heads": {"schedule": [0.9], "accumulate": False},
           "values": {"count": 8}, "keys": {"msb_bits": 5, "lsb_bits": 3, "threshold": 0.2},
           "fit": {"cosine": 0.97, "steps": 4}, "decode": True}
    pol = load_policy(doc)
    assert load_policy(pol.to_dict()) == pol
    assert pol.digest() == load_policy(pol.to_dict()).digest()


@pytest.mark.parametrize("doc, field, words", [
    ({"tokens": {"schedule": [1.0, 0.0]}}, "tokens.schedule[1]", "(0, 1]"),
    ({"tokens": {"schedule": [1.5]}}, "tokens.schedule[0]", "(0, 1]"),
    ({"heads": {"schedule": [0.5, 0.8]}}, "heads.schedule[1]", "never return"),
    ({"values": {"mass": 1.2}}, "values.mass", "(0, 1]"),
    ({"values": {"ratio": 0}}, "values.ratio", "(0, 1]"),
    ({"values": {"count": 0}}, "values.count", ">= 1"),
    ({"values": {"count": 3, "mass": 0.9}}, "values", "exactly one"),
    ({"keys": {"threshold": -0.1}}, "keys.threshold", "(0, 1]"),
    ({"keys": {"msb_bits": 1}}, "keys.msb_bits", "[2, 16]"),
    ({"fit": {"cosine": 1.01}}, "fit.cosine", "(0, 1]"),
    ({"fit": {"steps": 3}}, "fit", "cosine"),
    ({"tokens": {"schedulee": [1.0]}}, "tokens.schedulee", "did you mean 'schedule'"),
    ({"valeus": {"mass": 0.9}}, "valeus", "did you mean 'values'"),
])
def test_policy_errors_name_field_and_value(doc, field, words):
    with pytest.raises(PolicyError) as exc:
        load_policy(doc, source="p.yaml")
    msg = str(exc.value)
    assert msg.startswith(f"p.yaml: {field} = ") and words in msg and "\n" not in msg


def test_schedule_longer_than_model_is_refused():
    pol = load_policy({"tokens": {"schedule": [1.0] * 7}}, source="p.yaml")
    with pytest.raises(PolicyError, match=r"tokens.schedule .*at most 6 entries"):
        pol.check_layers(6)
    pol.check_layers(7)


def test_policy_file_errors(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("tokens: [unclosed\n")
    with pytest.raises(PolicyError, match="not valid YAML"):
        load_policy(str(bad))
    with pytest.raises(PolicyError, match="not found"):
        load_policy(str(tmp_path / "missing.yaml"))
