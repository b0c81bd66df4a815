"""Convolution and pooling kernels in the internal batch-innermost layout.

Internally, image batches are stored as (C, H, W, N): the batch is the innermost axis, so every
shifted copy of a window is a copy of long contiguous runs and a convolution is a single matmul
W (O, C*k*k) @ cols (C*k*k, Ho*Wo*N) whose result is already in the (O, Ho, Wo, N) layout. Loops run
only over kernel offsets (k * k of them), never over pixels or images. Large scratch arrays live in
a per-layer ``Scratch`` so a training loop does not allocate them again on every batch.
"""

from __future__ import annotations

import threading

import numpy as np
from numpy.lib.stride_tricks import as_strided
from threadpoolctl import ThreadpoolController


class Scratch:
    """Reusable work arrays, keyed by purpose; reallocated only when shape or dtype changes.

    Kept per thread, so that several threads may run inference on one model at the same time.
    """

    def __init__(self):
        self._local = threading.local()

    @property
    def _arrays(self) -> dict[str, np.ndarray]:
        arrays = getattr(self._local, "arrays", None)
        if arrays is None:
            arrays = self._local.arrays = {}
        return arrays

    def get(self, key: str, shape: tuple, dtype, zero: bool = False) -> np.ndarray:
        arrays = self._arrays
        a = arrays.get(key)
        if a is None or a.shape != shape or a.dtype != dtype:
            a = np.zeros(shape, dtype=dtype)
            arrays[key] = a
        elif zero:
            a.fill(0)
        return a

    def clear(self) -> None:
        """Free this thread's work arrays."""
        self._arrays.clear()


class _OneBlasThread:
    """Context manager: BLAS limited to one thread inside (a few microseconds to enter).

    The network's matrices are small: extra BLAS threads give little and, when the machine is
    busy, their spin-waiting makes a pass many times slower (measured). Both cores are used by
    processes instead (``formread.nn.parallel``). Reference-counted, so that overlapping uses from
    several threads restore the original setting only when the last one leaves.
    """

    def __init__(self):
        self._lock = threading.Lock()
        self._depth = 0
        self._controller = None
        self._limiter = None

    def __enter__(self):
        with self._lock:
            if self._depth == 0:
                if self._controller is None:
                    self._controller = ThreadpoolController()
                self._limiter = self._controller.limit(limits=1, user_api="blas")
            self._depth += 1
        return self

    def __exit__(self, *exc):
        with self._lock:
            self._depth -= 1
            if self._depth == 0:
                self._limiter.restore_original_limits()
                self._limiter = None


_ONE_BLAS_THREAD = _OneBlasThread()


def one_blas_thread() -> _OneBlasThread:
    """The shared context manager that keeps BLAS at one thread while a network pass runs."""
    return _ONE_BLAS_THREAD


def out_size(n: int, k: int, s: int, p: int = 0) -> int:
    """Output length of a window of size k at stride s over n values padded by p on each side."""
    return (n + 2 * p - k) // s + 1


def _slab(i: int, j: int, ho: int, wo: int, s: int):
    """Index of the (ho, wo) strided positions at kernel offset (i, j) in a (C, H, W, N) array."""
    return (slice(None), slice(i, i + s * (ho - 1) + 1, s), slice(j, j + s * (wo - 1) + 1, s))


def _windows(xp, k, s, ho, wo):
    """Read-only strided view (C, k, k, Ho, Wo, N) of the k x k windows at stride s of
    xp (C, H, W, N): element [c, i, j, u, v, n] is xp[c, s*u + i, s*v + j, n]. Built directly from
    the strides (sliding_window_view does the same with several microseconds of checks per call)."""
    c, _, _, n = xp.shape
    s0, s1, s2, s3 = xp.strides
    return as_strided(xp, (c, k, k, ho, wo, n), (s0, s1, s2, s * s1, s * s2, s3), writeable=False)


def conv_forward(x, w, b, s, p, scratch: Scratch):
    """x (C, H, W, N), w (O, C, k, k), b (O,) or None -> y (O, Ho, Wo, N) and the cols
    (C*k*k, Ho*Wo*N). With b None the bias is left out (added later by a fused block)."""
    c, h, wd, n = x.shape
    o, _, k, _ = w.shape
    if p:
        xp = scratch.get("xpad", (c, h + 2 * p, wd + 2 * p, n), x.dtype)
        xp[:, p:p + h, p:p + wd, :] = x  # borders stay zero between calls
    else:
        xp = x
    ho, wo = out_size(h, k, s, p), out_size(wd, k, s, p)
    cols = scratch.get("cols", (c, k, k, ho, wo, n), x.dtype)
    np.copyto(cols, _windows(xp, k, s, ho, wo))
    cols2 = cols.reshape(c * k * k, ho * wo * n)
    y = np.matmul(w.reshape(o, c * k * k), cols2)
    if b is not None:
        y += b[:, None]
    return y.reshape(o, ho, wo, n), cols2


