"""Development scenarios: writer and scanner styles, the second form, the MNIST test halves.

Each style must change what its name says, measured on the scans it makes (stroke widths with
scikit-image's skeletonize as an outside reference, slant and size from the ink's moments, pen
grey, blur, bilevel files, JPEG quantisation), and nothing may be drawn from outside its half.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from skimage.morphology import skeletonize
from typer.testing import CliRunner

from formread.cli.main import app
from formread.demo import demo_layout_path, make_demo
from formread.demo.fill import HALF_SEED, load_test_digits, mnist_test_halves, pen_stroke, thin
from formread.demo.scan import ScanSettings, scan_matrix
from formread.demo.styles import STYLES, WRITERS, draw_writer
from formread.demo.values import CROPS, SLIP_MISTAKE_KINDS, slip_values
from formread.errors import ParameterError
from formread.form.checkdigits import damm_compute, damm_valid
from formread.form.layout import load_layout
from formread.imaging.binarize import threshold_otsu
from formread.imaging.load import load_pages
from formread.learn.datasets import mnist_raw, mnist_split_indices
from formread.store import demo_forms as demo_dir

PAGES = 2     # pages per style set: the same seed, so the same values and base writers in each


def _truth(folder: Path) -> list[dict]:
    return [json.loads(line) for line in (folder / "truth.jsonl").read_text().splitlines()]


class _Sets:
    """Small sets per style (same seed), made on first use; ``crops`` also runs the imaging pipeline."""

    def __init__(self, root: Path):
        self.root, self.made, self.cut = root, {}, {}

    def __getitem__(self, style: str):
        if style not in self.made:
            folder = self.root / style
            info = make_demo(folder, count=PAGES, seed=21, style=style)
            self.made[style] = (folder, info, _truth(folder))
        return self.made[style]

    def crops(self, style: str) -> list[list[tuple[str, np.ndarray]]]:
        """Per page: (field kind, crop) for every written cell (boxed) and open field, cut at
        10 px per mm with the scan geometry the truth records."""
        if style not in self.cut:
            folder, _, truth = self[style]
            layout = load_layout(folder / "layout.toml")
            self.cut[style] = [_cut(load_pages(folder / r["source"])[r["page_number"] - 1].gray, r, layout)
                               for r in truth]
        return self.cut[style]


def _cut(gray: np.ndarray, rec: dict, layout) -> list[tuple[str, np.ndarray]]:
    """Resample the written regions of one scan, axis-aligned, at 10 px per mm, 0.5 mm inside
    the printed lines, from the recorded paper placement (formread.demo.scan.scan_matrix)."""
    s = rec["scan"]
    dpi = s["dpi"]
    settings = ScanSettings(dpi=dpi, skew_deg=s["skew_deg"], shift_mm=tuple(s["shift_mm"]), scale=s["scale"],
                            blur_px=0, noise=0, paper=255, gradient=0, gradient_dir_deg=0, shadow=0,
                            shadow_edge="left", upside_down=s["upside_down"])
    shape = (round(layout.height_mm * dpi / 25.4), round(layout.width_mm * dpi / 25.4))
    m = scan_matrix(settings, shape)
    out = []
    for f in layout.fields:
        regions = f.cell_regions() if f.kind == "boxed" else [f.region]
        for reg in regions:
            x0, y0, w, h = reg.x + 0.5, reg.y + 0.5, reg.w - 1.0, reg.h - 1.0
            rr, cc = np.mgrid[0:int(h * 10), 0:int(w * 10)]
            x = (x0 + (cc + 0.5) / 10) * dpi / 25.4
            y = (y0 + (rr + 0.5) / 10) * dpi / 25.4
            if s["upside_down"]:
                x, y = shape[1] - x, shape[0] - y
            px = m[0, 0] * x + m[0, 1] * y + m[0, 2] - 0.5
            py = m[1, 0] * x + m[1, 1] * y + m[1, 2] - 0.5
            out.append((f.kind, ndimage.map_coordinates(gray.astype(np.float32), [py, px], order=1,
                                                       mode="nearest")))
    return out


@pytest.fixture(scope="module")
def sets(tmp_path_factory):
    return _Sets(tmp_path_factory.mktemp("styles"))


def _cells(page, kind: str = "boxed"):
    """The crops of one kind on one page: (gray, cell height in px)."""
    return [(a, a.shape[0] + 10) for k, a in page if k == kind]


def _ink(a: np.ndarray) -> np.ndarray:
    return a < min(threshold_otsu(a), 200)


def _stroke_width_mm(crops) -> float:
    """Median stroke width over the open fields: ink area / centre-line length (skeletonize of
    scikit-image as the reference thinning), in mm (crops are 10 px per mm)."""
    widths = []
    for fields in crops:
        for a, _ in _cells(fields, "open"):
            ink = _ink(a)
            length = skeletonize(ink).sum()
            if length > 20:
                widths.append(ink.sum() / length / 10.0)
    return float(np.median(widths))


def test_pen_styles_change_the_stroke_width_in_order(sets):
    w = {s: _stroke_width_mm(sets.crops(s)) for s in ("hairline", "ballpoint", "demo", "felt-tip", "blotchy")}
    assert w["hairline"] < w["ballpoint"] < w["demo"] < w["felt-tip"], w
    assert w["hairline"] < 0.5 and w["felt-tip"] > 1.5, w   # thin vs marker (blur and threshold widen them)
    assert 0.8 < w["demo"] < 1.2, w                         # the styles module says about 1 mm
    assert w["ballpoint"] < w["blotchy"] < w["felt-tip"], w


def _slant(a: np.ndarray) -> float | None:
    """Shear of the ink in one cell: -cov(col, row) / var(row) (> 0 = tops lean right)."""
    r, c = np.nonzero(_ink(a))
    if r.size < 30 or np.var(r) == 0:
        return None
    return float(-np.cov(c, r)[0, 1] / np.var(r))


def test_slanted_writers_lean_further_than_the_demo(sets):
    def mean_abs(style):
        vals = [_slant(a) for fields in sets.crops(style) for a, _ in _cells(fields)]
        return float(np.mean(np.abs([v for v in vals if v is not None])))
    assert mean_abs("slanted") > mean_abs("demo") + 0.1
    recorded = [r["writer"]["slant"] for r in sets["slanted"][2]]
    assert all(0.28 <= abs(s) <= 0.5 for s in recorded)


def test_small_and_large_writing_fill_less_and_more_of_the_cell(sets):
    def height_share(style):
        shares = []
        for fields in sets.crops(style):
            for a, h in _cells(fields):
                rows = np.flatnonzero(_ink(a).any(axis=1))
                if rows.size:
                    shares.append((rows[-1] - rows[0] + 1) / h)
        return float(np.median(shares))
    small, demo, large = (height_share(s) for s in ("small", "demo", "large"))
    assert small + 0.1 < demo < large - 0.05, (small, demo, large)


def _ink_grey(crops) -> float:
    """Median grey level of the darkest tenth of the written cells' pixels (the pen's own grey)."""
    vals = []
    for fields in crops:
        for a, _ in _cells(fields):
            ink = a[_ink(a)]
            if ink.size > 30:
                vals.append(np.percentile(ink, 10))
    return float(np.median(vals))


def test_grey_pens_are_lighter_and_blotchy_ink_is_uneven(sets):
    assert _ink_grey(sets.crops("grey-pen")) > _ink_grey(sets.crops("demo")) + 40

    def spread(style):     # grey-level spread along the centre lines of the strokes
        s = []
        for fields in sets.crops(style):
            for a, _ in _cells(fields, "open"):
                centre = skeletonize(_ink(a))
                if centre.sum() > 20:
                    s.append(np.std(a[centre]))
        return float(np.median(s))
    assert spread("blotchy") > 1.5 * spread("ballpoint")


def _sharpness(folder: Path, truth: list[dict]) -> float:
    """Steepest grey-level step across the printed title (per pixel at 200 dpi), median over pages."""
    vals = []
    for rec in truth:
        g = load_pages(folder / rec["source"])[rec["page_number"] - 1].gray.astype(np.float32)
        if rec["scan"]["upside_down"]:
            g = g[::-1, ::-1]
        d = rec["scan"]["dpi"] / 25.4
        band = g[int(16 * d):int(40 * d), int(30 * d):int(180 * d)]
        step = np.abs(np.diff(band, axis=1)).max() * rec["scan"]["dpi"] / 200
        vals.append(step / max(float(np.ptp(band)), 1.0))
    return float(np.median(vals))


def test_blurry_scans_are_softer(sets):
    folder, _, truth = sets["blurry"]
    assert all(1.3 <= r["scan"]["blur_px"] <= 2.2 for r in truth)
    assert _sharpness(folder, truth) < 0.75 * _sharpness(*sets["demo"][0:3:2])


def test_bilevel_and_low_jpeg_scanners_write_what_they_say(sets):
    folder, info, truth = sets["bilevel"]
    for rec in truth:
        with Image.open(folder / rec["source"]) as im:
            assert im.format == "TIFF" and im.mode == "1" and im.info["compression"] == "group4"
        assert 95 <= rec["scan"]["bilevel_threshold"] <= 200
    assert len({r["scan"]["bilevel_threshold"] for r in truth}) > 1

    def quant(folder, truth):     # mean of the luminance quantisation table: larger = lower quality
        q = []
        for rec in truth:
            if rec["source"].endswith(".jpg"):
                with Image.open(folder / rec["source"]) as im:
                    q.append(np.mean(im.quantization[0]))
        return q
    low = quant(*sets["jpeg-low"][0:3:2])
    assert low and min(low) > 3 * max(quant(*sets["demo"][0:3:2]) or [1.0])
    assert all(10 <= r["scan"]["jpeg_quality"] <= 30 for r in sets["jpeg-low"][2])


def test_every_style_records_itself(sets):
    for style in STYLES:
        folder, info, truth = sets[style]
        assert len(truth) == PAGES and info["style"] == style
        if style == "demo":
            assert "style" not in truth[0]            # the shipped record form
            continue
        assert {r["style"] for r in truth} == {style}
        pops = {r["writer"]["population"] for r in truth}
        assert pops <= set(WRITERS) and (style not in WRITERS or pops == {style})


def test_the_halves_split_the_test_part_in_two(tmp_path):
    labels = mnist_raw()[1]
    split = mnist_split_indices(labels)
    test = split["test"]
    halves = mnist_test_halves()
    a, b = halves["a"], halves["b"]
    assert len(a) == len(b) == 500 and np.intersect1d(a, b).size == 0
    np.testing.assert_array_equal(np.union1d(a, b), test)
    assert (np.bincount(labels[a], minlength=10) == 50).all()       # stratified: 50 of each digit
    assert HALF_SEED == 20261203                                     # documented in formread.demo.fill
    np.testing.assert_array_equal(load_test_digits("b").indices, b)

    info = make_demo(tmp_path / "a", count=2, seed=5, style="felt-tip", form="slip", half="a")
    used = np.asarray(info["mnist_indices"])
    assert np.isin(used, a).all() and not np.isin(used, b).any()
    assert not np.isin(used, split["train"]).any()
    # per field, the recorded images show the digits written
    for rec, per_field in zip(_truth(tmp_path / "a"), info["mnist_by_page"]):
        assert rec["half"] == "a" and rec["mnist"] == per_field
        for name, value in rec["fields"].items():
            assert "".join(str(d) for d in labels[rec["mnist"][name]]) == value


def test_same_arguments_same_bytes(tmp_path):
    kw = dict(count=2, seed=4, style="mixed", form="slip", half="b")
    make_demo(tmp_path / "x", **kw)
    make_demo(tmp_path / "y", **kw)
    names = sorted(p.name for p in (tmp_path / "x").iterdir())
    assert names == sorted(p.name for p in (tmp_path / "y").iterdir())
    for n in names:
        assert (tmp_path / "x" / n).read_bytes() == (tmp_path / "y" / n).read_bytes(), n


@pytest.mark.slow
def test_the_shipped_demo_forms_are_made_again_byte_for_byte(tmp_path):
    make_demo(tmp_path / "d", count=30, seed=7)          # formread demo make --count 30 --seed 7
    shipped = sorted(p.name for p in demo_dir().iterdir()
                     if p.name not in ("README.md", "__init__.py", "__pycache__"))
    assert shipped == sorted(p.name for p in (tmp_path / "d").iterdir())
    for n in shipped:
        assert (demo_dir() / n).read_bytes() == (tmp_path / "d" / n).read_bytes(), n


def test_pen_redraw_keeps_the_shape_and_sets_the_width():
    mask = np.zeros((40, 40), bool)
    mask[8:32, 16:23] = True                              # a 7-pixel-wide bar
    centre = thin(mask)
    assert centre.sum() > 10 and (centre <= mask).all()
    assert centre.sum(axis=1)[12:28].max() == 1           # one pixel wide
    for width in (1.5, 4.0, 9.0):
        cover = pen_stroke(mask, width)
        row = cover[cover.shape[0] // 2]
        assert abs(row.sum() - width) < 1.0, (width, row.sum())


def _slip_failures(f: dict[str, str]) -> set[str]:
    """The slip layout's rules, checked independently of formread.form.rules."""
    bad = set()
    assert len(f["slip_number"]) == 6 and f["slip_number"].isdigit()
    if not damm_valid(f["slip_number"]):
        bad.add("damm:slip_number")
    day = dt.datetime.strptime(f["delivery_date"], "%d%m%y").date()   # raises on an unreal date
    assert day.year == 2026
    assert 1 <= int(f["plot_number"]) <= 240 and not f["plot_number"].startswith("0")
    for name in CROPS:
        v = f[name]
        assert v and (v == "0" or not v.startswith("0")) and len(v) <= 3
        if not 0 <= int(v) <= 150:
            bad.add(f"range:{name}")
    if int(f["total_crates"]) != sum(int(f[n]) for n in CROPS):
        bad.add("relation:total_crates")
    assert len(f["gross_kg"]) == 4
    return bad


