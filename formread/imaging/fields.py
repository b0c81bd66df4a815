"""Cut one field out of a registered page into a layout-aligned crop at a fixed resolution.

The crop is sampled from the page through the registration matrix (bilinear), so
that every later step works in millimetres at ``px_per_mm`` pixels per mm
whatever the scan's dpi, skew or orientation.  Only the small field window of the
page is touched, never the whole page.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import SegmentationError, check_param
from .affine import apply_affine, rect_corners, warp_bilinear
from .binarize import ink_map

OFF_PAGE_SHARE = 0.25
"""A field with more than this share of its rectangle off the scanned image cannot be cut."""
MARGIN_MM = {"boxed": 1.5, "open": 3.0}
"""Paper kept around a field's rectangle, by kind.  Open fields are written freely and their digits
run over the printed line: a 7-8 mm digit in an 11 mm field crossing it by 1-2.5 mm lost its part
beyond a 1.5 mm margin (35 of 100 drawn fields, tests/imaging/test_segment.py).  Ink lying mostly
outside the rectangle is dropped by segmentation, so the wider margin takes in no neighbour."""

__all__ = ["FieldCrop", "cut_field", "crop_to_page", "field_corners_px", "OFF_PAGE_SHARE", "MARGIN_MM"]


@dataclass
class FieldCrop:
    """One field sampled into layout-aligned crop pixels.

    Attributes
    ----------
    name, kind : str
        The field's name and kind (``"boxed"`` | ``"open"``).
    gray : ndarray of shape (h, w), uint8
        The crop, 0 = ink, 255 = paper.  Pixel (r, c) has its centre at layout mm
        ``(x0_mm + (c + 0.5) / px_per_mm, y0_mm + (r + 0.5) / px_per_mm)``.
    ink : ndarray of shape (h, w), bool
        Binarised crop, True = ink (printed lines included).
    px_per_mm : float
    x0_mm, y0_mm : float
        Layout mm of the crop's top-left corner (field corner minus the margin).
    rect : tuple of float (x0, y0, x1, y1)
        The field rectangle in crop pixels (without the margin).
    matrix : ndarray of shape (2, 3), float64
        The page registration matrix (layout mm -> page px) the crop was cut with.
    """

    name: str
    kind: str
    gray: np.ndarray
    ink: np.ndarray
    px_per_mm: float
    x0_mm: float
    y0_mm: float
    rect: tuple
    matrix: np.ndarray


def _share_inside(corners: np.ndarray, W: int, H: int) -> float:
    """Approximate share of a quadrilateral (4, 2) page px inside a W x H image (sampled on a grid)."""
    u = np.linspace(0.05, 0.95, 10)
    a, b = np.meshgrid(u, u)
    tl, tr, br, bl = corners
    pts = (tl * ((1 - a) * (1 - b))[..., None] + tr * (a * (1 - b))[..., None]
           + br * (a * b)[..., None] + bl * ((1 - a) * b)[..., None])
    ok = (pts[..., 0] >= 0) & (pts[..., 0] <= W) & (pts[..., 1] >= 0) & (pts[..., 1] <= H)
    return float(ok.mean())


def field_corners_px(matrix: np.ndarray, x: float, y: float, w: float, h: float) -> np.ndarray:
    """Corners of a layout rectangle on the page.

    Returns
    -------
    ndarray of shape (4, 2), float64
        Page pixels (x = col, y = row) of the corners top-left, top-right,
        bottom-right, bottom-left.
    """
    return apply_affine(matrix, rect_corners(x, y, w, h))


def crop_to_page(crop: FieldCrop, pts) -> np.ndarray:
    """Map crop pixel coordinates to page pixels.

    Parameters
    ----------
    pts : array-like of shape (N, 2)
        Crop pixel coordinates (x = col, y = row), continuous (pixel edges at integers).

    Returns
    -------
    ndarray of shape (N, 2), float64: page pixels (x = col, y = row), continuous like
    ``Registration.matrix`` (pixel (c, r) covers [c, c + 1) x [r, r + 1))
    """
    p = np.asarray(pts, np.float64).reshape(-1, 2)
    mm = np.column_stack([crop.x0_mm + p[:, 0] / crop.px_per_mm, crop.y0_mm + p[:, 1] / crop.px_per_mm])
    return apply_affine(crop.matrix, mm)


def cut_field(registration, field, *, px_per_mm: float = 10.0, margin_mm: float | None = None,
              level: float | None = None, method: str = "otsu") -> FieldCrop:
    """Sample a field (plus a margin) from the registered page into a layout-aligned crop.

    Parameters
    ----------
    registration : Registration
        ``matrix`` (2, 3) float64 maps layout mm (x, y, 1) to page px (col, row) of
        ``image`` (H, W) uint8.
    field : FieldSpec
        Uses ``name, kind, x, y, w, h`` (mm from the page's top-left corner).
    px_per_mm : float
        Crop resolution; 10 px/mm is about 254 dpi.
    margin_mm : float or None
        Paper around the field rectangle kept in the crop (for line search and spill-over);
        None: :data:`MARGIN_MM` for the field's kind.
    level, method
        Binarisation (see :func:`ink_map`).

    Raises
    ------
    SegmentationError
        When more than ``OFF_PAGE_SHARE`` of the field lies off the scanned image.

    Returns
    -------
    FieldCrop with ``gray`` and ``ink`` of shape
    (round((h + 2 margin) px_per_mm), round((w + 2 margin) px_per_mm)).
    """
    check_param(px_per_mm > 0, "px_per_mm", "positive", px_per_mm)
    if margin_mm is None:
        margin_mm = MARGIN_MM.get(field.kind, MARGIN_MM["boxed"])
    check_param(margin_mm >= 0, "margin_mm", "non-negative", margin_mm)
    A = np.asarray(registration.matrix, np.float64)
    page = registration.image
    x0, y0 = field.x - margin_mm, field.y - margin_mm
    out_w = max(1, int(round((field.w + 2 * margin_mm) * px_per_mm)))
    out_h = max(1, int(round((field.h + 2 * margin_mm) * px_per_mm)))
    # page position (continuous, pixel centres at integer indices) of crop pixel (r, c):
    # layout mm x = x0 + (c + 0.5)/ppm, y = y0 + (r + 0.5)/ppm, then the matrix
    # (the matrix maps mm to pixel-edge coordinates, hence the final -0.5)
    s = 1.0 / px_per_mm
    off_col = A[0, 0] * (x0 + 0.5 * s) + A[0, 1] * (y0 + 0.5 * s) + A[0, 2] - 0.5
    off_row = A[1, 0] * (x0 + 0.5 * s) + A[1, 1] * (y0 + 0.5 * s) + A[1, 2] - 0.5
    lin = np.array([[A[1, 1] * s, A[1, 0] * s], [A[0, 1] * s, A[0, 0] * s]])  # (row, col) order
    # only the page window under the crop is warped
    corners = np.array([[0, 0], [0, out_w], [out_h, 0], [out_h, out_w]], np.float64) @ lin.T + [off_row, off_col]
    H, W = page.shape
    r0 = int(np.clip(np.floor(corners[:, 0].min()) - 2, 0, H))
    r1 = int(np.clip(np.ceil(corners[:, 0].max()) + 3, 0, H))
    c0 = int(np.clip(np.floor(corners[:, 1].min()) - 2, 0, W))
    c1 = int(np.clip(np.ceil(corners[:, 1].max()) + 3, 0, W))
    fc = field_corners_px(A, field.x, field.y, field.w, field.h)
    inside = _share_inside(fc, W, H)
    if inside < 1 - OFF_PAGE_SHARE:
        raise SegmentationError(f"field {field.name!r}: {1 - inside:.0%} of it lies off the scanned page")
    if r1 <= r0 or c1 <= c0:
        gray = np.full((out_h, out_w), 255, np.uint8)
    else:
        window = page[r0:r1, c0:c1].astype(np.float32)
        gray = warp_bilinear(window, lin, (off_row - r0, off_col - c0), (out_h, out_w), cval=255.0)
        gray = np.clip(np.rint(gray), 0, 255).astype(np.uint8)
    m = margin_mm * px_per_mm
    rect = (m, m, m + field.w * px_per_mm, m + field.h * px_per_mm)
    ink = ink_map(gray, level=level, method=method, px_per_mm=px_per_mm, rect=rect)
    return FieldCrop(field.name, field.kind, gray, ink, float(px_per_mm), float(x0), float(y0), rect, A)