def conv_backward(dy, w, cols2, xshape, s, p, scratch: Scratch, need_dx: bool = True,
                  need_db: bool = True):
    """dy (O, Ho, Wo, N) -> (dx (C, H, W, N) or None, dw (O, C, k, k), db (O,) or None)."""
    c, h, wd, n = xshape
    o, _, k, _ = w.shape
    _, ho, wo, _ = dy.shape
    dy2 = dy.reshape(o, ho * wo * n)
    # weight gradient as cols @ dY^T: the long Ho*Wo*N axis is the contraction
    dw = np.matmul(cols2, dy2.T).T.reshape(w.shape)
    db = dy2.sum(axis=1) if need_db else None
    if not need_dx:
        return None, dw, db
    if s == 1:
        return _conv_dx_stride1(dy, w, xshape, p, scratch), dw, db
    # Input gradient: the columns' gradient W^T @ dY, one kernel row at a time so that each
    # piece is added back into place while it is still in cache (about 20% faster than whole).
    dxp = np.zeros((c, h + 2 * p, wd + 2 * p, n), dtype=dy.dtype)
    wrows = w.transpose(2, 1, 3, 0)  # (k_i, C, k_j, O)
    piece = scratch.get("dcols_row", (c * k, ho * wo * n), dy.dtype)
    for i in range(k):
        np.matmul(wrows[i].reshape(c * k, o), dy2, out=piece)
        rows = piece.reshape(c, k, ho, wo, n)
        for j in range(k):
            dxp[_slab(i, j, ho, wo, s)] += rows[:, j]
    dx = dxp[:, p:p + h, p:p + wd, :] if p else dxp
    return dx, dw, db


def _conv_dx_stride1(dy, w, xshape, p, scratch: Scratch):
    """Input gradient of a stride-1 convolution: dy (O, Ho, Wo, N) -> dx (C, H, W, N), a view of a
    work array (valid until the next call on this scratch).

    The k column shifts go into the product instead of into k * k scattered additions: dy is copied
    k times, shifted by j along W into a zero band (O, k, Ho, W + 2p, N); one matmul with the weights
    as (C * k_i, O * k_j) gives, for every kernel row i, a whole (C, Ho, W + 2p, N) slab that is added
    at row offset i. That is k copies, one matmul (contraction O * k instead of O; (W + 2p) / Wo
    times the multiply-adds, the band's zeros) and k additions in place of k matmuls and k * k
    additions: measured 13-22% less time for LeNet-5's second layer at 32-128 images, one core.
    """
    c, h, wd, n = xshape
    o, _, k, _ = w.shape
    _, ho, wo, _ = dy.shape
    wi = wd + 2 * p
    band = scratch.get("dx_band", (o, k, ho, wi, n), dy.dtype)  # zero outside the copies, always
    for j in range(k):
        band[:, j, :, j:j + wo, :] = dy
    wm = w.transpose(1, 2, 0, 3).reshape(c * k, o * k)
    piece = scratch.get("dx_piece", (c * k, ho * wi * n), dy.dtype)
    np.matmul(wm, band.reshape(o * k, ho * wi * n), out=piece)
    rows = piece.reshape(c, k, ho, wi, n)
    dxp = scratch.get("dx_pad", (c, ho + k - 1, wi, n), dy.dtype)  # = (C, H + 2p, W + 2p, N)
    dxp[:, :ho] = rows[:, 0]
    dxp[:, ho:] = 0
    for i in range(1, k):
        dxp[:, i:i + ho] += rows[:, i]
    return dxp[:, p:p + h, p:p + wd, :] if p else dxp


def _pick(views, out_shape, dtype):
    """Running maximum over a list of equally shaped arrays: (max, index of the first max).
    The index is bool for two arrays (True = the second), else uint8."""
    if len(views) == 2:
        a, b = views
        arg = b > a
        return np.maximum(a, b), arg
    m = views[0].copy()
    arg = np.zeros(out_shape, dtype=np.uint8)
    for q in range(1, len(views)):
        better = views[q] > m
        np.copyto(arg, np.uint8(q), where=better)
        np.maximum(m, views[q], out=m)
    return m, arg


