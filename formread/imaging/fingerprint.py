"""The header fingerprint: a small ink-density grid of a form's printed header, to tell forms apart.

Two forms can share their registration marks and even their fields; what differs is what is
printed on them, above all the title. A layout can carry the look of its blank form's header
region as ``[form.header] fingerprint = "ROWSxCOLS:HEX"``: the header rectangle is divided into a
grid of cells about ``CELL_MM`` square, each cell's ink share is measured, and the square root of
it (so that thin print still counts), scaled to the darkest cell, is written as one hex digit
(0-15) per cell, row by row.

A page is compared with a fingerprint window by window (``WINDOW`` cells, about a word of print):
in each window, the share of the ink (page and stored together) that the two disagree on, where a
page cell agrees with the stored value when the ink moved by up to ``SHIFT_MM`` in any direction
could give it (misregistration, print that is a little wider or narrower). The match is one minus
the worst window's disagreement: near 1 for the same print, near 0 where a word is missing, added
or different. One disagreeing word is enough, so two headers that share their first line still
differ on their second. Windows with little ink on both sides are not judged (a speck is not a word).

The grid is measured in layout millimetres through the registration matrix, so scans at any
resolution, quarter turn or small skew give the same grid. Ink is judged against the local paper
brightness (``InkMap``), so a shadowed edge is not taken for print.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..errors import LayoutError, RegistrationError
from ..form.layout import FINGERPRINT_PATTERN, Layout, Region
from .register import register_page

__all__ = ["InkMap", "grid_shape", "header_densities", "make_fingerprint", "parse_fingerprint",
           "fingerprint_match", "compare_header", "blank_fingerprint", "CELL_MM", "SHIFT_MM", "WINDOW", "INK_SHARE"]

CELL_MM = 3.0         # grid cells about this size (larger for a very large header: at most 1024 cells)
SHIFT_MM = 0.5        # print may lie this far from where the fingerprint has it
WINDOW = (2, 4)       # rows x cols of grid cells judged together (about 6 x 12 mm: a word)
INK_SHARE = 0.6       # ink: darker than this share of the local paper brightness
PAPER_BLOCK_MM = 4.0  # the paper's brightness is the brightest pixel of blocks about this size
_MAX_CELLS, _MAX_ROWS, _MAX_COLS = 1024, 32, 128
_MIN_WINDOW_INK = 0.25  # a window is judged when it holds at least this share of an average window's ink


@dataclass(frozen=True, eq=False)
class InkMap:
    """Which pixels of a page are ink: darker than ``INK_SHARE`` of the local paper brightness, so a
    shadowed or unevenly lit edge of the page is not taken for print.

    image : ndarray of shape (H, W), uint8, 0 = ink
    paper : ndarray of shape (ceil(H / block), ceil(W / block)), float32, the paper's brightness per
        block (the brightest pixel of the block and its eight neighbours)
    block : block side in pixels
    """
    image: np.ndarray
    paper: np.ndarray
    block: int

    @classmethod
    def of(cls, image: np.ndarray, px_per_mm: float) -> InkMap:
        """The ink map of a page (H, W) uint8 at ``px_per_mm`` pixels per millimetre."""
        image = np.asarray(image)
        block = max(2, int(round(PAPER_BLOCK_MM * px_per_mm)))
        H, W = image.shape
        bh, bw = -(-H // block), -(-W // block)
        pad = np.pad(image, ((0, bh * block - H), (0, bw * block - W)), mode="edge")
        bmax = pad.reshape(bh, block, bw, block).max(axis=(1, 3))
        paper = ndimage.maximum_filter(bmax, size=3, mode="nearest").astype(np.float32)
        return cls(image, paper, block)

    def at(self, points_px: np.ndarray) -> np.ndarray:
        """Ink at continuous pixel points (x, y), ndarray of shape (..., 2) -> bool of shape (...);
        points off the image are paper."""
        p = np.asarray(points_px, dtype=np.float64)
        c = np.floor(p[..., 0]).astype(np.int64)
        r = np.floor(p[..., 1]).astype(np.int64)
        H, W = self.image.shape
        inside = (c >= 0) & (c < W) & (r >= 0) & (r < H)
        out = np.zeros(c.shape, dtype=bool)
        ri, ci = r[inside], c[inside]
        out[inside] = self.image[ri, ci] <= INK_SHARE * self.paper[ri // self.block, ci // self.block]
        return out


def grid_shape(header: Region) -> tuple[int, int]:
    """(rows, cols) of the fingerprint grid for a header rectangle (mm): cells near ``CELL_MM`` square,
    larger when the header would need more than 1024 of them."""
    side = max(CELL_MM, math.sqrt(header.w * header.h / _MAX_CELLS))
    while True:
        rows = min(_MAX_ROWS, max(1, round(header.h / side)))
        cols = min(_MAX_COLS, max(1, round(header.w / side)))
        if rows * cols <= _MAX_CELLS:
            return rows, cols
        side *= 1.02


def _subcells(ink: InkMap, matrix: np.ndarray, header: Region, shape: tuple[int, int], k: int) -> np.ndarray:
    """Ink share of sub-cells 1/k of a grid cell across, over the header grown by one sub-cell on
    every side: ndarray of shape (rows * k + 2, cols * k + 2), float64."""
    rows, cols = shape
    m = np.asarray(matrix, dtype=np.float64)
    sh, sw = header.h / (rows * k), header.w / (cols * k)        # sub-cell size, mm
    scale = math.sqrt(abs(np.linalg.det(m[:, :2])))
    n = max(1, min(2, int(math.ceil(max(sh, sw) * scale))))     # samples per sub-cell side (2 x 2 will do)
    ys = header.y - sh + (np.arange((rows * k + 2) * n) + 0.5) * (sh / n)
    xs = header.x - sw + (np.arange((cols * k + 2) * n) + 0.5) * (sw / n)
    px = m[0, 0] * xs[None, :] + m[0, 1] * ys[:, None] + m[0, 2]
    py = m[1, 0] * xs[None, :] + m[1, 1] * ys[:, None] + m[1, 2]
    found = ink.at(np.stack([px, py], axis=-1))
    return found.reshape(rows * k + 2, n, cols * k + 2, n).mean(axis=(1, 3))


def _pool(sub: np.ndarray, shape: tuple[int, int], k: int, dr: int, dc: int) -> np.ndarray:
    """Cell densities from sub-cells, the grid moved by (dr, dc) sub-cells (each in -1..1)."""
    rows, cols = shape
    s = sub[1 + dr:1 + dr + rows * k, 1 + dc:1 + dc + cols * k]
    return s.reshape(rows, k, cols, k).mean(axis=(1, 3))


def _shift_steps(header: Region, shape: tuple[int, int]) -> int:
    """Sub-cells per cell side so that one sub-cell is about ``SHIFT_MM``."""
    rows, cols = shape
    return max(1, int(round(min(header.h / rows, header.w / cols) / SHIFT_MM)))


def header_densities(ink: InkMap, matrix: np.ndarray, header: Region,
                     shape: tuple[int, int] | None = None) -> np.ndarray:
    """Ink share of each grid cell of the header region on a registered page.

    Parameters
    ----------
    ink : the ink map of the registered page (``InkMap.of(Registration.image, Registration.scale)``)
    matrix : ndarray of shape (2, 3), float64, layout mm -> continuous pixels of that image
    header : the header rectangle in mm
    shape : (rows, cols) of the grid; default ``grid_shape(header)``

    Returns
    -------
    ndarray of shape (rows, cols), float64 in [0, 1]; points off the image count as paper.
    """
    shape = shape if shape is not None else grid_shape(header)
    k = _shift_steps(header, shape)
    return _pool(_subcells(ink, matrix, header, shape, k), shape, k, 0, 0)


def _encode(dens: np.ndarray) -> str:
    """The fingerprint text of a density grid (rows, cols)."""
    v = np.sqrt(np.clip(dens, 0.0, 1.0))
    top = float(v.max())
    q = np.rint(15.0 * v / top).astype(int) if top > 0 else np.zeros(v.shape, int)
    return f"{dens.shape[0]}x{dens.shape[1]}:" + "".join("0123456789abcdef"[x] for x in q.ravel())


def make_fingerprint(ink: InkMap, matrix: np.ndarray, header: Region) -> str:
    """The fingerprint text ``"ROWSxCOLS:HEX"`` of the header region on a registered blank form.

    ink : the page's ``InkMap``; matrix : (2, 3) float64, layout mm -> its pixels.
    Raises ``RegistrationError`` when the region holds no print (nothing to recognise the form by).
    """
    dens = header_densities(ink, matrix, header)
    if float(dens.max()) <= 0.0:
        raise RegistrationError(f"the header region (x={header.x:g} y={header.y:g} w={header.w:g} h={header.h:g} mm) "
                                f"holds no print")
    return _encode(dens)


def parse_fingerprint(text: str) -> np.ndarray:
    """A fingerprint's grid: ndarray of shape (rows, cols), float64 in [0, 1] (hex digit / 15).

    Raises ``LayoutError`` for text that is not ``ROWSxCOLS:HEX`` with rows x cols digits (a layout
    that loaded has already been checked).
    """
    m = FINGERPRINT_PATTERN.match(text) if isinstance(text, str) else None
    if m is None or int(m.group(1)) * int(m.group(2)) != len(m.group(3)):
        raise LayoutError(f"malformed header fingerprint {str(text)[:24]!r}")
    rows, cols = int(m.group(1)), int(m.group(2))
    vals = np.array([int(ch, 16) for ch in m.group(3)], dtype=np.float64) / 15.0
    return vals.reshape(rows, cols)


def _window_sums(a: np.ndarray, wr: int, wc: int) -> np.ndarray:
    """Sums of every wr x wc window of a (rows, cols) array (valid positions only)."""
    c = np.pad(np.cumsum(np.cumsum(a, axis=0), axis=1), ((1, 0), (1, 0)))
    return c[wr:, wc:] - c[:-wr, wc:] - c[wr:, :-wc] + c[:-wr, :-wc]


def fingerprint_match(ink: InkMap, matrix: np.ndarray, header: Region, fingerprint: str) -> float:
    """How well a registered page's header matches a fingerprint, in [0, 1]: one minus the worst
    window's share of disagreeing ink (see the module docstring); 0.0 when the page's header region
    holds no print while the fingerprint's does.

    ink : the page's ``InkMap``; matrix : (2, 3) float64, layout mm -> its pixels.
    """
    match = compare_header(ink, matrix, header, fingerprint)[1]
    assert match is not None  # a fingerprint was given
    return match


def compare_header(ink: InkMap, matrix: np.ndarray, header: Region,
                   fingerprint: str | None) -> tuple[float, float | None]:
    """(ink share of the header region, ``fingerprint_match`` or None without a fingerprint), from one
    sampling of the page."""
    want = parse_fingerprint(fingerprint) if fingerprint is not None else None
    shape = want.shape if want is not None else grid_shape(header)
    k = _shift_steps(header, shape)
    sub = _subcells(ink, matrix, header, shape, k)
    share = float(_pool(sub, shape, k, 0, 0).mean())
    if want is None:
        return share, None
    return share, _match(sub, shape, k, want)


def _match(sub: np.ndarray, shape: tuple[int, int], k: int, want: np.ndarray) -> float:
    """fingerprint_match from the page's sub-cells."""
    moved = np.stack([np.sqrt(_pool(sub, shape, k, dr, dc)) for dr in (-1, 0, 1) for dc in (-1, 0, 1)])
    got = moved[4]
    if float(got.max()) <= 0.0 or float(want.max()) <= 0.0:
        return 0.0 if float(want.max()) > 0.0 or float(got.max()) > 0.0 else 1.0
    # the same overall blackness (a heavier or lighter scan prints the same words)
    g = 1.0 / max(float(got.mean()), 1e-9)
    b = want / max(float(want.mean()), 1e-9)
    lo, hi = moved.min(axis=0) * g, moved.max(axis=0) * g
    miss = np.maximum(0.0, np.maximum(b - hi, lo - b))
    wr, wc = min(WINDOW[0], shape[0]), min(WINDOW[1], shape[1])
    mass = _window_sums(got * g + b, wr, wc)
    bad = _window_sums(miss, wr, wc)
    judged = mass >= 2 * _MIN_WINDOW_INK * wr * wc
    if not judged.any():
        return 1.0
    return float(max(0.0, 1.0 - (bad[judged] / mass[judged]).max()))


def blank_fingerprint(page, layout: Layout) -> str:
    """The fingerprint of ``layout``'s header region on a scan of the blank form.

    page : Page (``gray`` (H, W) uint8, 0 = ink), in any quarter turn; it is registered to ``layout``.
    Raises ``LayoutError`` when the layout has no header region, ``RegistrationError`` when the page
    cannot be registered or its header region is blank.
    """
    if layout.header is None:
        raise LayoutError(f"{layout.source}: no [form.header] region to take a fingerprint of (add x, y, w, h "
                          f"around the printed title)")
    reg = register_page(page, layout)
    try:
        return make_fingerprint(InkMap.of(reg.image, reg.scale), reg.matrix, layout.header)
    except RegistrationError as e:
        raise RegistrationError(f"{page.source} page {page.page_number}: {e}") from None
