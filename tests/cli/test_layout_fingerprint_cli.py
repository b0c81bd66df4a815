"""``formread layout fingerprint``: the header's fingerprint from a blank scan, written into the layout
file with its comments kept; ``layout draft`` writes a header region and its fingerprint; one-line errors."""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
from clikit import one_line_error
from PIL import Image
from typer.testing import CliRunner

from formread.cli.main import app
from formread.form.layout import load_layout

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "imaging"))
from form_kit import HEADERS, kit_layouts, scan_kit_form  # noqa: E402
from synth import render_form  # noqa: E402

from formread.imaging.fingerprint import blank_fingerprint  # noqa: E402
from formread.imaging.identify import identify_form  # noqa: E402
from formread.imaging.load import Page, load_pages  # noqa: E402

runner = CliRunner()
DPI = 200
RETURN, RENEWAL = kit_layouts(("return", "renewal"), fingerprints=False)


def _save(gray, path: Path) -> Path:
    Image.fromarray(gray).save(path, dpi=(DPI, DPI))
    return path


def _layout_file(tmp_path: Path, layout, name: str) -> Path:
    path = tmp_path / name
    path.write_text("# the return slip, kept by hand\n" + layout.to_toml())
    return path


def test_fingerprint_is_written_into_the_layout_in_place(tmp_path):
    blank, _ = render_form(RETURN, DPI, header_text=HEADERS["return"])
    scan = _save(np.ascontiguousarray(np.rot90(blank)), tmp_path / "blank.png")   # fed in sideways
    lay = _layout_file(tmp_path, RETURN, "return.toml")
    res = runner.invoke(app, ["layout", "fingerprint", str(scan), "--layout", str(lay)])
    assert res.exit_code == 0, res.output
    assert "header fingerprint of 6 x 54 cells" in res.stdout and f"wrote {lay}" in res.stdout
    text = lay.read_text()
    assert text.startswith("# the return slip, kept by hand\n")
    got = load_layout(lay)
    assert got.header_fingerprint == blank_fingerprint(load_pages(scan)[0], RETURN)
    assert dataclasses.replace(got, header_fingerprint=None, source=RETURN.source) == RETURN


def test_fingerprint_to_another_file_and_the_pair_is_then_told_apart(tmp_path):
    files = {}
    for name, layout in (("return", RETURN), ("renewal", RENEWAL)):
        blank, _ = render_form(layout, DPI, header_text=HEADERS[name])
        scan = _save(blank, tmp_path / f"blank-{name}.png")
        src = _layout_file(tmp_path, layout, f"{name}.toml")
        out = tmp_path / f"{name}-fp.toml"
        res = runner.invoke(app, ["layout", "fingerprint", str(scan), "-l", str(src), "-o", str(out)])
        assert res.exit_code == 0, res.output
        assert load_layout(src).header_fingerprint is None            # the source is left alone
        files[name] = load_layout(out)
    pair = [files["return"], files["renewal"]]
    for k, name in enumerate(("return", "renewal")):
        gray, _ = scan_kit_form(name, DPI, np.random.default_rng(70 + k), turn_deg=90)
        idf = identify_form(Page(gray, float(DPI), "slip.png", 1), pair)
        assert idf.identified and idf.index == k, idf.reason


def test_fingerprint_of_a_layout_without_a_header_region(tmp_path):
    plain = dataclasses.replace(RETURN, header=None)
    lay = tmp_path / "nohead.toml"
    lay.write_text(plain.to_toml())
    blank, _ = render_form(plain, DPI)
    scan = _save(blank, tmp_path / "blank.png")
    res = runner.invoke(app, ["layout", "fingerprint", str(scan), "-l", str(lay)])
    one_line_error(res, "nohead.toml", "no [form.header] region")


def test_fingerprint_of_a_page_without_marks_or_without_a_title(tmp_path):
    lay = _layout_file(tmp_path, RETURN, "return.toml")
    before = lay.read_text()
    white = _save(np.full((2339, 1654), 255, np.uint8), tmp_path / "white.png")
    one_line_error(runner.invoke(app, ["layout", "fingerprint", str(white), "-l", str(lay)]), "white.png", "page 1",
                   "marks")
    untitled, _ = render_form(dataclasses.replace(RETURN, header=None), DPI)   # printed without its title
    scan = _save(untitled, tmp_path / "untitled.png")
    one_line_error(runner.invoke(app, ["layout", "fingerprint", str(scan), "-l", str(lay)]), "untitled.png",
                   "holds no print")
    assert lay.read_text() == before


def test_fingerprint_missing_scan_and_page_out_of_range(tmp_path):
    lay = _layout_file(tmp_path, RETURN, "return.toml")
    one_line_error(runner.invoke(app, ["layout", "fingerprint", str(tmp_path / "gone.png"), "-l", str(lay)]),
                   "gone.png", "no such file")
    blank, _ = render_form(RETURN, DPI, header_text=HEADERS["return"])
    scan = _save(blank, tmp_path / "blank.png")
    one_line_error(runner.invoke(app, ["layout", "fingerprint", str(scan), "-l", str(lay), "-p", "2"]),
                   "blank.png", "no page 2")


def test_draft_writes_the_header_and_its_fingerprint(tmp_path):
    blank, _ = render_form(RENEWAL, DPI, header_text=HEADERS["renewal"])
    scan = _save(blank, tmp_path / "blank.png")
    out = tmp_path / "draft.toml"
    res = runner.invoke(app, ["layout", "draft", str(scan), "-o", str(out)])
    assert res.exit_code == 0, res.output
    assert "4 marks, 4 fields (4 boxed, 0 open), header x=" in res.stdout and "with its fingerprint" in res.stdout
    draft = load_layout(out)
    hd, want = draft.header, RENEWAL.header
    # the header region holds the printed title: inside the layout's own header box, give or take the margin
    assert hd.x >= want.x - 2 and hd.y >= want.y - 2 and hd.x + hd.w <= want.x + want.w + 2
    assert hd.y + hd.h <= want.y + want.h + 2
    gray, _ = scan_kit_form("renewal", DPI, np.random.default_rng(72), turn_deg=180)
    assert identify_form(Page(gray, float(DPI), "slip.png", 1), [draft]).identified