def _route(d, arg, outs):
    """Write d into outs[q] where arg selects q and zero elsewhere (inverse of ``_pick``)."""
    if len(outs) == 2:
        np.multiply(d, arg, out=outs[1])
        np.subtract(d, outs[1], out=outs[0])
        return
    for q, out in enumerate(outs):
        np.multiply(d, arg == q, out=out)


def maxpool_tiled_forward(x, k, need_arg: bool = True):
    """Non-overlapping max pooling (stride = size = k) in two passes, first along W then along H:
    x (C, H, W, N) -> y (C, H // k, W // k, N) and the two argmax arrays for the backward pass.
    The result and the chosen position equal those of the first maximum in row-major window order."""
    c, h, wd, n = x.shape
    ho, wo = h // k, wd // k
    v = x[:, : ho * k, : wo * k, :].reshape(c, ho, k, wo, k, n)
    if not need_arg:  # inference: the maximum only
        rows = v[:, :, :, :, 0, :].copy()
        for j in range(1, k):
            np.maximum(rows, v[:, :, :, :, j, :], out=rows)
        y = rows[:, :, 0].copy()
        for i in range(1, k):
            np.maximum(y, rows[:, :, i], out=y)
        return y, None
    rows, argj = _pick([v[:, :, :, :, j, :] for j in range(k)], (c, ho, k, wo, n), x.dtype)
    y, argi = _pick([rows[:, :, i] for i in range(k)], (c, ho, wo, n), x.dtype)
    return y, (argi, argj)


def maxpool_tiled_backward(dy, args, xshape, k):
    """dy (C, Ho, Wo, N) -> dx (C, H, W, N) for ``maxpool_tiled_forward``."""
    argi, argj = args
    c, ho, wo, n = dy.shape
    dx = np.empty(xshape, dtype=dy.dtype)
    if xshape[1] != ho * k or xshape[2] != wo * k:
        dx.fill(0)
    v = dx[:, : ho * k, : wo * k, :].reshape(c, ho, k, wo, k, n)
    drows = np.empty((c, ho, k, wo, n), dtype=dy.dtype)
    _route(dy, argi, [drows[:, :, i] for i in range(k)])
    _route(drows, argj, [v[:, :, :, :, j, :] for j in range(k)])
    return dx


