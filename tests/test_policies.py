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


# ---------------------------------------------------------------- KV-cache rules (decoders)


def _hh_replay(prefill_scores, rows, budget, recent):
    """Drive heavy_hitter_keep over hand-made attention rows: row t is the
    attention the decode token at position len(prefill_scores) + t gives to the
    rows it reads (in their order). Returns the rows read at each step."""
    from sim.trace.policies import heavy_hitter_keep

    n = len(prefill_scores)
    acc = dict(enumerate(prefill_scores))
    cached = np.arange(n)
    out = []
    for t, row in enumerate(rows):
        pos = n + t
        acc[pos] = 0.0
        cached = heavy_hitter_keep(np.append(cached, pos), np.array([acc[p] for p in np.append(cached, pos)]),
                                   budget, recent, pos)
        out.append(cached.tolist())
        for p, a in zip(cached, row):
            acc[int(p)] += a
    return out


def test_heavy_hitters_worked_example():
    """Heavy hitters plus a recent window (Zhang et al., NeurIPS 2023), worked by
    hand with budget 3, recent 1 (binary fractions, so sums are exact). Prompt
    positions 0..3 accumulated [0.75, 0.125, 0.5, 0.25] in prefill.
    pos 4: recent {4}; best two of the rest: 0 (0.75), 2 (0.5) -> [0, 2, 4];
           it attends [0.25, 0.0625, 0.6875] -> 0: 1.0, 2: 0.5625, 4: 0.6875.
    pos 5: recent {5}; best two of 0, 2, 4 -> 0, 4 -> [0, 4, 5];
           it attends [0.1875, 0.0625, 0.75] -> 0: 1.1875, 4: 0.75, 5: 0.75.
    pos 6: recent {6}; 0 and a tie 4 = 5: the earlier, 4, stays -> [0, 4, 6]."""
    got = _hh_replay([0.75, 0.125, 0.5, 0.25], [[0.25, 0.0625, 0.6875], [0.1875, 0.0625, 0.75], [0.5, 0.25, 0.25]],
                     budget=3, recent=1)
    assert got == [[0, 2, 4], [0, 4, 5], [0, 4, 6]]


def test_heavy_hitters_keep_the_recent_window_and_the_budget():
    """With recent 2 of budget 4 the two newest rows always stay; the footprint
    is min(budget, cached rows)."""
    from sim.trace.policies import heavy_hitter_keep

    cached = np.arange(10)
    scores = np.array([5, 0, 4, 0, 0, 0, 0, 0, 9, 0], dtype=float)
    assert heavy_hitter_keep(cached, scores, 4, 2, 9).tolist() == [0, 2, 8, 9]   # recent {8, 9}, best 0 and 2
    assert heavy_hitter_keep(cached, scores, 4, 1, 9).tolist() == [0, 2, 8, 9]   # recent {9}, best 8, 0, 2
    assert heavy_hitter_keep(cached[:3], scores[:3], 4, 2, 2).tolist() == [0, 1, 2]  # under budget: all


def test_sinks_worked_example():
    """Attention sinks plus a recent window (Xiao et al., ICLR 2024): sinks 2,
    recent 3 at position 9 keep 0, 1 and 7, 8, 9; where cascade pruning left
    holes only the cached ones count."""
    from sim.trace.policies import sink_keep

    assert sink_keep(np.arange(10), 2, 3, 9).tolist() == [0, 1, 7, 8, 9]
    assert sink_keep(np.array([0, 2, 3, 5, 8, 9]), 2, 3, 9).tolist() == [0, 8, 9]
    assert sink_keep(np.arange(4), 2, 3, 3).tolist() == [0, 1, 2, 3]


def test_page_selection_worked_example():
    """Query-aware page selection (Tang et al., ICML 2024), by hand: pages of 2
    rows; page 0 keys [1, 0], [0, 1] -> min [0, 0], max [1, 1]; page 1 keys
    [-1, 2], [3, -2] -> min [-1, -2], max [3, 2]; page 2 (the query's own,
    position 5) keys [0.5, 0.5], [0, 0]. Query [1, -1]: bound of page 0 =
    max(0, 1) + max(0, -1) = 1, of page 1 = max(-1, 3) + max(2, -2) = 5. Two
    pages: the own page and page 1 -> rows 2, 3, 4, 5."""
    from sim.trace.policies import page_bounds, page_select

    keys = np.array([[1, 0], [0, 1], [-1, 2], [3, -2], [0.5, 0.5], [0, 0]], dtype=np.float32)
    q = np.array([[1.0, -1.0]])
    assert page_select(np.arange(6), keys, q, 2, 2, 5).tolist() == [2, 3, 4, 5]
    # the bound is an upper bound of every q.k in the page (the method's premise)
    ids, lo, hi = page_bounds(np.arange(6), keys, 2)
    bound = np.maximum(q * lo, q * hi).sum(axis=1)
    for page in ids:
        assert (keys[2 * page:2 * page + 2] @ q[0]).max() <= bound[page] + 1e-12
    # one page: only the own page; a query of two heads sums their bounds
    assert page_select(np.arange(6), keys, q, 2, 1, 5).tolist() == [4, 5]
    q2 = np.array([[1.0, -1.0], [0.0, 3.0]])  # page 0: 1 + 3 = 4, page 1: 5 + 6 = 11
    assert page_select(np.arange(6), keys, q2, 2, 2, 5).tolist() == [2, 3, 4, 5]


