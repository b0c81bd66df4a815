"""Split a field crop into digit images: per printed cell (boxed) or by candidate cuts (open).

Boxed fields: printed lines are removed (strokes crossing them kept), each connected
piece of ink goes to the cell holding most of it (a digit spilling slightly over a
border stays with its cell), except that a piece with a real share in a second cell
(two digits touching) is parted along a least-ink path near the border.  A cell is
*blank* when its ink is under ``BLANK_SHARE`` of the cell's area or shorter than
``BLANK_HEIGHT`` of the cell's height.

Open fields: the field is over-segmented by cut paths (straight cuts through empty
gaps, and least-ink paths from top to bottom near minima of the column ink
profile or at multiples of the expected digit width, so that touching and slightly
overlapping digits can be parted), then consecutive pieces are grouped into digits.
Each grouping has a plausibility cost (digit width and height against the digit
height, ink crossed by the cuts used, empty gaps bridged); the ``MAX_CANDIDATES``
cheapest are returned best first, and the reader chooses among them by recognition
score.  All sizes are in mm (crops have a fixed px/mm), so nothing depends on the
scan's dpi.
"""

from __future__ import annotations

import heapq
import logging
from dataclasses import dataclass
from dataclasses import field as dc_field

import numpy as np
from scipy import ndimage

from ..digits import SIZE, normalize_digit
from ..errors import SegmentationError
from .fields import FieldCrop, crop_to_page
from .lines import remove_box_lines

__all__ = ["Candidate", "FieldDigits", "segment_field", "segment_boxed", "segment_open",
           "BLANK_SHARE", "BLANK_HEIGHT", "MAX_CANDIDATES", "SOLID_SHARE"]

log = logging.getLogger(__name__)

BLANK_SHARE = 0.012
"""A cell whose ink (after line removal) covers less than this share of its area is blank."""
BLANK_HEIGHT = 0.25
"""A cell whose ink is shorter than this share of the cell height is blank (a dot, a dash)."""
DOUBT_MARGIN = 0.0
"""Open fields are doubtful when a split of another length costs less than this more than the best.

0 turns this test off: the reader weighs every candidate split by its cost and by how
well its pieces read as digits (``formread.read.decode``), so a close rival split
already lowers the field's confidence.  Sending such fields to review regardless
(the margin was 0.3) reviewed mostly correct readings on development demo sets."""
SPLIT_SHARE = 0.25
"""Boxed fields: a piece of ink with at least this share in a second cell is parted between them."""
SPLIT_AREA = 0.06
"""... and so is a part covering at least this share of a cell's area."""
MAX_CANDIDATES = 8
"""Most segmentations returned for an open field."""
SOLID_SHARE = 0.6
"""A field whose rectangle is more than this share ink cannot be segmented."""
OPEN_INSIDE_SHARE = 0.3
"""Open fields keep a piece of ink with at least this share inside the field rectangle: a digit
crossing the printed line by a third of its height is still the field's (boxed cells: a half)."""
SPECK_MM2 = 0.12
"""Ink pieces smaller than this (mm^2) and under 0.6 mm long are dropped as specks."""

_8 = np.ones((3, 3), bool)

# weights of the open-field plausibility cost (set on drawn MNIST test-part fields, tests/imaging)
_W = {"digit": 0.35, "wide_at": 1.0, "wide": 3.0, "short": 5.0, "bridge": 4.0, "cut": 0.6, "cut_px": 0.3,
      "one": 0.6, "one_w": 0.3, "one_h": 0.75}
# "one": a narrow full-height piece (width <= one_w, height >= one_h digit heights) is nearly always
# a "1", so it costs less as a digit of its own.  A narrow "1" touching the next digit otherwise
# lost to the two read as one (on drawn fields whose first digit is an MNIST test-part "1"
# touching the next, the true split came first in 41% -> 56% of them; other fields unchanged)


@dataclass
class Candidate:
    """One way to split a field into digits.

    Attributes
    ----------
    digits : ndarray of shape (K, 1, 28, 28), float32 in [0, 1]
        The digits, normalised by :func:`formread.digits.normalize_digit` (ink high).
    boxes : list of K tuples (x0, y0, x1, y1)
        Each digit's ink box in crop px (x = col, y = row, end exclusive).
    cost : float
        Plausibility cost of the split (lower is more plausible; 0 for boxed fields).
    """

    digits: np.ndarray
    boxes: list
    cost: float


