"""Training-time distortions of digit images: geometry (affine, elastic) and pen and scanner effects.

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

Pen and scanner effects (on in the shipped recipe since 2026-12-03): stroke width
(grey dilation or erosion of the normalised 28x28 digit by one 3x3 step, blended by a random
strength, so a hairline and a marker version of a digit are both seen), scanner degradation
(Gaussian blur, resolution loss by down- and up-sampling, or bilevel thresholding at a random
level) and the box remnants cutting leaves (a short line along one edge).  They apply to the same
share ``prob`` of a batch as the geometric distortions, after them.

Non-digits (outlier exposure, Hendrycks, Mazeika and Dietterich 2019, "Deep anomaly detection with
outlier exposure"): :func:`touching_pairs` replaces a share of each batch with two of its digits
drawn touching or overlapping and normalised as one piece, labelled :data:`NOT_A_DIGIT`, whose
training target is the uniform distribution (``formread.nn.losses``).  An open field's reader
weighs each way of splitting the ink by how surely every piece reads as one digit; a network that
never saw two touching digits read a merged "1" and "6" as a sure "6", and the split that dropped
the "1" won.  Off by default: measured, it did not pay (models/MODEL_CARD.md).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage

from ..digits import crop_to_ink, normalize_digit
from ..errors import check_param

__all__ = ["AugmentConfig", "random_affine", "elastic", "stroke_width", "degrade", "box_remnants", "stroke_breaks",
           "augment_batch", "touching_pairs", "PEN_AND_SCANNER", "LATER_EFFECTS", "NOT_A_DIGIT"]

PEN_AND_SCANNER = ("stroke", "degrade", "remnants", "breaks")
"""The pen and scanner effects (on in the shipped recipe since 2026-12-03; off in records before)."""
LATER_EFFECTS = PEN_AND_SCANNER + ("pairs",)
"""Every setting added after the first recipe: off when a model record does not name it."""
NOT_A_DIGIT = -1
"""Label of a training image that is no single digit (target: uniform over the classes)."""


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
    stroke : bool
        Thicken or thin the strokes (each distorted image: thicker, thinner or as is, equal chances).
    stroke_max : float
        Largest blend towards one 3x3 dilation or erosion step, in [0, 1].
    degrade : bool
        Scanner degradation: blur, resolution loss or bilevel thresholding (one of them, equal chances).
    degrade_prob : float
        Share of the distorted images that are degraded.
    remnants : bool
        Draw a box-line remnant along one edge.
    remnants_prob : float
        Share of the distorted images that get one.
    breaks : bool
        Break strokes with one to three small gaps, as bilevel scans and dry pens leave.
    breaks_prob : float
        Share of the distorted images that get them.
    pairs : bool
        Replace a share of each batch by two of its digits touching (:func:`touching_pairs`),
        labelled :data:`NOT_A_DIGIT` (off in the shipped recipe).
    pairs_share : float
        That share, in [0, 0.5].
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
    stroke: bool = True
    stroke_max: float = 1.0
    degrade: bool = True
    degrade_prob: float = 0.5
    remnants: bool = True
    remnants_prob: float = 0.2
    breaks: bool = True
    breaks_prob: float = 0.3
    pairs: bool = False
    pairs_share: float = 0.1

    def as_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> AugmentConfig:
        """The config a model header recorded; unknown keys are dropped, and the pen and scanner effects
        a record does not name are off, and so are non-digit pairs (records made before they existed)."""
        off = {name: False for name in LATER_EFFECTS}
        return cls(**{**off, **{k: v for k, v in d.items() if k in cls.__dataclass_fields__}})

    @property
    def enabled(self) -> bool:
        return (self.affine or self.elastic or self.stroke or self.degrade or self.remnants
                or self.breaks) and self.prob > 0


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


_CROSS = ndimage.generate_binary_structure(2, 1)[None, None]   # (1, 1, 3, 3): per image, 4-connected


def stroke_width(x: np.ndarray, rng: np.random.Generator, *, max_strength: float = 1.0,
                 direction: np.ndarray | None = None) -> np.ndarray:
    """Thicken or thin every image's strokes, as a wider or finer pen would draw them.

    Each image is blended with its grey dilation (thicker) or erosion (thinner) by one 4-connected
    3x3 step, by a strength drawn uniformly in [0, max_strength].  Thinning never removes more than
    half of an image's ink, so a hairline digit is not erased.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator
    max_strength : float in [0, 1]
    direction : ndarray of shape (N,), int, optional
        +1 thicker, -1 thinner, 0 unchanged per image; drawn with equal chances when omitted.

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    n = len(x)
    d = rng.integers(-1, 2, n) if direction is None else np.asarray(direction)
    s = np.asarray(rng.uniform(0.0, max_strength, n), dtype=np.float32)
    thick = ndimage.grey_dilation(x, footprint=_CROSS, mode="constant", cval=0.0)
    thin = ndimage.grey_erosion(x, footprint=_CROSS, mode="constant", cval=0.0)
    mass, lost = x.sum(axis=(1, 2, 3)), (x - thin).sum(axis=(1, 2, 3))
    s_thin = np.minimum(s, np.where(lost > 0, 0.5 * mass / np.maximum(lost, 1e-6), 1.0)).astype(np.float32)
    w = np.where(d > 0, s, 0.0)[:, None, None, None].astype(np.float32)
    v = np.where(d < 0, s_thin, 0.0)[:, None, None, None].astype(np.float32)
    out = x + w * (thick - x) + v * (thin - x)
    return np.clip(out, 0.0, 1.0).astype(np.float32, copy=False)


