"""Quarter-turned demo cards in every input format (grey PNG, JPEG, bilevel Group 4 multi-page TIFF, PDF)
at 200 and 300 dpi: saved, loaded through formread.imaging.load, registered upright within half a
millimetre of the known truth, and identified among the test forms."""

from __future__ import annotations

import numpy as np
import pytest
from form_kit import INDEX_DEMO, kit_layouts, scan_demo_card
from PIL import Image

from formread.imaging.identify import identify_form
from formread.imaging.load import load_pages
from formread.imaging.register import register_page

LAYOUTS = kit_layouts()
DEMO = LAYOUTS[INDEX_DEMO]
CORNER_TOL_MM = 0.5


def _corner_error_mm(reg, truth: np.ndarray, dpi: float) -> float:
    regions = [f.region for f in DEMO.fields] + [DEMO.header]
    pts = np.vstack([r.corners() for r in regions])
    want = pts @ truth[:, :2].T + truth[:, 2]
    return float(np.hypot(*(reg.to_pixels(pts) - want).T).max()) / (dpi / 25.4)


def _save(fmt: str, grays: list[np.ndarray], path, dpi: int) -> None:
    ims = [Image.fromarray(g) for g in grays]
    if fmt == "tiff":      # a scanner's bilevel mode, CCITT Group 4, several pages in one file
        ims = [Image.fromarray(g >= 150) for g in grays]
        ims[0].save(path, save_all=True, append_images=ims[1:], compression="group4", dpi=(dpi, dpi))
    elif fmt == "pdf":
        ims[0].save(path, save_all=True, append_images=ims[1:], resolution=float(dpi))
    elif fmt == "jpeg":
        ims[0].save(path, quality=80, dpi=(dpi, dpi))
    else:
        ims[0].save(path, dpi=(dpi, dpi))


# PNG and JPEG hold one page each; the TIFF and the PDF hold all four quarter turns at 200 dpi, two at 300.
PLAN = {"png": (90,), "jpeg": (270,), "tiff": (0, 90, 180, 270), "pdf": (270, 180, 90, 0)}
PLAN_300 = {"png": (270,), "jpeg": (90,), "tiff": (90, 180), "pdf": (0, 270)}
SUFFIX = {"png": ".png", "jpeg": ".jpg", "tiff": ".tif", "pdf": ".pdf"}


@pytest.mark.parametrize("dpi", [200, 300])
@pytest.mark.parametrize("fmt", list(PLAN))
def test_quarter_turned_cards_in_each_format_register_and_are_identified(tmp_path, fmt, dpi):
    rng = np.random.default_rng(dpi * 10 + len(fmt))
    plan = PLAN[fmt] if dpi == 200 else PLAN_300[fmt]
    scans = [scan_demo_card(dpi, rng, turn_deg=t) for t in plan]
    path = tmp_path / f"cards{SUFFIX[fmt]}"
    _save(fmt, [g for g, _ in scans], path, dpi)
    pages = load_pages(path, pdf_dpi=dpi)
    assert len(pages) == len(plan)
    for page, turn, (gray, truth) in zip(pages, plan, scans):
        # PNG states dpi in pixels per metre; a PDF page is rendered from its size in points (+-1 pixel)
        assert np.abs(np.subtract(page.gray.shape, gray.shape)).max() <= (1 if fmt == "pdf" else 0)
        assert page.dpi == pytest.approx(dpi, rel=1e-4)
        if turn in (90, 270):
            assert page.gray.shape[1] > page.gray.shape[0]      # the portrait card lies landscape
        reg = register_page(page, DEMO)
        assert reg.turn_deg == turn and reg.dpi == pytest.approx(dpi, rel=1e-4)
        assert reg.image.shape == (page.gray.shape[::-1] if turn in (90, 270) else page.gray.shape)
        assert _corner_error_mm(reg, truth, dpi) <= CORNER_TOL_MM
        idf = identify_form(page, LAYOUTS)
        assert idf.identified and idf.index == INDEX_DEMO, idf.reason
        assert idf.registration.turn_deg == turn
