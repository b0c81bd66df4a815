"""Local samples from a clerk's decisions (formread.learn.samples)."""

import json

import numpy as np

from formread.learn.datasets import load_samples_folder
from formread.learn.samples import MANIFEST, collect_samples
from formread.ledger.fieldfile import load_digits
from formread.ledger.store import open_ledger
from formread.review import queries


def _decide(out, field_id, action, value=None, reviewer="ines"):
    conn = open_ledger(out, create=False)
    try:
        version = queries.field_detail(conn, field_id)["version"]
        queries.save_decision(conn, field_id, action=action, version=version, reviewer=reviewer, value=value)
    finally:
        conn.close()


def test_confirmed_and_corrected_fields_become_labelled_samples(ledger, tmp_path):
    out, info = ledger
    ids = info["ids"]
    _decide(out, ids[(0, "current_reading")], "correct", "03247")   # 5 images, 5 digits
    _decide(out, ids[(1, "plot_number")], "correct", "0233")        # 4 images
    _decide(out, ids[(0, "litres_used")], "confirm")                # 2 images, reading "57"
    _decide(out, ids[(1, "reading_date")], "correct", "2204202")    # 8 images for 7 digits: skipped
    _decide(out, ids[(2, "plot_number")], "correct", "0051")        # unregistered page: no images
    samples = tmp_path / "samples"

    rep = collect_samples(out, samples)
    assert rep.added == 11 and rep.fields_used == 3 and rep.duplicates == 0
    assert len(rep.skipped_fields) == 2
    assert sum(rep.per_digit) == 11

    records = [json.loads(line) for line in (samples / MANIFEST).read_text().splitlines()]
    assert len(records) == 11
    by_field = {}
    for r in records:
        assert (samples / r["file"]).is_file() and r["file"].startswith(f"{r['digit']}/")
        assert r["reviewer"] == "ines" and r["source"] == "scans/cards-2026-04.tif"
        by_field.setdefault(r["field"], []).append(r)
    cur = sorted(by_field["current_reading"], key=lambda r: r["position"])
    assert "".join(str(r["digit"]) for r in cur) == "03247"
    # the image stored for a sample is the one the network saw, as 8-bit grey, ink light on dark
    conn = open_ledger(out, create=False)
    path = conn.conn.execute("SELECT digits_path FROM fields WHERE id = ?",
                             (ids[(0, "current_reading")],)).fetchone()[0]
    conn.close()
    seen = load_digits(out / path)
    from PIL import Image
    stored = np.asarray(Image.open(samples / cur[4]["file"]), np.float32) / 255
    assert np.abs(stored - seen[4, 0]).max() <= 1 / 255 + 1e-6

    data = load_samples_folder(samples, min_share=0.0)
    assert len(data) == 11 and data.x.shape == (11, 1, 28, 28)
    assert sorted(data.y.tolist()) == sorted(r["digit"] for r in records)


def test_duplicates_are_not_added_twice_and_redecided_fields_are_relabelled(ledger, tmp_path):
    out, info = ledger
    fid = info["ids"][(0, "current_reading")]
    _decide(out, fid, "correct", "03247")
    samples = tmp_path / "samples"
    first = collect_samples(out, samples)
    again = collect_samples(out, samples)
    assert first.added == 5 and again.added == 0 and again.duplicates == 5
    _decide(out, fid, "correct", "03248", reviewer="tomas")
    third = collect_samples(out, samples)
    assert third.relabelled == 1 and third.duplicates == 4 and third.added == 0
    records = [json.loads(line) for line in (samples / MANIFEST).read_text().splitlines()]
    assert len(records) == 5
    last = [r for r in records if r["position"] == 4][0]
    assert last["digit"] == 8 and last["reviewer"] == "tomas"
    assert sum(1 for _ in samples.glob("*/*.png")) == 5
