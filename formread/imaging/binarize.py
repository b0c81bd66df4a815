"""Ink or paper: Otsu's global threshold, Sauvola's local threshold, and the rule that picks one.

Images are ``(H, W) uint8`` with 0 = ink and 255 = paper; masks are ``(H, W) bool`` with True = ink.
Otsu (1979) suits evenly lit scans; Sauvola & Pietikainen (2000) follows uneven lighting and shadows.
Every binarisation decision of the imaging step is made here: the page's method and ink level, the
crop's ink map, and the Sauvola settings.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from ..errors import check_param

__all__ = ["threshold_otsu", "threshold_sauvola", "binarize", "background", "is_uneven", "choose_method",
           "page_ink_level", "ink_map", "faint_writing_level", "UNEVEN_SPREAD", "SAUVOLA_K", "SAUVOLA_R",
           "SAUVOLA_WINDOW_MM", "FAINT_MIN_SHARE"]

SAUVOLA_K = 0.2
"""Sauvola's k (implementations use 0.2 or 0.5, see scikit-image; 0.2 keeps faint strokes)."""
SAUVOLA_R = 128.0
"""Sauvola's dynamic range R of the standard deviation, for 8-bit grey."""
SAUVOLA_WINDOW_MM = 8.0
"""Side of Sauvola's window in mm (about two digit heights at the demo's cell size)."""

#: ``auto`` picks Sauvola when the paper's brightness varies by more than this share of its level.
UNEVEN_SPREAD = 0.15


def threshold_otsu(gray: np.ndarray) -> float:
    """Otsu's threshold: the grey level that maximises the between-class variance.

    gray : ndarray of shape (H, W), uint8 (or any integer/float dtype)
    Returns a level t; ink (dark) is ``gray <= t``. Same histogram and tie rule as scikit-image's
    ``threshold_otsu``: integer images use one bin per grey level from min to max; a constant image
    returns its value.
    """
    a = np.asarray(gray)
    check_param(a.ndim == 2 and a.size > 0, "gray", "a non-empty 2-D image", a.shape)
    flat = a.ravel()
    lo, hi = flat.min(), flat.max()
    if lo == hi:
        return float(lo)
    if np.issubdtype(a.dtype, np.integer):
        counts = np.bincount(flat.astype(np.int64) - int(lo))
        centers = np.arange(int(lo), int(hi) + 1, dtype=np.float64)
    else:
        counts, edges = np.histogram(flat, bins=256, range=(float(lo), float(hi)))
        centers = (edges[:-1] + edges[1:]) / 2
    counts = counts.astype(np.float64)
    w1 = np.cumsum(counts)
    w2 = np.cumsum(counts[::-1])[::-1]
    m1 = np.cumsum(counts * centers) / np.maximum(w1, 1e-300)
    m2 = (np.cumsum((counts * centers)[::-1]) / np.maximum(w2[::-1], 1e-300))[::-1]
    between = w1[:-1] * w2[1:] * (m1[:-1] - m2[1:]) ** 2
    return float(centers[int(np.argmax(between))])


def _box_sum_rows(a: np.ndarray, r: int) -> np.ndarray:
    """Sum over rows i-r..i+r (clipped at the borders) from one running sum (1-D integral image).

    a : ndarray of shape (H, W), float64. Returns ndarray of shape (H, W), float64.
    """
    H = a.shape[0]
    c = np.empty((H + 1,) + a.shape[1:], dtype=np.float64)
    c[0] = 0.0
    np.cumsum(a, axis=0, out=c[1:])
    s = np.empty_like(c[1:])
    n_hi = max(H - r, 0)                  # rows whose window ends inside the image
    s[:n_hi] = c[r + 1:H + 1]
    s[n_hi:] = c[H]
    if r < H:
        s[r:] -= c[:H - r]                # rows whose window starts inside the image
    return s


