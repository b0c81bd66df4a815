"""``formread layout proof / draft``: pictures and drafts on synthetic scans, one-line errors on bad input."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from clikit import one_line_error as _one_line_error
from PIL import Image
from typer.testing import CliRunner

from formread.cli.main import app
from formread.form.layout import load_layout

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "imaging"))
from synth import EXAMPLE_TOML, Transform, example_layout, render_form, render_page  # noqa: E402

runner = CliRunner()
DPI = 200


def _save(gray: np.ndarray, path: Path) -> Path:
    Image.fromarray(gray).save(path, dpi=(DPI, DPI))
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("layout_cli")
    layout = example_layout()
    text = EXAMPLE_TOML.format(W=148.0, H=210.0, HW=98.0, XR=139.0, YB=201.0, YF=170.0)
    (d / "card.toml").write_text(text)
    gray, _ = render_page(layout, DPI, {"member": "20261202", "day": "07", "reading": "3141"},
                          np.random.default_rng(2), Transform(rotation_deg=-1.2, shift_mm=(1.5, 2.0), noise=5))
    _save(gray, d / "scan.png")
    blank, _ = render_form(layout, DPI)
    _save(blank, d / "blank.png")
    _save(np.full_like(blank, 255), d / "white.png")
    return d


def test_proof_draws_the_fields_over_the_scan(files):
    out = files / "proof.png"
    res = runner.invoke(app, ["layout", "proof", "--layout", str(files / "card.toml"), str(files / "scan.png"),
                              "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert "member: 8 of 8 cells written" in res.stdout
    assert "reading: 4 digits" in res.stdout and f"wrote {out}" in res.stdout
    img = np.asarray(Image.open(out).convert("RGB")).astype(int)
    H, W = np.asarray(Image.open(files / "scan.png")).shape
    assert img.shape == (round(H * 0.5), round(W * 0.5), 3)
    # coloured drawing on it: the amber digit boxes and the blue field rectangles
    amber = (np.abs(img - [214, 96, 0]).sum(axis=2) < 60).sum()
    blue = (np.abs(img - [0, 104, 139]).sum(axis=2) < 60).sum()
    assert amber > 100 and blue > 100


def test_proof_default_name_sits_beside_the_scan(files):
    res = runner.invoke(app, ["layout", "proof", "-l", str(files / "card.toml"), str(files / "scan.png")])
    assert res.exit_code == 0, res.output
    assert (files / "scan.proof-p1.png").is_file()


def test_proof_layout_with_a_syntax_error(files):
    bad = files / "broken.toml"
    bad.write_text("[form]\nname = \"x\nwidth_mm = 148\n")
    res = runner.invoke(app, ["layout", "proof", "-l", str(bad), str(files / "scan.png")])
    _one_line_error(res, "broken.toml", "syntax")


def test_proof_layout_with_an_impossible_field(files):
    text = (files / "card.toml").read_text().replace("x = 40.0\ny = 48.0\nw = 50.0", "x = 140.0\ny = 48.0\nw = 50.0")
    bad = files / "offpage.toml"
    bad.write_text(text)
    res = runner.invoke(app, ["layout", "proof", "-l", str(bad), str(files / "scan.png")])
    _one_line_error(res, "offpage.toml", "reading", "off")


def test_proof_missing_scan(files):
    res = runner.invoke(app, ["layout", "proof", "-l", str(files / "card.toml"), str(files / "nope.png")])
    _one_line_error(res, "nope.png", "no such file")


def test_proof_blank_page_names_file_and_page(files):
    out = files / "never.png"
    res = runner.invoke(app, ["layout", "proof", "-l", str(files / "card.toml"), str(files / "white.png"),
                              "--out", str(out)])
    _one_line_error(res, "white.png", "page 1", "marks")
    assert not out.exists()


def test_proof_page_out_of_range(files):
    res = runner.invoke(app, ["layout", "proof", "-l", str(files / "card.toml"), str(files / "scan.png"),
                              "--page", "3"])
    _one_line_error(res, "scan.png", "no page 3", "1 page")


def test_draft_finds_marks_and_fields_and_loads_back(files):
    out = files / "drafted.toml"
    res = runner.invoke(app, ["layout", "draft", str(files / "blank.png"), "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert "4 marks, 4 fields (3 boxed, 1 open)" in res.stdout
    draft = load_layout(out)
    truth = example_layout()
    assert [f.name for f in draft.fields] == ["field_1", "field_2", "field_3", "field_4"]
    by_pos = sorted(truth.fields, key=lambda f: (round(f.y / 4), f.x))
    for d, t in zip(draft.fields, by_pos):
        assert d.kind == t.kind and d.cells == t.cells
        assert max(abs(d.x - t.x), abs(d.y - t.y), abs(d.w - t.w), abs(d.h - t.h)) < 0.3  # mm
    for m in truth.marks:
        assert min(np.hypot(d.x - m.x, d.y - m.y) for d in draft.marks) < 0.3


def test_drafted_layout_reads_the_filled_form(files):
    out = files / "drafted2.toml"
    assert runner.invoke(app, ["layout", "draft", str(files / "blank.png"), "-o", str(out)]).exit_code == 0
    res = runner.invoke(app, ["layout", "proof", "-l", str(out), str(files / "scan.png"), "-o",
                              str(files / "p2.png")])
    assert res.exit_code == 0, res.output
    assert "field_1: 8 of 8 cells written" in res.stdout


def test_draft_refuses_to_overwrite(files):
    out = files / "exists.toml"
    out.write_text("keep me")
    res = runner.invoke(app, ["layout", "draft", str(files / "blank.png"), "--out", str(out)])
    _one_line_error(res, "exists.toml", "already exists")
    assert out.read_text() == "keep me"


def test_draft_of_a_page_without_marks(files):
    res = runner.invoke(app, ["layout", "draft", str(files / "white.png"), "--out", str(files / "w.toml")])
    _one_line_error(res, "white.png", "page 1", "corner squares")
    assert not (files / "w.toml").exists()


def test_draft_missing_file(files):
    res = runner.invoke(app, ["layout", "draft", str(files / "gone.png")])
    _one_line_error(res, "gone.png", "no such file")


def test_proof_of_page_two_of_a_group4_tiff(files):
    scan = np.asarray(Image.open(files / "scan.png"))
    blank = np.asarray(Image.open(files / "blank.png"))
    pages = [Image.fromarray(a >= 150) for a in (blank, scan)]        # bilevel, as a scanner writes it
    tif = files / "batch.tif"
    pages[0].save(tif, save_all=True, append_images=pages[1:], compression="group4", dpi=(DPI, DPI))
    res = runner.invoke(app, ["layout", "proof", "-l", str(files / "card.toml"), str(tif), "--page", "2"])
    assert res.exit_code == 0, res.output
    assert "member: 8 of 8 cells written" in res.stdout
    assert (files / "batch.proof-p2.png").is_file()
