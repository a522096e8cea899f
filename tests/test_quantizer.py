"""Progressive key quantization: the uniform quantizer and the bit planes.

Reference: W. R. Bennett, "Spectra of quantized signals", Bell System
Technical Journal 27, 1948 -- a uniform quantizer with step Delta on a signal
that is busy across many steps has error variance Delta^2 / 12.
"""

import functools
import math
import os

import numpy as np
import pytest

from sim.trace.encoder import Encoder, layer_norm
from sim.trace.policies import (KeyRule, attend, msb_reconstruct, quant_step, quantize_uniform,
                                softmax, split_planes, effective_key_bits)

RNG = np.random.default_rng(1948)
HERE = os.path.dirname(os.path.abspath(__file__))


@functools.lru_cache(maxsize=None)
def layer0_keys():
    """Real key tensors: layer 0 of the bundled encoder on the long bundled text."""
    enc = Encoder.load()
    with open(os.path.join(HERE, "..", "traces", "texts", "lighthouse_log.txt"), encoding="utf-8") as fh:
        ids, _ = enc.tokenize(fh.read())
    w, cfg = enc.weights, enc.config
    x = (w["embeddings.word_embeddings.weight"][ids] + w["embeddings.position_embeddings.weight"][:len(ids)]
         + w["embeddings.token_type_embeddings.weight"][0])
    x = layer_norm(x, w["embeddings.LayerNorm.weight"], w["embeddings.LayerNorm.bias"], cfg.eps)
    k = x @ w["encoder.layer.0.attention.self.key.weight"].T + w["encoder.layer.0.attention.self.key.bias"]
    q = x @ w["encoder.layer.0.attention.self.query.weight"].T + w["encoder.layer.0.attention.self.query.bias"]
    split = lambda t: t.reshape(len(ids), cfg.heads, cfg.head_dim).transpose(1, 0, 2).copy()  # noqa: E731
    return split(q), split(k)


@pytest.mark.parametrize("bits", [6, 8, 10])
def test_bennett_noise_variance_gaussian(bits):
    """Busy Gaussian input, range +-6 sigma: error variance within 10 % of Delta^2/12 (Bennett 1948)."""
    x = RNG.normal(0, 1, 200_000)
    step = 6.0 / (2 ** (bits - 1) - 1)
    x = x[np.abs(x) < 6.0]  # inside the range: no clipping error
    err = quantize_uniform(x, bits, step) * step - x
    assert abs(err.var() / (step ** 2 / 12) - 1) < 0.10


def test_bennett_noise_variance_on_real_keys():
    """Per-head 10-bit quantization of real layer-0 keys: within 10 % of Delta^2/12 (Bennett 1948)."""
    _, k = layer0_keys()
    for h in range(k.shape[0]):
        step = float(quant_step(k[h], 10))
        err = quantize_uniform(k[h], 10, step) * step - k[h].astype(np.float64)
        assert abs(err.var() / (step ** 2 / 12) - 1) < 0.10, f"head {h}"


def test_msb_plane_is_a_coarser_uniform_quantizer():
    """MSB plane alone (bucket centre) is a step Delta*2^L quantizer: variance (Delta 2^L)^2/12 (Bennett 1948)."""
    x = RNG.uniform(-1, 1, 200_000)
    bits, lsb = 10, 4
    step = float(quant_step(x, bits))
    msb, _ = split_planes(quantize_uniform(x, bits, step), lsb)
    err = msb_reconstruct(msb, lsb) * step - x
    assert abs(err.var() / ((step * 2 ** lsb) ** 2 / 12) - 1) < 0.10
    assert abs(err.mean()) < 0.05 * step * 2 ** lsb  # centred buckets: no bias


def test_planes_recombine_exactly():
    codes = RNG.integers(-511, 512, size=10_000).astype(np.int32)
    for lsb_bits in (0, 1, 4, 7):
        msb, lsb = split_planes(codes, lsb_bits)
        assert (msb * 2 ** lsb_bits + lsb == codes).all()
        assert lsb.min() >= 0 and lsb.max() < 2 ** lsb_bits


def test_quantizer_clips_and_codes_in_range():
    codes = quantize_uniform(np.array([-10.0, -1.0, 0.0, 0.49, 1.0, 10.0]), 4, 0.25)
    assert codes.tolist() == [-7, -4, 0, 2, 4, 7]


def test_progressive_threshold_extremes():
    """Threshold 1: every row not already saturated at p=1 refetches and gets the
    full-precision-code scores; a tiny threshold: no row does."""
    q, k = layer0_keys()
    d = q.shape[-1]
    scale = np.float32(1 / math.sqrt(d))
    rule = KeyRule(True, 6, 4, 1.0)
    probs, lsb = attend(q, k, rule, scale)
    assert lsb.mean() > 0.95
    step = quant_step(k, 10, axis=(1, 2))
    k_full = (quantize_uniform(k, 10, step) * step).astype(np.float32)
    ref = softmax(np.matmul(q, np.swapaxes(k_full, -1, -2)) * scale)
    np.testing.assert_allclose(probs[lsb], ref[lsb], rtol=1e-5, atol=1e-7)
    probs2, lsb2 = attend(q, k, KeyRule(True, 6, 4, 1e-6), scale)
    assert not lsb2.any()
    # refetching the LSB plane brings the rows closer to unquantized attention
    exact = softmax(np.matmul(q, np.swapaxes(k, -1, -2)) * scale)
    assert np.abs(ref - exact).mean() < np.abs(probs2 - exact).mean()


def test_refetch_rows_are_exactly_the_low_peak_rows():
    q, k = layer0_keys()
    scale = np.float32(1 / math.sqrt(q.shape[-1]))
    rule = KeyRule(True, 6, 4, 0.3)
    _, lsb = attend(q, k, rule, scale)
    msb_only, _ = attend(q, k, KeyRule(True, 6, 4, 1e-6), scale)
    assert (lsb == (msb_only.max(-1) < 0.3)).all()
    assert 0 < lsb.mean() < 1  # the threshold splits real rows


def test_effective_key_bits():
    rule = KeyRule(True, 6, 4, 0.1)
    assert effective_key_bits(rule, 0.0) == 6
    assert effective_key_bits(rule, 0.25) == 7
    assert effective_key_bits(KeyRule(), 0.5) is None
