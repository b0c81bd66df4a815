"""The one place for affine maps between layout millimetres and page pixels.

A registration is a (2, 3) float64 matrix ``A`` taking layout mm (x, y, 1) to page pixels
(x = col, y = row), continuous: pixel (c, r) covers [c, c + 1) x [r, r + 1) (DEVELOPERS.md).
"""

from __future__ import annotations

import math

import numpy as np
from PIL import Image

__all__ = ["apply_affine", "fit_affine", "affine_scale", "rect_corners", "warp_bilinear"]


def apply_affine(matrix: np.ndarray, points) -> np.ndarray:
    """Points through an affine map.

    matrix : ndarray of shape (2, 3); points : array-like of shape (N, 2)
    Returns ndarray of shape (N, 2), float64.
    """
    m = np.asarray(matrix, dtype=np.float64)
    p = np.asarray(points, dtype=np.float64).reshape(-1, 2)
    return p @ m[:, :2].T + m[:, 2]


def fit_affine(src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    """Least-squares affine map taking ``src`` (N, 2) to ``dst`` (N, 2), N >= 3 -> (2, 3) float64."""
    src = np.asarray(src, dtype=np.float64)
    dst = np.asarray(dst, dtype=np.float64)
    a = np.hstack([src, np.ones((len(src), 1))])
    sol, *_ = np.linalg.lstsq(a, dst, rcond=None)
    return sol.T.copy()


def affine_scale(matrix: np.ndarray) -> float:
    """The map's mean scale (pixels per mm for a registration): sqrt of |det| of its linear part."""
    return float(math.sqrt(abs(np.linalg.det(np.asarray(matrix, dtype=np.float64)[:, :2]))))


def rect_corners(x: float, y: float, w: float, h: float) -> np.ndarray:
    """Corners of a rectangle: top-left, top-right, bottom-right, bottom-left; ndarray (4, 2) float64."""
    return np.array([[x, y], [x + w, y], [x + w, y + h], [x, y + h]], dtype=np.float64)


def warp_bilinear(image: np.ndarray, lin: np.ndarray, offset, shape: tuple[int, int],
                  cval: float = 255.0) -> np.ndarray:
    """Bilinear resampling through an affine map, as ``scipy.ndimage.affine_transform(image, lin,
    offset, output_shape=shape, order=1, mode="constant", cval=cval, prefilter=False)`` gives it.

    image : ndarray of shape (H, W), float32; lin : (2, 2) in (row, col) order; offset : (2,)
    Returns ndarray of shape ``shape``, float32: output pixel (r, c) samples the image at
    ``lin @ (r, c) + offset`` (pixel centres at integer positions); samples outside
    [0, H - 1] x [0, W - 1] are ``cval``.

    Pillow's float ("F") affine transform does the interpolation, 2-3x faster than scipy's
    generic one on field crops; the values agree to float32 rounding (tests/imaging/test_fields.py).
    Pillow blends into the border instead of stopping at it, so the samples scipy leaves at
    ``cval`` are set afterwards, only when the output's corners reach past the image.
    """
    oh, ow = int(shape[0]), int(shape[1])
    h, w = image.shape
    m = np.asarray(lin, np.float64)
    r0, c0 = float(offset[0]), float(offset[1])
    # Pillow: input (x, y) = (a x' + b y' + c, d x' + e y' + f) for output pixel centres (x', y') =
    # (col + 0.5, row + 0.5), input pixel centres at +0.5 too
    data = (m[1, 1], m[1, 0], c0 + 0.5 - 0.5 * (m[1, 1] + m[1, 0]),
            m[0, 1], m[0, 0], r0 + 0.5 - 0.5 * (m[0, 1] + m[0, 0]))
    src = Image.fromarray(np.ascontiguousarray(image, dtype=np.float32), mode="F")
    out = np.array(src.transform((ow, oh), Image.Transform.AFFINE, data,
                                 resample=Image.Resampling.BILINEAR, fillcolor=float(cval)), dtype=np.float32)
    corners = np.array([[0, 0], [0, ow - 1], [oh - 1, 0], [oh - 1, ow - 1]], np.float64) @ m.T + (r0, c0)
    if corners[:, 0].min() < 0 or corners[:, 1].min() < 0 or corners[:, 0].max() > h - 1 or corners[:, 1].max() > w - 1:
        r = np.arange(oh, dtype=np.float64)[:, None]
        c = np.arange(ow, dtype=np.float64)[None, :]
        ri = m[0, 0] * r + m[0, 1] * c + r0
        ci = m[1, 0] * r + m[1, 1] * c + c0
        out[(ri < 0) | (ri > h - 1) | (ci < 0) | (ci > w - 1)] = cval
    return out
