"""Registration: match a scanned page to its layout through the printed corner marks.

The marks are solid squares. They are found on a copy of the page reduced to about 75 dpi (fast),
as connected ink components that are filled, square and of the expected size. Pairs of them at the
distance and angle of a pair of layout marks (rotation up to ``max_rotation_deg``, scale within
``max_scale_change``, any shift) propose where the others must be; every consistent set of three
or more marks is fitted with an affine transform, and the one with most marks and a plausible,
tight fit wins (ties: the one nearest the nominal placement, image top-left = page top-left). Mark
centres are then refined at full resolution (ink-weighted centroids) and the final affine transform
from layout millimetres to page pixels is fitted by least squares; its RMS residual is reported in mm.

A sheet may go through the scanner in any quarter turn (0, 90, 180 or 270 degrees), so the marks
are matched in all four: a turned page's image is landscape when the form is portrait, and the
marks' pattern turns with it, so for a form that is not square only the right quarter turn and
its half-turn partner fit. Four identical corner squares look the same on a page turned 180
degrees, so when several turns fit equally the page content decides: the printed field borders and
the header region (``[form.header]``) are dark where the layout says they are only in the right
orientation. ``Registration.image`` is the page turned upright and ``matrix`` maps into it, so what
comes after registration never sees the turn.

A page that cannot be matched is refused (``RegistrationError("<file> page N: <reason>")``); it is
never read with a wrong geometry.

Pixel coordinates are continuous (x = col, y = row): pixel (col, row) covers [col, col + 1) x
[row, row + 1), so its centre is (col + 0.5, row + 0.5) and an exactly placed scan at ``dpi`` has
``matrix = [[dpi / 25.4, 0, 0], [0, dpi / 25.4, 0]]``. (Internally, mark finding works in pixel-centre
coordinates and converts at the end.)
"""

from __future__ import annotations

import itertools
import logging
import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..errors import RegistrationError, check_param
from ..form.layout import Layout
from .affine import affine_scale, apply_affine, fit_affine
from .load import Page

__all__ = ["Registration", "register_page", "fit_affine", "apply_affine", "turn_points", "WORK_DPI", "TURNS"]

log = logging.getLogger(__name__)

WORK_DPI = 75.0          # resolution of the reduced copy the marks are searched on
_MAX_BLOBS = 60          # mark-like squares considered at most
_MIN_CONTENT_GAP = 0.02  # orientation scores closer than this cannot decide; upright is kept
TURNS = (0, 90, 180, 270)  # quarter turns tried, degrees counter-clockwise (Pillow's sense)


@dataclass(frozen=True, eq=False)
class Registration:
    """Where the layout lies on a page.

    matrix : ndarray of shape (2, 3), float64: layout mm (x, y, 1) -> pixels (x = col, y = row) of ``image``,
        continuous coordinates (pixel (c, r) covers [c, c + 1) x [r, r + 1))
    residual_mm : RMS distance between found mark centres and the fitted transform, in mm
        (0.0 when exactly three marks were used: three points fix an affine transform)
    marks_found : how many of the layout's marks were used
    rotated_180 : the scan was upside down (``turn_deg == 180``); ``image`` is it turned the right way up
    skew_deg : rotation of the page content, counter-clockwise positive (Pillow's convention), after the
        quarter turn is undone
    image : ndarray of shape (H', W'), uint8, the page turned upright (the orientation ``matrix`` maps
        into): the scan itself when ``turn_deg == 0``, else the scan turned back by ``turn_deg``
        (``numpy.rot90(scan, -turn_deg // 90)``; H', W' swap for 90 and 270)
    dpi : the resolution used: the page's, or the one its size implies when the stated one did not fit
    mark_px : ndarray of shape (marks_found, 2), float64, refined mark centres (x, y) in ``image``
        (same continuous coordinates as ``matrix``)
    mark_index : which layout marks those are (0-based, layout order)
    scale : mean pixels per mm of the fit (compare with dpi / 25.4)
    turn_deg : the quarter turn the scan showed the form in, degrees counter-clockwise (0, 90, 180
        or 270; 90 = the form's top edge lies along the scan's left edge)
    """
    matrix: np.ndarray
    residual_mm: float
    marks_found: int
    rotated_180: bool
    skew_deg: float
    image: np.ndarray
    dpi: float = 0.0
    mark_px: np.ndarray | None = None
    mark_index: tuple[int, ...] = ()
    scale: float = 0.0
    turn_deg: int = 0

    def to_pixels(self, points_mm) -> np.ndarray:
        """Layout points in mm, ndarray of shape (N, 2) (x, y) -> pixels (x = col, y = row) of ``image``."""
        return apply_affine(self.matrix, points_mm)


