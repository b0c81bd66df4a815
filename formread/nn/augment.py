"""Training-time distortions of digit images: random affine maps and elastic distortion.

Both are done for a whole batch at once: one set of sampling coordinates of
shape (N, 28, 28) is built with numpy and the batch is resampled by a single
``scipy.ndimage.map_coordinates`` call (the image index is the first, integer
coordinate, so images never mix).

Elastic distortion follows Simard, Steinkraus and Platt (2003), "Best practices
for convolutional neural networks applied to visual document analysis": a
random displacement field, uniform in [-1, 1] per pixel, smoothed with a
Gaussian of standard deviation ``sigma`` and scaled by ``alpha``.  The paper's
values are about sigma = 4 and alpha = 34 on 29x29 digits (quoted from memory
of the paper); the defaults here (alpha 24) are the shipped model's recipe, milder.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage

from ..errors import check_param

__all__ = ["AugmentConfig", "random_affine", "elastic", "augment_batch"]


@dataclass
class AugmentConfig:
    """How strongly to distort training images (all ranges are symmetric around 0 / 1).

    Attributes
    ----------
    affine : bool
        Apply a random affine map.
    rotate_deg : float
        Rotation drawn uniformly in [-rotate_deg, rotate_deg] degrees.
    scale : float
        Scale drawn uniformly in [1 - scale, 1 + scale] (same on both axes).
    shear : float
        Horizontal shear factor drawn uniformly in [-shear, shear].
    shift_px : float
        Translation drawn uniformly in [-shift_px, shift_px] pixels per axis.
    elastic : bool
        Apply elastic distortion (Simard et al. 2003).
    elastic_alpha, elastic_sigma : float
        Scale and smoothing (pixels) of the displacement field.
    prob : float
        Share of the images in a batch that are distorted; the rest pass unchanged.
    """

    affine: bool = True
    rotate_deg: float = 12.0
    scale: float = 0.10
    shear: float = 0.20
    shift_px: float = 2.0
    elastic: bool = True
    elastic_alpha: float = 24.0
    elastic_sigma: float = 4.0
    prob: float = 0.9

    def as_dict(self) -> dict:
        return asdict(self)

    @property
    def enabled(self) -> bool:
        return (self.affine or self.elastic) and self.prob > 0


def _identity_grid(n: int, h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    rr, cc = np.meshgrid(np.arange(h, dtype=np.float32), np.arange(w, dtype=np.float32), indexing="ij")
    return np.broadcast_to(rr, (n, h, w)).copy(), np.broadcast_to(cc, (n, h, w)).copy()


def _affine_coords(n: int, h: int, w: int, cfg: AugmentConfig, rng: np.random.Generator):
    """Source coordinates (rows, cols), each of shape (N, H, W) float32, of random affine maps
    about the image centre."""
    theta = np.deg2rad(rng.uniform(-cfg.rotate_deg, cfg.rotate_deg, n))
    s = rng.uniform(1.0 - cfg.scale, 1.0 + cfg.scale, n)
    sh = rng.uniform(-cfg.shear, cfg.shear, n)
    t = rng.uniform(-cfg.shift_px, cfg.shift_px, (n, 2))
    cos, sin = np.cos(theta), np.sin(theta)
    # forward map on (row, col) offsets from the centre: rotation @ shear, scaled
    a = np.empty((n, 2, 2))
    a[:, 0, 0] = cos * s
    a[:, 0, 1] = (cos * sh - sin) * s
    a[:, 1, 0] = sin * s
    a[:, 1, 1] = (sin * sh + cos) * s
    inv = np.linalg.inv(a)  # output pixel -> source pixel
    cy, cx = (h - 1) / 2.0, (w - 1) / 2.0
    rr, cc = _identity_grid(n, h, w)
    dr = rr - cy - t[:, 0, None, None].astype(np.float32)
    dc = cc - cx - t[:, 1, None, None].astype(np.float32)
    inv = inv.astype(np.float32)
    src_r = inv[:, 0, 0, None, None] * dr + inv[:, 0, 1, None, None] * dc + cy
    src_c = inv[:, 1, 0, None, None] * dr + inv[:, 1, 1, None, None] * dc + cx
    return src_r, src_c


def _elastic_field(n: int, h: int, w: int, alpha: float, sigma: float, rng: np.random.Generator):
    """Displacement (d_rows, d_cols), each of shape (N, H, W) float32 (Simard et al. 2003)."""
    u = rng.uniform(-1.0, 1.0, (2, n, h, w)).astype(np.float32)
    # smooth each image's field separately (sigma 0 along the batch and component axes)
    u = ndimage.gaussian_filter(u, sigma=(0, 0, sigma, sigma), mode="constant", truncate=3.0)
    return alpha * u[0], alpha * u[1]


def _resample(x: np.ndarray, src_r: np.ndarray, src_c: np.ndarray) -> np.ndarray:
    """Bilinear resampling of (N, 1, H, W) images at (N, H, W) source coordinates; outside is 0."""
    n, _, h, w = x.shape
    idx = np.broadcast_to(np.arange(n, dtype=np.float32)[:, None, None], (n, h, w))
    coords = np.stack([idx, src_r, src_c])
    out = ndimage.map_coordinates(x[:, 0], coords, order=1, mode="constant", cval=0.0)
    return np.clip(out, 0.0, 1.0)[:, None].astype(np.float32, copy=False)


def _check(x: np.ndarray) -> None:
    check_param(isinstance(x, np.ndarray) and x.ndim == 4 and x.shape[1] == 1,
                "x", "an array of shape (N, 1, H, W)", getattr(x, "shape", type(x).__name__))


def random_affine(x: np.ndarray, rng: np.random.Generator, cfg: AugmentConfig | None = None) -> np.ndarray:
    """Apply a random affine map (rotation, scale, shear, shift) to every image.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator
    cfg : AugmentConfig, optional (ranges; the ``affine`` flag is ignored here)

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    cfg = cfg or AugmentConfig()
    n, _, h, w = x.shape
    return _resample(x, *_affine_coords(n, h, w, cfg, rng))


def elastic(x: np.ndarray, rng: np.random.Generator, *, alpha: float = 34.0, sigma: float = 4.0) -> np.ndarray:
    """Elastic distortion of every image (Simard, Steinkraus and Platt 2003).

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator
    alpha : float
        Scale of the displacement field (pixels per unit of smoothed noise).
    sigma : float
        Standard deviation (pixels) of the Gaussian smoothing the field.

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    n, _, h, w = x.shape
    rr, cc = _identity_grid(n, h, w)
    dr, dc = _elastic_field(n, h, w, alpha, sigma, rng)
    return _resample(x, rr + dr, cc + dc)


def augment_batch(x: np.ndarray, rng: np.random.Generator, cfg: AugmentConfig) -> np.ndarray:
    """Distort a training batch: affine and/or elastic in one resampling pass.

    A share ``cfg.prob`` of the images is distorted; the others are returned as they were.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator
    cfg : AugmentConfig

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1] (a new array)
    """
    _check(x)
    if not cfg.enabled or len(x) == 0:
        return x.copy()
    n, _, h, w = x.shape
    if cfg.affine:
        src_r, src_c = _affine_coords(n, h, w, cfg, rng)
    else:
        src_r, src_c = _identity_grid(n, h, w)
    if cfg.elastic:
        dr, dc = _elastic_field(n, h, w, cfg.elastic_alpha, cfg.elastic_sigma, rng)
        src_r += dr
        src_c += dc
    out = _resample(x, src_r, src_c)
    keep = rng.random(n) >= cfg.prob
    out[keep] = x[keep]
    return out
