"""Proof pictures and drafted layouts on drawn pages."""

from __future__ import annotations

import numpy as np
import pytest
from digit_pages import S, blank_page, draw_boxes, draw_rect
from synth import Transform, corners_px, example_layout, render_page

from formread.errors import LayoutError
from formread.form.layout import parse_layout
from formread.imaging.draft import draft_layout
from formread.imaging.load import Page
from formread.imaging.pipeline import process_page
from formread.imaging.proof import PALETTE, render_proof


def _marks(page: np.ndarray, w_mm: float, h_mm: float, size: float = 6.0, inset: float = 9.0) -> None:
    for x, y in [(inset, inset), (w_mm - inset, inset), (inset, h_mm - inset), (w_mm - inset, h_mm - inset)]:
        page[int(round((y - size / 2) * S)):int(round((y + size / 2) * S)),
             int(round((x - size / 2) * S)):int(round((x + size / 2) * S))] = 0


def _near(img: np.ndarray, colour, tol: int = 60) -> np.ndarray:
    return np.abs(img.astype(int) - colour).sum(axis=2) < tol


# ----------------------------------------------------------------------------- proof

@pytest.fixture(scope="module")
def proof_case():
    layout = example_layout()
    gray, truth = render_page(layout, 200, {"member": "31415926", "reading": "271"}, np.random.default_rng(4),
                              Transform(rotation_deg=2.0, shift_mm=(-1.0, 1.0)))
    pd = process_page(Page(gray, 200.0, "p.png", 1), layout)
    return layout, truth, pd


def test_proof_draws_each_field_where_it_is_on_the_page(proof_case):
    layout, truth, pd = proof_case
    img = np.asarray(render_proof(pd, layout, scale=1.0))
    assert img.shape[:2] == pd.registration.image.shape
    blue = _near(img, PALETTE["field"])
    for f in layout.fields:
        c = corners_px(truth, f.region)
        # the middle of the field's top edge is drawn in the field colour (within 2 px)
        mx, my = (c[0] + c[1]) / 2
        assert blue[int(my) - 2:int(my) + 3, int(mx) - 2:int(mx) + 3].any(), f.name
    # eight amber digit boxes inside the member field, none far outside any field
    amber = _near(img, PALETTE["digit"])
    c = corners_px(truth, layout.field("member").region)
    x0, x1 = int(c[:, 0].min()) - 3, int(c[:, 0].max()) + 3
    y0, y1 = int(c[:, 1].min()) - 3, int(c[:, 1].max()) + 3
    assert amber[y0:y1, x0:x1].sum() > 200
    # the empty 'litres' field: grey dots for blank cells, no amber
    c = corners_px(truth, layout.field("litres").region)
    region = (slice(int(c[:, 1].min()), int(c[:, 1].max())), slice(int(c[:, 0].min()), int(c[:, 0].max())))
    assert not amber[region].any() and _near(img, PALETTE["blank"], 20)[region].sum() >= 6


def test_proof_marks_a_doubtful_field_in_its_own_colour(proof_case):
    layout, truth, pd = proof_case
    fd = pd.fields["day"]
    fd.doubtful, fd.reason = True, "test reason"
    try:
        img = np.asarray(render_proof(pd, layout, scale=1.0))
    finally:
        fd.doubtful, fd.reason = False, None
    c = corners_px(truth, layout.field("day").region)
    mx, my = (c[0] + c[1]) / 2
    assert _near(img, PALETTE["doubt"])[int(my) - 2:int(my) + 3, int(mx) - 2:int(mx) + 3].any()


def test_proof_scale_sets_the_picture_size(proof_case):
    layout, _, pd = proof_case
    H, W = pd.registration.image.shape
    assert render_proof(pd, layout, scale=0.25).size == (round(W * 0.25), round(H * 0.25))


# ----------------------------------------------------------------------------- draft

def test_draft_joins_a_row_of_separate_boxes_into_one_boxed_field():
    W, H = 120.0, 90.0
    page = blank_page(W, H)
    _marks(page, W, H)
    for k in range(5):                              # five 5 x 7 mm boxes, 2 mm apart
        draw_rect(page, 30.0 + 7.0 * k, 30.0, 5.0, 7.0)
    draw_boxes(page, 30.0, 50.0, 24.0, 6.0, 4)        # four touching cells
    draw_rect(page, 30.0, 65.0, 60.0, 10.0)           # an open field
    draw_rect(page, 100.0, 30.0, 6.0, 7.0)            # a lone box
    lay = draft_layout(Page(page, 300.0, "form.png", 1))
    kinds = {(round(f.x), round(f.y)): (f.kind, f.cells, f.max_digits) for f in lay.fields}
    assert kinds[(29, 30)] == ("boxed", 5, 5)       # x from half a gap before the first box
    assert kinds[(30, 50)] == ("boxed", 4, 4)
    assert kinds[(30, 65)][0] == "open" and kinds[(30, 65)][2] >= 6
    assert kinds[(100, 30)] == ("boxed", 1, 1)
    row = next(f for f in lay.fields if round(f.y) == 30 and f.cells == 5)
    # each cell's centre is a printed box's centre (draw_rect puts its 0.3 mm lines right of x)
    centres = [row.x + (k + 0.5) * row.w / 5 for k in range(5)]
    assert np.allclose(centres, [32.65 + 7.0 * k for k in range(5)], atol=0.1)
    assert [f.name for f in lay.fields] == ["field_1", "field_2", "field_3", "field_4"]
    assert len(lay.marks) == 4
    again = parse_layout(lay.to_toml(), "draft")  # the draft is a valid layout
    assert [f.cells for f in again.fields] == [f.cells for f in lay.fields]


def test_draft_ignores_a_panel_around_the_fields():
    W, H = 120.0, 90.0
    page = blank_page(W, H)
    _marks(page, W, H)
    draw_rect(page, 20.0, 20.0, 80.0, 38.0)          # a printed panel
    draw_boxes(page, 30.0, 30.0, 30.0, 8.0, 5)
    lay = draft_layout(Page(page, 300.0, "form.png", 1))
    assert [(f.kind, f.cells) for f in lay.fields] == [("boxed", 5)]


def test_draft_without_fields_is_refused():
    W, H = 120.0, 90.0
    page = blank_page(W, H)
    _marks(page, W, H)
    with pytest.raises(LayoutError, match="empty.png page 1: no printed field rectangles"):
        draft_layout(Page(page, 300.0, "empty.png", 1))


def test_draft_without_marks_is_refused():
    page = blank_page(120.0, 90.0)
    draw_rect(page, 30.0, 30.0, 40.0, 8.0)
    with pytest.raises(LayoutError, match="nomarks.png page 2: only 0 solid corner squares"):
        draft_layout(Page(page, 300.0, "nomarks.png", 2))


def test_draft_of_the_demo_card_finds_its_fields():
    # the demo's own blank card (formread.demo): every layout field is found within 0.5 mm
    from formread.demo.card import LAYOUT_PATH, read_card_layout, render_card
    from formread.form.layout import load_layout

    card = render_card(read_card_layout(LAYOUT_PATH), 200)
    lay = draft_layout(Page(card, 200.0, "card.png", 1))
    assert len(lay.marks) == 4 and all(type(m.x) is float for m in lay.marks)
    for f in load_layout(LAYOUT_PATH).fields:
        match = [d for d in lay.fields if abs(d.x - f.x) < 0.5 and abs(d.y - f.y) < 0.5]
        assert len(match) == 1, f.name
        d = match[0]
        assert d.kind == f.kind and d.cells == f.cells and abs(d.w - f.w) < 0.6 and abs(d.h - f.h) < 0.6