@pytest.fixture(scope="module")
def slips(tmp_path_factory):
    """10 delivery slips (seed 1): one writer mistake, a count over its range."""
    folder = tmp_path_factory.mktemp("slips")
    info = make_demo(folder, count=10, seed=1, form="slip", style="demo")
    return folder, info, _truth(folder)


def test_slip_values_keep_the_rules_except_the_deliberate_mistakes(slips):
    # Damm check digit: 572 -> 4 (the published worked example)
    assert damm_compute("572") == "4"
    rng = np.random.default_rng(0)
    assert all(_slip_failures(slip_values(rng)) == set() for _ in range(300))
    for kind in SLIP_MISTAKE_KINDS:
        for _ in range(50):
            v = slip_values(rng, mistake=kind)
            assert _slip_failures(v) == {kind}
            if kind.startswith("range:"):
                assert len(v[kind.split(":")[1]]) == 3          # a 3-digit count over the range
    folder, info, truth = slips
    assert info["mistakes"] == 1 and [m for r in truth for m in r["writer_mistakes"]] == ["range:crates_potatoes"]
    for rec in truth:
        assert _slip_failures(rec["fields"]) == set(rec["writer_mistakes"])
    lay = load_layout(folder / "layout.toml")
    assert (folder / "layout.toml").read_bytes() == demo_layout_path("slip").read_bytes()
    assert sum(f.kind == "open" for f in lay.fields) > sum(f.kind == "boxed" for f in lay.fields)
    meter = load_layout(demo_layout_path())
    assert {f.w / f.cells for f in lay.fields if f.kind == "boxed"} != \
        {f.w / f.cells for f in meter.fields if f.kind == "boxed"}


