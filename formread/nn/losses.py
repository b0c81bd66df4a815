"""Softmax and the softmax cross-entropy loss, numerically stable, dtype preserving."""

from __future__ import annotations

import numpy as np

from formread.errors import check_param

__all__ = ["softmax", "log_softmax", "softmax_cross_entropy"]


def softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Softmax along ``axis``; z of any shape, float32 or float64 (kept). Max-shifted: no overflow."""
    z = np.asarray(z)
    e = np.exp(z - z.max(axis=axis, keepdims=True))
    e /= e.sum(axis=axis, keepdims=True)
    return e


def log_softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """log(softmax(z)) along ``axis`` by the log-sum-exp trick; same shape and dtype as z."""
    z = np.asarray(z)
    shifted = z - z.max(axis=axis, keepdims=True)
    return shifted - np.log(np.exp(shifted).sum(axis=axis, keepdims=True))


def softmax_cross_entropy(logits: np.ndarray, y: np.ndarray, smoothing: float = 0.0
                          ) -> tuple[float, np.ndarray]:
    """Mean cross-entropy between softmax(logits) and the (optionally smoothed) one-hot labels.

    logits : (N, C) float; y : (N,) int in [0, C), or -1 for an image of no class (target uniform 1 / C:
    outlier exposure, Hendrycks et al. 2019); smoothing : share of the target mass spread evenly over
    all C classes (label smoothing, Szegedy et al. 2016): target = (1 - s) onehot + s / C.
    Returns (loss as a Python float, dlogits (N, C) same dtype as logits, the gradient of the mean loss).
    """
    logits = np.asarray(logits)
    y = np.asarray(y)
    check_param(logits.ndim == 2, "logits", "of shape (N, C)", logits.shape)
    n, c = logits.shape
    check_param(y.shape == (n,) and np.issubdtype(y.dtype, np.integer), "y",
                f"integer labels of shape ({n},)", (y.shape, str(y.dtype)))
    check_param(n == 0 or (y.min() >= -1 and y.max() < c), "y", f"labels in [0, {c}) or -1",
                (int(y.min()), int(y.max())) if n else ())
    check_param(0.0 <= smoothing < 1.0, "smoothing", "a number in [0, 1)", smoothing)
    logp = log_softmax(logits, axis=1)
    target = np.full_like(logits, smoothing / c)
    some = np.flatnonzero(y >= 0)
    target[some, y[some]] += 1.0 - smoothing
    target[y < 0] = 1.0 / c
    loss = -float((target * logp).sum()) / max(n, 1)
    dlogits = np.exp(logp)
    dlogits -= target
    dlogits *= logits.dtype.type(1.0 / max(n, 1))
    return loss, dlogits
