"""Synthetic scanned forms for tests: a printed form (marks, header, boxed and open fields) with
stroke-drawn digits, moved and degraded like a scan, and the exact truth of where everything landed.

Main entry points::

    layout = example_layout()                       # or any formread Layout
    gray, truth = render_page(layout, 200, {"member": "1234"}, rng,
                              Transform(rotation_deg=2, scale=1.02, shift_mm=(5, -3), noise=8,
                                        blur_px=0.8, jpeg_quality=70, upside_down=True))
    corners = corners_px(truth, layout.field("member").region)   # (4, 2) pixels (x, y)

``gray`` is (H, W) uint8 (0 = ink); ``truth.matrix`` maps layout mm (x, y) to pixels (x = col,
y = row; continuous: pixel (c, r) covers [c, c + 1) x [r, r + 1), as ``Registration.matrix``) of
the page turned the right way up (what a correct ``Registration.image`` is); ``truth.scan_matrix``
maps into ``gray`` as returned.

Printed parts (marks, borders, cell dividers, header) are axis-aligned rectangles rendered with exact
area coverage (anti-aliased), so their geometry is known to a small fraction of a pixel; the scan
transform is a bilinear affine warp by Pillow. Digits are simple polylines (a seven-segment-like
hand) with a little random jitter: enough for geometry and segmentation tests, not for training.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

from formread.form.layout import Layout, Region, parse_layout

__all__ = ["EXAMPLE_TOML", "example_layout", "Transform", "Truth", "render_page", "render_form",
           "warp", "degrade", "corners_px", "to_pixels", "truth_matrix", "DIGIT_STROKES"]

EXAMPLE_TOML = """
[form]
name = "Synthetic test card"
width_mm = {W}
height_mm = {H}
binarize = "auto"

[form.header]
x = 25.0
y = 6.0
w = {HW}
h = 12.0

[[marks]]
x = 9.0
y = 9.0
size = 6.0
[[marks]]
x = {XR}
y = 9.0
size = 6.0
[[marks]]
x = 9.0
y = {YB}
size = 6.0
[[marks]]
x = {XR}
y = {YB}
size = 6.0

[[fields]]
name = "member"
kind = "boxed"
x = 20.0
y = 30.0
w = 40.0
h = 8.0
cells = 8

[[fields]]
name = "day"
kind = "boxed"
x = 20.0
y = 48.0
w = 10.0
h = 8.0
cells = 2

[[fields]]
name = "reading"
kind = "open"
x = 40.0
y = 48.0
w = 50.0
h = 10.0
max_digits = 6

