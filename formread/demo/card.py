"""The blank demo forms: read a demo layout and print it as a clean page image.

Two invented forms: the water-meter card (``layout.toml``) and the produce delivery slip
(``slip_layout.toml``).  The layout file is the single source of geometry (marks, header,
fields); this module adds only the printed words around them (title, labels, hints, footer),
held in a :class:`CardText` per form.  All names on the forms are invented.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from ..form.layout import Layout, load_layout

__all__ = ["LAYOUT_PATH", "SLIP_LAYOUT_PATH", "read_card_layout", "marks_mm", "render_card", "mm_to_px",
           "TITLE", "SUBTITLE", "PRINT_GREY", "CardText", "METER_TEXT", "SLIP_TEXT"]

LAYOUT_PATH = Path(__file__).with_name("layout.toml")
SLIP_LAYOUT_PATH = Path(__file__).with_name("slip_layout.toml")
TITLE = "Larkspur Lane Allotment Cooperative"
SUBTITLE = "Water Meter Card - monthly reading"
PRINT_GREY = 25
"""Grey level of printed ink (0 = black): laser toner is near black."""

_LABELS = {
    "plot_number": ("Plot number", "(1 to 240)"),
    "member_number": ("Member number", "(8 digits, see your membership card)"),
    "reading_date": ("Date of reading", None),
    "previous_reading": ("Previous meter reading", "litres"),
    "current_reading": ("Current meter reading", "litres"),
    "litres_used": ("Litres used", "(current minus previous)"),
}


_SLIP_LABELS = {
    "slip_number": ("Slip number", "(from the slip pad)"),
    "delivery_date": ("Date of delivery", None),
    "plot_number": ("Plot number", "(1 to 240)"),
    "crates_tomatoes": ("Tomatoes", "crates"),
    "crates_beans": ("Beans", "crates"),
    "crates_courgettes": ("Courgettes", "crates"),
    "crates_apples": ("Apples", "crates"),
    "crates_potatoes": ("Potatoes", "crates"),
    "total_crates": ("Total crates", "(sum of the five lines)"),
    "gross_kg": ("Gross weight, kg", "(from the stall scale)"),
}


@dataclass(frozen=True)
class CardText:
    """The printed words of one demo form (the layout file holds the geometry)."""

    title: str
    subtitle: str
    instruction: str
    labels: tuple[tuple[str, tuple[str, str | None]], ...]   # field name -> (label, hint)
    lower: str                                               # which lower part to print: "meter" | "slip"


METER_TEXT = CardText(TITLE, SUBTITLE,
                      "Write in dark ink, one digit per box. Keep your numbers inside the boxes.",
                      tuple(_LABELS.items()), "meter")
SLIP_TEXT = CardText(TITLE, "Produce Delivery Slip - market stall",
                     "One digit per box in the boxed lines. Write 0 for a crop you did not bring.",
                     tuple(_SLIP_LABELS.items()), "slip")


def read_card_layout(path: Path = LAYOUT_PATH) -> Layout:
    """The demo layout, read by the project's one layout parser (mm, x right, y down)."""
    return load_layout(path)


def marks_mm(layout: Layout) -> list[tuple[float, float, float]]:
    """The registration marks as (x centre, y centre, side) in mm."""
    return [(m.x, m.y, m.size) for m in layout.marks]


def mm_to_px(v: float, dpi: float) -> float:
    """Millimetres to pixels at ``dpi``."""
    return v * dpi / 25.4


def _font(size_mm: float, dpi: float) -> ImageFont.FreeTypeFont | ImageFont.ImageFont:
    # Pillow's built-in font (>= 10.1) scales without any system font installed.
    return ImageFont.load_default(size=max(6, round(mm_to_px(size_mm, dpi))))


def _rect(d: ImageDraw.ImageDraw, x: float, y: float, w: float, h: float, dpi: float, lw: int,
          fill: int | None = None) -> None:
    p = lambda v: round(mm_to_px(v, dpi))  # noqa: E731
    d.rectangle([p(x), p(y), p(x + w), p(y + h)], outline=PRINT_GREY, width=lw, fill=fill)


def _text(d: ImageDraw.ImageDraw, x: float, y: float, s: str, size_mm: float, dpi: float,
          anchor: str = "lm") -> None:
    d.text((mm_to_px(x, dpi), mm_to_px(y, dpi)), s, fill=PRINT_GREY, font=_font(size_mm, dpi), anchor=anchor)