def _rms_mm(matrix: np.ndarray, src: np.ndarray, dst: np.ndarray) -> float:
    """RMS of fit residuals, converted from pixels to mm with the fit's own scale."""
    res = apply_affine(matrix, src) - dst
    scale = affine_scale(matrix)
    return float(np.sqrt(np.mean(np.sum(res ** 2, axis=1)))) / max(scale, 1e-12)


def _turn_matrix(turn_deg: int, shape: tuple[int, int]) -> np.ndarray:
    """(3, 3) float64: pixel-centre (x, y, 1) of a scan of ``shape`` (H, W) -> the same point in the scan
    turned back by ``turn_deg`` (``numpy.rot90(scan, -turn_deg // 90)``)."""
    H, W = shape
    q = (turn_deg // 90) % 4
    return np.array([[[1, 0, 0], [0, 1, 0]],
                     [[0, -1, H - 1], [1, 0, 0]],
                     [[-1, 0, W - 1], [0, -1, H - 1]],
                     [[0, 1, 0], [-1, 0, W - 1]]][q] + [[0, 0, 1]], dtype=np.float64)


def turn_points(points, turn_deg: int, shape: tuple[int, int]) -> np.ndarray:
    """Pixel-centre points (x, y) of a scan of ``shape`` (H, W), ndarray of shape (N, 2) -> (N, 2) float64,
    the same points in ``numpy.rot90(scan, -turn_deg // 90)`` (the scan turned back by ``turn_deg``)."""
    m = _turn_matrix(turn_deg, shape)
    return apply_affine(m[:2], points)


def _upright(gray: np.ndarray, turn_deg: int, tile: int = 256) -> np.ndarray:
    """The scan turned back by ``turn_deg`` (a contiguous copy unless no turn). A quarter turn is
    copied in tiles: a whole-page transposed copy is several times slower (cache misses)."""
    q = (turn_deg // 90) % 4
    if q == 0:
        return gray
    view = np.rot90(gray, -q)
    if q == 2:
        return np.ascontiguousarray(view)
    out = np.empty(view.shape, dtype=gray.dtype)
    for r in range(0, view.shape[0], tile):
        for c in range(0, view.shape[1], tile):
            out[r:r + tile, c:c + tile] = view[r:r + tile, c:c + tile]
    return out


# ------------------------------------------------------------------------------------ reduced copy

def _reduce(gray: np.ndarray, f: int) -> np.ndarray:
    """Block mean of ``f`` x ``f`` pixels: (H, W) uint8 -> (H // f, W // f) float32 (ragged edge dropped)."""
    if f == 1:
        return gray.astype(np.float32)
    H, W = gray.shape
    h, w = H // f, W // f
    acc = np.uint16 if f * f * 255 <= 65535 else np.uint32
    # Sum f rows (every f-th row, offset k) then f columns: integer sums, no large temporaries.
    rows = np.zeros((h, W), dtype=acc)
    for k in range(f):
        rows += gray[k:h * f:f, :]
    out = np.zeros((h, w), dtype=acc)
    for k in range(f):
        out += rows[:, k:w * f:f]
    return out.astype(np.float32) / np.float32(f * f)


def _darkness(small: np.ndarray, block: int) -> np.ndarray:
    """Flat-fielded darkness in [0, 1] (0 = paper, 1 = black) of a reduced page: each pixel against
    the local paper level (block maxima, spread over neighbouring blocks), so shadows do not count."""
    h, w = small.shape
    bh, bw = -(-h // block), -(-w // block)
    pad = np.pad(small, ((0, bh * block - h), (0, bw * block - w)), mode="edge")
    bmax = pad.reshape(bh, block, bw, block).max(axis=(1, 3))
    bmax = ndimage.maximum_filter(bmax, size=3, mode="nearest")
    paper = np.repeat(np.repeat(bmax, block, axis=0), block, axis=1)[:h, :w]
    return np.clip(1.0 - small / np.maximum(paper, 1.0), 0.0, 1.0)


@dataclass
class _Blob:
    x: float   # centroid in full-resolution pixels of the original page
    y: float
    side: float  # sqrt(area) in full-resolution pixels


def _mark_blobs(dark: np.ndarray, f: int, side_px: tuple[float, float]) -> list[_Blob]:
    """Filled, square components whose side lies within ``side_px`` (full-resolution pixels)."""
    ink = dark > 0.5
    lab, n = ndimage.label(ink)
    if n == 0:
        return []
    lo, hi = side_px[0] / f, side_px[1] / f
    out = []
    objs = ndimage.find_objects(lab)
    areas = np.bincount(lab.ravel())
    for i, sl in enumerate(objs, 1):
        bh, bw = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
        if not (lo * 0.8 <= bh <= hi * 1.2 + 2 and lo * 0.8 <= bw <= hi * 1.2 + 2):
            continue
        area = float(areas[i])
        if not (0.75 <= bh / bw <= 1.33) or area < 0.6 * bh * bw or not (lo * lo * 0.6 <= area <= hi * hi * 1.3):
            continue
        r, c = np.nonzero(lab[sl] == i)
        cy = (r.mean() + sl[0].start + 0.5) * f - 0.5
        cx = (c.mean() + sl[1].start + 0.5) * f - 0.5
        out.append(_Blob(cx, cy, math.sqrt(area) * f))
    return out


# ---------------------------------------------------------------------------------- matching marks

@dataclass
class _Fit:
    matrix: np.ndarray       # layout mm -> full-resolution pixels in this orientation
    marks: tuple[int, ...]   # layout mark indices used
    points: np.ndarray       # (K, 2) pixel centres in this orientation
    residual_mm: float


def _plausible(m: np.ndarray, px_per_mm: float, max_rot: float, max_scale: float) -> bool:
    """A near-similarity transform at the expected scale and within the rotation limit."""
    lin = m[:, :2] / px_per_mm
    sv = np.linalg.svd(lin, compute_uv=False)
    if np.linalg.det(lin) <= 0:
        return False  # a mirror image
    if not (1 - max_scale - 0.03 <= sv[1] and sv[0] <= 1 + max_scale + 0.03):
        return False
    if sv[0] / sv[1] > 1.04:  # more shear or stretch than any scanner gives
        return False
    rot = math.degrees(math.atan2(lin[1, 0] - lin[0, 1], lin[0, 0] + lin[1, 1]))
    return abs(rot) <= max_rot + 1.0


def _best_fit(layout: Layout, blobs: list[_Blob], pts: np.ndarray, px_per_mm: float,
              max_rot: float, max_scale: float, max_residual: float) -> _Fit | None:
    """The best consistent assignment of blobs to layout marks in one orientation, or None.

    pts : ndarray of shape (len(blobs), 2), the blobs' centres in that orientation (pixel centres)

    Every pair of layout marks and every pair of blobs at the right distance and angle proposes a
    similarity transform; the blobs it predicts the other marks onto complete the proposal. Each
    distinct set of three or more marks is then fitted with an affine transform and judged: most
    marks first, then the smallest residual, then the placement nearest the nominal one.
    """
    marks = layout.marks
    src_all = np.array([[mk.x, mk.y] for mk in marks], dtype=np.float64)
    sides = np.array([b.side for b in blobs])
    # Which blobs may be which mark: side within the scale range (with room for blur and rounding).
    fits_mark = [(sides >= (1 - max_scale) * 0.8 * mk.size * px_per_mm)
                 & (sides <= (1 + max_scale) * 1.25 * mk.size * px_per_mm) for mk in marks]
    diff = pts[None, :, :] - pts[:, None, :]              # (N, N, 2): blob b minus blob a
    dist = np.hypot(diff[..., 0], diff[..., 1])
    ang = np.arctan2(diff[..., 1], diff[..., 0])
    tol = max(2.0, 3 * max_residual) * px_per_mm
    proposals: set[tuple[int | None, ...]] = set()
    for i, j in itertools.combinations(range(len(marks)), 2):
        v = src_all[j] - src_all[i]
        d_mm = math.hypot(*v)
        if d_mm < 1e-9:
            continue
        a_mm = math.atan2(v[1], v[0])
        ratio = dist / (d_mm * px_per_mm)
        turn = np.angle(np.exp(1j * (ang - a_mm)))
        ok = (np.abs(ratio - 1) <= max_scale + 0.02) & (np.abs(turn) <= math.radians(max_rot + 1.0))
        ok &= fits_mark[i][:, None] & fits_mark[j][None, :]
        for a, b in zip(*np.nonzero(ok)):
            s, t = ratio[a, b] * px_per_mm, turn[a, b]
            rot = s * np.array([[math.cos(t), -math.sin(t)], [math.sin(t), math.cos(t)]])
            pred = (src_all - src_all[i]) @ rot.T + pts[a]
            assign: list[int | None] = []
            for k in range(len(marks)):
                if k == i:
                    assign.append(int(a))
                elif k == j:
                    assign.append(int(b))
                else:
                    dk = np.hypot(*(pts - pred[k]).T)
                    dk[~fits_mark[k]] = np.inf
                    n = int(np.argmin(dk))
                    assign.append(n if dk[n] <= tol else None)
            proposals.add(tuple(assign))
    best, best_key = None, None
    cx, cy = layout.width_mm / 2, layout.height_mm / 2
    nominal = np.array([cx, cy]) * px_per_mm - 0.5
    for prop in proposals:
        used = [(k, n) for k, n in enumerate(prop) if n is not None]
        if len(used) < 3 or len({n for _, n in used}) < len(used):
            continue
        idx = tuple(k for k, _ in used)
        src, dst = src_all[list(idx)], pts[[n for _, n in used]]
        m = fit_affine(src, dst)
        if not _plausible(m, px_per_mm, max_rot, max_scale):
            continue
        res = _rms_mm(m, src, dst)
        if res > max_residual * 2.5:  # refined centres tighten the fit; the final check is exact
            continue
        shift = float(np.hypot(*(apply_affine(m, [[cx, cy]])[0] - nominal))) / px_per_mm
        key = (-len(used), round(res, 1), shift)
        if best_key is None or key < best_key:
            best, best_key = _Fit(m, idx, dst, res), key
    return best


def _content_score(layout: Layout, dark: np.ndarray, f: int, matrix: np.ndarray) -> float:
    """Mean darkness where the layout has print: the field borders and the header region."""
    pts = []
    for fs in layout.fields:
        n = max(4, int(fs.w))
        t = np.linspace(0, 1, n)
        pts += [np.column_stack([fs.x + t * fs.w, np.full(n, fs.y)]),
                np.column_stack([fs.x + t * fs.w, np.full(n, fs.y + fs.h)])]
        n = max(4, int(fs.h))
        t = np.linspace(0, 1, n)
        pts += [np.column_stack([np.full(n, fs.x), fs.y + t * fs.h]),
                np.column_stack([np.full(n, fs.x + fs.w), fs.y + t * fs.h])]
    score = 0.0
    h, w = dark.shape

    def sample(p):
        """Darkest of the 3 x 3 reduced pixels around each point (tolerates a pixel of misplacement)."""
        q = (apply_affine(matrix, p) + 0.5) / f - 0.5
        c = np.rint(q[:, 0]).astype(int)
        r = np.rint(q[:, 1]).astype(int)
        best = np.zeros(len(q))
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                best = np.maximum(best, dark[np.clip(r + dr, 0, h - 1), np.clip(c + dc, 0, w - 1)])
        return best

    if pts:
        score += float(sample(np.vstack(pts)).mean())
    if layout.header is not None:
        hd = layout.header
        gx, gy = np.meshgrid(np.arange(hd.x, hd.x + hd.w, 1.0), np.arange(hd.y, hd.y + hd.h, 1.0))
        score += float(sample(np.column_stack([gx.ravel(), gy.ravel()])).mean())
    return score


# ----------------------------------------------------------------------------------- refinement

def _refine(gray: np.ndarray, x: float, y: float, side: float) -> tuple[float, float] | None:
    """Ink-weighted centroid of the solid square near (x, y) at full resolution (original page
    coordinates), or None when no square of about ``side`` pixels is there."""
    H, W = gray.shape
    half = int(math.ceil(side * 1.1)) + 3
    x0, x1 = max(0, int(round(x)) - half), min(W, int(round(x)) + half + 1)
    y0, y1 = max(0, int(round(y)) - half), min(H, int(round(y)) + half + 1)
    if x1 - x0 < 3 or y1 - y0 < 3:
        return None
    crop = gray[y0:y1, x0:x1].astype(np.float32)
    paper = float(np.percentile(crop, 95))
    ink = float(np.percentile(crop, 2))
    if paper - ink < 40:
        return None
    solid = crop < (paper + ink) / 2
    lab, n = ndimage.label(solid)
    if n == 0:
        return None
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    # The component nearest the predicted centre among those big enough to be the mark.
    cr, cc = int(round(y)) - y0, int(round(x)) - x0
    big = np.nonzero(sizes >= 0.4 * side * side)[0]
    if big.size == 0:
        return None
    if 0 <= cr < lab.shape[0] and 0 <= cc < lab.shape[1] and lab[cr, cc] in big:
        k = lab[cr, cc]
    else:
        k = big[int(np.argmax(sizes[big]))]
    if not (0.7 * side * side <= sizes[k] <= 1.4 * side * side):
        return None
    rows, cols = ndimage.find_objects((lab == k).astype(np.int32))[0]
    if rows.start == 0 or cols.start == 0 or rows.stop == lab.shape[0] or cols.stop == lab.shape[1]:
        return None  # cut by the image edge, or joined to other ink: its centre cannot be trusted
    region = ndimage.binary_dilation(lab == k, iterations=max(2, int(round(side * 0.08))))
    wts = np.clip((paper - crop) / (paper - ink), 0.0, 1.0) * region
    total = wts.sum()
    if total <= 0:
        return None
    rr, cc2 = np.indices(crop.shape)
    return float((wts * cc2).sum() / total + x0), float((wts * rr).sum() / total + y0)


# ----------------------------------------------------------------------------------------- main

def register_page(page: Page, layout: Layout, *, max_residual_mm: float = 1.0, max_rotation_deg: float = 5.0,
                  max_scale_change: float = 0.05, cache: dict | None = None) -> Registration:
    """Find the layout's registration marks on ``page`` and fit layout mm -> page pixels.

    page : a loaded page (gray (H, W) uint8, dpi), in any quarter turn
    layout : the form's layout (at least 3 marks)
    max_residual_mm : refuse the page when the fitted marks are off by more than this (RMS, mm)
    max_rotation_deg, max_scale_change : how far the scan may be skewed (beyond its quarter turn) and
        scaled (the page may sit anywhere in the image: among equally good fits the one nearest the
        nominal placement wins)
    cache : an empty dict to share between calls on the SAME page with other layouts (form
        identification): the reduced copy and its squares are then found once
    Returns a ``Registration`` (``image`` upright, ``turn_deg`` the quarter turn undone); raises
    ``RegistrationError("<file> page N: <reason>")``.

    When the marks do not fit at the page's stated resolution but the image is the size of the form
    at another one (a file that states no or a wrong dpi), that resolution is tried once too;
    ``Registration.dpi`` says which one was used.
    """
    check_param(max_residual_mm > 0, "max_residual_mm", "> 0", max_residual_mm)
    check_param(0 <= max_scale_change < 0.5, "max_scale_change", "in [0, 0.5)", max_scale_change)
    check_param(0 <= max_rotation_deg <= 45, "max_rotation_deg", "in [0, 45]", max_rotation_deg)
    check_param(cache is None or isinstance(cache, dict), "cache", "None or a dict", type(cache).__name__)
    where = f"{page.source} page {page.page_number}"
    gray = np.asarray(page.gray)
    if gray.ndim != 2 or gray.dtype != np.uint8:
        raise RegistrationError(f"{where}: page image must be (H, W) uint8; got {gray.shape} {gray.dtype}")
    if not (page.dpi > 0 and math.isfinite(page.dpi)):
        raise RegistrationError(f"{where}: page resolution must be a positive number; got {page.dpi!r}")
    if cache is not None and cache.get("gray") is not gray:
        cache.clear()
        cache["gray"] = gray
    opts = (max_residual_mm, max_rotation_deg, max_scale_change, cache)
    try:
        return _register(gray, float(page.dpi), layout, where, *opts)
    except RegistrationError as first:
        H, W = gray.shape
        if (W > H) != (layout.width_mm > layout.height_mm):  # a quarter-turned page: its sides swap
            H, W = W, H
        guesses = [W * 25.4 / layout.width_mm, H * 25.4 / layout.height_mm]
        guess = float(np.mean(guesses))
        if (abs(guesses[0] / guesses[1] - 1) > 0.08 or abs(guess / page.dpi - 1) < 2 * max_scale_change + 0.02
                or not 50 <= guess <= 2400 or "looks blank" in str(first)):
            raise
        guess = float(round(guess))
        try:
            reg = _register(gray, guess, layout, where, *opts)
        except RegistrationError:
            raise first from None
        log.info("%s: registered at %g dpi from the page size (the file says %g dpi)", where, guess, page.dpi)
        return reg


def _squares(gray: np.ndarray, dpi: float, layout: Layout, max_scale_change: float, cache: dict | None):
    """The reduced copy's darkness, its reduction factor and the mark-like squares (full-resolution
    pixel centres of the scan), reused from ``cache`` when another layout asked for the same."""
    px_per_mm = dpi / 25.4
    f = max(1, int(round(dpi / WORK_DPI)))
    block = max(2, int(round(max(m.size for m in layout.marks) * 1.6 * px_per_mm / f)))
    sizes = [m.size * px_per_mm for m in layout.marks]
    side = (round((1 - max_scale_change) * min(sizes), 3), round((1 + max_scale_change) * max(sizes), 3))
    cache = {} if cache is None else cache
    if ("small", f) not in cache:
        cache[("small", f)] = _reduce(gray, f)
    small = cache[("small", f)]
    if min(small.shape) < 8:
        return small, None, f, None
    if ("dark", f, block) not in cache:
        cache[("dark", f, block)] = _darkness(small, block)
    dark = cache[("dark", f, block)]
    if ("blobs", f, block, side) not in cache:
        cache[("blobs", f, block, side)] = _mark_blobs(dark, f, side)
    return small, dark, f, cache[("blobs", f, block, side)]


def _register(gray: np.ndarray, dpi: float, layout: Layout, where: str, max_residual_mm: float,
              max_rotation_deg: float, max_scale_change: float, cache: dict | None = None) -> Registration:
    """register_page at one assumed resolution."""
    H, W = gray.shape
    px_per_mm = dpi / 25.4
    small, dark, f, blobs = _squares(gray, dpi, layout, max_scale_change, cache)
    if dark is None:
        raise RegistrationError(f"{where}: page too small to register ({W} x {H} pixels)")
    sizes = [m.size * px_per_mm for m in layout.marks]
    if not blobs:
        if float(np.mean(dark > 0.5)) < 0.001:
            raise RegistrationError(f"{where}: no registration marks found (the page looks blank)")
        raise RegistrationError(f"{where}: no registration marks found (no solid squares of "
                                f"{min(m.size for m in layout.marks):g} mm at {dpi:g} dpi)")
    if len(blobs) > _MAX_BLOBS:  # a page full of squares: keep those closest to a mark's size
        want = float(np.median(sizes))
        blobs = sorted(blobs, key=lambda b: abs(b.side - want))[:_MAX_BLOBS]
    args = (px_per_mm, max_rotation_deg, max_scale_change, max_residual_mm)
    centres = np.array([[b.x, b.y] for b in blobs], dtype=np.float64).reshape(-1, 2)
    fits = {t: _best_fit(layout, blobs, turn_points(centres, t, (H, W)), *args) for t in TURNS}
    cand = {k: v for k, v in fits.items() if v is not None}
    if not cand:
        if len(blobs) < 3:
            raise RegistrationError(f"{where}: only {len(blobs)} of the layout's {len(layout.marks)} registration "
                                    f"marks found (3 are needed; covered, cut off or not printed?)")
        raise RegistrationError(f"{where}: registration marks not found: {len(blobs)} solid squares seen, but no "
                                f"3 of them sit where the layout's {len(layout.marks)} marks are (wrong layout, or a "
                                f"wrong resolution: {dpi:g} dpi?)")
    most = max(len(v.marks) for v in cand.values())
    cand = {k: v for k, v in cand.items() if len(v.marks) == most}
    if len(cand) > 1:
        score = {}
        for t, fit in cand.items():
            # layout mm -> the turned-back frame (fit) -> the scan, whose reduced copy is sampled
            back = np.linalg.inv(_turn_matrix(t, (H, W)))
            m = (back @ np.vstack([fit.matrix, [0, 0, 1]]))[:2]
            score[t] = _content_score(layout, dark, f, m)
        best = max(score, key=lambda t: score[t])
        near = [t for t in cand if score[t] >= score[best] - _MIN_CONTENT_GAP]
        turn = 0 if 0 in near else best
        log.debug("%s: orientation scores %s", where, {t: round(v, 3) for t, v in score.items()})
    else:
        turn = next(iter(cand))
    fit = cand[turn]
    to_scan = np.linalg.inv(_turn_matrix(turn, (H, W)))[:2]

    # Refine each used mark at full resolution (in the scan's own coordinates), then refit.
    refined, used = [], []
    for i in fit.marks:
        pred = apply_affine(fit.matrix, [[layout.marks[i].x, layout.marks[i].y]])
        ox, oy = apply_affine(to_scan, pred)[0]
        c = _refine(gray, ox, oy, layout.marks[i].size * px_per_mm)
        if c is None:
            continue
        refined.append(turn_points([c], turn, (H, W))[0])
        used.append(i)
    if len(used) < 3:
        raise RegistrationError(f"{where}: only {len(used)} of {len(layout.marks)} registration marks could be "
                                f"measured cleanly (3 are needed; a mark cut by the image edge or touching "
                                f"other ink is not used)")
    src = np.array([[layout.marks[i].x, layout.marks[i].y] for i in used], dtype=np.float64)
    dst = np.array(refined, dtype=np.float64)
    matrix = fit_affine(src, dst)
    residual = _rms_mm(matrix, src, dst) if len(used) > 3 else 0.0
    if residual > max_residual_mm:
        raise RegistrationError(f"{where}: registration marks do not fit the layout (residual "
                                f"{residual:.2f} mm > {max_residual_mm:g} mm)")
    if not _plausible(matrix, px_per_mm, max_rotation_deg, max_scale_change):
        raise RegistrationError(f"{where}: registration marks imply an implausible scale, stretch or rotation")
    if cache is not None:
        image = cache.get(("upright", turn))
        if image is None:
            image = cache[("upright", turn)] = _upright(gray, turn)
    else:
        image = _upright(gray, turn)
    skew = -math.degrees(math.atan2(matrix[1, 0], matrix[0, 0]))
    matrix[:, 2] += 0.5  # pixel-centre -> continuous (pixel-edge) coordinates
    dst = dst + 0.5
    return Registration(matrix=matrix, residual_mm=float(residual), marks_found=len(used),
                        rotated_180=turn == 180, skew_deg=float(skew), image=image, dpi=float(dpi), mark_px=dst,
                        mark_index=tuple(used), scale=affine_scale(matrix), turn_deg=int(turn))
