"""The invented demo set: deterministic, rule-abiding (bar deliberate mistakes), held-out
handwriting only, and the scan formats it promises."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pytest
import tomllib
from PIL import Image

from formread.demo import demo_layout_path, make_demo
from formread.demo.card import marks_mm, read_card_layout
from formread.demo.scan import ScanSettings, random_scan_settings, scan_matrix
from formread.demo.values import card_values
from formread.errors import ParameterError
from formread.form.checkdigits import luhn_compute, luhn_valid
from formread.form.layout import load_layout
from formread.imaging.load import load_pages
from formread.learn.datasets import mnist_raw, mnist_split_indices

COUNT = 8   # smallest set with every format: 3-page TIFF, 2-page PDF, PNG, TIFF, JPEG (one upside down)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_a")
    calls = []
    summary = make_demo(out, count=COUNT, seed=3, progress=lambda d, t, **k: calls.append((d, t, k)))
    truth = [json.loads(line) for line in (out / "truth.jsonl").read_text().splitlines()]
    return out, summary, truth, calls


def test_luhn_used_for_member_numbers_matches_the_standard_example():
    # ISO/IEC 7812-1 annex B worked example: payload 7992739871 -> check digit 3.
    assert luhn_compute("7992739871") == "3"
    assert luhn_valid("79927398713")
    assert not luhn_valid("7992739874")   # same source: 7992739874 is invalid


def test_same_seed_gives_same_files_byte_for_byte(demo, tmp_path):
    out, summary, truth, _ = demo
    again = make_demo(tmp_path / "b", count=COUNT, seed=3)
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in (tmp_path / "b").iterdir())
    for name in names:
        assert (out / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    assert again["mnist_indices"] == summary["mnist_indices"]


def test_summary_progress_and_sources(demo):
    out, summary, truth, calls = demo
    assert summary["pages"] == COUNT == len(truth)
    assert summary["fields"] == 6 * COUNT
    assert [c[0] for c in calls] == list(range(1, COUNT + 1)) and all(c[1] == COUNT for c in calls)
    assert (out / "layout.toml").read_bytes() == demo_layout_path().read_bytes()
    for rec in truth:
        assert set(rec["fields"]) == {"plot_number", "member_number", "reading_date", "previous_reading",
                                      "current_reading", "litres_used"}
        assert (out / rec["source"]).is_file() and rec["page_number"] >= 1
    assert summary["files"] == len({r["source"] for r in truth})


def _rule_failures(f: dict[str, str]) -> set[str]:
    """Which of the layout's rules the written values break (the intended rules of the card)."""
    bad = set()
    assert f["plot_number"] and 1 <= int(f["plot_number"]) <= 240 and not f["plot_number"].startswith("0")
    m = f["member_number"]
    assert len(m) == 8 and m.isdigit()
    if not luhn_valid(m):
        bad.add("luhn:member_number")
    day = dt.datetime.strptime(f["reading_date"], "%d%m%Y").date()   # raises on an unreal date
    assert day.year == 2026 and len(f["reading_date"]) == 8
    prev, cur = f["previous_reading"], f["current_reading"]
    assert len(prev) == len(cur) == 6 and int(cur) >= int(prev)
    lit = f["litres_used"]
    if lit:
        assert len(lit) <= 6 and (lit == "0" or not lit.startswith("0"))
        if int(lit) != int(cur) - int(prev):
            bad.add("relation:litres_used")
    return bad


def test_values_obey_the_rules_except_the_deliberate_mistakes(demo):
    _, summary, truth, _ = demo
    for rec in truth:
        assert _rule_failures(rec["fields"]) == set(rec["writer_mistakes"])
    assert summary["mistakes"] == sum(bool(r["writer_mistakes"]) for r in truth) >= 1
    rng = np.random.default_rng(0)
    many = [card_values(rng, litres_empty=bool(rng.random() < 0.2)) for _ in range(300)]
    assert all(_rule_failures(v) == set() for v in many)
    assert any(v["litres_used"] == "" for v in many)
    for kind in ("luhn:member_number", "relation:litres_used"):
        assert all(_rule_failures(card_values(rng, mistake=kind)) == {kind} for _ in range(50))