def _meter_lower(d: ImageDraw.ImageDraw, dpi: float, thin: int) -> None:
    """Lower part of the water-meter card: remarks, office box, signature, footer (nothing written there)."""
    p = lambda v: round(mm_to_px(v, dpi))  # noqa: E731
    _text(d, 20, 178, "Remarks", 3.8, dpi)
    for yy in (190, 200, 210):
        d.line([p(20), p(yy), p(190), p(yy)], fill=PRINT_GREY, width=thin)
    _text(d, 20, 238, "Signature of plot holder", 3.4, dpi)
    d.line([p(80), p(241), p(125), p(241)], fill=PRINT_GREY, width=thin)
    _rect(d, 138, 222, 52, 22, dpi, thin)
    _text(d, 141, 226, "Office use only", 2.8, dpi)
    _text(d, 141, 236, "Checked:", 2.8, dpi)
    _text(d, 105, 284, "Return this card to the plot office by the 5th of each month.  Card WM-2 (2026)",
          2.6, dpi, anchor="mm")


def _slip_lower(d: ImageDraw.ImageDraw, dpi: float, thin: int) -> None:
    """Lower part of the delivery slip: signature, stall box, footer (nothing written there)."""
    p = lambda v: round(mm_to_px(v, dpi))  # noqa: E731
    _text(d, 20, 104, "Crates delivered today", 3.8, dpi)
    d.line([p(20), p(187 - 12.5), p(125), p(187 - 12.5)], fill=PRINT_GREY, width=thin)
    _text(d, 20, 236, "Signature of grower", 3.4, dpi)
    d.line([p(70), p(239), p(118), p(239)], fill=PRINT_GREY, width=thin)
    _rect(d, 138, 224, 52, 22, dpi, thin)
    _text(d, 141, 228, "Stall use only", 2.8, dpi)
    _text(d, 141, 238, "Weighed by:", 2.8, dpi)
    _text(d, 105, 284, "Hand this slip in with your crates at the market stall.  Slip PD-1 (2026)",
          2.6, dpi, anchor="mm")


@lru_cache(maxsize=4)
def _render(layout: Layout, dpi: int, text: CardText = METER_TEXT) -> bytes:
    w_px, h_px = round(mm_to_px(layout.width_mm, dpi)), round(mm_to_px(layout.height_mm, dpi))
    im = Image.new("L", (w_px, h_px), 255)
    d = ImageDraw.Draw(im)
    thin = max(1, round(mm_to_px(0.3, dpi)))
    p = lambda v: round(mm_to_px(v, dpi))  # noqa: E731

    for x, y, s in marks_mm(layout):
        d.rectangle([p(x - s / 2), p(y - s / 2), p(x + s / 2) - 1, p(y + s / 2) - 1], fill=0)

    assert layout.header is not None  # the demo layouts have a [form.header]
    hx, hy, hw, hh = layout.header.x, layout.header.y, layout.header.w, layout.header.h
    _text(d, hx + hw / 2, hy + hh * 0.32, text.title, 6.5, dpi, anchor="mm")
    _text(d, hx + hw / 2, hy + hh * 0.80, text.subtitle, 4.2, dpi, anchor="mm")
    d.line([p(20), p(hy + hh + 2), p(190), p(hy + hh + 2)], fill=PRINT_GREY, width=thin * 2)
    _text(d, 20, hy + hh + 7, text.instruction, 3.2, dpi)

    labels = dict(text.labels)
    for f in layout.fields:
        label, hint = labels.get(f.name, (f.name.replace("_", " ").capitalize(), None))
        _text(d, 20, f.y + f.h / 2, label, 3.8, dpi)
        _rect(d, f.x, f.y, f.w, f.h, dpi, thin)
        if f.kind == "boxed" and f.cells:
            cw = f.w / f.cells
            for k in range(1, f.cells):
                xx = p(f.x + k * cw)
                d.line([xx, p(f.y), xx, p(f.y + f.h)], fill=PRINT_GREY, width=thin)
        pattern = dict(f.rules).get("date") if f.kind == "boxed" else None
        if pattern and len(pattern) == f.cells:      # day, month, year letters under the boxes
            cw = f.w / f.cells
            for k, c in enumerate(pattern):
                _text(d, f.x + (k + 0.5) * cw, f.y + f.h + 2.2, c, 2.6, dpi, anchor="mm")
        if hint:
            _text(d, f.x + f.w + 4, f.y + f.h / 2, hint, 3.0, dpi)

    if text.lower == "slip":
        _slip_lower(d, dpi, thin)
    else:
        _meter_lower(d, dpi, thin)
    return np.asarray(im, dtype=np.uint8).tobytes()


def render_card(layout: Layout, dpi: int, text: CardText = METER_TEXT) -> np.ndarray:
    """Print the blank form at ``dpi``: the layout's marks, header and fields with ``text``'s words.

    Returns
    -------
    page : ndarray of shape (H, W), uint8, 0 = ink, 255 = paper; H, W = page size in mm * dpi / 25.4
    """
    w_px, h_px = round(mm_to_px(layout.width_mm, dpi)), round(mm_to_px(layout.height_mm, dpi))
    return np.frombuffer(_render(layout, int(dpi), text), dtype=np.uint8).reshape(h_px, w_px).copy()
