"""A proof picture of a layout on a scan: where the fields, cells and found digits are.

The registered page (turned the right way up) is drawn in soft grey and over it, in
colour: the registration marks used (rings), each field's rectangle with its name,
the cell borders of boxed fields, and the boxes of the digits found (the best
candidate).  Blank cells get a small dot, doubtful fields are drawn in a warning
colour with their reason.  A person checks a new layout by eye with it.
"""

from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from ..errors import check_param
from .affine import affine_scale, apply_affine

__all__ = ["render_proof", "PALETTE"]

PALETTE = {
    "field": (0, 104, 139),      # deep sea blue: field rectangles and names
    "cell": (84, 170, 196),      # light sea blue: cell borders
    "digit": (214, 96, 0),       # amber: digit boxes
    "blank": (150, 150, 150),    # grey dot: blank cell
    "doubt": (178, 24, 120),     # plum: doubtful fields
    "mark": (30, 140, 60),       # green ring: registration marks used
    "header": (120, 90, 170),    # violet: the header region
}


def _poly(draw: ImageDraw.ImageDraw, pts: np.ndarray, colour, width: int) -> None:
    p = [tuple(map(float, q)) for q in pts]
    draw.line(p + [p[0]], fill=colour, width=width)


def render_proof(page_digits, layout, *, scale: float = 0.5) -> Image.Image:
    """Draw the registered fields and found digits over the page.

    Parameters
    ----------
    page_digits : PageDigits
        From :func:`formread.imaging.pipeline.process_page`.
    layout : Layout
    scale : float
        Size of the picture relative to the scan (0.5 keeps a 300 dpi A4 page near 1240 x 1750).

    Returns
    -------
    PIL.Image.Image, mode "RGB"
    """
    check_param(0 < scale <= 4, "scale", "in (0, 4]", scale)
    reg = page_digits.registration
    gray = np.asarray(reg.image)
    H, W = gray.shape
    size = (max(1, int(round(W * scale))), max(1, int(round(H * scale))))
    base = Image.fromarray(gray).resize(size, Image.Resampling.BILINEAR)
    # paper stays white, ink turns mid grey so the colours on top stand out
    soft = np.asarray(base, np.float32) * 0.55 + 255 * 0.45
    img = Image.fromarray(np.clip(soft, 0, 255).astype(np.uint8)).convert("RGB")
    draw = ImageDraw.Draw(img)
    lw = max(1, int(round(3 * scale)))
    s = scale
    px_per_mm = affine_scale(reg.matrix)
    label_px = max(10, int(round(2.8 * px_per_mm * s)))   # labels about 2.8 mm tall on the page
    font = ImageFont.load_default(size=label_px)

    def mm_to_img(points_mm) -> np.ndarray:
        return apply_affine(reg.matrix, points_mm) * s

    marks = getattr(reg, "mark_px", None)
    if marks is not None:
        used = list(getattr(reg, "mark_index", ())) or list(range(len(marks)))
        for (x, y), i in zip(np.asarray(marks) * s, used):
            r = 0.8 * layout.marks[i].size * px_per_mm * s
            draw.ellipse([x - r, y - r, x + r, y + r], outline=PALETTE["mark"], width=lw)
    if layout.header is not None:
        hd = layout.header
        _poly(draw, mm_to_img(hd.corners()), PALETTE["header"], max(1, lw // 2))
    for f in layout.fields:
        fd = page_digits.fields.get(f.name)
        colour = PALETTE["doubt"] if fd is not None and fd.doubtful else PALETTE["field"]
        rect = mm_to_img(f.region.corners())
        for c in f.cell_regions()[1:]:
            _poly(draw, mm_to_img([(c.x, c.y), (c.x, c.y + c.h)])[[0, 1, 1, 0]], PALETTE["cell"], max(1, lw // 2))
        _poly(draw, rect, colour, lw)
        label = f.name if fd is None or not fd.doubtful else f"{f.name}: {fd.reason}"
        tx, ty = rect[0, 0], rect[0, 1] - label_px - 3
        draw.text((tx, max(0.0, ty)), label, fill=colour, font=font)
        if fd is None or not fd.candidates:
            continue
        best = fd.candidates[0]
        for k, box in enumerate(best.boxes):
            if fd.blank is not None and fd.blank[k]:
                x0, y0, x1, y1 = box
                cx, cy = fd.to_page([[(x0 + x1) / 2, (y0 + y1) / 2]])[0] * s
                r = max(1.5, 4 * s)
                draw.ellipse([cx - r, cy - r, cx + r, cy + r], fill=PALETTE["blank"])
                continue
            x0, y0, x1, y1 = box
            q = fd.to_page([[x0, y0], [x1, y0], [x1, y1], [x0, y1]]) * s
            _poly(draw, q, PALETTE["digit"], max(1, lw - 1))
        if f.kind == "open":
            n = len(best.boxes)
            draw.text((rect[1, 0] + 4, rect[1, 1]), f"{n}", fill=PALETTE["digit"], font=font)
    return img
