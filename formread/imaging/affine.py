"""The one place for affine maps between layout millimetres and page pixels.

A registration is a (2, 3) float64 matrix ``A`` taking layout mm (x, y, 1) to page pixels
(x = col, y = row), continuous: pixel (c, r) covers [c, c + 1) x [r, r + 1) (DEVELOPERS.md).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["apply_affine", "fit_affine", "affine_scale", "rect_corners"]


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