def test_a_count_over_its_range_reaches_a_person(slips, tmp_path):
    """A written 3-digit count above the range is never accepted as read (shipped model, real reader)."""
    from formread.read.batch import read_batch

    folder, _, truth = slips
    hits = [r for r in truth if any(m.startswith("range:") for m in r["writer_mistakes"])]
    assert hits
    out = tmp_path / "out"
    read_batch([folder / r["source"] for r in hits], folder / "layout.toml", out, workers=1)
    rows = {(Path(r["source"]).name, r["page_number"], r["field"]): r
            for r in map(json.loads, (out / "fields.jsonl").read_text().splitlines())}
    for rec in hits:
        for m in rec["writer_mistakes"]:
            name = m.split(":")[1]
            assert rows[(rec["source"], rec["page_number"], name)]["decision"] == "review", m


def test_bad_style_form_or_half_is_one_line(tmp_path):
    for kw, word in (({"style": "crayon"}, "style"), ({"form": "invoice"}, "form"), ({"half": "c"}, "half")):
        with pytest.raises(ParameterError, match=word):
            make_demo(tmp_path / "x", count=1, **kw)
    res = CliRunner().invoke(app, ["demo", "make", "--count", "1", "--style", "crayon", str(tmp_path / "y"), "-q"])
    assert res.exit_code == 2 and "--style" in res.output   # a choice typer checks: a usage error