def test_handwriting_comes_only_from_the_mnist_test_part(demo):
    _, summary, truth, _ = demo
    labels = mnist_raw()[1]
    split = mnist_split_indices(labels)
    used = np.asarray(summary["mnist_indices"])
    written = "".join("".join(r["fields"].values()) for r in truth)
    assert len(used) == len(written) == summary["digits"]
    assert np.isin(used, split["test"]).all() and not np.isin(used, split["train"]).any()
    # each drawn image shows the digit the truth says was written, in writing order
    order = ("plot_number", "member_number", "reading_date", "previous_reading", "current_reading",
             "litres_used")
    written = "".join("".join(r["fields"][k] for k in order) for r in truth)
    assert "".join(str(d) for d in labels[used]) == written
    start = 0
    for r in truth:                       # no image twice on one card
        n = sum(len(v) for v in r["fields"].values())
        assert len(set(used[start: start + n])) == n
        start += n


def test_file_formats(demo):
    out, _, truth, _ = demo
    by_file: dict[str, list[dict]] = {}
    for r in truth:
        by_file.setdefault(r["source"], []).append(r)
    kinds = set()
    for name, recs in by_file.items():
        path = out / name
        dpi = recs[0]["scan"]["dpi"]
        assert [r["page_number"] for r in recs] == list(range(1, len(recs) + 1))
        if path.suffix == ".pdf":
            import pypdfium2 as pdfium
            doc = pdfium.PdfDocument(str(path))
            assert len(doc) == len(recs) == 2
            w, h = doc[0].get_size()      # points: A4 is 595 x 842 pt
            assert abs(w - 595.3) < 2 and abs(h - 841.9) < 2
            doc.close()
            kinds.add("pdf")
            continue
        with Image.open(path) as im:
            assert round(im.info["dpi"][0]) == dpi
            assert im.size == (round(210 * dpi / 25.4), round(297 * dpi / 25.4))
            if path.suffix == ".tif":
                assert im.mode == "1" and im.info["compression"] == "group4"
                assert im.n_frames == len(recs)
                kinds.add(f"tif{len(recs)}")
            else:
                assert im.mode == "L" and len(recs) == 1
                assert im.format == {".jpg": "JPEG", ".png": "PNG"}[path.suffix]
                kinds.add(im.format)
    assert kinds == {"pdf", "tif1", "tif3", "JPEG", "PNG"}
    assert sum(r["scan"]["upside_down"] for r in truth) == 1
    assert {r["scan"]["dpi"] for r in truth} == {200, 300}


def test_recorded_scan_geometry_finds_the_marks(demo):
    out, _, truth, _ = demo
    layout = read_card_layout()
    for rec in truth:
        if not rec["source"].endswith((".jpg", ".png")):
            continue
        s = rec["scan"]
        with Image.open(out / rec["source"]) as im:
            a = np.asarray(im.convert("L"))
        settings = ScanSettings(dpi=s["dpi"], skew_deg=s["skew_deg"], shift_mm=tuple(s["shift_mm"]),
                                scale=s["scale"], blur_px=0, noise=0, paper=255, gradient=0,
                                gradient_dir_deg=0, shadow=0, shadow_edge="left", upside_down=s["upside_down"])
        m = scan_matrix(settings, a.shape)
        for x, y, _ in marks_mm(layout):
            if s["upside_down"]:
                x, y = 210 - x, 297 - y
            px = m @ [x * s["dpi"] / 25.4, y * s["dpi"] / 25.4, 1]
            c, r = int(round(px[0])), int(round(px[1]))
            assert a[r - 3: r + 4, c - 3: c + 4].mean() < 90, (rec["source"], x, y)


def test_scan_settings_keep_marks_on_the_page():
    layout = read_card_layout()
    rng = np.random.default_rng(5)
    for k in range(200):
        s = random_scan_settings(rng, dpi=200, page_mm=(210, 297), marks_mm=marks_mm(layout),
                                 upside_down=bool(k % 2))
        assert abs(s.skew_deg) <= 3 and max(map(abs, s.shift_mm)) <= 8 and abs(s.scale - 1) <= 0.03