@dataclass
class FieldDigits:
    """A field cut into digits (DEVELOPERS.md, "Python objects").

    Attributes
    ----------
    name, kind : str
    image : ndarray of shape (h, w), uint8
        The registered field crop (0 = ink) with cell borders outlined in mid grey.
    candidates : list of Candidate
        Best prior first; boxed fields have one candidate with K = cells.
    blank : ndarray of shape (K,), bool, or None
        Boxed fields: which cells hold no digit.  None for open fields.
    doubtful : bool
    reason : str or None
        Why the segmentation is doubtful.
    box_px : ndarray of shape (4, 2), float64, or None
        Page pixels (x = col, y = row) of the crop's corners top-left, top-right,
        bottom-right, bottom-left on the registered page image; a crop point
        (x, y) lies at ``tl + x / w * (tr - tl) + y / h * (bl - tl)``.
    rect : tuple (x0, y0, x1, y1) or None
        The field rectangle inside the crop (crop px, without the margin).
    """

    name: str
    kind: str
    image: np.ndarray
    candidates: list
    blank: np.ndarray | None
    doubtful: bool
    reason: str | None
    box_px: np.ndarray | None = None
    rect: tuple | None = None
    cells_px: list = dc_field(default_factory=list)

    def to_page(self, pts) -> np.ndarray:
        """Map crop pixel points (N, 2) (x, y) to page pixels (N, 2) using ``box_px``."""
        p = np.asarray(pts, np.float64).reshape(-1, 2)
        assert self.box_px is not None, "to_page needs box_px"
        tl, tr, br, bl = self.box_px
        h, w = self.image.shape
        return tl + np.outer(p[:, 0] / w, tr - tl) + np.outer(p[:, 1] / h, bl - tl)


# ----------------------------------------------------------------------------- shared helpers

def _ink_weights(crop: FieldCrop) -> np.ndarray:
    """Grey-level ink of the crop, (h, w) float32 in 0..1 (high = ink)."""
    return (255.0 - crop.gray.astype(np.float32)) / np.float32(255.0)


def _drop_specks(ink: np.ndarray, ppm: float, rect, inside_share: float = 0.5
                 ) -> tuple[np.ndarray, np.ndarray, int]:
    """Label 8-connected ink, dropping specks and pieces with less than ``inside_share`` of their
    ink inside the field rectangle.

    Returns
    -------
    labels : (h, w) int32, 0 = no ink, pieces numbered 1..n
    kept : (h, w) bool
    n : int
    """
    lab, n = ndimage.label(ink, _8)
    if n == 0:
        return lab, np.zeros_like(ink), 0
    area = np.bincount(lab.ravel(), minlength=n + 1)
    x0, y0, x1, y1 = (int(round(v)) for v in rect)
    inside = np.bincount(lab[y0:y1, x0:x1].ravel(), minlength=n + 1)
    objs = ndimage.find_objects(lab)
    keep = np.zeros(n + 1, bool)
    speck = SPECK_MM2 * ppm * ppm
    for i, sl in enumerate(objs, 1):
        ext = max(sl[0].stop - sl[0].start, sl[1].stop - sl[1].start)
        if area[i] < speck and ext < 0.6 * ppm:
            continue
        if inside[i] < inside_share * area[i]:
            continue
        keep[i] = True
    kept = keep[lab]
    lab, n = ndimage.label(kept, _8)
    return lab, kept, n


def _outlined(crop: FieldCrop, xs: list) -> np.ndarray:
    """The crop with the field rectangle and cell borders drawn in mid grey (for the review page)."""
    img = crop.gray.copy()
    h, w = img.shape
    x0, y0, x1, y1 = crop.rect
    r0, r1 = int(np.clip(round(y0), 0, h - 1)), int(np.clip(round(y1) - 1, 0, h - 1))
    for x in xs:
        c = int(np.clip(round(x), 0, w - 1))
        col = img[r0:r1 + 1, c]
        img[r0:r1 + 1, c] = np.minimum(col, 160)
    c0, c1 = int(np.clip(round(x0), 0, w - 1)), int(np.clip(round(x1) - 1, 0, w - 1))
    for r in (r0, r1):
        img[r, c0:c1 + 1] = np.minimum(img[r, c0:c1 + 1], 160)
    return img


