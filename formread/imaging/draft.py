"""A first layout from a blank form: corner squares, printed rectangles and their cells, the header.

On a straight scan of the blank form, solid squares become registration marks;
printed rectangles become fields: a rectangle divided by inner vertical lines is a
boxed field with that many cells, a row of separate equal boxes is one boxed field,
and an undivided rectangle is an open field (a single box about as wide as it is
tall is a one-cell boxed field).  Fields are named ``field_1``, ``field_2``, ... in
reading order, for a person to rename and adjust; millimetres come from the scan's
dpi, so the form must be scanned straight and at its true size.  The print above the
first field (the title, less the marks) becomes the header region, with its
fingerprint (``fingerprint.py``): it tells upright from upside down, and this form
from others with the same marks.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..errors import LayoutError, RegistrationError
from ..form.layout import FieldSpec, Layout, Mark, Region
from .binarize import binarize
from .deskew import estimate_skew, rotate
from .fingerprint import InkMap, make_fingerprint

__all__ = ["draft_layout", "find_marks", "find_boxes", "find_header", "Box"]

log = logging.getLogger(__name__)

_8 = np.ones((3, 3), bool)
MIN_SKEW_DEG = 0.1
"""A blank form scanned more askew than this is straightened before drafting."""


@dataclass
class Box:
    """A printed rectangle found on the page, in mm (x right, y down from the top-left corner).

    x, y, w, h : the rectangle through the middle of its lines
    cells : number of cells (inner vertical dividers + 1)
    line : line thickness, mm
    """

    x: float
    y: float
    w: float
    h: float
    cells: int
    line: float


def find_marks(ink: np.ndarray, lab: np.ndarray, objs: list, dpi: float) -> list[Mark]:
    """Solid squares 3-15 mm wide (the registration marks), as layout marks in mm.

    Parameters
    ----------
    ink : (H, W) bool; lab : (H, W) int32 8-connected labels of ink; objs : ``find_objects(lab)``
    """
    k = dpi / 25.4
    out = []
    for i, sl in enumerate(objs, 1):
        if sl is None:
            continue
        h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
        if not (3 * k <= min(h, w) and max(h, w) <= 15 * k and 0.8 <= w / h <= 1.25):
            continue
        fill = float((lab[sl] == i).mean())
        if fill < 0.85:
            continue
        ys, xs = np.nonzero(lab[sl] == i)
        cy, cx = ys.mean() + sl[0].start + 0.5, xs.mean() + sl[1].start + 0.5
        out.append(Mark(round(float(cx) / k, 2), round(float(cy) / k, 2), round(float(np.sqrt(len(ys))) / k, 2)))
    if out:  # keep the squares of the common size (marks are printed alike)
        side = float(np.median([m.size for m in out]))
        out = [m for m in out if abs(m.size - side) <= 0.2 * side]
    return out


def _lines_1d(cover: np.ndarray, min_cover: float) -> list[tuple[int, int]]:
    """Runs of positions whose cover is at least ``min_cover``: (first, last)."""
    on = np.r_[False, cover >= min_cover, False]
    d = np.diff(on.astype(np.int8))
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1))


def _frame(comp: np.ndarray, k: float) -> tuple[float, float, float, float, int, float] | None:
    """A frame's inner geometry from one component's bounding-box mask, or None when it is no frame.

    Returns (left, top, right, bottom) line centres in px within the mask, cells, line thickness px.
    """
    h, w = comp.shape
    rows = _lines_1d(comp.mean(axis=1), 0.8)
    cols = _lines_1d(comp.mean(axis=0), 0.8)
    if len(rows) < 2 or len(cols) < 2:
        return None
    top, bottom = rows[0], rows[-1]
    left, right = cols[0], cols[-1]
    if top[0] > 0.15 * k or bottom[1] < h - 1 - 0.15 * k or left[0] > 0.15 * k or right[1] < w - 1 - 0.15 * k:
        return None
    if len(rows) > 2:  # horizontal lines inside: a grid or a table, not a field
        return None
    t = float(np.mean([top[1] - top[0] + 1, bottom[1] - bottom[0] + 1, left[1] - left[0] + 1]))
    if t > 2.0 * k:
        return None
    inner = comp[top[1] + 1:bottom[0], :]
    if inner.size == 0:
        return None
    # dividers: columns fully inked between the top and bottom lines
    divs = _lines_1d(inner.mean(axis=0), 0.9)
    divs = [d for d in divs if d[0] > left[1] + 1 and d[1] < right[0] - 1]
    cells = len(divs) + 1
    if cells > 1:
        centres = np.array([(left[0] + left[1]) / 2] + [(a + b) / 2 for a, b in divs] + [(right[0] + right[1]) / 2])
        widths = np.diff(centres)
        if widths.max() > 1.25 * widths.min():  # unequal cells: the layout cannot say so; keep it open
            cells = 1
    return ((left[0] + left[1] + 1) / 2, (top[0] + top[1] + 1) / 2, (right[0] + right[1] + 1) / 2,
            (bottom[0] + bottom[1] + 1) / 2, cells, t)


def find_boxes(lab: np.ndarray, objs: list, dpi: float) -> list[Box]:
    """Printed rectangles 3-40 mm tall and at least 3 mm wide, innermost only, in mm."""
    k = dpi / 25.4
    out = []
    for i, sl in enumerate(objs, 1):
        if sl is None:
            continue
        h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
        if not (3 * k <= h <= 40 * k and 3 * k <= w):
            continue
        comp = lab[sl] == i
        if comp.mean() > 0.5:
            continue
        fr = _frame(comp, k)
        if fr is None:
            continue
        left, t, r, b, cells, line = fr
        x0, y0 = sl[1].start + left, sl[0].start + t
        out.append(Box(x0 / k, y0 / k, (r - left) / k, (b - t) / k, cells, line / k))
    # a frame around other frames is a panel, not a field
    inner = []
    for a in out:
        if not any(b is not a and a.x <= b.x and a.y <= b.y and b.x + b.w <= a.x + a.w and b.y + b.h <= a.y + a.h
                   for b in out):
            inner.append(a)
    return inner


def _rows_of_boxes(boxes: list[Box]) -> list[Box]:
    """Join runs of separate, equal, evenly spaced one-cell boxes on one line into boxed fields."""
    singles = sorted([b for b in boxes if b.cells == 1 and b.w <= 1.5 * b.h], key=lambda b: (round(b.y), b.x))
    others = [b for b in boxes if not (b.cells == 1 and b.w <= 1.5 * b.h)]
    used = set()
    joined = []
    for i, a in enumerate(singles):
        if i in used:
            continue
        run = [a]
        used.add(i)
        for j in range(i + 1, len(singles)):
            if j in used:
                continue
            b, last = singles[j], run[-1]
            gap = b.x - (last.x + last.w)
            same = abs(b.y - a.y) < 0.5 and abs(b.h - a.h) < 0.1 * a.h and abs(b.w - a.w) < 0.1 * a.w
            first_gap = run[1].x - (run[0].x + run[0].w) if len(run) > 1 else gap
            if same and 0 <= gap < a.w and abs(gap - first_gap) < 0.5:
                run.append(b)
                used.add(j)
        if len(run) == 1:
            joined.append(a)
            continue
        # cells one box pitch wide, centred on the printed boxes
        x_first, x_last = run[0].x + run[0].w / 2, run[-1].x + run[-1].w / 2
        pitch = (x_last - x_first) / (len(run) - 1)
        joined.append(Box(x_first - pitch / 2, a.y, len(run) * pitch, a.h, len(run), a.line))
    return others + joined


def find_header(ink: np.ndarray, dpi: float, marks: list[Mark], boxes: list[Box]) -> Region | None:
    """The printed matter above the first field (marks and field boxes left out), in mm, or None.

    Parameters
    ----------
    ink : (H, W) bool, the binarised blank form; marks, boxes : what was found on it (mm)

    Returns
    -------
    Region around that print with 1.5 mm of paper (kept on the page), or None when there is none
    at least 10 mm wide and 2 mm tall (specks under half a millimetre are ignored).
    """
    k = dpi / 25.4
    H, W = ink.shape
    top = min(b.y for b in boxes) - 1.0
    if top * k < 2:
        return None
    band = ink[:int(top * k)].copy()
    for x0, y0, x1, y1 in ([(m.x - m.size / 2, m.y - m.size / 2, m.x + m.size / 2, m.y + m.size / 2) for m in marks]
                           + [(b.x, b.y, b.x + b.w, b.y + b.h) for b in boxes]):
        band[max(0, int((y0 - 1) * k)):max(0, int((y1 + 1) * k)),
             max(0, int((x0 - 1) * k)):max(0, int((x1 + 1) * k))] = False
    lab, n = ndimage.label(band, _8)
    keep = [sl for sl in ndimage.find_objects(lab) if sl is not None
            and max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start) >= 0.5 * k]
    if not keep:
        return None
    r0, r1 = min(sl[0].start for sl in keep), max(sl[0].stop for sl in keep)
    c0, c1 = min(sl[1].start for sl in keep), max(sl[1].stop for sl in keep)
    if (c1 - c0) < 10 * k or (r1 - r0) < 2 * k:
        return None
    x0, y0 = math.ceil(max(0.0, c0 / k - 1.5) * 10) / 10, math.ceil(max(0.0, r0 / k - 1.5) * 10) / 10
    x1, y1 = math.floor(min(W / k, c1 / k + 1.5) * 10) / 10, math.floor(min(H / k, r1 / k + 1.5) * 10) / 10
    return Region(x0, y0, round(x1 - x0, 1), round(y1 - y0, 1))   # whole tenths of a mm, inside the page


def draft_layout(page, *, name: str | None = None) -> Layout:
    """Draft a layout from a straight scan of a blank form.

    Parameters
    ----------
    page : Page
        ``gray`` (H, W) uint8 (0 = ink), ``dpi``, ``source``, ``page_number``.
    name : str or None
        The form's name (default: from the file name).

    Returns
    -------
    Layout whose fields are ``field_1``, ``field_2``, ... in reading order, with the header
    region and its fingerprint when there is print above the first field.

    Raises
    ------
    LayoutError
        When fewer than 3 corner squares or no printed rectangles are found.
    """
    where = f"{page.source} page {page.page_number}"
    gray = np.asarray(page.gray)
    dpi = float(page.dpi)
    k = dpi / 25.4
    ink = binarize(gray, "auto", dpi=dpi)
    skew = estimate_skew(ink)
    if abs(skew) >= MIN_SKEW_DEG:      # a blank form scanned a little askew: straighten it first
        log.info("%s: straightening a skew of %.2f degrees", where, skew)
        gray = rotate(gray, -skew)
        ink = binarize(gray, "auto", dpi=dpi)
    lab, n = ndimage.label(ink, _8)
    objs = ndimage.find_objects(lab)
    marks = find_marks(ink, lab, objs, dpi)
    if len(marks) < 3:
        raise LayoutError(f"{where}: only {len(marks)} solid corner squares found (a layout needs at least 3 "
                          f"registration marks; is it the blank form, scanned straight at {dpi:.0f} dpi?)")
    boxes = _rows_of_boxes(find_boxes(lab, objs, dpi))
    if not boxes:
        raise LayoutError(f"{where}: no printed field rectangles found")
    H, W = gray.shape
    width_mm, height_mm = round(W / k, 2), round(H / k, 2)
    boxes.sort(key=lambda b: (round(b.y / 4.0), b.x))  # reading order: rows 4 mm apart, then left to right
    fields = []
    for i, b in enumerate(boxes, 1):
        x, y = max(0.0, round(float(b.x), 2)), max(0.0, round(float(b.y), 2))
        w, h = round(float(min(b.w, width_mm - x)), 2), round(float(min(b.h, height_mm - y)), 2)
        if b.cells > 1 or b.w <= 1.5 * b.h:
            fields.append(FieldSpec(f"field_{i}", "boxed", x, y, w, h, b.cells, b.cells))
        else:
            fields.append(FieldSpec(f"field_{i}", "open", x, y, w, h, None, max(1, int(w / (0.7 * h)))))
    label = name or str(page.source).rsplit("/", 1)[-1].rsplit(".", 1)[0]
    header = find_header(ink, dpi, marks, boxes)
    fingerprint = None
    if header is not None:
        try:
            fingerprint = make_fingerprint(InkMap.of(gray, k), np.array([[k, 0.0, 0.0], [0.0, k, 0.0]]), header)
        except RegistrationError:  # print too faint to measure: a header region without a fingerprint
            fingerprint = None
    log.info("%s: %d marks, %d fields drafted%s", where, len(marks), len(fields),
             "" if header is None else ", a header with its fingerprint")
    return Layout(name=f"Draft of {label}", width_mm=width_mm, height_mm=height_mm, marks=tuple(marks),
                  fields=tuple(fields), header=header, binarize="auto", source=where,
                  header_fingerprint=fingerprint)