def test_outdir_rules(tmp_path):
    stranger = tmp_path / "other"
    stranger.mkdir()
    (stranger / "keep.txt").write_text("mine")
    with pytest.raises(ParameterError, match="other"):
        make_demo(stranger, count=1)
    assert (stranger / "keep.txt").read_text() == "mine"
    with pytest.raises(ParameterError, match="count"):
        make_demo(tmp_path / "x", count=0)
    out = tmp_path / "set"
    make_demo(out, count=2, seed=1)
    (out / "README.md").write_text("notes")
    make_demo(out, count=1, seed=1)      # a previous demo set: its scans are replaced
    truth = [json.loads(line) for line in (out / "truth.jsonl").read_text().splitlines()]
    assert len(truth) == 1
    assert sorted(p.name for p in out.iterdir()) == sorted(["README.md", "layout.toml", "truth.jsonl",
                                                            truth[0]["source"]])


def test_layout_follows_the_contract():
    doc = tomllib.loads(demo_layout_path().read_text())
    assert doc["form"]["binarize"] == "auto" and doc["form"]["target_error"] == 0.005
    assert "threshold" not in doc["form"]   # the bundle's fitted decisions give the threshold
    assert {"x", "y", "w", "h"} == set(doc["form"]["header"])
    assert len(doc["marks"]) == 4
    fields = {f["name"]: f for f in doc["fields"]}
    assert fields["member_number"]["rules"] == {"length": 8, "check": "luhn"}
    assert fields["reading_date"]["rules"]["date"] == "DDMMYYYY"
    assert fields["reading_date"]["rules"]["years"] == [2025, 2027]   # the demo dates are in 2026
    assert fields["plot_number"]["rules"]["range"] == [1, 240]
    assert fields["litres_used"]["optional"] and not fields["plot_number"]["optional"]
    assert {r["rule"] for r in doc["relations"]} == {"current_reading >= previous_reading",
                                                     "litres_used = current_reading - previous_reading"}
    lay = load_layout(demo_layout_path())
    assert [f.name for f in lay.fields] == list(fields)
    assert lay.header is not None and len(lay.marks) == 4
    assert dict(lay.fields[1].rules)["check"] == "luhn"
    assert lay.binarize == "auto" and lay.threshold is None and lay.target_error == pytest.approx(0.005)
    # the card printer reads the same file with the same parser
    assert read_card_layout() == lay


def test_project_loader_reads_every_scan(demo):
    out, _, truth, _ = demo
    for name in sorted({r["source"] for r in truth}):
        pages = load_pages(out / name)
        expected = [r for r in truth if r["source"] == name]
        assert [p.page_number for p in pages] == [r["page_number"] for r in expected]
        assert all(abs(p.dpi - r["scan"]["dpi"]) < 0.5 for p, r in zip(pages, expected))


def test_a_run_cut_short_can_be_made_again(tmp_path):
    out = tmp_path / "cut"

    def stop(done, total, **_):
        if done == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        make_demo(out, count=3, seed=2, progress=stop)
    assert not (out / "truth.jsonl").exists() and (out / "truth.jsonl.part").exists()
    make_demo(out, count=1, seed=2)
    truth = [json.loads(line) for line in (out / "truth.jsonl").read_text().splitlines()]
    assert sorted(p.name for p in out.iterdir()) == sorted(["layout.toml", "truth.jsonl", truth[0]["source"]])


def test_file_plan_covers_every_count():
    from formread.demo.make import _plan

    for count in range(1, 61):
        files = _plan(count, np.random.default_rng(count))
        assert sum(f.pages for f in files) == count
        assert len({f.name for f in files}) == len(files)
        assert sum(f.upside_down for f in files) == (count >= 2)
        if count >= 8:
            assert {(f.fmt, f.pages) for f in files} >= {("tiff", 3), ("pdf", 2), ("png", 1), ("tiff", 1),
                                                          ("jpeg", 1)}