def _crop_corners_px(crop: FieldCrop) -> np.ndarray:
    h, w = crop.gray.shape
    return crop_to_page(crop, [[0, 0], [w, 0], [w, h], [0, h]])


def _digit(weights: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, tuple]:
    """Normalised digit (28, 28) float32 and its ink box from the crop's ink weights and a mask of its pixels.

    The grey ink is taken under the mask grown by one pixel, so the digit keeps the soft
    edges the binarisation cut off (like the training digits; on the demo cards this read
    about 0.7% more boxed digits right than the bare mask).
    """
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return np.zeros((SIZE, SIZE), np.float32), (0, 0, 0, 0)
    h, w = mask.shape
    r0, r1 = max(0, rows[0] - 1), min(h, rows[-1] + 2)
    c0, c1 = max(0, cols[0] - 1), min(w, cols[-1] + 2)
    sub = np.zeros((r1 - r0 + 2, c1 - c0 + 2), bool)      # the window with a 1 px border (np.pad is slow)
    sub[1:-1, 1:-1] = mask[r0:r1, c0:c1]
    grown = np.zeros((r1 - r0, c1 - c0), bool)
    for dr in (0, 1, 2):
        for dc in (0, 1, 2):
            grown |= sub[dr:dr + r1 - r0, dc:dc + c1 - c0]
    img = normalize_digit(np.where(grown, weights[r0:r1, c0:c1], np.float32(0.0)))
    return img, (int(cols[0]), int(rows[0]), int(cols[-1]) + 1, int(rows[-1]) + 1)


def segment_field(crop: FieldCrop, field) -> FieldDigits:
    """Segment a field crop by its kind.

    Parameters
    ----------
    crop : FieldCrop (from :func:`formread.imaging.fields.cut_field`)
    field : FieldSpec

    Returns
    -------
    FieldDigits

    Raises
    ------
    SegmentationError
        When more than ``SOLID_SHARE`` of the field is ink: nothing to segment.
    """
    x0, y0, x1, y1 = (int(round(v)) for v in crop.rect)
    inside = crop.ink[y0:y1, x0:x1]
    if inside.size and inside.mean() > SOLID_SHARE:
        raise SegmentationError(f"field {field.name!r}: {inside.mean():.0%} of it is ink (blacked out or covered?)")
    if field.kind == "boxed":
        return segment_boxed(crop, field)
    return segment_open(crop, field)


# ----------------------------------------------------------------------------- boxed fields

