"""A scanner tray of several forms: each page read as the one form it fits, in any quarter turn.

Pages: invented demo water-meter cards and produce delivery slips (formread demo make --form meter /
--form slip), put together in one folder with a multi-page TIFF holding both forms, a page turned a
quarter, and a page of a third form that no layout given describes.
"""

import csv
import io
import json
import sqlite3

import numpy as np
import pytest
from PIL import Image

from formread.demo import make_demo
from formread.form.layout import load_layout
from formread.imaging.load import load_pages
from formread.read.batch import read_batch
from formread.read.evaluate import score_ledger
from formread.review.export import export_final


@pytest.fixture(scope="module")
def tray(tmp_path_factory):
    base = tmp_path_factory.mktemp("tray")
    make_demo(base / "meter", count=3, seed=41, form="meter")
    make_demo(base / "slip", count=3, seed=42, form="slip")
    scans = base / "scans"
    scans.mkdir()
    truth = []
    pages = {}
    for form in ("meter", "slip"):
        for line in (base / form / "truth.jsonl").read_text().splitlines():
            t = json.loads(line)
            for page in load_pages(base / form / t["source"]):
                if page.page_number == t["page_number"]:
                    pages[(form, len([k for k in pages if k[0] == form]))] = (page, t["fields"])
    # one multi-page TIFF holding a card and a slip; the other pages as PNGs, one of them turned a quarter
    (m0, mf0), (s0, sf0) = pages[("meter", 0)], pages[("slip", 0)]
    Image.fromarray(m0.gray).save(scans / "mixed.tif", dpi=(m0.dpi, m0.dpi), save_all=True,
                                  append_images=[Image.fromarray(s0.gray)])
    truth += [{"source": "mixed.tif", "page_number": 1, "fields": mf0},
              {"source": "mixed.tif", "page_number": 2, "fields": sf0}]
    expect = {("mixed.tif", 1): "meter", ("mixed.tif", 2): "slip"}
    for (form, i), (page, fields) in pages.items():
        if i == 0:
            continue
        gray = np.rot90(page.gray, 1) if (form, i) == ("slip", 1) else page.gray    # fed sideways
        name = f"{form}_{i}.png"
        Image.fromarray(np.ascontiguousarray(gray)).save(scans / name, dpi=(page.dpi, page.dpi))
        truth.append({"source": name, "page_number": 1, "fields": fields})
        expect[(name, 1)] = form
    # a page of a form no layout describes: marks in the corners, no fields where either layout has them
    other = np.full(m0.gray.shape, 255, np.uint8)
    k = m0.dpi / 25.4
    for cx, cy in ((12, 12), (198, 12), (12, 285), (198, 285)):
        other[int((cy - 3) * k):int((cy + 3) * k), int((cx - 3) * k):int((cx + 3) * k)] = 0
    Image.fromarray(other).save(scans / "other.png", dpi=(m0.dpi, m0.dpi))
    (base / "truth.jsonl").write_text("".join(json.dumps(t) + "\n" for t in truth))
    layouts = [base / "meter" / "layout.toml", base / "slip" / "layout.toml"]
    out = base / "out"
    report = read_batch([scans], layouts, out, workers=2)
    return {"out": out, "report": report, "expect": expect, "truth": base / "truth.jsonl", "base": base}


def _pages(out):
    conn = sqlite3.connect(out / "ledger.sqlite")
    try:
        return {(r[0].rsplit("/", 1)[-1], r[1]): (r[2], r[3], r[4])
                for r in conn.execute("SELECT source, page_number, form, status, error FROM pages")}
    finally:
        conn.close()


def test_every_page_is_read_as_the_form_it_is_or_as_no_known_form(tray):
    pages = _pages(tray["out"])
    for key, form in tray["expect"].items():
        assert pages[key][:2] == (("Larkspur Lane water meter card" if form == "meter"
                                   else "Larkspur Lane produce delivery slip"), "read"), (key, pages[key])
    form, status, error = pages[("other.png", 1)]
    assert form is None and status == "unregistered" and error
    rep = tray["report"]
    assert (rep.read, rep.unregistered) == (len(tray["expect"]), 1)


def _csv(path):
    return list(csv.DictReader(io.StringIO(path.read_text())))


def test_one_table_per_form_and_a_combined_jsonl(tray):
    out = tray["out"]
    meter = _csv(out / "readings-larkspur-lane-water-meter-card.csv")
    slip = _csv(out / "readings-larkspur-lane-produce-delivery-slip.csv")
    assert len(meter) == 3 and len(slip) == 3
    assert "member_number" in meter[0] and "member_number" not in slip[0]
    every = _csv(out / "readings.csv")
    assert len(every) == 7 and {r["form"] for r in every} == {"Larkspur Lane water meter card",
                                                               "Larkspur Lane produce delivery slip", ""}
    recs = [json.loads(line) for line in (out / "fields.jsonl").read_text().splitlines()]
    assert {r["form"] for r in recs} == {"Larkspur Lane water meter card", "Larkspur Lane produce delivery slip"}
    res = export_final(out, tray["base"] / "export")
    assert sorted(p.name for p in res.csv_paths) == ["final_values-larkspur-lane-produce-delivery-slip.csv",
                                                     "final_values-larkspur-lane-water-meter-card.csv"]


def test_scores_across_forms(tray):
    s = score_ledger(tray["out"], tray["truth"])
    meter = load_layout(tray["base"] / "meter" / "layout.toml")
    slip = load_layout(tray["base"] / "slip" / "layout.toml")
    assert s["pages"] == 6 and s["fields"] == 3 * len(meter.fields) + 3 * len(slip.fields)
    assert s["field_accuracy_before_review"] > 0.8
    assert s["writer_mistakes_accepted"] == 0