[[fields]]
name = "litres"
kind = "boxed"
x = 20.0
y = {YF}
w = 30.0
h = 8.0
cells = 6
optional = true
"""


def example_layout(width_mm: float = 148.0, height_mm: float = 210.0) -> Layout:
    """A test form (default A5 portrait): four 6 mm corner marks 9 mm in from the corners, a header,
    boxed fields ``member`` (8 cells), ``day`` (2), ``litres`` (6, near the bottom) and an open
    field ``reading`` (up to 6 digits)."""
    text = EXAMPLE_TOML.format(W=float(width_mm), H=float(height_mm), HW=float(width_mm - 50),
                               XR=float(width_mm - 9), YB=float(height_mm - 9), YF=float(height_mm - 40))
    return parse_layout(text, "<example layout>")


# Seven-segment-like strokes in a unit box (x right, y down), one list of polylines per digit.
DIGIT_STROKES = {
    "0": [[(0, 0), (1, 0), (1, 1), (0, 1), (0, 0)]],
    "1": [[(0.3, 0.2), (0.6, 0), (0.6, 1)]],
    "2": [[(0, 0), (1, 0), (1, 0.5), (0, 0.5), (0, 1), (1, 1)]],
    "3": [[(0, 0), (1, 0), (1, 1), (0, 1)], [(0.2, 0.5), (1, 0.5)]],
    "4": [[(0, 0), (0, 0.55), (1, 0.55)], [(0.8, 0.2), (0.8, 1)]],
    "5": [[(1, 0), (0, 0), (0, 0.5), (1, 0.5), (1, 1), (0, 1)]],
    "6": [[(1, 0), (0, 0), (0, 1), (1, 1), (1, 0.5), (0, 0.5)]],
    "7": [[(0, 0), (1, 0), (0.35, 1)]],
    "8": [[(0, 0), (1, 0), (1, 1), (0, 1), (0, 0)], [(0, 0.5), (1, 0.5)]],
    "9": [[(1, 0.5), (0, 0.5), (0, 0), (1, 0), (1, 1), (0, 1)]],
}


@dataclass(frozen=True)
class Transform:
    """How the simulated scan differs from the printed layout.

    rotation_deg : content turned counter-clockwise on screen (Pillow's convention), about the page centre
    scale : size change about the page centre
    shift_mm : (dx, dy) move of the page content, mm (x right, y down)
    upside_down : the sheet went through the scanner the other way round (image turned 180 degrees)
    turn_deg : the sheet went in turned by this quarter turn, degrees counter-clockwise (0, 90, 180, 270;
        added to ``upside_down``): the image is ``numpy.rot90(upright scan, turn_deg // 90)``
    noise : standard deviation of added Gaussian grey noise (grey levels)
    blur_px : Gaussian blur radius in pixels
    jpeg_quality : JPEG-compress at this quality (None: no compression)
    shadow : darken one side of the page by this share (0..1), a smooth gradient (uneven lighting)
    cover_marks : indices of layout marks left unprinted (as if covered by a sticker)
    margin_mm : scanner bed beyond the paper on every side: the image is that much larger and the
        paper (before ``shift_mm``) sits centred in it
    """
    rotation_deg: float = 0.0
    scale: float = 1.0
    shift_mm: tuple[float, float] = (0.0, 0.0)
    upside_down: bool = False
    turn_deg: int = 0
    noise: float = 0.0
    blur_px: float = 0.0
    jpeg_quality: int | None = None
    shadow: float = 0.0
    cover_marks: tuple[int, ...] = ()
    margin_mm: float = 0.0


@dataclass(frozen=True, eq=False)
class Truth:
    """What the renderer knows about a page.

    matrix : (2, 3) float64, layout mm -> continuous pixels (x, y) of the page turned the right way up
    scan_matrix : (2, 3) float64, layout mm -> continuous pixels (x, y) of the image as returned
    rotated_180 : the returned image is upside down (``turn_deg == 180``)
    skew_deg : rotation of the content in the upright page (counter-clockwise positive)
    dpi : resolution
    digits : what was written in each field
    digit_boxes : per field, list of (x0, y0, x1, y1) mm boxes of the drawn digits
    turn_deg : the quarter turn of the returned image, degrees counter-clockwise (0, 90, 180, 270)
    """
    matrix: np.ndarray
    scan_matrix: np.ndarray
    rotated_180: bool
    skew_deg: float
    dpi: float
    digits: dict = field(default_factory=dict)
    digit_boxes: dict = field(default_factory=dict)
    turn_deg: int = 0


def to_pixels(matrix: np.ndarray, points_mm) -> np.ndarray:
    """(N, 2) mm points (x, y) through a (2, 3) matrix -> (N, 2) pixels (x, y)."""
    p = np.asarray(points_mm, dtype=np.float64).reshape(-1, 2)
    return p @ matrix[:, :2].T + matrix[:, 2]


def corners_px(truth: Truth, region: Region, *, upright: bool = True) -> np.ndarray:
    """The four corners of a mm region (top-left, top-right, bottom-right, bottom-left) in pixels (x, y):
    of the upright page (``upright=True``, compare with a Registration) or of the returned image."""
    return to_pixels(truth.matrix if upright else truth.scan_matrix, region.corners())


# ---------------------------------------------------------------------------------------- drawing

def _coverage(a: float, b: float, n: int) -> tuple[int, np.ndarray]:
    """Share of each pixel [i, i + 1) covered by the interval [a, b) (continuous coordinates):
    first index and the coverage of pixels first..last."""
    i0 = max(0, int(math.floor(a)))
    i1 = min(n, int(math.ceil(b)))
    if i1 <= i0:
        return i0, np.zeros(0)
    idx = np.arange(i0, i1, dtype=np.float64)
    return i0, np.clip(np.minimum(idx + 1, b) - np.maximum(idx, a), 0.0, 1.0)


def _paint(img: np.ndarray, k: float, x0: float, y0: float, x1: float, y1: float, ink: float = 0.92) -> None:
    """Darken the mm rectangle [x0, x1) x [y0, y1) by ``ink`` with exact area coverage (in place)."""
    H, W = img.shape
    c0, cx = _coverage(x0 * k, x1 * k, W)
    r0, cy = _coverage(y0 * k, y1 * k, H)
    if cx.size and cy.size:
        img[r0:r0 + cy.size, c0:c0 + cx.size] *= 1.0 - ink * np.outer(cy, cx).astype(np.float32)


def render_form(layout: Layout, dpi: float, digits: dict | None = None, rng: np.random.Generator | None = None,
                cover_marks=(), line_mm: float = 0.3, pen_mm: float = 0.5,
                header_text: str | None = None) -> tuple[np.ndarray, dict]:
    """The printed and filled-in form, upright and exactly placed: (H, W) uint8 and the digits' mm boxes.

    digits : field name -> string of digits to write in that field (boxed: one per cell from the left)
    header_text : print this title (one or two lines, split at "\n") in the header region with
        Pillow's built-in font, instead of the default row of block "letters"
    """
    rng = rng if rng is not None else np.random.default_rng(0)
    k = dpi / 25.4
    W, H = int(round(layout.width_mm * k)), int(round(layout.height_mm * k))
    img = np.ones((H, W), dtype=np.float32)
    for i, m in enumerate(layout.marks):
        if i not in cover_marks:
            _paint(img, k, m.x - m.size / 2, m.y - m.size / 2, m.x + m.size / 2, m.y + m.size / 2, ink=0.95)
    t = line_mm
    for f in layout.fields:
        _paint(img, k, f.x - t / 2, f.y - t / 2, f.x + f.w + t / 2, f.y + t / 2)
        _paint(img, k, f.x - t / 2, f.y + f.h - t / 2, f.x + f.w + t / 2, f.y + f.h + t / 2)
        _paint(img, k, f.x - t / 2, f.y + t / 2, f.x + t / 2, f.y + f.h - t / 2)
        _paint(img, k, f.x + f.w - t / 2, f.y + t / 2, f.x + f.w + t / 2, f.y + f.h - t / 2)
        for c in f.cell_regions()[1:]:
            _paint(img, k, c.x - t / 2, f.y + t / 2, c.x + t / 2, f.y + f.h - t / 2)
    if layout.header is not None and header_text is not None:
        _print_title(img, layout.header, k, header_text)
    elif layout.header is not None:  # a title line of block "letters" and a rule under it
        hd = layout.header
        x = hd.x + 1.0
        pattern = [3, 2, 4, 0, 3, 3, 1, 4, 0, 2, 5, 3, 0, 4, 2, 3, 1]
        j = 0
        while x < hd.x + hd.w - 3.0:
            n = pattern[j % len(pattern)]
            j += 1
            if n == 0:
                x += 2.0
                continue
            top = hd.y + 1.5 + (0.0 if n % 2 else 1.5)
            _paint(img, k, x, top, x + 0.7, hd.y + hd.h - 4.0)
            _paint(img, k, x, top, x + 1.6, top + 0.6)
            x += 2.2
        _paint(img, k, hd.x + 1.0, hd.y + hd.h - 2.0, hd.x + hd.w - 1.0, hd.y + hd.h - 1.2)
    gray = np.clip(np.rint(img * 255.0), 0, 255).astype(np.uint8)
    boxes = _write_digits(gray, layout, k, digits or {}, rng, pen_mm)
    return gray, boxes


def _print_title(img: np.ndarray, hd: Region, k: float, text: str) -> None:
    """Print ``text`` (lines split at "\n") centred in the header region, black on the paper (in place)."""
    lines = text.split("\n")
    im = Image.new("L", (img.shape[1], img.shape[0]), 255)
    draw = ImageDraw.Draw(im)
    size = hd.h / (1.6 * len(lines))
    for i, line in enumerate(lines):
        font = ImageFont.load_default(size=max(6, round(size * k * (1.0 if i == 0 else 0.7))))
        cy = hd.y + hd.h * (i + 0.5) / len(lines)
        draw.text(((hd.x + hd.w / 2) * k, cy * k), line, fill=0, font=font, anchor="mm")
    img *= 1.0 - 0.92 * (1.0 - np.asarray(im, dtype=np.float32) / 255.0)


def _write_digits(gray: np.ndarray, layout: Layout, k: float, digits: dict, rng: np.random.Generator,
                  pen_mm: float) -> dict:
    """Draw the digit strings into the fields (in place); return each field's digit boxes in mm."""
    im = Image.fromarray(gray)
    draw = ImageDraw.Draw(im)
    width = max(1, int(round(pen_mm * k)))
    boxes = {}
    for name, text in digits.items():
        f = layout.field(name)
        out = []
        if f.kind == "boxed":
            slots = [(c.x + 0.22 * c.w, c.y + 0.18 * c.h, 0.56 * c.w, 0.64 * c.h) for c in f.cell_regions()]
        else:
            dw = min(4.0, f.w / max(1, len(text)) * 0.7)
            slots = [(f.x + 2.0 + i * dw * 1.35, f.y + 0.2 * f.h, dw, 0.6 * f.h) for i in range(len(text))]
        for ch, (x, y, w, h) in zip(text, slots):
            if ch == " ":
                continue
            jx, jy = rng.uniform(-0.08, 0.08, 2) * (w, h)
            for line in DIGIT_STROKES[ch]:
                pts = [((x + jx + px * w + rng.uniform(-0.04, 0.04) * w) * k - 0.5,
                        (y + jy + py * h + rng.uniform(-0.03, 0.03) * h) * k - 0.5) for px, py in line]
                draw.line(pts, fill=25, width=width, joint="curve")
            out.append((x + jx, y + jy, x + jx + w, y + jy + h))
        boxes[name] = out
    gray[...] = np.asarray(im)
    return boxes


# ------------------------------------------------------------------------------------ scan effects

def _scan_map(layout: Layout, dpi: float, tr: Transform) -> np.ndarray:
    """(2, 3) forward map in continuous pixel coordinates: upright form -> moved content."""
    k = dpi / 25.4
    cx, cy = layout.width_mm * k / 2, layout.height_mm * k / 2
    a = math.radians(tr.rotation_deg)
    rot = np.array([[math.cos(a), math.sin(a)], [-math.sin(a), math.cos(a)]]) * tr.scale
    t = np.array([cx, cy]) - rot @ np.array([cx, cy]) + (np.array(tr.shift_mm) + tr.margin_mm) * k
    return np.hstack([rot, t[:, None]])


def warp(gray: np.ndarray, forward: np.ndarray, size: tuple[int, int] | None = None) -> np.ndarray:
    """Move the image content by the (2, 3) forward map (continuous pixel coordinates), bilinear,
    paper-filled. gray: (H, W) uint8 -> ``size`` (H', W') uint8 (default: same size)."""
    inv = np.linalg.inv(np.vstack([forward, [0, 0, 1]]))[:2]
    H, W = size if size is not None else gray.shape
    out = Image.fromarray(gray).transform((W, H), Image.Transform.AFFINE, data=tuple(inv.ravel()),
                                          resample=Image.Resampling.BILINEAR, fillcolor=255)
    return np.asarray(out)


def degrade(gray: np.ndarray, rng: np.random.Generator, *, noise: float = 0.0, blur_px: float = 0.0,
            jpeg_quality: int | None = None, shadow: float = 0.0) -> np.ndarray:
    """Scan-like damage: a lighting gradient, Gaussian blur, grey noise, JPEG compression.
    gray: (H, W) uint8 -> (H, W) uint8."""
    out = gray
    if shadow > 0:
        H, W = gray.shape
        ramp = 1.0 - shadow * np.clip(np.linspace(1.2, -0.2, W), 0, 1) ** 1.5
        out = (out.astype(np.float32) * ramp[None, :].astype(np.float32)).astype(np.uint8)
    if blur_px > 0:
        out = np.asarray(Image.fromarray(out).filter(ImageFilter.GaussianBlur(blur_px)))
    if noise > 0:
        n = rng.standard_normal(out.shape, dtype=np.float32) * np.float32(noise)
        out = np.clip(out.astype(np.float32) + n, 0, 255).astype(np.uint8)
    if jpeg_quality is not None:
        buf = io.BytesIO()
        Image.fromarray(out).save(buf, format="JPEG", quality=int(jpeg_quality))
        out = np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("L"))
    return np.ascontiguousarray(out)


def truth_matrix(layout: Layout, dpi: float, transform: Transform | None = None) -> np.ndarray:
    """(2, 3) layout mm -> continuous pixels (x, y) of the upright scanned page, without rendering it."""
    fwd = _scan_map(layout, dpi, transform or Transform())
    return np.hstack([fwd[:, :2] * (dpi / 25.4), fwd[:, 2:3]])


def render_page(layout: Layout, dpi: float, digits: dict | None = None, rng: np.random.Generator | None = None,
                transform: Transform | None = None, header_text: str | None = None) -> tuple[np.ndarray, Truth]:
    """A simulated scan of the filled-in form: (H, W) uint8 (0 = ink) and its ``Truth``.

    The image has the size of the layout's page at ``dpi`` (plus ``transform.margin_mm`` on every side);
    content moved off it is lost, as on a scanner.
    """
    rng = rng if rng is not None else np.random.default_rng(0)
    tr = transform or Transform()
    form, boxes = render_form(layout, dpi, digits, rng, cover_marks=tr.cover_marks, header_text=header_text)
    fwd = _scan_map(layout, dpi, tr)
    pad = int(round(tr.margin_mm * dpi / 25.4))
    size = (form.shape[0] + 2 * pad, form.shape[1] + 2 * pad)
    moved = warp(form, fwd, size) if not np.allclose(fwd, [[1, 0, 0], [0, 1, 0]]) else form
    gray = degrade(moved, rng, noise=tr.noise, blur_px=tr.blur_px, jpeg_quality=tr.jpeg_quality, shadow=tr.shadow)
    # mm -> continuous (x dpi / 25.4) -> moved continuous (fwd)
    matrix = truth_matrix(layout, dpi, tr)
    H, W = gray.shape
    turn = (int(tr.turn_deg) + (180 if tr.upside_down else 0)) % 360
    if turn not in (0, 90, 180, 270):
        raise ValueError(f"turn_deg must be a quarter turn; got {tr.turn_deg!r}")
    # continuous coordinates of the upright image -> of numpy.rot90(image, q): (x, y) -> (y, W - x) per
    # counter-clockwise quarter turn (q = 2: (W - x, H - y); q = 3: (H - y, x))
    q = turn // 90
    rot = [np.array([[1, 0, 0], [0, 1, 0]]), np.array([[0, 1, 0], [-1, 0, W]]),
           np.array([[-1, 0, W], [0, -1, H]]), np.array([[0, -1, H], [1, 0, 0]])][q].astype(np.float64)
    scan = rot[:, :2] @ matrix + np.array([[0, 0, rot[0, 2]], [0, 0, rot[1, 2]]])
    if q:
        gray = np.ascontiguousarray(np.rot90(gray, q))
    truth = Truth(matrix=matrix, scan_matrix=scan, rotated_180=turn == 180, skew_deg=tr.rotation_deg,
                  dpi=float(dpi), digits=dict(digits or {}), digit_boxes=boxes, turn_deg=turn)
    return gray, truth