_BLUR_SIGMAS = (0.5, 0.8, 1.1)   # pixels of the 28x28 image
_LOW_RES = (12, 14, 18)          # side the image is sampled down to, then back up to 28


def degrade(x: np.ndarray, rng: np.random.Generator, kind: np.ndarray | None = None) -> np.ndarray:
    """Scanner degradation of every image: blur, resolution loss or bilevel thresholding.

    Blur is a Gaussian of sigma 0.5-1.1 px; resolution loss samples the image down to 12-18 px a
    side and back up (bilinear), as a 200 dpi scan of a small digit is; bilevel thresholding keeps
    ink above a level drawn in [0.25, 0.65] as full black (low levels fatten, high ones break thin
    strokes), as a bilevel scanner does.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator
    kind : ndarray of shape (N,), int, optional
        0 blur, 1 resolution loss, 2 bilevel per image; drawn with equal chances when omitted.

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    n, _, h, w = x.shape
    k = rng.integers(0, 3, n) if kind is None else np.asarray(kind)
    level = rng.integers(0, 3, n)
    thr = np.asarray(rng.uniform(0.25, 0.65, n), dtype=np.float32)
    out = x.copy()
    for j in range(3):
        sel = np.flatnonzero((k == 0) & (level == j))
        if sel.size:
            out[sel] = ndimage.gaussian_filter(x[sel], sigma=(0, 0, _BLUR_SIGMAS[j], _BLUR_SIGMAS[j]),
                                               mode="constant", truncate=3.0)
        sel = np.flatnonzero((k == 1) & (level == j))
        if sel.size:
            side = _LOW_RES[j]
            small = ndimage.zoom(x[sel], (1, 1, side / h, side / w), order=1, grid_mode=True, mode="grid-constant")
            out[sel] = ndimage.zoom(small, (1, 1, h / side, w / side), order=1, grid_mode=True,
                                    mode="grid-constant")[:, :, :h, :w]
    sel = k == 2
    out[sel] = (x[sel] >= thr[sel, None, None, None]).astype(np.float32)
    return np.clip(out, 0.0, 1.0).astype(np.float32, copy=False)


def box_remnants(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Draw a printed-line remnant along one edge of every image, as cutting a boxed field leaves.

    The line lies within 2 px of a random edge, 1-2 px thick, over 30-100% of that side, at a
    grey level of 0.4-1.0; ink already there is kept (maximum).

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    n, _, h, w = x.shape
    out = x.copy()
    edge = np.asarray(rng.integers(0, 4, n))           # 0 top, 1 bottom, 2 left, 3 right
    off = np.asarray(rng.integers(0, 3, n))
    thick = np.asarray(rng.integers(1, 3, n))
    frac = np.asarray(rng.uniform(0.3, 1.0, n))
    grey = np.asarray(rng.uniform(0.4, 1.0, n), dtype=np.float32)
    for i in range(n):
        side = h if edge[i] >= 2 else w
        length = max(1, int(round(frac[i] * side)))
        start = int(rng.integers(0, side - length + 1))
        a = int(off[i]) if edge[i] in (0, 2) else (h if edge[i] == 1 else w) - int(off[i]) - int(thick[i])
        b = a + int(thick[i])
        if edge[i] < 2:
            out[i, 0, a:b, start:start + length] = np.maximum(out[i, 0, a:b, start:start + length], grey[i])
        else:
            out[i, 0, start:start + length, a:b] = np.maximum(out[i, 0, start:start + length, a:b], grey[i])
    return out


def stroke_breaks(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Cut one to three small gaps into every image's strokes.

    Each gap is a disc of radius 1-1.8 px centred on a pixel of strong ink (>= 0.5), cleared to
    paper; an image without such ink is returned as it was.

    Parameters
    ----------
    x : ndarray of shape (N, 1, H, W), float32 in [0, 1]
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (N, 1, H, W), float32 in [0, 1]
    """
    _check(x)
    n, _, h, w = x.shape
    out = x.copy()
    rr, cc = np.mgrid[0:h, 0:w]
    gaps = np.asarray(rng.integers(1, 4, n))
    for i in range(n):
        ink = np.flatnonzero(x[i, 0] >= 0.5)
        if ink.size == 0:
            continue
        for at in rng.choice(ink, size=int(gaps[i])):
            r0, c0 = divmod(int(at), w)
            radius = float(rng.uniform(1.0, 1.8))
            out[i, 0][(rr - r0) ** 2 + (cc - c0) ** 2 <= radius ** 2] = 0.0
    return out