def test_cli_makes_a_styled_set_and_lists_every_style(tmp_path):
    res = CliRunner().invoke(app, ["demo", "make", "--count", "2", "--seed", "3", "--style", "felt-tip",
                                   "--form", "slip", "--half", "b", str(tmp_path / "z"), "-q"])
    assert res.exit_code == 0, res.output
    truth = _truth(tmp_path / "z")
    assert {(r["style"], r["form"], r["half"]) for r in truth} == {("felt-tip", "slip", "b")}
    help_res = CliRunner().invoke(app, ["demo", "make", "--help"], terminal_width=400, env={"COLUMNS": "400"})
    help_text = " ".join(help_res.stdout.split())
    assert all(s in help_text for s in STYLES)
    bad = CliRunner().invoke(app, ["demo", "make", "--style", "crayon", str(tmp_path / "w")])
    assert bad.exit_code == 2 and not (tmp_path / "w").exists()     # a usage error: choices are checked first


def test_draw_writer_changes_only_its_own_ranges():
    for _name, pop in WRITERS.items():
        base = draw_writer(WRITERS["demo"], np.random.default_rng(9))
        w = draw_writer(pop, np.random.default_rng(9))
        assert w.bias == base.bias and w.sloppy == base.sloppy and w.touch == base.touch
        if pop.size is None:
            assert w.size == base.size
        if pop.ink is None:
            assert w.ink == base.ink
