"""The page pipeline on synthetic scans (tests/imaging/synth.py): crops land on their fields."""

from __future__ import annotations

import numpy as np
import pytest
from digit_pages import FakeField, FakeRegistration
from synth import Transform, corners_px, example_layout, render_page

from formread.errors import RegistrationError, SegmentationError
from formread.imaging.fields import cut_field
from formread.imaging.load import Page
from formread.imaging.pipeline import STEPS, process_page

DIGITS = {"member": "12345678", "day": "31", "reading": "40571", "litres": "  12 4"}


@pytest.fixture(scope="module")
def scanned():
    layout = example_layout()
    rng = np.random.default_rng(5)
    tr = Transform(rotation_deg=1.8, scale=1.01, shift_mm=(2.0, -1.5), noise=6, blur_px=0.6, upside_down=True)
    gray, truth = render_page(layout, 300, DIGITS, rng, tr)
    timings: dict = {}
    pd = process_page(Page(gray, 300.0, "card.png", 1), layout, timings=timings)
    return layout, truth, pd, timings


def test_field_crops_land_on_their_fields(scanned):
    layout, truth, pd, _ = scanned
    assert list(pd.fields) == layout.field_names
    mm = 300 / 25.4
    for f in layout.fields:
        fd = pd.fields[f.name]
        x0, y0, x1, y1 = fd.rect
        got = fd.to_page([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])
        want = corners_px(truth, f.region)     # the renderer's exact geometry of the upright page
        assert np.abs(got - want).max() < 0.3 * mm, f.name


def test_digits_are_found_where_they_were_written(scanned):
    layout, truth, pd, _ = scanned
    assert not pd.fields["member"].blank.any()
    assert pd.fields["day"].blank.tolist() == [False, False]
    assert pd.fields["litres"].blank.tolist() == [c == " " for c in DIGITS["litres"]]
    # the open field: a candidate with 5 digits whose boxes sit on the drawn digits
    fd = pd.fields["reading"]
    five = [c for c in fd.candidates if len(c.boxes) == 5]
    assert five
    crop_mm = fd.to_page  # crop px -> page px; compare in page px via the truth matrix
    true_px = []
    for (bx0, by0, bx1, by1) in truth.digit_boxes["reading"]:
        p = corners_px(truth, type(layout.fields[0].region)(bx0, by0, bx1 - bx0, by1 - by0))
        true_px.append((p[:, 0].min(), p[:, 1].min(), p[:, 0].max(), p[:, 1].max()))
    best = five[0]
    for box, t in zip(best.boxes, true_px):
        q = crop_mm([[box[0], box[1]], [box[2], box[1]], [box[2], box[3]], [box[0], box[3]]])
        got = (q[:, 0].min(), q[:, 1].min(), q[:, 0].max(), q[:, 1].max())
        # the renderer's boxes are the writing slots (a '1' fills only part of its slot):
        # the found ink lies inside its slot and covers its middle
        cx, cy = (got[0] + got[2]) / 2, (got[1] + got[3]) / 2
        tol = 0.6 * 300 / 25.4  # half the pen width plus the slant of the turned page
        assert t[0] - tol <= got[0] and got[2] <= t[2] + tol and t[1] <= cy <= t[3]
        assert got[0] <= (t[0] + t[2]) / 2 + 0.3 * (t[2] - t[0]) and cx >= t[0]
    assert all(c.digits.shape[1:] == (1, 28, 28) and c.digits.dtype == np.float32 for c in fd.candidates)


def test_timings_are_gathered_per_step(scanned):
    *_, timings = scanned
    assert set(timings) == set(STEPS) - {"load"}
    assert all(v >= 0 for v in timings.values())


def test_a_blank_page_is_refused_by_registration():
    layout = example_layout()
    blank = np.full((int(210 * 150 / 25.4), int(148 * 150 / 25.4)), 255, np.uint8)
    with pytest.raises(RegistrationError, match="blank.png page 2"):
        process_page(Page(blank, 150.0, "blank.png", 2), layout)


def test_a_blacked_out_field_is_doubtful_and_the_page_goes_on():
    layout = example_layout()
    gray, truth = render_page(layout, 200, {"member": "1234"}, np.random.default_rng(1))
    p = corners_px(truth, layout.field("day").region)
    gray[int(p[:, 1].min()):int(p[:, 1].max()), int(p[:, 0].min()):int(p[:, 0].max())] = 10
    pd = process_page(Page(gray, 200.0, "inked.png", 1), layout)
    day = pd.fields["day"]
    assert day.doubtful and "day" in day.reason and day.candidates == []
    assert day.image.shape == (110, 130) and day.image[20:90, 20:110].mean() < 50  # the crop, for the reviewer
    assert not pd.fields["member"].doubtful and pd.fields["member"].blank.tolist()[:4] == [False] * 4


def test_a_field_off_the_scanned_image_cannot_be_cut():
    page = np.full((300, 300), 255, np.uint8)
    reg = FakeRegistration(np.array([[10.0, 0.0, 0.0], [0.0, 10.0, 0.0]]), page)
    with pytest.raises(SegmentationError, match="'far'.*off the scanned page"):
        cut_field(reg, FakeField("far", "open", 20.0, 20.0, 40.0, 8.0))


@pytest.mark.parametrize("tr,method", [(Transform(shadow=0.6, noise=5), "sauvola"),
                                       (Transform(blur_px=1.2, noise=10, jpeg_quality=50), "otsu")])
def test_uneven_light_and_a_poor_scan_still_find_the_digits(tr, method):
    layout = example_layout()
    gray, _ = render_page(layout, 200, DIGITS, np.random.default_rng(1), tr)
    pd = process_page(Page(gray, 200.0, "poor.png", 1), layout)
    assert pd.method == method
    assert not pd.fields["member"].blank.any()
    assert pd.fields["litres"].blank.tolist() == [c == " " for c in DIGITS["litres"]]
    assert len(pd.fields["reading"].candidates[0].boxes) == 5


def test_a_bilevel_page_reads_like_a_grey_one():
    layout = example_layout()
    gray, _ = render_page(layout, 300, DIGITS, np.random.default_rng(5), Transform(rotation_deg=-1.0, noise=4))
    bilevel = np.where(gray < 150, 0, 255).astype(np.uint8)      # a scanner's bilevel mode
    pd = process_page(Page(bilevel, 300.0, "g4.tif", 1), layout)
    assert not pd.fields["member"].blank.any()
    assert pd.fields["litres"].blank.tolist() == [c == " " for c in DIGITS["litres"]]
    assert len(pd.fields["reading"].candidates[0].boxes) == 5
