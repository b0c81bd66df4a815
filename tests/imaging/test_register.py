"""Registration and deskew on synthetic scans with known transforms (tests/imaging/synth.py).

Pages are rendered here, not downloaded: a test form with four 6 mm corner marks, a printed header,
boxed and open fields and stroke-drawn digits, then turned (within +-5 degrees), scaled (+-5 %),
shifted (up to 15 mm), blurred, noised and JPEG-compressed, at 150, 200, 300 and 600 dpi.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from synth import Transform, corners_px, degrade, example_layout, render_page, to_pixels, truth_matrix

from formread.errors import RegistrationError
from formread.form.layout import parse_layout
from formread.imaging.binarize import binarize
from formread.imaging.deskew import estimate_skew, rotate
from formread.imaging.load import Page
from formread.imaging.register import Registration, apply_affine, fit_affine, register_page

LAYOUT = example_layout()            # A5 portrait test card
DIGITS = {"member": "40719385", "day": "27", "reading": "5062", "litres": "318"}
MARGIN = 20.0                        # scanner bed around the paper, mm
CORNER_TOL_MM = 0.5
SKEW_TOL_DEG = 0.2


def _marks_inside(layout, dpi, tr, margin_mm) -> bool:
    """All mark squares land at least 1 mm inside the scanned image."""
    k = dpi / 25.4
    m = truth_matrix(layout, dpi, tr)
    W, H = (layout.width_mm + 2 * margin_mm) * k, (layout.height_mm + 2 * margin_mm) * k
    for mk in layout.marks:
        h = mk.size / 2
        p = to_pixels(m, [[mk.x - h, mk.y - h], [mk.x + h, mk.y - h], [mk.x + h, mk.y + h], [mk.x - h, mk.y + h]])
        if p.min() < k or (p[:, 0] > W - k).any() or (p[:, 1] > H - k).any():
            return False
    return True


def _random_cases():
    """(dpi, Transform) pairs: random rotation, scale, shift and damage, a fixed seed."""
    rng = np.random.default_rng(20261202)
    plan = [150] * 6 + [200] * 6 + [300] * 6 + [600] * 2
    cases = []
    for i, dpi in enumerate(plan):
        while True:
            ang = rng.uniform(0, 2 * math.pi)
            r = rng.uniform(0, 15.0)
            tr = Transform(rotation_deg=float(rng.uniform(-5, 5)), scale=float(rng.uniform(0.95, 1.05)),
                           shift_mm=(float(r * math.cos(ang)), float(r * math.sin(ang))),
                           upside_down=bool(i % 3 == 1), noise=float(rng.uniform(0, 14)),
                           blur_px=float(rng.uniform(0, 1.5) * dpi / 200), margin_mm=MARGIN,
                           jpeg_quality=int(rng.choice([50, 75, 95])) if i % 2 else None,
                           shadow=0.5 if i % 5 == 3 else 0.0)
            if _marks_inside(LAYOUT, dpi, tr, MARGIN):
                break
        cases.append((dpi, tr))
    return cases


CASES = _random_cases()


def _corner_error_mm(reg: Registration, truth, layout=LAYOUT) -> float:
    """Largest distance (mm) between recovered and true corners of every field and the header."""
    regions = [f.region for f in layout.fields] + ([layout.header] if layout.header else [])
    err = max(float(np.hypot(*(reg.to_pixels(r.corners()) - corners_px(truth, r)).T).max()) for r in regions)
    return err / (truth.dpi / 25.4)


@pytest.mark.parametrize("dpi,tr", CASES, ids=[f"{d}dpi-{i}" for i, (d, _) in enumerate(CASES)])
def test_transformed_page_registers_within_half_a_millimetre(dpi, tr):
    rng = np.random.default_rng(dpi)
    gray, truth = render_page(LAYOUT, dpi, DIGITS, rng, tr)
    reg = register_page(Page(gray, float(dpi), "synthetic.png", 1), LAYOUT)
    assert reg.rotated_180 == tr.upside_down
    assert reg.marks_found == 4
    assert _corner_error_mm(reg, truth) <= CORNER_TOL_MM
    assert abs(reg.skew_deg - truth.skew_deg) <= SKEW_TOL_DEG
    assert reg.residual_mm < 0.2
    # The image is the page turned the right way up: the matrix maps into it.
    assert reg.image.shape == gray.shape
    np.testing.assert_array_equal(reg.image, gray[::-1, ::-1] if tr.upside_down else gray)


def test_matrix_uses_continuous_pixel_coordinates():
    # DEVELOPERS.md contract: pixel (c, r) covers [c, c + 1) x [r, r + 1), so an exactly placed scan
    # has matrix = diag(dpi / 25.4) with no offset (what fields.py and the batch's boxes assume).
    gray, _ = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(11))
    reg = register_page(Page(gray, 200.0, "exact.png", 1), LAYOUT)
    k = 200 / 25.4
    np.testing.assert_allclose(reg.matrix, [[k, 0, 0], [0, k, 0]], atol=0.02)
    np.testing.assert_allclose(reg.mark_px, [[m.x * k, m.y * k] for m in LAYOUT.marks], atol=0.02)
    up, _ = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(11), Transform(upside_down=True))
    np.testing.assert_allclose(register_page(Page(up, 200.0, "up.png", 1), LAYOUT).matrix, reg.matrix, atol=0.02)


def test_all_four_cases_of_orientation_and_symmetric_marks():
    # Four identical corner squares: only the header and field borders tell the two ways round apart.
    for upside_down in (False, True):
        tr = Transform(rotation_deg=1.0, upside_down=upside_down, margin_mm=5, noise=5)
        gray, truth = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(1), tr)
        reg = register_page(Page(gray, 150.0, "card.png", 2), LAYOUT)
        assert reg.rotated_180 is upside_down
        assert _corner_error_mm(reg, truth) <= CORNER_TOL_MM


def test_three_marks_asymmetric_layout_upside_down():
    # Only three marks (no bottom-right): the geometry alone tells the orientation.
    text = LAYOUT.to_toml().replace("[[marks]]\nx = 139.0\ny = 201.0\nsize = 6.0\n", "")
    three = parse_layout(text, "three.toml")
    assert len(three.marks) == 3
    tr = Transform(rotation_deg=-2.0, upside_down=True, margin_mm=5)
    gray, truth = render_page(three, 150, DIGITS, np.random.default_rng(2), tr)
    reg = register_page(Page(gray, 150.0, "three.png", 1), three)
    assert reg.rotated_180 and reg.marks_found == 3
    assert _corner_error_mm(reg, truth, three) <= CORNER_TOL_MM


@pytest.mark.parametrize("covered", [0, 1, 2, 3])
def test_one_mark_covered_the_other_three_register(covered):
    tr = Transform(rotation_deg=2.5, scale=1.02, shift_mm=(-4, 6), margin_mm=10, cover_marks=(covered,),
                   noise=6)
    gray, truth = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(covered), tr)
    reg = register_page(Page(gray, 150.0, "covered.png", 1), LAYOUT)
    assert reg.marks_found == 3 and covered not in reg.mark_index
    assert reg.residual_mm == 0.0  # three points fix an affine transform exactly
    assert _corner_error_mm(reg, truth) <= CORNER_TOL_MM


@pytest.mark.parametrize("covered", [(0, 3), (1, 2), (2, 3)])
def test_two_marks_covered_is_refused_with_the_reason(covered):
    tr = Transform(rotation_deg=-1.0, margin_mm=5, cover_marks=covered)
    gray, _ = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(3), tr)
    with pytest.raises(RegistrationError,
                       match=r"^scan\.tif page 4: only 2 of the layout's 4 registration marks found"):
        register_page(Page(gray, 150.0, "scan.tif", 4), LAYOUT)


def test_blank_page_is_refused():
    gray = degrade(np.full((1300, 900), 240, np.uint8), np.random.default_rng(4), noise=8, jpeg_quality=70)
    with pytest.raises(RegistrationError,
                       match=r"^blank\.png page 1: no registration marks found \(the page looks blank\)"):
        register_page(Page(gray, 150.0, "blank.png", 1), LAYOUT)


def test_mark_cut_off_by_the_image_edge_is_not_used():
    # Shifted up-left with no scanner margin: the top marks are cut by the image edge.
    tr = Transform(shift_mm=(-4, -10))
    gray, truth = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(5), tr)
    with pytest.raises(RegistrationError, match=r"registration marks"):
        register_page(Page(gray, 150.0, "cut.png", 1), LAYOUT)


def test_wrong_layout_is_refused_not_misread():
    # A layout whose right and bottom marks sit 11 mm further in than the printed ones: never a wrong geometry.
    other = parse_layout(LAYOUT.to_toml().replace("x = 139.0", "x = 128.0").replace("y = 201.0", "y = 190.0"),
                         "other.toml")
    gray, _ = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(6), Transform(margin_mm=5))
    with pytest.raises(RegistrationError, match=r"^other\.png page 1: "):
        register_page(Page(gray, 150.0, "other.png", 1), other)


def test_a_file_with_a_wrong_resolution_registers_at_the_one_its_size_implies():
    # Scanned at 200 dpi, but the file stated none and the loader assumed 300 (its documented fallback).
    gray, truth = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(10), Transform(rotation_deg=1.0))
    reg = register_page(Page(gray, 300.0, "nodpi.png", 1), LAYOUT)
    assert reg.dpi == 200.0 and _corner_error_mm(reg, truth) <= CORNER_TOL_MM
    # A crop that is not the form's page size gives no such second chance.
    with pytest.raises(RegistrationError, match=r"^crop\.png page 1: no registration marks found \(no solid "
                                                r"squares of 6 mm at 300 dpi\)$"):
        register_page(Page(gray[:, :1000], 300.0, "crop.png", 1), LAYOUT)


def test_fit_affine_recovers_a_known_transform_and_residual_is_in_mm():
    rng = np.random.default_rng(7)
    m = np.array([[11.7, -0.4, 30.0], [0.5, 11.9, -12.0]])
    src = rng.uniform(0, 200, (6, 2))
    np.testing.assert_allclose(fit_affine(src, apply_affine(m, src)), m, atol=1e-9)


def test_registration_of_a_shadowed_page_and_of_a_page_with_square_handwriting():
    # Uneven lighting (one side darkened by 60 %) and noise.
    tr = Transform(rotation_deg=3.0, shadow=0.6, noise=8, margin_mm=8)
    gray, truth = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(8), tr)
    reg = register_page(Page(gray, 200.0, "shadow.png", 1), LAYOUT)
    assert reg.marks_found == 4 and _corner_error_mm(reg, truth) <= CORNER_TOL_MM
    # A filled square blot the size of a mark inside a field does not confuse the marks.
    blotted = gray.copy()
    c = to_pixels(truth.matrix, [[75.0, 53.0]])[0].astype(int)
    s = int(6.0 * 200 / 25.4 / 2)
    blotted[c[1] - s:c[1] + s, c[0] - s:c[0] + s] = 20
    reg = register_page(Page(blotted, 200.0, "blot.png", 1), LAYOUT)
    assert reg.marks_found == 4 and _corner_error_mm(reg, truth) <= CORNER_TOL_MM


@pytest.mark.parametrize("angle", [-4.3, -1.2, 0.0, 0.7, 2.9, 4.8])
def test_estimate_skew_from_printed_lines(angle):
    tr = Transform(rotation_deg=angle, margin_mm=10, noise=5)
    gray, _ = render_page(LAYOUT, 150, DIGITS, np.random.default_rng(9), tr)
    est = estimate_skew(binarize(gray, "otsu", dpi=150))
    assert abs(est - angle) <= SKEW_TOL_DEG
    # Turning the page back by the estimate leaves (almost) no skew.
    back = rotate(gray, -est)
    assert abs(estimate_skew(binarize(back, "otsu", dpi=150))) <= SKEW_TOL_DEG


def test_estimate_skew_of_too_little_ink_is_zero():
    assert estimate_skew(np.zeros((100, 100), bool)) == 0.0


# ------------------------------------------------------------------------------------- quarter turns

def _turn_cases():
    """(dpi, Transform) pairs in every quarter turn: random skew, scale, shift and damage, a fixed seed."""
    rng = np.random.default_rng(20261203)
    cases = []
    for i, dpi in enumerate([150, 200, 300] * 4):
        turn = (0, 90, 180, 270)[i % 4]
        while True:
            ang = rng.uniform(0, 2 * math.pi)
            r = rng.uniform(0, 10.0)
            tr = Transform(rotation_deg=float(rng.uniform(-4, 4)), scale=float(rng.uniform(0.96, 1.04)),
                           shift_mm=(float(r * math.cos(ang)), float(r * math.sin(ang))), turn_deg=turn,
                           noise=float(rng.uniform(0, 10)), blur_px=float(rng.uniform(0, 1.2) * dpi / 200),
                           margin_mm=MARGIN, jpeg_quality=int(rng.choice([60, 90])) if i % 3 == 0 else None)
            if _marks_inside(LAYOUT, dpi, tr, MARGIN):
                break
        cases.append((dpi, tr))
    return cases


TURN_CASES = _turn_cases()


@pytest.mark.parametrize("dpi,tr", TURN_CASES,
                         ids=[f"{d}dpi-turn{t.turn_deg}-{i}" for i, (d, t) in enumerate(TURN_CASES)])
def test_a_page_in_any_quarter_turn_registers_upright(dpi, tr):
    rng = np.random.default_rng(dpi + tr.turn_deg)
    gray, truth = render_page(LAYOUT, dpi, DIGITS, rng, tr)
    if tr.turn_deg in (90, 270):
        assert gray.shape[1] > gray.shape[0]  # a portrait form turned a quarter is a landscape image
    reg = register_page(Page(gray, float(dpi), "turned.png", 1), LAYOUT)
    assert reg.turn_deg == tr.turn_deg and reg.rotated_180 == (tr.turn_deg == 180)
    assert reg.marks_found == 4 and reg.residual_mm < 0.2
    assert _corner_error_mm(reg, truth) <= CORNER_TOL_MM
    assert abs(reg.skew_deg - truth.skew_deg) <= SKEW_TOL_DEG
    # The image is the scan turned back, as numpy.rot90 turns it (k quarter turns counter-clockwise).
    np.testing.assert_array_equal(reg.image, np.rot90(gray, -tr.turn_deg // 90))


def test_turn_points_follow_numpy_rot90():
    # Reference: numpy.rot90(a, -k) moves the element at (row, col) to where turn_points puts (x, y) = (col, row).
    from formread.imaging.register import turn_points

    a = np.arange(5 * 7).reshape(5, 7)
    pts = np.array([[0, 0], [6, 0], [3, 2], [6, 4], [1, 3]], dtype=float)   # (x = col, y = row)
    for turn in (0, 90, 180, 270):
        b = np.rot90(a, -turn // 90)
        q = turn_points(pts, turn, a.shape).astype(int)
        for (x, y), (u, v) in zip(pts.astype(int), q):
            assert b[v, u] == a[y, x]


@pytest.mark.parametrize("turn", [90, 270])
def test_three_marks_quarter_turned(turn):
    # Three marks: the geometry alone gives the turn; the matrix maps into the upright image.
    text = LAYOUT.to_toml().replace("[[marks]]\nx = 139.0\ny = 201.0\nsize = 6.0\n", "")
    three = parse_layout(text, "three.toml")
    tr = Transform(rotation_deg=1.5, turn_deg=turn, margin_mm=5, noise=4)
    gray, truth = render_page(three, 200, DIGITS, np.random.default_rng(turn), tr)
    reg = register_page(Page(gray, 200.0, "three.png", 1), three)
    assert reg.turn_deg == turn and reg.marks_found == 3
    assert _corner_error_mm(reg, truth, three) <= CORNER_TOL_MM


def test_a_quarter_turned_file_with_a_wrong_resolution_registers_at_the_one_its_size_implies():
    # A landscape image of a portrait form: the page-size guess swaps the sides.
    gray, truth = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(12), Transform(turn_deg=90))
    reg = register_page(Page(gray, 300.0, "nodpi.png", 1), LAYOUT)
    assert reg.dpi == 200.0 and reg.turn_deg == 90 and _corner_error_mm(reg, truth) <= CORNER_TOL_MM


def test_a_square_form_in_each_quarter_turn_is_told_by_its_content():
    # Four marks on a square: every quarter turn fits the marks; field borders and the header decide.
    square = example_layout(160.0, 160.0)
    for turn in (0, 90, 180, 270):
        tr = Transform(rotation_deg=-1.0, turn_deg=turn, margin_mm=5, noise=5)
        gray, truth = render_page(square, 150, DIGITS, np.random.default_rng(turn + 1), tr)
        reg = register_page(Page(gray, 150.0, "square.png", 1), square)
        assert reg.turn_deg == turn
        assert _corner_error_mm(reg, truth, square) <= CORNER_TOL_MM


def test_a_shared_cache_gives_the_same_registration():
    # identify_form shares the reduced copy between layouts; the answer must not change.
    gray, _ = render_page(LAYOUT, 200, DIGITS, np.random.default_rng(13), Transform(turn_deg=270, rotation_deg=2))
    page = Page(gray, 200.0, "cache.png", 1)
    cache: dict = {}
    other = parse_layout(LAYOUT.to_toml().replace("x = 139.0", "x = 128.0"), "other.toml")
    with pytest.raises(RegistrationError):
        register_page(page, other, cache=cache)
    a, b = register_page(page, LAYOUT, cache=cache), register_page(page, LAYOUT)
    np.testing.assert_array_equal(a.matrix, b.matrix)
    np.testing.assert_array_equal(a.image, b.image)
    assert a.turn_deg == b.turn_deg == 270