def _box_mean(a: np.ndarray, window: int) -> np.ndarray:
    """Mean over a ``window`` x ``window`` box around each pixel (clipped at the borders), from
    integral images (running sums along rows then columns): O(1) per pixel whatever the window.

    a : ndarray of shape (H, W), float64. Returns ndarray of shape (H, W), float64.
    """
    H, W = a.shape
    r = window // 2
    s = _box_sum_rows(_box_sum_rows(a, r).T, r).T
    rows = np.minimum(np.arange(H) + r + 1, H) - np.maximum(np.arange(H) - r, 0)
    cols = np.minimum(np.arange(W) + r + 1, W) - np.maximum(np.arange(W) - r, 0)
    s /= rows[:, None].astype(np.float64)
    s /= cols[None, :].astype(np.float64)
    return s


def threshold_sauvola(gray: np.ndarray, window: int = 31, k: float = 0.2, r: float = 128.0) -> np.ndarray:
    """Sauvola's local threshold T = m * (1 + k * (s / R - 1)) from the mean m and standard deviation s
    of a ``window`` x ``window`` neighbourhood (integral images; the window is clipped at the borders).

    gray : ndarray of shape (H, W), uint8 (or float)
    window : odd side of the neighbourhood in pixels
    k, r : Sauvola's k and dynamic range R
    Returns ndarray of shape (H, W), float64; ink is ``gray <= T``.
    """
    a = np.asarray(gray)
    check_param(a.ndim == 2 and a.size > 0, "gray", "a non-empty 2-D image", a.shape)
    check_param(isinstance(window, (int, np.integer)) and window >= 3 and window % 2 == 1,
                "window", "an odd whole number >= 3", window)
    check_param(r > 0, "r", "> 0", r)
    a = a.astype(np.float64)
    m = _box_mean(a, window)
    m2 = _box_mean(a * a, window)
    s = np.sqrt(np.maximum(m2 - m * m, 0.0))
    return m * (1.0 + k * (s / r - 1.0))