def segment_boxed(crop: FieldCrop, field) -> FieldDigits:
    """One digit per printed cell.

    Returns
    -------
    FieldDigits with one Candidate of K = ``field.cells`` digits (K, 1, 28, 28) float32
    (zeros for blank cells) and ``blank`` (K,) bool.
    """
    ppm = crop.px_per_mm
    x0, y0, x1, y1 = crop.rect
    K = int(field.cells)
    cw = (x1 - x0) / K
    borders = [x0 + k * cw for k in range(K + 1)]
    res = remove_box_lines(crop.ink, rows=[y0, y1], cols=borders, px_per_mm=ppm,
                           search_mm=min(1.2, 0.3 * cw / ppm), max_lines=2)
    lab, kept, n = _drop_specks(res.clean, ppm, crop.rect)
    digits = np.zeros((K, 1, SIZE, SIZE), np.float32)
    weights = _ink_weights(crop)
    boxes = []
    blank = np.ones(K, bool)
    doubtful, reason = False, None
    cell_area = cw * (y1 - y0)
    h, w = lab.shape
    cell_of = np.full(h * w, -1, np.int64)
    if n:
        straight = np.clip(((np.arange(w) - x0) // cw).astype(np.int64), 0, K - 1)
        cellmap = np.broadcast_to(straight[None, :], (h, w))
        objs = ndimage.find_objects(lab)
        if any(straight[sl[1].start] != straight[sl[1].stop - 1] for sl in objs):
            # where a piece of ink spanning a border is parted: least-ink paths near the inner borders
            inner = np.array([int(round(b)) for b in borders[1:-1]], np.int64)
            paths, _, _ = _cut_paths(kept.astype(np.float64), inner, max(2, int(0.2 * cw)))
            cellmap = (np.arange(w)[None, None, :] >= paths[:, :, None]).sum(axis=0)
        flat = np.flatnonzero(lab)
        labs, cells = lab.ravel()[flat], cellmap.ravel()[flat]
        counts = np.bincount(labs * K + cells, minlength=(n + 1) * K).reshape(n + 1, K)
        share = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1)
        owner = np.argmax(counts, axis=1)
        # a piece goes to the cell holding most of its ink; a real share of it in another cell
        # (touching digits) goes to that cell, a slight spill over the border stays with its owner
        # a part with much ink counts as a real share too (a bold digit touching a light one
        # must not swallow it); a slight spill over a border has far less
        real = (share >= SPLIT_SHARE) | (counts >= SPLIT_AREA * cell_area)
        keep_own = real[labs, cells]
        cell_of[flat] = np.where(keep_own, cells, owner[labs])
        big = real.sum(axis=1) >= 3
        if big.any():
            i = int(np.flatnonzero(big)[0])
            ks = np.flatnonzero(real[i]) + 1
            doubtful, reason = True, f"one stroke runs across cells {ks[0]} to {ks[-1]} (struck through?)"
    cell_of = cell_of.reshape(h, w)
    for k in range(K):
        mask = cell_of == k
        area = int(mask.sum())
        if area:
            rows = np.flatnonzero(mask.any(axis=1))
            height = rows[-1] - rows[0] + 1
            if area >= BLANK_SHARE * cell_area and height >= BLANK_HEIGHT * (y1 - y0):
                blank[k] = False
                digits[k, 0], box = _digit(weights, mask)
                boxes.append(box)
                continue
        cx0, cx1 = borders[k], borders[k + 1]
        boxes.append((int(round(cx0)), int(round(y0)), int(round(cx1)), int(round(y1))))
    cand = Candidate(digits, boxes, 0.0)
    return FieldDigits(field.name, field.kind, _outlined(crop, borders), [cand], blank, doubtful, reason,
                       _crop_corners_px(crop), crop.rect,
                       [(borders[k], y0, borders[k + 1], y1) for k in range(K)])


# ----------------------------------------------------------------------------- open fields

def _stroke_width(ink: np.ndarray) -> float:
    """Typical stroke width in px: the median length of horizontal and vertical ink runs."""
    lens = []
    for a in (ink, ink.T):
        d = np.diff(np.pad(a, ((0, 0), (1, 1))).astype(np.int8), axis=1)
        starts = np.flatnonzero(d.ravel() == 1)
        ends = np.flatnonzero(d.ravel() == -1)
        if starts.size:
            lens.append(ends - starts)
    if not lens:
        return 1.0
    return float(max(1.0, np.median(np.concatenate(lens))))


def _cut_paths(ink: np.ndarray, starts: np.ndarray, reach: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least-ink top-to-bottom paths, one per start column, each within ``reach`` px of its start.

    A path moves at most one column per row; its cost is the ink it crosses plus a
    small price for straying from the start column.

    Returns
    -------
    paths : (P, h) int64, the column of each path in each row (pixels left of it go left)
    pixels : (P,) float64, ink pixels crossed
    strokes : (P,) float64, separate strokes crossed (runs of ink along the path)
    """
    h, w = ink.shape
    P = len(starts)
    offs = np.arange(-reach, reach + 1)
    cols = starts[:, None] + offs[None, :]                      # (P, B)
    valid = (cols >= 0) & (cols < w)
    colsc = np.clip(cols, 0, w - 1)
    stray = 0.02 * np.abs(offs)[None, :]
    big = 1e9
    step = np.where(valid[None], ink[:, colsc] + stray[None], big)   # (h, P, B) price of each pixel
    acc = step[0].copy()
    back = np.zeros((h, P, len(offs)), np.int8)
    left = np.full_like(acc, big)
    right = np.full_like(acc, big)
    for r in range(1, h):
        left[:, 1:] = acc[:, :-1]
        right[:, :-1] = acc[:, 1:]
        m = np.minimum(np.minimum(left, acc), right)
        back[r] = np.where(left == m, -1, np.where(acc == m, 0, 1))   # ties: left, then straight
        acc = m + step[r]
    j = np.argmin(acc, axis=1)
    paths = np.zeros((P, h), np.int64)
    for r in range(h - 1, -1, -1):
        paths[:, r] = colsc[np.arange(P), j]
        if r:  # back holds where the best came from: -1 = one column left, +1 = one right
            j = j + back[r, np.arange(P), j]
    on = ink[np.arange(h)[None, :], paths] > 0                      # (P, h)
    runs = (np.diff(np.pad(on.astype(np.int8), ((0, 0), (1, 0))), axis=1) == 1).sum(axis=1)
    return paths, on.sum(axis=1).astype(np.float64), runs.astype(np.float64)


def _projection_cuts(prof: np.ndarray, lo: int, hi: int, dh: float) -> list[int]:
    """Candidate cut columns inside an ink run [lo, hi): profile minima and even divisions."""
    width = hi - lo
    out: list[int] = []
    edge = max(2, int(0.12 * dh))
    if width < 0.3 * dh:
        return out
    k = max(3, int(0.08 * dh)) | 1
    sm = np.convolve(prof[lo:hi], np.ones(k) / k, mode="same")
    interior = np.arange(edge, width - edge)
    if interior.size:
        v = sm[interior]
        is_min = np.r_[True, v[1:] <= v[:-1]] & np.r_[v[:-1] <= v[1:], True]
        mins = interior[is_min]
        order = np.argsort(sm[mins], kind="stable")
        n_take = max(1, int(np.ceil(2.0 * width / (0.6 * dh))))
        chosen: list[int] = []
        for m in mins[order]:
            if all(abs(m - c) >= 0.2 * dh for c in chosen):
                chosen.append(int(m))
            if len(chosen) >= n_take:
                break
        out += [lo + c for c in chosen]
    n_est = width / (0.6 * dh)
    for n in range(2, max(2, int(round(n_est)) + 1) + 1):
        out += [lo + int(round(width * i / n)) for i in range(1, n)]
    return out


def _drop_dots(lab: np.ndarray, objs: list, dh: float) -> tuple[np.ndarray, int, list]:
    """Drop small pieces standing alone (a dot of dirt, a stray mark): under a quarter of the
    digit height in both directions and farther than 0.4 digit heights from any other ink."""
    boxes = np.array([[sl[1].start, sl[1].stop, sl[0].start, sl[0].stop] for sl in objs], np.float64)
    small = np.maximum(boxes[:, 1] - boxes[:, 0], boxes[:, 3] - boxes[:, 2]) < 0.25 * dh
    if not small.any() or small.all():
        return lab, len(objs), objs
    drop = []
    for i in np.flatnonzero(small):
        others = np.delete(boxes, i, axis=0)
        gx = np.maximum(0, np.maximum(others[:, 0] - boxes[i, 1], boxes[i, 0] - others[:, 1]))
        gy = np.maximum(0, np.maximum(others[:, 2] - boxes[i, 3], boxes[i, 2] - others[:, 3]))
        if np.hypot(gx, gy).min() > 0.4 * dh:
            drop.append(i + 1)
    if not drop:
        return lab, len(objs), objs
    lab = np.where(np.isin(lab, drop), 0, lab)
    lab, n = ndimage.label(lab > 0, _8)
    return lab, n, ndimage.find_objects(lab)


def segment_open(crop: FieldCrop, field, *, max_candidates: int = MAX_CANDIDATES) -> FieldDigits:
    """Candidate segmentations of a freely written field, best first.

    Returns
    -------
    FieldDigits with up to ``max_candidates`` Candidates (each digits (K_i, 1, 28, 28)
    float32), ``blank`` None; an empty field gives one candidate with K = 0.
    """
    ppm = crop.px_per_mm
    x0, y0, x1, y1 = crop.rect
    res = remove_box_lines(crop.ink, rows=[y0, y1], cols=[x0, x1], px_per_mm=ppm,
                           h_min_run_mm=max(2.5, 0.4 * (x1 - x0) / ppm), max_lines=1)
    lab, ink, n = _drop_specks(res.clean, ppm, crop.rect, OPEN_INSIDE_SHARE)
    image = _outlined(crop, [x0, x1])
    corners = _crop_corners_px(crop)
    empty = Candidate(np.zeros((0, 1, SIZE, SIZE), np.float32), [], 0.0)
    if n == 0:
        return FieldDigits(field.name, field.kind, image, [empty], None, False, None, corners, crop.rect)
    h, w = ink.shape
    # digit height: the tallest pieces (fragments of broken digits are shorter)
    objs = ndimage.find_objects(lab)
    heights = np.array([sl[0].stop - sl[0].start for sl in objs], np.float64)
    dh = float(np.median(heights[heights >= 0.6 * heights.max()]))
    lab, n, objs = _drop_dots(lab, objs, dh)
    ink = lab > 0
    if n == 0:
        return FieldDigits(field.name, field.kind, image, [empty], None, False, None, corners, crop.rect)
    rows_ink = np.flatnonzero(ink.any(axis=1))
    ink_h = rows_ink[-1] - rows_ink[0] + 1
    # all the ink shorter than a blank boxed cell's limit: no digit seen whole (writing faded or lost
    # by a bilevel scan, a stray mark), which a reader must not take for a confident "1"
    marks_only = ink_h < BLANK_HEIGHT * (y1 - y0)
    # pieces of broken digits are short; the whole line of writing is about one digit tall
    dh = max(dh, 0.85 * ink_h, 0.25 * (y1 - y0))
    sw = _stroke_width(ink)
    prof = ink.sum(axis=0).astype(np.float64)
    cols_ink = np.flatnonzero(prof > 0)
    left, right = int(cols_ink[0]), int(cols_ink[-1]) + 1
    # ink runs along x and the empty gaps between them
    on = prof > 0
    d = np.diff(np.r_[0, on.astype(np.int8), 0])
    run_lo, run_hi = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    free = [int((a + b) // 2) for a, b in zip(run_hi[:-1], run_lo[1:])]
    gap_w = {int((a + b) // 2): int(b - a) for a, b in zip(run_hi[:-1], run_lo[1:])}
    starts: list[int] = []
    for r0, r1 in zip(run_lo, run_hi):
        starts += _projection_cuts(prof, int(r0), int(r1), dh)
    # pieces that overlap in x without touching are parted by a free (zero-ink) path too
    reach = max(2, int(0.3 * dh))
    bounds: list[tuple[np.ndarray, float, int]] = []   # (path (h,), ink crossed, gap width)
    if starts:
        paths, pix, runs = _cut_paths(ink.astype(np.float64), np.array(sorted(set(starts)), np.int64), reach)
        # a cut between touching digits crosses one stroke; one through a digit mostly two or more
        pcost = runs + _W["cut_px"] * pix / sw
        for p, c in zip(paths, pcost):
            if left < p.min() and p.max() < right:
                bounds.append((p, float(c), 0))
    for f in free:
        bounds.append((np.full(h, f, np.int64), 0.0, gap_w[f]))
    # order the cuts left to right, drop near-duplicates (keep the cheaper), keep them from crossing
    bounds.sort(key=lambda b: (float(b[0].mean()), b[1]))
    merged: list = []
    for b in bounds:
        if merged and abs(b[0].mean() - merged[-1][0].mean()) < 0.12 * dh:
            if b[1] < merged[-1][1] or (b[1] == merged[-1][1] and b[2] > merged[-1][2]):
                merged[-1] = b
            continue
        merged.append(b)
    edges = [(np.full(h, left, np.int64), 0.0, 0)] + merged + [(np.full(h, right, np.int64), 0.0, 0)]
    log.debug("dh %.1f sw %.1f cuts %s", dh, sw,
              [(int(e[0].min()), int(e[0].max()), round(e[1], 1), e[2]) for e in edges])
    for i in range(1, len(edges)):
        edges[i] = (np.maximum(edges[i][0], edges[i - 1][0]), edges[i][1], edges[i][2])
    nb = len(edges)
    colgrid = np.arange(w)[None, :]
    group_cache: dict = {}

    def group(j: int, i: int):
        """Mask, box and cost of the digit made of the pieces between boundaries j and i; the mask
        covers the crop's columns ``a:`` only (those the two boundaries span, and one more on each
        side for ``_digit`` to grow it into), ``a`` returned too."""
        key = (j, i)
        if key in group_cache:
            return group_cache[key]
        pj, pi = edges[j][0], edges[i][0]
        a, b = max(0, int(pj.min()) - 1), min(w, int(pi.max()) + 1)
        m = ink[:, a:b] & (colgrid[:, a:b] >= pj[:, None]) & (colgrid[:, a:b] < pi[:, None])
        rows = np.flatnonzero(m.any(axis=1))
        if rows.size == 0:
            group_cache[key] = (None, a, None, np.inf)
            return group_cache[key]
        cols = np.flatnonzero(m.any(axis=0)) + a
        gw = cols[-1] - cols[0] + 1
        gh = rows[-1] - rows[0] + 1
        cost = _W["digit"]                                      # each digit: prefer fewer, all else equal
        cost += _W["wide"] * max(0.0, gw / dh - _W["wide_at"])  # too wide for one digit
        cost += _W["short"] * max(0.0, 0.6 - gh / dh)           # too short: a fragment
        cost += 2.0 * max(0.0, 0.5 - gh / dh) * (gw < 0.3 * dh)
        if gw <= _W["one_w"] * dh and gh >= _W["one_h"] * dh:
            cost -= _W["one"]                                   # a narrow stroke of full height: a "1"
        bridged = sum(edges[k][2] for k in range(j + 1, i))
        cost += _W["bridge"] * bridged / dh                     # empty gaps bridged inside one digit
        cost += _W["cut"] * (edges[j][1] + edges[i][1]) / 2.0   # half of each cut's price
        if gw > 2.2 * dh and i - j > 1:
            cost = np.inf
        group_cache[key] = (m, a, (int(cols[0]), int(rows[0]), int(cols[-1]) + 1, int(rows[-1]) + 1), cost)
        return group_cache[key]

    # k-best segmentations over the boundary lattice
    keep = max(max_candidates * 8, 64)
    best: list[list] = [[] for _ in range(nb)]
    best[0] = [(0.0, ())]
    for i in range(1, nb):
        cands = []
        for j in range(i - 1, -1, -1):
            if j < i - 1 and edges[j + 1][2] > 0.5 * dh:   # a wide empty gap is never inside one digit
                break
            _, _, box, c = group(j, i)
            if box is not None and box[2] - box[0] > 2.4 * dh:   # wider than any one digit
                break
            if not best[j] or not np.isfinite(c):
                continue
            for cost, path in best[j]:
                cands.append((cost + c, path + (j,)))
        best[i] = heapq.nsmallest(keep, cands, key=lambda t: t[0])
    finals = []
    for cost, path in best[nb - 1]:
        cut = list(path) + [nb - 1]
        k = len(cut) - 1
        over = max(0, k - int(field.max_digits))
        finals.append((cost + 3.0 * over, cut))
    finals.sort(key=lambda t: t[0])
    candidates = []
    seen = set()
    weights = _ink_weights(crop)
    images: dict = {}
    for cost, cut in finals:
        pairs = [(cut[t], cut[t + 1]) for t in range(len(cut) - 1)]
        boxes = tuple(group(*p)[2] for p in pairs)
        if boxes in seen:
            continue
        seen.add(boxes)
        digits = np.zeros((len(boxes), 1, SIZE, SIZE), np.float32)
        for t, p in enumerate(pairs):
            if p not in images:  # the same digit recurs in many candidates: normalise it once
                m, a = group(*p)[:2]
                images[p] = _digit(weights[:, a:a + m.shape[1]], m)[0]
            digits[t, 0] = images[p]
        candidates.append(Candidate(digits, list(boxes), float(cost)))
        if len(candidates) >= max_candidates:
            break
    if not candidates:  # cannot happen with finite single-piece groups, but never lose the field
        img, box = _digit(weights, ink)
        candidates = [Candidate(img[None, None], [box], 100.0)]
    doubtful, reason = _open_doubt(candidates, field, dh)
    if marks_only and not doubtful:
        doubtful, reason = True, "only marks shorter than a digit (faint, broken or stray writing?)"
    return FieldDigits(field.name, field.kind, image, candidates, None, doubtful, reason, corners, crop.rect)


def _open_doubt(candidates: list, field, dh: float) -> tuple[bool, str | None]:
    """Doubt an open field when rival splits of another length cost nearly as much,
    or when every split keeps a too-wide digit."""
    best = candidates[0]
    k = len(best.boxes)
    if k > field.max_digits:
        return True, f"{k} digits found, the field holds at most {field.max_digits}"
    rivals = sorted({len(c.boxes) for c in candidates[1:] if c.cost - best.cost < DOUBT_MARGIN and len(c.boxes) != k})
    if rivals:
        return True, "segmentation unsure: " + " or ".join(str(n) for n in [k] + rivals) + " digits"
    # wider than 99% of MNIST test digits (aspect 1.43); only when no candidate parts it (the reader
    # weighs the candidates, so a wide piece in the best-prior split alone is no reason to doubt)
    if all(any((b[2] - b[0]) > 1.45 * dh for b in c.boxes) for c in candidates):
        return True, "a digit is implausibly wide (touching digits not parted?)"
    return False, None