def test_cache_rules_load_validate_and_blend():
    pol = load_policy({"cache": {"heavy_hitters": {"budget": 64, "recent": 16}}, "fit": {"agreement": 0.9}})
    assert pol.cache.rows == 64 and pol.fit.agreement == 0.9
    assert load_policy(pol.to_dict()) == pol
    assert pol.cache.at_strength(0.0, 200).budget == 200
    assert pol.cache.at_strength(0.5, 200).budget == 132
    s = load_policy({"cache": {"sinks": {"sinks": 4, "recent": 28}}}).cache
    assert s.rows == 32 and s.at_strength(0.0, 100).recent == 96
    p = load_policy({"cache": {"pages": {"page_size": 16, "pages": 4}}}).cache
    assert p.rows == 64 and p.at_strength(0.0, 100).pages == 7
    # older policies keep their digest: no cache key when the rule is off
    assert "cache" not in load_policy({}).to_dict()


@pytest.mark.parametrize("doc, field, words", [
    ({"cache": {"heavy_hitters": {"budget": 8, "recent": 9}}}, "cache.heavy_hitters.recent", "at most budget"),
    ({"cache": {"heavy_hitters": {"budget": 0, "recent": 0}}}, "cache.heavy_hitters.budget", ">= 1"),
    ({"cache": {"sinks": {"sinks": -1, "recent": 4}}}, "cache.sinks.sinks", ">= 0"),
    ({"cache": {"pages": {"page_size": 16}}}, "cache.pages.pages", ">= 1"),
    ({"cache": {"pages": {"page_size": 4, "pages": 2}, "sinks": {"sinks": 1, "recent": 2}}}, "cache", "exactly one"),
    ({"cache": {"heavy_hitter": {"budget": 4, "recent": 1}}}, "cache.heavy_hitter", "did you mean 'heavy_hitters'"),
    ({"fit": {"agreement": 0.9, "cosine": 0.9}}, "fit", "exactly one"),
    ({"fit": {"agreement": 1.5}}, "fit.agreement", "(0, 1]"),
])
def test_cache_rule_errors_name_field_and_value(doc, field, words):
    with pytest.raises(PolicyError) as exc:
        load_policy(doc, source="p.yaml")
    msg = str(exc.value)
    assert msg.startswith(f"p.yaml: {field} = ") and words in msg and "\n" not in msg


def test_budget_larger_than_the_context_is_refused():
    pol = load_policy({"cache": {"heavy_hitters": {"budget": 200, "recent": 8}}}, source="p.yaml")
    with pytest.raises(PolicyError) as exc:
        pol.check_decoder(120, 100)
    assert exc.value.field == "cache.heavy_hitters.budget" and "100 prompt + 20 generated" in exc.value.expected
    pol.check_decoder(200, 180)
    with pytest.raises(PolicyError, match="fit.agreement for a decoder"):
        load_policy({"fit": {"cosine": 0.9}}).check_decoder(10, 5)
    with pytest.raises(PolicyError, match="no cache rule for an encoder"):
        load_policy({"cache": {"sinks": {"sinks": 1, "recent": 2}}}).check_encoder()


def test_causal_value_pruning_counts_only_visible_entries():
    """Value pruning with a causal mask: ratios and counts apply to the keys a
    row can see (row i sees i + 1), never to the masked future."""
    probs = np.array([[1.0, 0, 0, 0], [0.7, 0.3, 0, 0], [0.5, 0.3, 0.2, 0], [0.4, 0.3, 0.2, 0.1]])
    valid = np.tril(np.ones((4, 4), dtype=bool))
    for rule, counts in ((ValueRule("ratio", 0.5), [1, 1, 2, 2]),   # ceil(0.5 (i + 1))
                         (ValueRule("count", 3), [1, 2, 3, 3]),     # min(3, i + 1)
                         (ValueRule("mass", 0.75), [1, 2, 2, 3])):  # fewest largest reaching 75 %
        keep = rule.keep_mask(probs, valid=valid)
        assert (keep & ~valid).sum() == 0
        assert keep.sum(axis=1).tolist() == counts, rule
