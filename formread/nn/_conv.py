"""Convolution and pooling kernels on (N, C, H, W) arrays: im2col with BLAS matmuls.

Loops run only over kernel offsets (k * k of them), never over pixels or images.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view


def _out_size(n: int, k: int, s: int) -> int:
    return (n - k) // s + 1


def _windows(x: np.ndarray, k: int, s: int) -> np.ndarray:
    """View of shape (N, C, Ho, Wo, k, k) on the k x k windows of x at stride s."""
    ho, wo = _out_size(x.shape[2], k, s), _out_size(x.shape[3], k, s)
    win = sliding_window_view(x, (k, k), axis=(2, 3))
    return win[:, :, : (ho - 1) * s + 1 : s, : (wo - 1) * s + 1 : s]


def conv_forward(x, w, b, stride, padding):
    """x (N, C, H, W), w (O, C, k, k), b (O,) -> y (N, O, Ho, Wo) and a cache for the backward pass."""
    n, c, h, wd = x.shape
    o, _, k, _ = w.shape
    if padding:
        xp = np.zeros((n, c, h + 2 * padding, wd + 2 * padding), dtype=x.dtype)
        xp[:, :, padding:padding + h, padding:padding + wd] = x
    else:
        xp = x
    check = xp.shape[2] >= k and xp.shape[3] >= k
    if not check:
        from formread.errors import check_param
        check_param(False, "x", f"at least {k}x{k} after padding", x.shape)
    win = _windows(xp, k, stride)
    ho, wo = win.shape[2], win.shape[3]
    cols = np.ascontiguousarray(win.transpose(0, 2, 3, 1, 4, 5)).reshape(n * ho * wo, c * k * k)
    y = cols @ w.reshape(o, -1).T
    y += b
    y = np.ascontiguousarray(y.reshape(n, ho, wo, o).transpose(0, 3, 1, 2))
    return y, (cols, x.shape, xp.shape, stride, padding, ho, wo)


def conv_backward(dy, w, cache):
    """dy (N, O, Ho, Wo) -> dx (N, C, H, W), dw (O, C, k, k), db (O,)."""
    cols, xshape, xpshape, s, p, ho, wo = cache
    n, c, h, wd = xshape
    o, _, k, _ = w.shape
    dy2 = np.ascontiguousarray(dy.transpose(0, 2, 3, 1)).reshape(-1, o)
    dw = (dy2.T @ cols).reshape(w.shape)
    db = dy2.sum(axis=0)
    dcols = (dy2 @ w.reshape(o, -1)).reshape(n, ho, wo, c, k, k).transpose(0, 3, 1, 2, 4, 5)
    dxp = np.zeros(xpshape, dtype=dy.dtype)
    for i in range(k):
        for j in range(k):
            dxp[:, :, i:i + s * (ho - 1) + 1:s, j:j + s * (wo - 1) + 1:s] += dcols[..., i, j]
    dx = dxp[:, :, p:p + h, p:p + wd] if p else dxp
    return np.ascontiguousarray(dx), dw, db


def maxpool_forward(x, k, s):
    """x (N, C, H, W) -> y (N, C, Ho, Wo) maximum over each window, and a cache."""
    win = _windows(x, k, s)
    n, c, ho, wo = win.shape[:4]
    flat = win.reshape(n, c, ho, wo, k * k)
    idx = flat.argmax(axis=-1)
    y = np.take_along_axis(flat, idx[..., None], axis=-1)[..., 0]
    return y, (idx, x.shape, k, s)


def maxpool_backward(dy, cache):
    """dy (N, C, Ho, Wo) -> dx (N, C, H, W): gradient routed to the (first) maximum of each window."""
    idx, xshape, k, s = cache
    ho, wo = dy.shape[2], dy.shape[3]
    dx = np.zeros(xshape, dtype=dy.dtype)
    for q in range(k * k):
        i, j = divmod(q, k)
        dx[:, :, i:i + s * (ho - 1) + 1:s, j:j + s * (wo - 1) + 1:s] += np.where(idx == q, dy, 0)
    return dx


def avgpool_forward(x, k, s):
    """x (N, C, H, W) -> y (N, C, Ho, Wo) mean over each window, and a cache."""
    win = _windows(x, k, s)
    y = win.mean(axis=(-2, -1), dtype=x.dtype)
    return y.astype(x.dtype, copy=False), (x.shape, k, s)


def avgpool_backward(dy, cache):
    """dy (N, C, Ho, Wo) -> dx (N, C, H, W): gradient spread evenly over each window."""
    xshape, k, s = cache
    ho, wo = dy.shape[2], dy.shape[3]
    dx = np.zeros(xshape, dtype=dy.dtype)
    share = dy * dy.dtype.type(1.0 / (k * k))
    for i in range(k):
        for j in range(k):
            dx[:, :, i:i + s * (ho - 1) + 1:s, j:j + s * (wo - 1) + 1:s] += share
    return dx
