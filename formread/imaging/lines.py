"""Remove printed box lines from a field's ink map, keeping the strokes that cross them.

The layout says roughly where the lines are (the field's top and bottom edges, the
cell borders); the actual line is looked for in a band around each expected
position, as the rows (or columns) covered by long runs of ink.  Its pixels are
then removed, except where a stroke continues on both sides of the line: there the
stroke crosses the line, and the line pixels under it are kept as stroke.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Line", "LineResult", "find_line", "remove_box_lines", "LINE_GAP_MM"]

LINE_GAP_MM = 0.4
"""Breaks along a printed line up to this long still count as line.  A thin cell border that a
blurred scan thresholded to bilevel comes out dashed; without this it was not found, stayed in the
digits beside it ("|2" read as 6) and whole boxed fields were misread."""


@dataclass
class Line:
    """A printed line found in a crop.

    Attributes
    ----------
    axis : "h" | "v"
    lo, hi : int
        First and last row (``"h"``) or column (``"v"``) of the line's core.
    span : tuple of int (start, stop)
        Columns (``"h"``) or rows (``"v"``) the line covers, stop exclusive.
    dashed : bool
        Found only with its breaks bridged (see ``find_line``'s ``gap``).
    """

    axis: str
    lo: int
    hi: int
    span: tuple
    dashed: bool = False

    @property
    def centre(self) -> float:
        return (self.lo + self.hi) / 2


@dataclass
class LineResult:
    """Outcome of :func:`remove_box_lines`.

    Attributes
    ----------
    clean : ndarray of shape (h, w), bool
        Ink with the box lines removed and crossing strokes kept.
    lines : ndarray of shape (h, w), bool
        The pixels taken away.
    found : list of Line
    """

    clean: np.ndarray
    lines: np.ndarray
    found: list = field(default_factory=list)


def _runs_open(band: np.ndarray, length: int, axis: int) -> np.ndarray:
    """Pixels of runs of ink at least ``length`` long along ``axis``.

    The same as a morphological opening with a ``length`` line (``scipy.ndimage.binary_opening``),
    from two running sums: windows of ``length`` pixels all ink, then every pixel such a window covers.
    """
    if length <= 1:
        return band.copy()
    a = band if axis == 1 else band.T
    n = a.shape[1]
    if n < length:
        out = np.zeros_like(a)
        return out if axis == 1 else out.T
    c = np.zeros((a.shape[0], n + 1), np.int32)
    np.cumsum(a, axis=1, out=c[:, 1:])
    full = (c[:, length:] - c[:, :-length]) == length          # (rows, n - length + 1) window starts
    f = np.zeros((a.shape[0], n + 1), np.int32)
    np.cumsum(full, axis=1, out=f[:, 1:n - length + 2])             # the window starts, then flat
    f[:, n - length + 2:] = f[:, n - length + 1:n - length + 2]
    # pixel j is covered when a full window starts in [j - length + 1, j]
    j = np.arange(n)
    lo = np.maximum(j - length + 1, 0)
    out = (f[:, j + 1] - f[:, lo]) > 0
    return out if axis == 1 else out.T


def _close_gaps(band: np.ndarray, gap: int) -> np.ndarray:
    """(n, m) bool -> (n, m) bool: each row's runs of paper at most ``gap`` px long between two ink
    pixels filled with ink, so that a dashed line reads as one run (its pixels are never removed:
    only the ink under a line found is)."""
    n, m = band.shape
    if gap <= 0 or m == 0:
        return band
    idx = np.arange(m)
    last = np.maximum.accumulate(np.where(band, idx, -m - gap - 1), axis=1)       # last ink at or before j
    nxt = np.minimum.accumulate(np.where(band, idx, 2 * m + gap + 1)[:, ::-1], axis=1)[:, ::-1]  # next at or after
    return band | ((nxt - last - 1) <= gap)


def find_line(ink: np.ndarray, axis: str, expected: float, *, search: int, min_run: int,
              min_cover: float, max_thick: int, span: tuple | None = None, slack: int = 0,
              gap: int = 0) -> Line | None:
    """Find one printed line near an expected position.

    Parameters
    ----------
    ink : ndarray of shape (h, w), bool
    axis : "h" (a horizontal line: look for rows) | "v" (vertical: look for columns)
    expected : float
        Expected row (``"h"``) or column (``"v"``) in crop px.
    search : int
        Half-width of the band searched around ``expected``, px.
    min_run : int
        Shortest run of ink (along the line) that counts as line, px.
    min_cover : float
        Share of the span a row/column must have covered by such runs.
    max_thick : int
        Thickest line accepted, px.
    span : (start, stop) or None
        Part of the crop along the line to look in (default: all of it).
    slack : int
        Ink is first thickened by this many px across the line, so that a thin line
        slightly askew (or jagged after a bilevel scan) still forms long runs; the
        line found then includes that slack on each side.
    gap : int
        Where no solid line is found, breaks along the line up to this many px long are
        bridged and the search is made again (a thin line that a blurred bilevel scan left
        dashed); the line found then says ``dashed``.  Only then: bridging breaks beside a
        solid line would let a stroke that touches it widen it.

    Returns
    -------
    Line or None when no line is there.
    """
    a = ink if axis == "h" else ink.T
    n, length = a.shape
    s0, s1 = span if span is not None else (0, length)
    s0, s1 = max(0, int(s0)), min(length, int(s1))
    lo, hi = max(0, int(round(expected - search))), min(n, int(round(expected + search)) + 1)
    if hi <= lo or s1 - s0 < min_run:
        return None
    sub = a[lo:hi, s0:s1]
    if slack > 0:
        lo2, hi2 = max(0, lo - slack), min(n, hi + slack)
        wide = a[lo2:hi2, s0:s1]
        thick = wide.copy()
        for d in range(1, slack + 1):
            thick[d:] |= wide[:-d]
            thick[:-d] |= wide[d:]
        sub = thick[lo - lo2:lo - lo2 + (hi - lo)]
    band = _runs_open(sub, min_run, 1)
    cover = band.sum(axis=1) / float(s1 - s0)
    dashed = False
    if cover.max() < min_cover and gap > 0:
        band = _runs_open(_close_gaps(sub, gap), min_run, 1)
        cover = band.sum(axis=1) / float(s1 - s0)
        dashed = True
    if cover.max() < min_cover:
        return None
    # the line's core: rows around the best one with at least half its cover
    p = int(np.argmax(cover - 1e-3 * np.abs(np.arange(lo, hi) - expected)))
    keep = cover >= 0.5 * cover[p]
    a_, b_ = p, p
    while a_ > 0 and keep[a_ - 1] and b_ - a_ + 1 < max_thick:
        a_ -= 1
    while b_ < len(keep) - 1 and keep[b_ + 1] and b_ - a_ + 1 < max_thick:
        b_ += 1
    cols = np.flatnonzero(band[a_:b_ + 1].any(axis=0))
    return Line(axis, lo + a_, lo + b_, (s0 + int(cols[0]), s0 + int(cols[-1]) + 1), dashed)


def _line_mask(ink: np.ndarray, ln: Line) -> np.ndarray:
    """Ink pixels of a line's core plus one px of fuzz on each side, within its span."""
    m = np.zeros_like(ink)
    a = max(0, ln.lo - 1)
    if ln.axis == "h":
        m[a:ln.hi + 2, ln.span[0]:ln.span[1]] = ink[a:ln.hi + 2, ln.span[0]:ln.span[1]]
    else:
        m[ln.span[0]:ln.span[1], a:ln.hi + 2] = ink[ln.span[0]:ln.span[1], a:ln.hi + 2]
    return m


def _crossings(keep_ink: np.ndarray, ln: Line, reach: int) -> np.ndarray:
    """Positions along a line where ink continues on both sides (a stroke crosses).

    Returns
    -------
    ndarray of shape (length along the line,), bool
    """
    a = keep_ink if ln.axis == "h" else keep_ink.T
    n = a.shape[0]
    before = np.zeros(a.shape[1], bool)
    after = np.zeros(a.shape[1], bool)
    up = [r for r in range(ln.lo - 2 - reach, ln.lo - 1) if 0 <= r < n]
    down = [r for r in range(ln.hi + 2, ln.hi + 3 + reach) if 0 <= r < n]
    if not up or not down:
        return before
    # a stroke is there when at least two of the rows next to the line hold ink (one column of slack)
    before = a[up].sum(axis=0) >= min(2, len(up))
    after = a[down].sum(axis=0) >= min(2, len(down))
    before = before | np.r_[False, before[:-1]] | np.r_[before[1:], False]   # one position of slack
    after = after | np.r_[False, after[:-1]] | np.r_[after[1:], False]
    return before & after


def remove_box_lines(ink: np.ndarray, *, rows: list, cols: list, px_per_mm: float = 10.0,
                     search_mm: float = 1.2, max_thick_mm: float = 1.0, v_span: tuple | None = None,
                     h_min_run_mm: float = 2.5, h_span: tuple | None = None,
                     max_lines: int = 1, gap_mm: float = LINE_GAP_MM) -> LineResult:
    """Remove printed lines near expected positions, keeping crossing strokes.

    Parameters
    ----------
    ink : ndarray of shape (h, w), bool
    rows : list of float
        Expected rows (crop px) of horizontal lines (e.g. the field's top and bottom edges).
    cols : list of float
        Expected columns (crop px) of vertical lines (cell borders, field ends).
    px_per_mm : float
    search_mm : float
        How far from the expected position a line may be.
    max_thick_mm : float
        Thickest printed line accepted.
    v_span : (top, bottom) or None
        Rows a vertical line must cover; default: between the horizontal lines found.
    h_min_run_mm : float
        Shortest run of ink counted as horizontal line (shorter than a cell, longer than most strokes).
    h_span : (left, right) or None
        Columns searched for horizontal lines (default: all).
    max_lines : int
        Most lines looked for near each expected column (2 where separate boxes
        leave a gap between the right edge of one and the left edge of the next).
    gap_mm : float
        Longest break along a line that still counts as line (see :data:`LINE_GAP_MM`).

    Returns
    -------
    LineResult
    """
    ink = np.asarray(ink, bool)
    h, w = ink.shape
    search = max(2, int(round(search_mm * px_per_mm)))
    thick = max(2, int(round(max_thick_mm * px_per_mm)))
    slack = max(1, int(round(0.15 * px_per_mm)))  # a thin line may wander this much (skew, bilevel jaggies)
    gap = max(0, int(round(gap_mm * px_per_mm)))
    found: list[Line] = []
    for r in rows:
        ln = find_line(ink, "h", r, search=search, min_run=max(3, int(round(h_min_run_mm * px_per_mm))),
                       min_cover=0.3, max_thick=thick + 2 * slack, span=h_span, slack=slack, gap=gap)
        if ln is not None:
            found.append(ln)
    hs = sorted(found, key=lambda ln: ln.centre)
    if v_span is None:
        v_span = (hs[0].lo, hs[-1].hi + 1) if len(hs) >= 2 else (0, h)
    v_len = max(3, v_span[1] - v_span[0])
    for c in cols:
        rest = ink
        col_gap = gap        # a second line beside a solid first one is looked for solid only (the same print)
        for _ in range(max_lines):
            span = (max(0, v_span[0] - search), min(h, v_span[1] + search))
            ln = find_line(rest, "v", c, search=search, min_run=max(3, int(0.8 * v_len)),
                           min_cover=0.85 * v_len / max(1, span[1] - span[0]), max_thick=thick + 2 * slack,
                           span=span, slack=slack, gap=col_gap)
            if ln is None:
                break
            col_gap = gap if ln.dashed else 0
            if not any(o.axis == "v" and o.lo <= ln.hi and ln.lo <= o.hi for o in found):
                found.append(ln)
            rest = rest.copy()
            rest[:, max(0, ln.lo - 1):ln.hi + 2] = False
    if not found:
        return LineResult(ink.copy(), np.zeros_like(ink), [])
    masks = [_line_mask(ink, ln) for ln in found]
    count = np.zeros(ink.shape, np.uint8)            # how many lines' masks hold each pixel
    for m in masks:
        count += m
    all_lines = count > 0
    keep_ink = ink & ~all_lines
    removed = all_lines.copy()
    reach = max(2, int(round(0.3 * px_per_mm)))
    for ln, m in zip(found, masks):
        cross = _crossings(keep_ink, ln, reach)
        if not cross.any():
            continue
        if ln.axis == "h":
            restore = m & cross[None, :]
        else:
            restore = m & cross[:, None]
        # a crossing of two printed lines (a box corner) is no stroke: only restore off the other lines
        others = count > m
        removed &= ~(restore & ~others)
    return LineResult(ink & ~removed, removed, found)