def maxpool_forward(x, k, s):
    """x (C, H, W, N) -> y (C, Ho, Wo, N) maximum of each window, and the argmax (C, Ho, Wo, N) uint8
    (offset i * k + j of the first maximum in the window)."""
    c, h, wd, n = x.shape
    ho, wo = out_size(h, k, s), out_size(wd, k, s)
    y = x[_slab(0, 0, ho, wo, s)].copy()
    arg = np.zeros(y.shape, dtype=np.uint8)
    for q in range(1, k * k):
        v = x[_slab(q // k, q % k, ho, wo, s)]
        better = v > y
        np.copyto(arg, np.uint8(q), where=better)
        np.maximum(y, v, out=y)
    return y, arg


def maxpool_backward(dy, arg, xshape, k, s):
    """dy (C, Ho, Wo, N) -> dx (C, H, W, N): each window's gradient goes to its first maximum."""
    _, ho, wo, _ = dy.shape
    zero = dy.dtype.type(0)
    if s == k:
        dx = np.empty(xshape, dtype=dy.dtype)
        h, wd = xshape[1], xshape[2]
        if h != ho * k or wd != wo * k:
            dx.fill(0)
        for q in range(k * k):
            np.copyto(dx[_slab(q // k, q % k, ho, wo, s)], np.where(arg == q, dy, zero))
        return dx
    dx = np.zeros(xshape, dtype=dy.dtype)
    for q in range(k * k):
        dx[_slab(q // k, q % k, ho, wo, s)] += np.where(arg == q, dy, zero)
    return dx


def avgpool_forward(x, k, s):
    """x (C, H, W, N) -> y (C, Ho, Wo, N) mean of each window."""
    c, h, wd, n = x.shape
    ho, wo = out_size(h, k, s), out_size(wd, k, s)
    y = x[_slab(0, 0, ho, wo, s)].copy()
    for q in range(1, k * k):
        y += x[_slab(q // k, q % k, ho, wo, s)]
    y *= y.dtype.type(1.0 / (k * k))
    return y


def avgpool_backward(dy, xshape, k, s):
    """dy (C, Ho, Wo, N) -> dx (C, H, W, N): each window's gradient spread evenly over it."""
    _, ho, wo, _ = dy.shape
    share = dy * dy.dtype.type(1.0 / (k * k))
    if s == k:
        dx = np.empty(xshape, dtype=dy.dtype)
        if xshape[1] != ho * k or xshape[2] != wo * k:
            dx.fill(0)
        for q in range(k * k):
            dx[_slab(q // k, q % k, ho, wo, s)] = share
        return dx
    dx = np.zeros(xshape, dtype=dy.dtype)
    for q in range(k * k):
        dx[_slab(q // k, q % k, ho, wo, s)] += share
    return dx


def _tile_weights(w, s, scratch: Scratch):
    """w (O, C, k, k) -> (s*s*O, C*K*K) with K = k + s - 1: row (a, b, o) holds w[o] shifted by
    (a, b) inside a K x K window, so one product yields the s x s conv outputs of a pooling tile."""
    o, c, k, _ = w.shape
    kk = k + s - 1
    wt = scratch.get("wtile", (s, s, o, c, kk, kk), w.dtype)  # zeros outside the blocks stay zero
    for a in range(s):
        for b in range(s):
            wt[a, b, :, :, a:a + k, b:b + k] = w
    return wt.reshape(s * s * o, c * kk * kk)


def conv_maxpool_forward(x, w, p, s, scratch: Scratch, need_arg: bool = True):
    """Stride-1 convolution (without bias) followed by s x s max pooling, computed per pooling tile.

    x (C, H, W, N), w (O, C, k, k) -> pooled (O, Ho // s, Wo // s, N), the tile cols and argmax
    arrays for the backward pass. Each tile's s*s conv outputs come from one (k+s-1)^2 input
    window, so the matmul has s*s*O rows instead of O (better use of BLAS when O is small) and
    the pooling is a maximum over s*s contiguous blocks. Conv outputs that the pooling would drop
    are never computed. Same values and first-maximum choice as conv_forward + maxpool_tiled_forward.
    """
    c, h, wd, n = x.shape
    o, _, k, _ = w.shape
    kk = k + s - 1
    if p:
        xp = scratch.get("xpad", (c, h + 2 * p, wd + 2 * p, n), x.dtype)
        xp[:, p:p + h, p:p + wd, :] = x
    else:
        xp = x
    hq, wq = out_size(h, k, 1, p) // s, out_size(wd, k, 1, p) // s
    cols = scratch.get("cols", (c, kk, kk, hq, wq, n), x.dtype)
    np.copyto(cols, _windows(xp, kk, s, hq, wq))
    cols2 = cols.reshape(c * kk * kk, hq * wq * n)
    z = np.matmul(_tile_weights(w, s, scratch), cols2).reshape(s, s, o, hq, wq, n)
    if not need_arg:
        y = z[0, 0].copy()
        for q in range(1, s * s):
            np.maximum(y, z[q // s, q % s], out=y)
        return y, cols2, None
    rows, argj = _pick([z[:, b] for b in range(s)], (s, o, hq, wq, n), x.dtype)
    y, argi = _pick([rows[a] for a in range(s)], (o, hq, wq, n), x.dtype)
    return y, cols2, (argi, argj)


def conv_maxpool_backward(dy, args, w, cols2, xshape, p, s, scratch: Scratch, need_dx: bool = True):
    """dy (O, Hq, Wq, N) for ``conv_maxpool_forward`` -> (dx (C, H, W, N) or None, dw (O, C, k, k))."""
    argi, argj = args
    c, h, wd, n = xshape
    o, _, k, _ = w.shape
    kk = k + s - 1
    _, hq, wq, _ = dy.shape
    m = hq * wq * n
    drows = np.empty((s, o, hq, wq, n), dtype=dy.dtype)
    _route(dy, argi, [drows[a] for a in range(s)])
    dz = np.empty((s, s, o, hq, wq, n), dtype=dy.dtype)
    _route(drows, argj, [dz[:, b] for b in range(s)])
    dz2 = dz.reshape(s * s * o, m)
    dwt = np.matmul(cols2, dz2.T).T.reshape(s, s, o, c, kk, kk)
    dw = dwt[0, 0, :, :, :k, :k].copy()
    for q in range(1, s * s):
        a, b = divmod(q, s)
        dw += dwt[a, b, :, :, a:a + k, b:b + k]
    if not need_dx:
        return None, dw
    dcols = scratch.get("dcols", (c * kk * kk, m), dy.dtype)
    np.matmul(_tile_weights(w, s, scratch).T, dz2, out=dcols)
    dcols = dcols.reshape(c, kk, kk, hq, wq, n)
    dxp = np.zeros((c, h + 2 * p, wd + 2 * p, n), dtype=dy.dtype)
    for u in range(kk):
        for v in range(kk):
            dxp[_slab(u, v, hq, wq, s)] += dcols[:, u, v]
    dx = dxp[:, p:p + h, p:p + wd, :] if p else dxp
    return dx, dw
