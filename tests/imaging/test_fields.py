"""Field cutting: layout-aligned crops at a fixed resolution, their binarisation, the line-run filter."""

from __future__ import annotations

import math

import numpy as np
import pytest
from digit_pages import FakeField, FakeRegistration
from scipy import ndimage

from formread.imaging.affine import warp_bilinear
from formread.imaging.binarize import ink_map, page_ink_level, threshold_otsu
from formread.imaging.fields import crop_to_page, cut_field
from formread.imaging.lines import _runs_open

FIELD = FakeField("meter", "open", 30.0, 40.0, 50.0, 10.0)


def _matrix(dpi: float, angle_deg: float = 0.0, shift=(0.0, 0.0), scale: float = 1.0) -> np.ndarray:
    """Layout mm -> page px: turn by ``angle_deg`` (counter-clockwise on screen), scale, shift (px)."""
    k = dpi / 25.4 * scale
    a = math.radians(angle_deg)
    return np.array([[k * math.cos(a), k * math.sin(a), shift[0]], [-k * math.sin(a), k * math.cos(a), shift[1]]])


def _page_with_dots(matrix: np.ndarray, dots_mm, size=(1400, 1400), radius_px: float = 4.0) -> np.ndarray:
    """A white page with round black dots at layout mm positions (continuous px through ``matrix``)."""
    page = np.full(size, 255, np.uint8)
    yy, xx = np.mgrid[0:size[0], 0:size[1]]
    for x, y in dots_mm:
        px, py = matrix @ [x, y, 1.0]
        page[(xx + 0.5 - px) ** 2 + (yy + 0.5 - py) ** 2 <= radius_px ** 2] = 0
    return page


@pytest.mark.parametrize("dpi,angle", [(300, 0.0), (200, 2.5), (300, -4.0)])
def test_points_land_where_the_layout_says(dpi, angle):
    m = _matrix(dpi, angle, shift=(40.0, 25.0))
    dots = [(35.0, 43.0), (70.0, 47.5), (52.5, 45.0)]
    reg = FakeRegistration(m, _page_with_dots(m, dots))
    crop = cut_field(reg, FIELD, px_per_mm=10.0, margin_mm=1.5)
    assert crop.gray.shape == (130, 530)          # (10 + 3) mm x (50 + 3) mm at 10 px/mm
    lab, n = ndimage.label(crop.ink)
    assert n == 3
    found = sorted(ndimage.center_of_mass(crop.ink, lab, range(1, 4)), key=lambda p: p[1])
    for (r, c), (x, y) in zip(found, sorted(dots)):
        # pixel (c, r) has its centre at mm (x0 + (c + 0.5) / 10, y0 + (r + 0.5) / 10)
        assert abs(crop.x0_mm + (c + 0.5) / 10 - x) < 0.08 and abs(crop.y0_mm + (r + 0.5) / 10 - y) < 0.08
    # and back to the page: crop_to_page agrees with the matrix
    (r, c) = found[0]
    page_pt = crop_to_page(crop, [[c + 0.5, r + 0.5]])[0]
    want = m @ [sorted(dots)[0][0], sorted(dots)[0][1], 1.0]
    assert np.hypot(*(page_pt - want)) < 0.08 * dpi / 25.4


def test_crops_do_not_depend_on_the_scan_resolution():
    dots = [(40.0, 44.0), (60.0, 46.0)]
    inks = []
    for dpi in (200, 300, 400):
        m = _matrix(dpi)
        crop = cut_field(FakeRegistration(m, _page_with_dots(m, dots, size=(1700, 1700), radius_px=0.6 * dpi / 25.4)),
                         FIELD)
        inks.append(crop.ink)
    assert inks[0].shape == inks[1].shape == inks[2].shape
    for other in inks[1:]:
        inter, union = (inks[0] & other).sum(), (inks[0] | other).sum()
        assert inter / union > 0.85


def test_blank_paper_crop_holds_no_ink():
    rng = np.random.default_rng(0)
    gray = np.clip(rng.normal(235, 4, (130, 530)), 0, 255).astype(np.uint8)
    assert not ink_map(gray).any()


def test_sauvola_follows_a_shadow_that_a_single_level_cannot():
    # strokes on paper that darkens from left (250) to right (120); ink is 60 grey levels under the paper
    paper = np.linspace(250, 120, 530)[None, :].repeat(130, axis=0)
    strokes = np.zeros((130, 530), bool)
    for c in range(30, 520, 60):
        strokes[30:100, c:c + 5] = True
    gray = np.clip(paper - 60 * strokes, 0, 255).astype(np.uint8)
    local = ink_map(gray, method="sauvola", level=200.0)
    flat = ink_map(gray, level=200.0)
    iou = lambda a: (a & strokes).sum() / (a | strokes).sum()  # noqa: E731
    assert iou(local) > 0.8
    assert iou(flat) < 0.5        # one level: the shadowed half of the paper turns to ink


def test_field_off_the_image_is_cut_as_paper_when_mostly_inside():
    m = _matrix(300, shift=(-370.0, 0.0))   # the field's left 1.35 mm (of 50) lie left of the image
    page = np.zeros((1000, 1000), np.uint8)  # an all-black image: anything white came from outside it
    crop = cut_field(FakeRegistration(m, page), FakeField("edge", "open", 30.0, 10.0, 50.0, 10.0),
                     margin_mm=1.5)
    assert crop.gray[:, :20].min() == 255 and crop.gray[:, 40:].max() == 0


