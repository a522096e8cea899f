"""Numerics shared by the numpy model passes (encoder and decoder).

Float32 building blocks with the formulas their reference implementations
use: exact and tanh GELU, SiLU, LayerNorm, RMSNorm, rotary position
embeddings; plus a file digest and a one-BLAS-thread guard for small products.
"""

import contextlib
import hashlib
import math

import numpy as np


def file_digest(path, chunk=1 << 22):
    """SHA-256 of a file, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def erf(x):
    """Error function, |error| < 1.5e-7 (Abramowitz & Stegun 1964, formula 7.1.26)."""
    s = np.sign(x)
    a = np.abs(x)
    t = 1.0 / (1.0 + 0.3275911 * a)
    poly = t * (0.254829592 + t * (-0.284496736 + t * (1.421413741 + t * (-1.453152027 + t * 1.061405429))))
    return s * (1.0 - poly * np.exp(-a * a))


def gelu(x, kind="gelu"):
    """GELU (exact, via erf) or its tanh form, as the config names it."""
    if kind == "gelu":
        return (0.5 * x * (1.0 + erf(x * x.dtype.type(1.0 / math.sqrt(2.0))))).astype(x.dtype)
    if kind == "relu":
        return np.maximum(x, 0)
    c = x.dtype.type(math.sqrt(2.0 / math.pi))
    inner = c * x * (1 + x.dtype.type(0.044715) * x * x)  # x * x * x, not x ** 3: power() is slow
    return (0.5 * x * (1.0 + np.tanh(inner))).astype(x.dtype)


def layer_norm(x, w, b, eps):
    mu = x.mean(axis=-1, keepdims=True)
    var = ((x - mu) ** 2).mean(axis=-1, keepdims=True)
    return (x - mu) / np.sqrt(var + eps) * w + b


def one_blas_thread():
    """Run the pass on one BLAS thread when threadpoolctl is there.

    The per-head products are small; on a busy two-core machine a
    multi-threaded BLAS spins on them and a pass runs several times slower
    (measured with bench/capture.py). Results do not depend on it.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def silu(x):
    """SiLU (swish): x * sigmoid(x), as the gated feed-forward of the Llama family uses."""
    return (x / (1.0 + np.exp(-x))).astype(x.dtype)


def rms_norm(x, w, eps):
    """RMSNorm (Zhang & Sennrich, 2019): x / sqrt(mean(x^2) + eps) * w."""
    var = np.mean(np.square(x), axis=-1, keepdims=True)
    return (x / np.sqrt(var + np.float32(eps))).astype(x.dtype) * w


def rotary_tables(positions, head_dim, theta):
    """cos and sin tables (positions, head_dim) of rotary position embeddings
    (Su et al., RoFormer, 2021) in the half-split layout: frequency
    theta^(-2i/d) for i < d/2, repeated for both halves."""
    inv = (1.0 / (theta ** (np.arange(0, head_dim, 2, dtype=np.float32) / np.float32(head_dim)))).astype(np.float32)
    ang = np.asarray(positions, dtype=np.float32)[:, None] * inv[None, :]
    emb = np.concatenate([ang, ang], axis=-1)
    return np.cos(emb).astype(np.float32), np.sin(emb).astype(np.float32)


def rotate(x, cos, sin):
    """Apply rotary embeddings to x (..., positions, head_dim): x cos + rotate_half(x) sin."""
    half = x.shape[-1] // 2
    rot = np.concatenate([-x[..., half:], x[..., :half]], axis=-1)
    return x * cos + rot * sin