def background(gray: np.ndarray, block: int) -> np.ndarray:
    """The paper's brightness in blocks of ``block`` x ``block`` pixels (a high percentile per block,
    so ink does not pull it down).

    gray : ndarray of shape (H, W), uint8
    Returns ndarray of shape (ceil(H / block), ceil(W / block)), float64.
    """
    a = np.asarray(gray)
    H, W = a.shape
    bh, bw = -(-H // block), -(-W // block)
    pad = np.pad(a, ((0, bh * block - H), (0, bw * block - W)), mode="edge")
    blocks = pad.reshape(bh, block, bw, block).transpose(0, 2, 1, 3).reshape(bh, bw, -1)
    return np.percentile(blocks, 90, axis=2)


def is_uneven(gray: np.ndarray, dpi: float = 300.0) -> bool:
    """True when the paper's brightness, estimated in 10 mm blocks (90th percentile of each), spreads
    (5th to 95th percentile across blocks) by more than ``UNEVEN_SPREAD`` of its level: shadows,
    a curled page or uneven lighting. This is ``binarize``'s ``auto`` rule."""
    a = np.asarray(gray)
    block = max(4, int(round(10.0 * dpi / 25.4)))
    step = max(1, block // 16)  # a sparse sample of each block is plenty for a percentile
    bg = background(a[::step, ::step], max(2, block // step))
    lo, hi = np.percentile(bg, [5, 95])
    return bool(hi > 0 and (hi - lo) / hi > UNEVEN_SPREAD)


def binarize(gray: np.ndarray, method: str = "auto", *, dpi: float = 300.0, window_mm: float = SAUVOLA_WINDOW_MM,
             k: float = SAUVOLA_K, r: float = SAUVOLA_R, min_contrast: float = 0.2) -> np.ndarray:
    """The ink mask of a grey page.

    gray : ndarray of shape (H, W), uint8, 0 = ink
    method : "otsu" (global), "sauvola" (local, window ``window_mm`` at ``dpi``), or "auto":
        Sauvola when ``is_uneven`` says the background is uneven, else Otsu
    min_contrast : with Otsu, ink must also be this share darker than the paper (the 99th percentile),
        so a blank page's noise does not turn into ink
    Returns ndarray of shape (H, W), bool, True = ink.
    """
    check_param(method in ("auto", "otsu", "sauvola"), "method", "'auto', 'otsu' or 'sauvola'", method)
    a = np.asarray(gray)
    check_param(a.ndim == 2 and a.size > 0, "gray", "a non-empty 2-D image", a.shape)
    method = choose_method(method, a, dpi)
    if method == "sauvola":
        window = max(3, int(round(window_mm * dpi / 25.4)) | 1)
        return a <= threshold_sauvola(a, window=window, k=k, r=r)
    t = threshold_otsu(a)
    paper = float(np.percentile(a[:: max(1, a.shape[0] // 512), :: max(1, a.shape[1] // 512)], 99))
    return (a <= t) & (a < paper * (1.0 - min_contrast))


def choose_method(method: str, gray: np.ndarray, dpi: float) -> str:
    """The binarisation a page gets: ``method`` itself, or for ``"auto"`` Sauvola when
    :func:`is_uneven` says the paper is unevenly lit, else Otsu."""
    if method == "auto":
        return "sauvola" if is_uneven(gray, dpi) else "otsu"
    return method


def page_ink_level(image: np.ndarray) -> float:
    """Otsu's level of a page from a sparse sample (every 3rd row and column: the histogram barely changes).

    Parameters
    ----------
    image : ndarray of shape (H, W), uint8, 0 = ink

    Returns
    -------
    float: grey levels ``<= level`` are ink; never above 80% of the paper's brightness, so the
    noise of a blank page is not ink.

    Every level in the empty gap between Otsu's two classes splits the page alike; the level is put
    in the middle of that gap rather than at its dark end.  On a grey scan the gap is one level wide
    and nothing changes; on a bilevel scan (only 0 and 255) it is the whole range, and the crops,
    resampled from the page, hold the greys in between: at the gap's dark end only pure black stays
    ink, and thin printed lines and strokes come out dashed.
    """
    sample = np.asarray(image)[::3, ::3]
    level = threshold_otsu(sample)
    counts = np.bincount(sample.ravel(), minlength=256)
    above = np.flatnonzero(counts[int(level) + 1:])
    if above.size and above[0] > 0:                 # the next grey level present is not level + 1
        level = (level + int(level) + 1 + int(above[0])) / 2.0
    hist = np.cumsum(counts)
    paper = float(np.searchsorted(hist, 0.99 * hist[-1]))       # the 99th percentile grey level
    return float(min(level, 0.8 * paper))


MIN_CONTRAST = 50.0
"""Without a page level, a crop whose two Otsu classes differ by fewer grey levels holds no ink."""


def ink_map(gray: np.ndarray, *, level: float | None = None, method: str = "otsu",
            px_per_mm: float = 10.0, rect=None) -> np.ndarray:
    """Binarise a crop into ink (with :mod:`formread.imaging.binarize`).

    Parameters
    ----------
    gray : ndarray of shape (h, w), uint8, 0 = ink
    level : float or None
        A page-wide grey level (pixels ``<= level`` are ink), so that a blank field
        stays blank; when None, Otsu on the crop itself, and a crop with too little
        contrast to hold ink is all paper.
    method : "otsu" | "sauvola"
        ``"sauvola"`` thresholds locally (Sauvola 2000, :data:`SAUVOLA_K`, :data:`SAUVOLA_R`,
        a :data:`SAUVOLA_WINDOW_MM` window),
        never darker-than-level paper only: a pixel is ink when it is under both the
        local threshold and the midpoint between ``level`` and white.
    rect : (x0, y0, x1, y1) or None
        The field's rectangle in the crop: with a page ``level`` (not the crop's own) and Otsu, writing much paler
        than the page's print gets the field's own level (:func:`faint_writing_level`).

    Returns
    -------
    ndarray of shape (h, w), bool, True = ink
    """
    g = np.asarray(gray)
    if g.size == 0:
        return np.zeros(g.shape, bool)
    page_level = level is not None
    if level is None:
        level = threshold_otsu(g)
        dark, light = g[g <= level], g[g > level]
        # paper with noise only: Otsu still splits it, but into two nearly equal greys
        if dark.size == 0 or light.size == 0 or float(light.mean()) - float(dark.mean()) < MIN_CONTRAST:
            return np.zeros(g.shape, bool)
    if method == "sauvola":
        window = max(3, int(round(SAUVOLA_WINDOW_MM * px_per_mm)) | 1)
        return (g <= threshold_sauvola(g, window=window, k=SAUVOLA_K, r=SAUVOLA_R)) & (g <= (level + 255.0) / 2)
    if rect is not None and page_level:
        level = faint_writing_level(g, rect, level, px_per_mm) or level
    return g <= level


FAINT_MIN_SHARE = 0.004
"""Share of a field's inside that faint strokes must cover before the field gets its own level."""


def faint_writing_level(gray: np.ndarray, rect, level: float, px_per_mm: float = 10.0) -> float | None:
    """A grey level of the field's own for writing much paler than the page's print, or None.

    The page's level sits between the paper and the printed form, which is what most of a page's
    dark pixels are; a hairline or grey pen under a blurred scan can stay lighter than that level
    and come out as specks (a development page read '31219355' as '3725').  When the field's inside
    holds strokes clearly darker than its paper (four times the paper's noise, at least 15 grey
    levels) but lighter than ``level``, away from everything the page level already calls ink (so not
    the soft edges of dark strokes or printed lines), the field's level is put halfway between its
    paper and those strokes.

    Parameters
    ----------
    gray : ndarray of shape (h, w), uint8, 0 = ink (a field crop)
    rect : (x0, y0, x1, y1) the field's rectangle in crop px
    level : the page's ink level (formread.imaging.binarize.page_ink_level)
    px_per_mm : crop resolution

    Returns
    -------
    float above ``level``, or None when the field's writing is not faint (the page level stands).
    """
    x0, y0, x1, y1 = (int(round(v)) for v in rect)
    m = int(round(1.2 * px_per_mm))                       # off the field's own border lines
    inner = np.asarray(gray)[max(0, y0 + m):max(0, y1 - m), max(0, x0 + m):max(0, x1 - m)]
    if inner.size < 100:
        return None
    reach = max(1, int(round(0.6 * px_per_mm)))          # soft edges of strokes the level already has
    dark = inner <= level
    # more than ``reach`` 4-neighbour steps from it (as binary_dilation by ``reach`` iterations, 3x faster)
    free = (ndimage.distance_transform_cdt(~dark, metric="taxicab") > reach if dark.any()
            else np.ones(inner.shape, bool))
    if free.sum() < 0.25 * inner.size:
        return None
    # the paper away from all that, and its noise from the light side only (pale strokes sit on
    # the dark side): for normal noise the 90th to 98th percentile spans 0.77 standard deviations
    p90, p98 = np.percentile(inner[free], [90, 98])
    paper = float(p90)
    delta = max(15.0, 4.0 * float(p98 - p90) / 0.77)     # well beyond the paper's own noise
    if paper - delta <= level:
        return None
    pale = (inner <= paper - delta) & free
    if pale.sum() < FAINT_MIN_SHARE * inner.size:
        return None
    lab, n = ndimage.label(pale)
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    strokes = sizes >= 0.6 * px_per_mm ** 2             # pieces of stroke, not specks of dust or noise
    covered = int(sizes[strokes].sum())
    if covered < FAINT_MIN_SHARE * inner.size:
        return None
    darkness = float(np.median(inner[strokes[lab]]))
    return float(max(level, (paper + darkness) / 2.0))
