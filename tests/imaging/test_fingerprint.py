"""Header fingerprints: taken from a blank form, matched on filled scans; the same print matches in any
resolution, file kind or quarter turn, other print does not; ink is judged against the local paper."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from form_kit import HEADERS, kit_layouts, scan_kit_form
from synth import Transform, example_layout, render_form, render_page

from formread.errors import LayoutError, RegistrationError
from formread.form.layout import Region, parse_layout
from formread.imaging.fingerprint import (
    InkMap,
    blank_fingerprint,
    compare_header,
    fingerprint_match,
    grid_shape,
    header_densities,
    make_fingerprint,
    parse_fingerprint,
)
from formread.imaging.identify import MIN_HEADER
from formread.imaging.load import Page
from formread.imaging.register import register_page

RETURN, RENEWAL = kit_layouts(("return", "renewal"))


def _match(gray, dpi, layout, fingerprint):
    reg = register_page(Page(gray, float(dpi), "p.png", 1), layout)
    return fingerprint_match(InkMap.of(reg.image, reg.scale), reg.matrix, layout.header, fingerprint)


def test_grid_cells_are_about_3_mm_and_at_most_1024():
    assert grid_shape(Region(24, 18, 162, 20)) == (7, 54)          # the demo card's header
    rows, cols = grid_shape(Region(0, 0, 200, 150))
    assert rows * cols <= 1024 and abs(200 / cols - 150 / rows) < 1.0
    assert grid_shape(Region(0, 0, 2, 1)) == (1, 1)


def test_the_fingerprint_text_decodes_to_its_grid():
    fp = RETURN.header_fingerprint
    grid = parse_fingerprint(fp)
    assert grid.shape == grid_shape(RETURN.header) and fp.startswith(f"{grid.shape[0]}x{grid.shape[1]}:")
    assert grid.max() == 1.0 and grid.min() == 0.0                # scaled to the darkest cell; paper around the title
    with pytest.raises(LayoutError, match="malformed header fingerprint"):
        parse_fingerprint("3x3:00")


def test_the_same_blank_form_gives_the_same_fingerprint_in_any_quarter_turn():
    blank, _ = render_form(RETURN, 300, header_text=HEADERS["return"])
    upright = blank_fingerprint(Page(blank, 300.0, "blank.png", 1), RETURN)
    assert upright == RETURN.header_fingerprint
    for k in (1, 2, 3):   # numpy.rot90 turns are lossless, so the registered image is the same
        turned = np.ascontiguousarray(np.rot90(blank, k))
        assert blank_fingerprint(Page(turned, 300.0, "blank.png", 1), RETURN) == upright


@pytest.mark.parametrize("dpi,damage", [(200, "bilevel"), (200, "shadow"), (300, "clean"), (300, "jpeg")])
def test_filled_scans_match_their_own_header_and_not_the_other_one(dpi, damage):
    rng = np.random.default_rng(dpi + len(damage))
    kw = {"jpeg": dict(jpeg_quality=50), "shadow": dict(shadow=0.4, blur_px=1.2 * dpi / 200)}.get(damage, {})
    for layout, other in ((RETURN, RENEWAL), (RENEWAL, RETURN)):
        name = "return" if layout is RETURN else "renewal"
        gray, _ = scan_kit_form(name, dpi, rng, **kw)
        if damage == "bilevel":
            gray = np.where(gray >= 150, 255, 0).astype(np.uint8)
        own = _match(gray, dpi, layout, layout.header_fingerprint)
        # the two slips share the first line and differ in one word of the second
        wrong = _match(gray, dpi, layout, other.header_fingerprint)
        assert own >= 0.85 and wrong < MIN_HEADER, (own, wrong)


def test_a_header_without_print_matches_nothing():
    blank, _ = render_form(dataclasses.replace(RETURN, header=None), 200)   # the slip printed without its title
    reg = register_page(Page(blank, 200.0, "untitled.png", 1), RETURN)
    ink = InkMap.of(reg.image, reg.scale)
    share, match = compare_header(ink, reg.matrix, RETURN.header, RETURN.header_fingerprint)
    assert share == 0.0 and match == 0.0
    with pytest.raises(RegistrationError, match=r"header region .* holds no print"):
        make_fingerprint(ink, reg.matrix, RETURN.header)


def test_half_a_millimetre_of_misregistration_is_tolerated():
    gray, _ = scan_kit_form("return", 300, np.random.default_rng(3))
    reg = register_page(Page(gray, 300.0, "p.png", 1), RETURN)
    ink = InkMap.of(reg.image, reg.scale)
    for dx, dy in ((0.4, 0.0), (0.0, -0.4), (0.3, 0.3)):
        m = reg.matrix.copy()
        m[:, 2] += m[:, :2] @ [dx, dy]
        assert fingerprint_match(ink, m, RETURN.header, RETURN.header_fingerprint) >= 0.8


def test_blank_fingerprint_needs_a_header_region():
    plain = parse_layout(example_layout().to_toml().split("[form.header]")[0]
                         + "[[marks]]" + example_layout().to_toml().split("[[marks]]", 1)[1], "nohead.toml")
    assert plain.header is None
    blank, _ = render_form(plain, 200)
    with pytest.raises(LayoutError, match=r"^nohead\.toml: no \[form\.header\] region"):
        blank_fingerprint(Page(blank, 200.0, "blank.png", 1), plain)


def test_ink_map_ignores_a_shadow_that_a_global_threshold_takes_for_ink():
    # Known truth: thin strokes (grey 30 on paper 240) under a lighting ramp that darkens the right
    # side of the page to 40 % (paper 96 there, strokes 12).
    rng = np.random.default_rng(4)
    H, W = 400, 600
    truth = np.zeros((H, W), bool)
    for _ in range(60):
        r, c = rng.integers(0, H - 12), rng.integers(0, W - 40)
        truth[r:r + 3, c:c + 30] = True
    light = np.linspace(1.0, 0.4, W)[None, :]
    gray = np.clip(np.where(truth, 30.0, 240.0) * light + rng.normal(0, 3, (H, W)), 0, 255).astype(np.uint8)
    ink = InkMap.of(gray, 200 / 25.4)
    rr, cc = np.mgrid[0:H, 0:W]
    got = ink.at(np.stack([cc + 0.5, rr + 0.5], axis=-1))
    assert (got == truth).mean() > 0.995
    # Otsu's single global level (scikit-image's threshold_otsu, the reference implementation) takes
    # the shadowed paper for ink: the reason the ink map is local.
    from skimage.filters import threshold_otsu
    assert ((gray <= threshold_otsu(gray)) & ~truth).mean() > 0.1
    # points off the image are paper
    assert not ink.at(np.array([[-1.0, 5.0], [W + 2.0, 5.0], [5.0, H + 0.5]])).any()


def test_densities_measure_a_known_ink_share():
    # A header of 12 x 6 mm with its left half solid black: left cells 1, right cells 0.
    k = 10.0                                             # 254 dpi: whole pixels per mm
    gray = np.full((400, 400), 250, np.uint8)
    gray[200:260, 100:160] = 0
    matrix = np.array([[k, 0, 0], [0, k, 0]])
    dens = header_densities(InkMap.of(gray, k), matrix, Region(10, 20, 12, 6), shape=(2, 4))
    np.testing.assert_allclose(dens[:, :2], 1.0)
    np.testing.assert_allclose(dens[:, 2:], 0.0)


def test_a_page_of_the_example_card_matches_its_own_block_letter_header():
    # synth's default header (a row of block letters) fingerprints like printed text does
    layout = example_layout()
    blank, _ = render_form(layout, 300)
    fp = blank_fingerprint(Page(blank, 300.0, "blank.png", 1), layout)
    gray, _ = render_page(layout, 200, {"member": "12345678"}, np.random.default_rng(5),
                          Transform(rotation_deg=2.0, turn_deg=90, noise=6, margin_mm=4))
    assert _match(gray, 200, layout, fp) >= 0.9
