"""Form identification: mixed pages of several invented forms (tests/imaging/form_kit.py), in any quarter
turn and file kind, are assigned to the layout they fit; a page of an unknown form is "unknown"; two forms
that only their headers tell apart are told apart by the fingerprints, and are "ambiguous" without them."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from form_kit import KIT_NAMES, kit_layouts, scan_demo_card, scan_kit_form
from PIL import Image
from synth import Transform, example_layout, render_page

from formread.errors import ParameterError, RegistrationError
from formread.imaging.fingerprint import InkMap
from formread.imaging.identify import (
    MIN_HEADER,
    MIN_LINES,
    TELL_HEADER,
    TELL_LINES,
    Identification,
    identify_form,
    line_share,
)
from formread.imaging.load import Page, load_pages
from formread.imaging.register import register_page

LAYOUTS = kit_layouts()                     # demo, loan, return, renewal, with fingerprints
INDEX = {n: i for i, n in enumerate(KIT_NAMES)}


def _scan(name: str, dpi: int, seed: int, turn: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if name == "demo":
        return scan_demo_card(dpi, rng, turn_deg=turn)[0]
    return scan_kit_form(name, dpi, rng, turn_deg=turn)[0]


def _one_line(idf: Identification) -> None:
    assert idf.reason and "\n" not in idf.reason


def test_a_multi_page_tiff_of_mixed_forms_and_turns_is_sorted_page_by_page(tmp_path):
    plan = [("demo", 0), ("loan", 90), ("return", 0), ("renewal", 270), ("demo", 180), ("return", 90)]
    pages = [Image.fromarray(_scan(n, 200, 30 + i, t) >= 150) for i, (n, t) in enumerate(plan)]   # bilevel
    path = tmp_path / "tray.tif"
    pages[0].save(path, save_all=True, append_images=pages[1:], compression="group4", dpi=(200, 200))
    loaded = load_pages(path)
    assert len(loaded) == len(plan)
    for page, (name, turn) in zip(loaded, plan):
        idf = identify_form(page, LAYOUTS)
        assert idf.status == "identified" and idf.index == INDEX[name], (page.page_number, idf.reason)
        assert idf.registration.turn_deg == turn and idf.best == idf.index
        _one_line(idf)
        # the registration is the one register_page gives for that layout alone
        alone = register_page(page, LAYOUTS[idf.index])
        np.testing.assert_allclose(idf.registration.matrix, alone.matrix)


@pytest.mark.parametrize("name", KIT_NAMES)
def test_every_form_in_every_quarter_turn(name):
    for turn in (0, 90, 180, 270):
        idf = identify_form(Page(_scan(name, 200, 40 + turn, turn), 200.0, f"{name}.png", 1), LAYOUTS)
        assert idf.identified and idf.index == INDEX[name], idf.reason
        assert idf.registration.turn_deg == turn
        ev = idf.evidence[idf.index]
        assert ev.fits and ev.lines >= MIN_LINES and ev.header >= MIN_HEADER and ev.marks_found == 4


def test_the_pair_only_the_header_tells_apart():
    # return and renewal slips: marks within 0.5 mm of each other, the same fields, one word of the
    # header differs. Their printed lines fit both equally; the fingerprints decide.
    pair = [LAYOUTS[INDEX["return"]], LAYOUTS[INDEX["renewal"]]]
    for k, name in enumerate(("return", "renewal")):
        idf = identify_form(Page(_scan(name, 300, 50 + k), 300.0, "slip.png", 1), pair)
        assert idf.identified and idf.index == k, idf.reason
        own, other = idf.evidence[k], idf.evidence[1 - k]
        assert other.residual_mm is not None and other.residual_mm < 0.1     # the marks fit both
        assert abs(own.lines - other.lines) < TELL_LINES                     # so do the lines
        assert own.header - other.header >= TELL_HEADER
        assert other.name in idf.reason   # "told apart from" it, or why it does not fit


def test_without_fingerprints_the_pair_is_ambiguous_never_a_guess():
    plain = kit_layouts(("return", "renewal"), fingerprints=False)
    idf = identify_form(Page(_scan("return", 200, 60), 200.0, "slip.png", 1), plain)
    assert idf.status == "ambiguous" and idf.index is None and idf.registration is None
    assert "nothing tells them apart" in idf.reason and all(e.fits for e in idf.evidence)
    _one_line(idf)
    # one with a fingerprint, one without: no evidence both have tells them apart either
    mixed = [LAYOUTS[INDEX["return"]], plain[1]]
    assert identify_form(Page(_scan("return", 200, 61), 200.0, "slip.png", 1), mixed).status == "ambiguous"


def test_the_same_layout_twice_is_ambiguous():
    demo = LAYOUTS[INDEX["demo"]]
    idf = identify_form(Page(_scan("demo", 200, 62), 200.0, "card.png", 1), [demo, demo])
    assert idf.status == "ambiguous"


def test_forms_with_different_fields_are_told_apart_by_their_lines_alone():
    plain = kit_layouts(("demo", "loan"), fingerprints=False)
    for k, name in enumerate(("demo", "loan")):
        idf = identify_form(Page(_scan(name, 200, 63 + k, 90), 200.0, "p.png", 1), plain)
        assert idf.identified and idf.index == k, idf.reason
        assert idf.evidence[1 - k].fits is False and "printed lines" in idf.evidence[1 - k].reason


def test_a_page_of_a_form_not_among_the_candidates_is_unknown():
    # A return slip offered only the other three: the renewal slip fits its marks and lines, but not
    # its header; nothing is assigned, and the reason names the closest candidate and its residual.
    others = [LAYOUTS[INDEX[n]] for n in ("demo", "loan", "renewal")]
    idf = identify_form(Page(_scan("return", 300, 64, 270), 300.0, "stray.png", 2), others)
    assert idf.status == "unknown" and idf.index is None and idf.registration is None
    assert idf.best == 2 and idf.residual_mm is not None and idf.residual_mm < 0.1
    assert idf.reason.startswith("no known form: closest is 'Tool library renewal slip' (residual ")
    assert "header does not match" in idf.reason
    _one_line(idf)
    # A page of yet another form (the A5 test card, marks 9 mm from its corners): no layout registers.
    gray, _ = render_page(example_layout(), 200, {"member": "12345678"}, np.random.default_rng(65),
                          Transform(rotation_deg=1.0, margin_mm=4))
    idf = identify_form(Page(gray, 200.0, "a5.png", 1), LAYOUTS)
    assert idf.status == "unknown" and idf.residual_mm is None
    assert all(e.residual_mm is None and e.reason for e in idf.evidence)


def test_a_blank_page_is_unknown_with_the_reason():
    idf = identify_form(Page(np.full((2339, 1654), 245, np.uint8), 200.0, "blank.png", 3), LAYOUTS)
    assert idf.status == "unknown" and "looks blank" in idf.reason
    _one_line(idf)


def test_one_candidate_that_fits_is_identified():
    demo = LAYOUTS[INDEX["demo"]]
    page = Page(_scan("demo", 300, 66, 90), 300.0, "card.jpg", 1)
    idf = identify_form(page, [demo])
    assert idf.identified and idf.index == 0 and idf.reason.startswith("fits 'Larkspur Lane water meter card'")
    # A card whose header was covered (a sticker over the title) does not fit its fingerprint.
    covered = page.gray.copy()
    reg = idf.registration
    x0, y0 = np.rint(reg.to_pixels([[demo.header.x, demo.header.y]])[0]).astype(int)
    x1, y1 = np.rint(reg.to_pixels([[demo.header.x + demo.header.w, demo.header.y + demo.header.h]])[0]).astype(int)
    up = np.rot90(covered, -1).copy()          # cover it on the upright page, turn it back
    up[y0:y1, x0:x1] = 235
    idf2 = identify_form(Page(np.ascontiguousarray(np.rot90(up, 1)), 300.0, "card.jpg", 1), [demo])
    assert idf2.status == "unknown" and "header" in idf2.reason


def test_line_share_measures_where_the_lines_are():
    demo = LAYOUTS[INDEX["demo"]]
    reg = register_page(Page(_scan("demo", 200, 67), 200.0, "card.png", 1), demo)
    ink = InkMap.of(reg.image, reg.scale)
    assert line_share(ink, reg.matrix, demo) > 0.97
    # the same layout 2 mm off, down and right: its lines fall beside the printed ones ...
    off = reg.matrix.copy()
    off[:, 2] += off[:, :2] @ [2.0, 2.0]
    assert line_share(ink, off, demo) < 0.4
    # ... and 2 mm off along x alone, only the vertical lines do (the horizontal ones lie on themselves)
    along = reg.matrix.copy()
    along[:, 2] += along[:, :2] @ [2.0, 0.0]
    assert 0.5 < line_share(ink, along, demo) < MIN_LINES
    assert line_share(ink, reg.matrix, dataclasses.replace(demo, fields=())) is None


def test_bad_arguments():
    page = Page(np.full((100, 100), 255, np.uint8), 200.0, "x.png", 1)
    with pytest.raises(ParameterError, match="layouts"):
        identify_form(page, [])
    with pytest.raises(RegistrationError, match=r"^x\.png page 1: page image must be \(H, W\) uint8"):
        identify_form(Page(np.zeros((10, 10), np.float32), 200.0, "x.png", 1), LAYOUTS)
