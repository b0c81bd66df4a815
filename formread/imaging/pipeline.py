"""One page in, its fields' digit images out: register, binarise, cut, segment.

A page that cannot be registered raises ``RegistrationError`` (the batch records it
as a failed page).  A field that cannot be cut or segmented never stops the page: it
comes back with no candidates, ``doubtful=True`` and the reason, for a person to read.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from dataclasses import dataclass

import numpy as np

from ..errors import SegmentationError
from .binarize import choose_method, page_ink_level
from .fields import crop_to_page, cut_field, field_corners_px
from .register import Registration, register_page
from .segment import FieldDigits, segment_field

__all__ = ["PageDigits", "process_page", "STEPS"]

log = logging.getLogger(__name__)

STEPS = ("load", "binarize", "register", "cut", "segment")
"""The steps timed by ``process_page(..., timings=)`` (``load`` is timed by the caller)."""


@dataclass
class PageDigits:
    """A page's fields cut into digits (DEVELOPERS.md, "Python objects").

    Attributes
    ----------
    registration : Registration
        Where the layout lies on the page (``image`` is the page the right way up).
    fields : dict of str -> FieldDigits
        One entry per layout field, in layout order.
    method : str
        The binarisation used for the crops (``"otsu"`` or ``"sauvola"``).
    level : float
        The page's ink level (grey levels ``<= level`` are ink).
    crops : dict of str -> FieldCrop
        The crop each field was segmented from (missing for a field that could not be cut).
    """

    registration: Registration
    fields: dict
    method: str = "otsu"
    level: float = 127.0
    crops: dict = dataclasses.field(default_factory=dict)


def _failed(field, reg, reason: str, crop=None) -> FieldDigits:
    """A field that could not be segmented: no candidates, doubtful, with the reason (and its crop if cut)."""
    if crop is not None:
        h, w = crop.gray.shape
        corners = crop_to_page(crop, [[0, 0], [w, 0], [w, h], [0, h]])
        image, rect = crop.gray, crop.rect
    else:
        corners = field_corners_px(reg.matrix, field.x, field.y, field.w, field.h)
        image, rect = np.full((1, 1), 255, np.uint8), None
    return FieldDigits(field.name, field.kind, image, [],
                       np.ones(field.cells, bool) if field.kind == "boxed" else None,
                       True, reason, corners, rect)


def process_page(page, layout, *, timings: dict | None = None, px_per_mm: float = 10.0,
                 margin_mm: float | None = None, registration=None) -> PageDigits:
    """Register a page to its layout and cut every field into digit images.

    Parameters
    ----------
    page : Page
        ``gray`` (H, W) uint8 (0 = ink), ``dpi``, ``source``, ``page_number``.
    layout : Layout
    timings : dict or None
        When given, seconds spent per step (``binarize``, ``register``, ``cut``,
        ``segment``) are added to it, for the page-speed benchmark.
    px_per_mm, margin_mm : float (margin None: by the field's kind)
        Crop resolution and the paper kept around each field (see ``cut_field``).
    registration : Registration or None
        The page already registered to ``layout`` (by form identification); None registers it here.

    Returns
    -------
    PageDigits

    Raises
    ------
    RegistrationError
        When the page cannot be matched to the layout (from ``register_page``).
    """
    tick = time.perf_counter

    def add(step: str, t0: float) -> float:
        t1 = tick()
        if timings is not None:
            timings[step] = timings.get(step, 0.0) + (t1 - t0)
        return t1

    t = tick()
    reg = register_page(page, layout) if registration is None else registration
    t = add("register", t)
    dpi = float(getattr(reg, "dpi", 0.0) or page.dpi)
    method = choose_method(layout.binarize, reg.image, dpi)
    level = page_ink_level(reg.image)
    t = add("binarize", t)
    where = f"{page.source} page {page.page_number}"
    out: dict[str, FieldDigits] = {}
    crops = {}
    for field in layout.fields:
        crop = None
        try:
            crop = cut_field(reg, field, px_per_mm=px_per_mm, margin_mm=margin_mm, level=level, method=method)
            crops[field.name] = crop
            t = add("cut", t)
            out[field.name] = segment_field(crop, field)
            t = add("segment", t)
        except SegmentationError as e:
            log.info("%s: %s", where, e)
            out[field.name] = _failed(field, reg, str(e), crop)
            t = add("segment" if crop is not None else "cut", t)
    return PageDigits(reg, out, method, level, crops)
