"""Several invented A4 forms for form-identification tests, and scans of them in any quarter turn.

The forms belong to an invented tool library ("Quillby Marsh Tool Library"; no real organisation):

* ``loan``    - a loan slip: marks 3 mm further in than the demo card's on every side;
* ``return``  - a return slip: marks 3 mm lower / higher than the demo card's (x the same);
* ``renewal`` - a renewal slip: marks within 0.5 mm of the return slip's and the SAME fields, only
  the header's second line differs ("Renewal slip" instead of "Return slip"): the pair that only the
  header tells apart;

plus the demo card itself (``formread.demo``: the invented water-meter card, MNIST test-part
handwriting). ``kit_layouts()`` gives each layout with the fingerprint of its blank form's header,
taken by ``blank_fingerprint`` from a straight 300 dpi render of the blank form, exactly as
``formread layout fingerprint BLANK --layout L`` does it.
"""

from __future__ import annotations

import dataclasses
from functools import cache

import numpy as np
from synth import Transform, render_form, render_page

from formread.demo.card import LAYOUT_PATH, marks_mm, read_card_layout, render_card
from formread.demo.fill import load_test_digits, random_writer, write_field
from formread.demo.scan import random_scan_settings, scan_matrix, simulate_scan
from formread.demo.values import card_values
from formread.form.layout import Layout, parse_layout
from formread.imaging.fingerprint import blank_fingerprint
from formread.imaging.load import Page

__all__ = ["KIT_NAMES", "INDEX_DEMO", "HEADERS", "kit_layouts", "scan_kit_form", "scan_demo_card", "kit_digits"]

KIT_NAMES = ("demo", "loan", "return", "renewal")
INDEX_DEMO = 0

HEADERS = {
    "loan": "Quillby Marsh Tool Library\nLoan slip - keep with the tool",
    "return": "Quillby Marsh Tool Library\nReturn slip",
    "renewal": "Quillby Marsh Tool Library\nRenewal slip",
}

_MARKS = {
    "loan": [(15.0, 15.0), (195.0, 15.0), (15.0, 282.0), (195.0, 282.0)],
    "return": [(12.0, 15.0), (198.0, 15.0), (12.0, 282.0), (198.0, 282.0)],
    "renewal": [(12.4, 15.3), (197.6, 15.3), (12.4, 281.6), (197.6, 281.6)],
}

_FIELDS = {
    "loan": [("member", "boxed", 70.0, 50.0, 48.0, 8.0, 8), ("tool_code", "boxed", 70.0, 70.0, 30.0, 8.0, 5),
             ("loan_date", "boxed", 70.0, 90.0, 48.0, 8.0, 8), ("days", "open", 70.0, 110.0, 30.0, 11.0, 2)],
    "return": [("member", "boxed", 60.0, 56.0, 48.0, 8.0, 8), ("tool_code", "boxed", 60.0, 76.0, 30.0, 8.0, 5),
               ("return_date", "boxed", 60.0, 96.0, 48.0, 8.0, 8), ("condition", "boxed", 60.0, 116.0, 6.0, 8.0, 1)],
}
_FIELDS["renewal"] = _FIELDS["return"]

_HEADER_BOX = {"loan": (30.0, 20.0, 150.0, 18.0), "return": (24.0, 22.0, 162.0, 18.0),
               "renewal": (24.0, 22.0, 162.0, 18.0)}


def _toml(name: str) -> str:
    hx, hy, hw, hh = _HEADER_BOX[name]
    out = ["[form]", f'name = "Tool library {name} slip"', "width_mm = 210.0", "height_mm = 297.0", "",
           "[form.header]", f"x = {hx}", f"y = {hy}", f"w = {hw}", f"h = {hh}"]
    for x, y in _MARKS[name]:
        out += ["", "[[marks]]", f"x = {x}", f"y = {y}", "size = 6.0"]
    for fname, kind, x, y, w, h, n in _FIELDS[name]:
        out += ["", "[[fields]]", f'name = "{fname}"', f'kind = "{kind}"', f"x = {x}", f"y = {y}", f"w = {w}",
                f"h = {h}", f"cells = {n}" if kind == "boxed" else f"max_digits = {n}"]
    return "\n".join(out) + "\n"


