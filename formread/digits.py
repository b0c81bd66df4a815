"""The one digit normalisation shared by training data and segmented form digits.

MNIST style (the MNIST database's description): the ink is cropped to its
bounding box, scaled so that its longer side is 20 pixels keeping the aspect
ratio (anti-aliased), and placed in a 28x28 frame so that its centre of mass
sits at the frame centre.  Both training images (scikit-learn's digits, the
MNIST sample, local samples) and digits cut from scans go through
:func:`normalize_digit`, so the network sees the same kind of image in
training and in use.  This module imports neither ``formread.nn`` nor
``formread.imaging``.
"""

from __future__ import annotations

import numpy as np
from PIL import Image
from scipy import ndimage

from .errors import ParameterError

__all__ = ["SIZE", "BOX", "NORMALISATION", "normalize_digit", "crop_to_ink", "normalize_batch", "upscale_small"]

SIZE = 28
"""Side of the network's input frame in pixels."""
BOX = 20
"""Side of the box the ink is fitted into."""
NORMALISATION = "mnist-fit20-com28"
"""Name recorded in model files for this normalisation."""

_INK_FLOOR = 0.15  # share of the peak below which a pixel is background when finding the bounding box


def crop_to_ink(a: np.ndarray) -> np.ndarray:
    """An ink map (h, w), scaled so that its peak is 1, cut to the box of its pixels above the
    background floor (a view); shape (0, 0) when none is."""
    rows = np.flatnonzero((a > _INK_FLOOR).any(axis=1))
    if rows.size == 0:
        return a[:0, :0]
    cols = np.flatnonzero((a > _INK_FLOOR).any(axis=0))
    return a[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]


def normalize_digit(ink: np.ndarray) -> np.ndarray:
    """Normalise one digit image to the network's input.

    Parameters
    ----------
    ink : ndarray of shape (H, W), any real dtype
        Ink map: larger means more ink (white digit on black), any scale.

    Returns
    -------
    ndarray of shape (28, 28), float32 in [0, 1]
        The ink fitted into a 20x20 box, centred by centre of mass.  All zeros
        when the image holds no ink.
    """
    a = np.asarray(ink, dtype=np.float32)
    if a.ndim != 2:
        raise ParameterError(f"ink must be a 2-D array; got shape {a.shape}")
    out = np.zeros((SIZE, SIZE), np.float32)
    peak = float(a.max()) if a.size else 0.0
    if not np.isfinite(peak) or peak <= 0:
        return out
    a = crop_to_ink(np.clip(a / peak, 0.0, 1.0))
    if a.size == 0:
        return out
    h, w = a.shape
    scale = BOX / max(h, w)
    nh, nw = max(1, round(h * scale)), max(1, round(w * scale))
    img = Image.fromarray(a).resize((nw, nh), Image.Resampling.BILINEAR)
    small = np.clip(np.asarray(img, dtype=np.float32), 0.0, 1.0)
    total = float(small.sum())
    if total <= 0:
        return out
    r0, c0 = (SIZE - nh) // 2, (SIZE - nw) // 2
    out[r0:r0 + nh, c0:c0 + nw] = small
    cy, cx = ndimage.center_of_mass(out)
    dy, dx = (SIZE - 1) / 2 - cy, (SIZE - 1) / 2 - cx
    # integer shift keeps strokes sharp; clamp so the ink never leaves the frame
    dy = int(np.clip(round(dy), -r0, SIZE - nh - r0))
    dx = int(np.clip(round(dx), -c0, SIZE - nw - c0))
    out = np.zeros_like(out)
    out[r0 + dy:r0 + dy + nh, c0 + dx:c0 + dx + nw] = small
    m = out.max()
    if m > 0:
        out /= m
    return out


def normalize_batch(inks) -> np.ndarray:
    """Normalise many digit images.

    Parameters
    ----------
    inks : sequence of ndarray of shape (H_i, W_i), or ndarray of shape (N, H, W)

    Returns
    -------
    ndarray of shape (N, 1, 28, 28), float32 in [0, 1]
    """
    out = np.zeros((len(inks), 1, SIZE, SIZE), np.float32)
    for i, ink in enumerate(inks):
        out[i, 0] = normalize_digit(ink)
    return out


def upscale_small(images: np.ndarray, factor: int = 4) -> np.ndarray:
    """Smoothly upscale small digit images (e.g. scikit-learn's 8x8) before normalising.

    Parameters
    ----------
    images : ndarray of shape (N, h, w), any real dtype, larger = more ink
    factor : int
        Upscaling factor (bicubic).

    Returns
    -------
    ndarray of shape (N, h*factor, w*factor), float32, clipped at 0
    """
    images = np.asarray(images, dtype=np.float32)
    n, h, w = images.shape
    out = np.empty((n, h * factor, w * factor), np.float32)
    for i in range(n):
        img = Image.fromarray(np.ascontiguousarray(images[i])).resize((w * factor, h * factor),
                                                                      Image.Resampling.BICUBIC)
        out[i] = np.asarray(img, dtype=np.float32)
    return np.clip(out, 0.0, None)