def _inked(img: np.ndarray) -> np.ndarray:
    """A digit image scaled to peak 1 and cut to its ink, as ``normalize_digit`` cuts it; (0, 0) if blank."""
    peak = float(img.max())
    return crop_to_ink(img / peak) if peak > 0 else img[:0, :0]


def touching_pairs(x: np.ndarray, y: np.ndarray, rng: np.random.Generator, share: float
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Replace a share of a batch by pairs of its digits touching side by side, labelled NOT_A_DIGIT.

    Each pair is two images of the batch, each cropped to its ink and brought to the same height
    (within 10%), the right one overlapping the left by 0-35% of the narrower width (0 = touching)
    and shifted up or down by up to 15% of the height, joined by the maximum and normalised as
    one piece of ink (``formread.digits.normalize_digit``), as an open field's reader sees two
    touching digits it did not part.

    Parameters
    ----------
    x : ndarray of shape (N, 1, 28, 28), float32 in [0, 1]
    y : ndarray of shape (N,), int labels
    rng : numpy.random.Generator
    share : float in [0, 0.5]
        Expected share of the batch replaced (each image independently).

    Returns
    -------
    (x, y) new arrays of the same shapes and dtypes; replaced rows have label ``NOT_A_DIGIT``.
    """
    _check(x)
    check_param(0.0 <= share <= 0.5, "share", "in [0, 0.5]", share)
    n = len(x)
    x, y = x.copy(), np.array(y, copy=True)
    if n < 2 or share == 0:
        return x, y
    sel = np.flatnonzero(rng.random(n) < share)
    partner = rng.integers(0, n, len(sel))
    overlap = rng.uniform(0.0, 0.35, len(sel))
    lift = rng.uniform(-0.15, 0.15, len(sel))
    size = rng.uniform(0.9, 1.1, len(sel))
    src = x[:, 0].copy()
    for i, j, ov, dy, sz in zip(sel, partner, overlap, lift, size):
        a, b = _inked(src[i]), _inked(src[int(j)])
        if not a.size or not b.size:
            continue
        hb = max(1, int(round(a.shape[0] * sz)))
        wb = max(1, int(round(b.shape[1] * hb / b.shape[0])))
        b = np.asarray(ndimage.zoom(b, (hb / b.shape[0], wb / b.shape[1]), order=1), np.float32)
        hb, wb = b.shape
        over = int(round(ov * min(a.shape[1], wb)))
        top_b = int(round(dy * a.shape[0]))
        r0 = min(0, top_b)
        height = max(a.shape[0], top_b + hb) - r0
        width = a.shape[1] + wb - over
        canvas = np.zeros((height, width), np.float32)
        canvas[-r0:-r0 + a.shape[0], :a.shape[1]] = a
        region = canvas[top_b - r0:top_b - r0 + hb, a.shape[1] - over:]
        np.maximum(region, b[:, :region.shape[1]], out=region)
        x[i, 0] = normalize_digit(canvas)
        y[i] = NOT_A_DIGIT
    return x, y


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
    out = x
    if cfg.affine or cfg.elastic:
        if cfg.affine:
            src_r, src_c = _affine_coords(n, h, w, cfg, rng)
        else:
            src_r, src_c = _identity_grid(n, h, w)
        if cfg.elastic:
            dr, dc = _elastic_field(n, h, w, cfg.elastic_alpha, cfg.elastic_sigma, rng)
            src_r += dr
            src_c += dc
        out = _resample(x, src_r, src_c)
    if out is x:
        out = x.copy()              # the caller's batch is never changed
    # pen and scanner effects draw from the generator only when on, so the shipped recipe's
    # random stream (and its weights) stay as they were
    if cfg.stroke:
        out = stroke_width(out, rng, max_strength=cfg.stroke_max)
    if cfg.degrade:
        sel = rng.random(n) < cfg.degrade_prob
        out[sel] = degrade(out[sel], rng)
    if cfg.remnants:
        sel = rng.random(n) < cfg.remnants_prob
        out[sel] = box_remnants(out[sel], rng)
    if cfg.breaks:
        sel = rng.random(n) < cfg.breaks_prob
        out[sel] = stroke_breaks(out[sel], rng)
    keep = rng.random(n) >= cfg.prob
    out[keep] = x[keep]
    return out