@cache
def _plain(name: str) -> Layout:
    if name == "demo":
        return read_card_layout(LAYOUT_PATH)
    return parse_layout(_toml(name), f"{name}.toml")


@cache
def _fingerprinted(name: str) -> Layout:
    layout = _plain(name)
    if name == "demo":
        blank = render_card(layout, 300)
    else:
        blank, _ = render_form(layout, 300, header_text=HEADERS[name])
    fp = blank_fingerprint(Page(blank, 300.0, f"blank-{name}.png", 1), layout)
    return dataclasses.replace(layout, header_fingerprint=fp)


def kit_layouts(names=KIT_NAMES, *, fingerprints: bool = True) -> list[Layout]:
    """The kit's layouts in the order of ``names``, with (or without) header fingerprints."""
    return [(_fingerprinted if fingerprints else _plain)(n) for n in names]


def kit_digits(name: str, rng: np.random.Generator) -> dict:
    """Random digit strings for a kit form's fields (stroke-drawn by synth.py)."""
    out = {}
    for f in _plain(name).fields:
        n = f.cells if f.kind == "boxed" else int(rng.integers(1, f.max_digits + 1))
        out[f.name] = "".join(str(d) for d in rng.integers(0, 10, n))
    return out


def scan_kit_form(name: str, dpi: float, rng: np.random.Generator, *, turn_deg: int = 0,
                  **damage) -> tuple[np.ndarray, object]:
    """A filled, scanned tool-library slip: (H, W) uint8 and synth's ``Truth``; the sheet is skewed
    (within 2 degrees), scaled (within 2 %), shifted (within 4 mm) and turned by ``turn_deg``."""
    layout = _plain(name)
    tr = Transform(rotation_deg=float(rng.uniform(-2, 2)), scale=float(rng.uniform(0.98, 1.02)),
                   shift_mm=(float(rng.uniform(-4, 4)), float(rng.uniform(-4, 4))), turn_deg=turn_deg,
                   noise=float(damage.pop("noise", rng.uniform(2, 8))),
                   blur_px=float(damage.pop("blur_px", rng.uniform(0.3, 1.0) * dpi / 200)), margin_mm=3.0, **damage)
    return render_page(layout, dpi, kit_digits(name, rng), rng, tr, header_text=HEADERS[name])


def scan_demo_card(dpi: int, rng: np.random.Generator, *, turn_deg: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """A filled demo card (MNIST test-part handwriting) scanned like ``formread demo make`` does, then
    turned by ``turn_deg`` (counter-clockwise, ``numpy.rot90``).

    Returns the scan (H, W) uint8 and the true (2, 3) matrix from layout mm to continuous pixels of the
    UPRIGHT scan (what a correct ``Registration.matrix`` is)."""
    layout = _plain("demo")
    card = render_card(layout, dpi)
    values = card_values(rng)
    writer = random_writer(rng)
    bank = load_test_digits()
    for fld in layout.fields:
        write_field(card, fld, values[fld.name], writer, bank, dpi, rng)
    settings = random_scan_settings(rng, dpi=dpi, page_mm=(layout.width_mm, layout.height_mm),
                                    marks_mm=marks_mm(layout))
    scan = simulate_scan(card, settings, rng)
    # mm -> card pixels (continuous x k) -> pixel centres (- 0.5) -> scan_matrix -> continuous (+ 0.5)
    s = scan_matrix(settings, card.shape)
    k = dpi / 25.4
    truth = np.hstack([s[:, :2] * k, (s[:, :2] @ [-0.5, -0.5] + s[:, 2] + 0.5)[:, None]])
    return (np.ascontiguousarray(np.rot90(scan, turn_deg // 90)) if turn_deg else scan), truth
