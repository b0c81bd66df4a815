"""Skew of a scanned page from its printed lines (projection profiles), and rotation to undo it.

Angle convention (the same as Pillow's ``Image.rotate``): a positive angle means the page content is
turned counter-clockwise as seen on screen; ``rotate(gray, -estimate_skew(mask))`` straightens it.
"""

from __future__ import annotations

import numpy as np
from PIL import Image

from ..errors import check_param

__all__ = ["estimate_skew", "rotate"]

_MAX_POINTS = 150_000


def _profile_energy(rows: np.ndarray, cols: np.ndarray, angles_deg: np.ndarray, bin_px: float) -> np.ndarray:
    """Sum of squared projection-profile counts of the ink points for each candidate angle.

    A horizontal printed line turned by ``a`` runs along direction (cos a, -sin a) in (col, row);
    projecting on the normal ``col * sin a + row * cos a`` piles it into one bin when ``a`` is right.
    """
    out = np.empty(len(angles_deg))
    for i, a in enumerate(np.deg2rad(angles_deg)):
        p = cols * np.sin(a) + rows * np.cos(a)
        idx = np.floor((p - p.min()) / bin_px).astype(np.int64)
        h = np.bincount(idx).astype(np.float64)
        out[i] = float(h @ h)
    return out


def estimate_skew(ink_mask: np.ndarray, *, max_angle: float = 6.0) -> float:
    """The page's skew in degrees (positive = content turned counter-clockwise), by maximising the
    variance of the horizontal projection profile of the ink (coarse then fine search).

    ink_mask : ndarray of shape (H, W), bool, True = ink
    max_angle : search range in degrees (either way)
    Returns 0.0 for a page with too little ink to tell.
    """
    m = np.asarray(ink_mask, dtype=bool)
    check_param(m.ndim == 2, "ink_mask", "a 2-D boolean image", m.shape)
    rows, cols = np.nonzero(m)
    if rows.size < 50:
        return 0.0
    if rows.size > _MAX_POINTS:  # an even subsample keeps every line's share
        step = int(np.ceil(rows.size / _MAX_POINTS))
        rows, cols = rows[::step], cols[::step]
    rows = rows.astype(np.float64)
    cols = cols.astype(np.float64)
    scale = max(m.shape) / 1000.0  # bins of about 1/1000 of the page on the coarse pass
    coarse = np.arange(-max_angle, max_angle + 1e-9, 0.25)
    e = _profile_energy(rows, cols, coarse, max(1.0, 2 * scale))
    best = float(coarse[int(np.argmax(e))])
    fine = np.arange(best - 0.3, best + 0.3 + 1e-9, 0.02)
    e = _profile_energy(rows, cols, fine, 1.0)
    i = int(np.argmax(e))
    if 0 < i < len(fine) - 1:  # parabolic peak for a sub-step estimate
        y0, y1, y2 = e[i - 1], e[i], e[i + 1]
        den = y0 - 2 * y1 + y2
        off = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        return float(fine[i] + np.clip(off, -0.5, 0.5) * 0.02)
    return float(fine[i])


def rotate(gray: np.ndarray, angle_deg: float) -> np.ndarray:
    """The page turned counter-clockwise by ``angle_deg`` about its centre, same size, paper-filled.

    gray : ndarray of shape (H, W), uint8. Returns ndarray of shape (H, W), uint8.
    """
    im = Image.fromarray(np.asarray(gray, dtype=np.uint8))
    return np.asarray(im.rotate(angle_deg, resample=Image.Resampling.BILINEAR, fillcolor=255))