def test_line_runs_equal_scipy_binary_opening():
    # reference: scipy.ndimage.binary_opening with a line structuring element
    rng = np.random.default_rng(1)
    for _ in range(100):
        a = rng.random((int(rng.integers(1, 25)), int(rng.integers(1, 80)))) < rng.uniform(0.3, 0.95)
        length = int(rng.integers(2, 20))
        for axis, shape in ((1, (1, length)), (0, (length, 1))):
            ref = ndimage.binary_opening(a, structure=np.ones(shape, bool))
            assert np.array_equal(_runs_open(a, length, axis), ref)


def test_crop_samples_the_page_bilinearly():
    # reference: bilinear interpolation written out by hand at the page position of each crop pixel
    rng = np.random.default_rng(2)
    page = rng.integers(0, 256, (600, 600)).astype(np.uint8)
    m = _matrix(250, 3.0, shift=(20.0, 15.0))
    crop = cut_field(FakeRegistration(m, page), FakeField("grid", "open", 20.0, 20.0, 20.0, 8.0))
    for r, c in [(0, 0), (17, 40), (50, 199), (109, 229), (64, 3)]:
        x = crop.x0_mm + (c + 0.5) / crop.px_per_mm
        y = crop.y0_mm + (r + 0.5) / crop.px_per_mm
        px, py = m @ [x, y, 1.0] - 0.5          # continuous -> pixel-centre (index) coordinates
        i, j = int(np.floor(py)), int(np.floor(px))
        fy, fx = py - i, px - j
        p = page.astype(float)
        want = ((1 - fy) * ((1 - fx) * p[i, j] + fx * p[i, j + 1])
                + fy * ((1 - fx) * p[i + 1, j] + fx * p[i + 1, j + 1]))
        assert abs(int(crop.gray[r, c]) - want) <= 1.0


@pytest.mark.parametrize("seed", range(6))
def test_warp_equals_scipy_affine_transform_inside_and_at_the_border(seed):
    # reference: scipy.ndimage.affine_transform, order 1, mode "constant" (scipy's own definition of
    # where the image stops); offsets of up to 8 px put part of the output off the image
    rng = np.random.default_rng(seed)
    h, w = int(rng.integers(30, 120)), int(rng.integers(30, 160))
    image = rng.integers(0, 256, (h, w)).astype(np.float32)
    a, k = rng.normal(0.0, 0.04), rng.uniform(0.7, 1.4)
    lin = k * np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    offset = (float(rng.uniform(-8, 8)), float(rng.uniform(-8, 8))) if seed % 2 else (2.0, -1.0)
    shape = (int(rng.integers(10, h + 10)), int(rng.integers(10, w + 10)))
    want = ndimage.affine_transform(image, lin, offset=offset, output_shape=shape, order=1, mode="constant",
                                    cval=255.0, prefilter=False)
    got = warp_bilinear(image, lin, offset, shape, cval=255.0)
    assert got.shape == shape and got.dtype == np.float32
    assert np.abs(got - want).max() < 1e-3
    assert (want == 255.0).any() == (got == 255.0).any()


def test_page_level_sits_in_the_middle_of_a_bilevel_page_gap():
    # Otsu's between-class variance is the same for every level between 0 and 255 on a bilevel
    # page (common practice: Otsu 1979, the criterion depends on the classes only); the level is
    # put in the middle, and on a grey page (no empty gap above Otsu's level) it is Otsu's own
    rng = np.random.default_rng(4)
    bilevel = np.where(rng.random((300, 300)) < 0.05, 0, 255).astype(np.uint8)
    assert page_ink_level(bilevel) == 127.5
    grey = np.clip(rng.normal(200, 30, (300, 300)), 0, 255).astype(np.uint8)
    assert page_ink_level(grey) == min(threshold_otsu(grey[::3, ::3]),
                                       0.8 * np.percentile(grey[::3, ::3], 99, method="inverted_cdf"))


@pytest.mark.parametrize("angle", [0.3, 0.7, -0.5])
def test_a_thin_bilevel_line_stays_whole_in_the_crop(angle):
    # a bilevel 200 dpi scan of a printed line one pixel thick, slightly askew: resampling to the
    # crop grid turns it into greys; with the page's level it must stay one unbroken line
    m = _matrix(200, angle, shift=(30.0, 20.0))
    page = np.full((900, 900), 255, np.uint8)
    for c in range(page.shape[1]):                  # the line y = 45 mm, drawn pixel by pixel
        x_mm = (c + 0.5 - m[0, 2]) / m[0, 0]
        r = int(np.floor(m[1, 0] * x_mm + m[1, 1] * 45.0 + m[1, 2]))
        if 0 <= r < page.shape[0]:
            page[r, c] = 0
    reg = FakeRegistration(m, page)
    crop = cut_field(reg, FIELD, px_per_mm=10.0, margin_mm=1.5, level=page_ink_level(page))
    lab, n = ndimage.label(crop.ink, np.ones((3, 3), bool))
    assert n == 1
    cols = np.flatnonzero(crop.ink.any(axis=0))
    assert cols.size == crop.ink.shape[1]           # it covers every column of the crop
