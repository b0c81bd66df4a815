"""Handwriting on the demo card: MNIST digits of the held-out test part, written as ink on paper.

Only the test part of the MNIST sample (``formread.learn.datasets.mnist_split_indices()["test"]``)
is ever used here: the shipped model never trained on those images, so the demo reads
handwriting the model has not seen.  Every digit drawn records its MNIST index.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np
from scipy import ndimage

from ..learn.datasets import mnist_raw, mnist_split_indices
from ..form.layout import FieldSpec
from .card import mm_to_px

__all__ = ["DigitBank", "load_test_digits", "Writer", "random_writer", "write_field"]


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
def load_test_digits() -> DigitBank:
    """The MNIST sample's held-out test part (1,000 images), never its training part.

    Cached: treat the arrays as read-only."""
    x, y = mnist_raw()
    test = mnist_split_indices(y)["test"]
    return DigitBank((x[test] / 255.0).astype(np.float32), y[test], test.astype(np.int64))


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
           rng: np.random.Generator, max_width_px: float | None = None) -> np.ndarray:
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
    cover = _draw(src, scale, theta, shear, writer.weight)
    if max_width_px is not None and cover.shape[1] > max_width_px:
        cover = _draw(src, scale * max_width_px / cover.shape[1], theta, shear, writer.weight)
    return cover


def _draw(src: np.ndarray, scale: float, theta: float, shear: float, weight: float) -> np.ndarray:
    """Scale, shear and rotate a (h, w) float32 digit image; return its cropped ink coverage."""
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
    # a pen line has a firm edge: stretch the soft MNIST profile
    cover = np.clip((cover - weight) / 0.35, 0.0, 1.0)
    r, k = np.nonzero(cover > 0.05)
    if r.size == 0:
        return cover.astype(np.float32)
    return cover[r.min(): r.max() + 1, k.min(): k.max() + 1].astype(np.float32)


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
    ink = lambda: float(np.clip(writer.ink + rng.normal(0, 8), 0, 110))  # noqa: E731
    if fld.kind == "boxed":
        cw, ch = px(fld.w / fld.cells), px(fld.h)
        for k, ch_digit in enumerate(text):
            size = writer.size * (1 + rng.normal(0, 0.04))
            max_w = 0.86
            dx = writer.bias[0] + rng.normal(0, 0.05)
            dy = writer.bias[1] + rng.normal(0, 0.04)
            if rng.random() < writer.sloppy:           # strays over a box line
                if rng.random() < 0.5:
                    size, max_w = rng.uniform(0.92, 1.05), 1.1
                else:
                    dx += rng.choice([-1, 1]) * rng.uniform(0.12, 0.25)
                    dy += rng.choice([-1, 1]) * rng.uniform(0.0, 0.12)
            g = _glyph(bank, int(ch_digit), writer, size * ch, rng, max_width_px=max_w * cw)
            cx = px(fld.x) + (k + 0.5 + dx) * cw
            cy = px(fld.y) + (0.5 + dy) * ch
            _stamp(page, g, round(cy - g.shape[0] / 2), round(cx - g.shape[1] / 2), ink())
        return
    # open field: a free run of digits, left to right, neighbours sometimes touching
    fh = px(fld.h)
    cursor = px(fld.x) + px(float(rng.uniform(1.5, 7.0)))
    mid = px(fld.y) + fh * (0.5 + writer.bias[1])
    for ch_digit in text:
        g = _glyph(bank, int(ch_digit), writer, writer.size_open * fh * (1 + rng.normal(0, 0.04)), rng)
        mid += px(float(rng.normal(0, 0.25)))
        _stamp(page, g, round(mid - g.shape[0] / 2), round(cursor), ink())
        gap = rng.uniform(-0.4, 0.1) if rng.random() < writer.touch else rng.normal(1.1, 0.35)
        cursor += g.shape[1] + px(float(gap))
