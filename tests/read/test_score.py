"""Scoring readings against truth, the differences, and the curve PNG."""

import json

import numpy as np
import pytest
from PIL import Image

from formread.errors import DataError, FormreadError
from formread.read.score import load_truth, score_readings, write_curve_png


def write_truth(tmp_path, pages, name="truth.jsonl"):
    p = tmp_path / name
    p.write_text("\n".join(json.dumps(x) for x in pages) + "\n")
    return p


def rec(source, page, field, reading, conf, decision="accepted", reason=None):
    return {"source": source, "page_number": page, "field": field, "reading": reading, "confidence": conf,
            "decision": decision, "reason": reason}


TRUTH = [
    {"source": "batch/cards_01.tif", "page_number": 1, "fields": {"meter": "04512", "litres": "20", "note": ""}},
    {"source": "batch/cards_01.tif", "page_number": 2, "fields": {"meter": "11111", "litres": "7", "note": "3"}},
]


def readings():
    return [
        rec("/scans/batch/cards_01.tif", 1, "meter", "04512", 0.99),
        rec("/scans/batch/cards_01.tif", 1, "litres", "26", 0.97),                    # wrong, accepted
        rec("/scans/batch/cards_01.tif", 1, "note", "", 0.95),
        rec("/scans/batch/cards_01.tif", 2, "meter", "11171", 0.6, "review", "low_confidence"),
        rec("/scans/batch/cards_01.tif", 2, "litres", "7", 0.99),
        rec("/scans/batch/cards_01.tif", 2, "note", "3", 0.99, "review", "rule_failed:range"),
    ]


def test_summary_figures(tmp_path):
    rep = score_readings(readings(), write_truth(tmp_path, TRUTH))
    s = rep.summary()
    assert s["pages"] == 2 and s["fields"] == 6
    assert s["accepted"] == 4 and s["review"] == 2 and s["wrong_accepted"] == 1
    assert s["error_among_accepted"] == pytest.approx(0.25)
    assert s["review_rate"] == pytest.approx(2 / 6)
    assert s["field_accuracy_before_review"] == pytest.approx(4 / 6)
    # digits over same-length non-empty fields: 5 + 2 (one wrong) + 5 (one wrong) + 1 + 1
    assert s["digits_compared"] == 14 and s["digit_accuracy"] == pytest.approx(12 / 14)
    assert s["per_field"]["litres"]["wrong_accepted"] == 1
    assert s["per_field"]["meter"]["field_accuracy_before_review"] == 0.5
    assert s["truth_pages_not_read"] == 0 and s["pages_not_in_truth"] == 0
    json.dumps(s)


def test_length_mismatch_is_not_compared_digitwise(tmp_path):
    truth = [{"source": "a.png", "page_number": 1, "fields": {"x": "123", "y": ""}}]
    rep = score_readings([rec("a.png", 1, "x", "12", 0.9), rec("a.png", 1, "y", None, 0.0, "review",
                                                                  "page_not_registered")],
                         write_truth(tmp_path, truth))
    s = rep.summary()
    assert s["digit_accuracy"] is None and s["length_mismatches"] == 1 and s["field_accuracy_before_review"] == 0


def test_differences_are_recorded_or_strict(tmp_path):
    truth = TRUTH + [{"source": "batch/cards_02.tif", "page_number": 1, "fields": {"meter": "1"}}]
    path = write_truth(tmp_path, truth)
    extra = readings() + [rec("cards_09.tif", 1, "meter", "5", 0.9)]
    s = score_readings(extra, path).summary()
    assert s["truth_pages_not_read"] == 1 and s["first_truth_page_not_read"] == "batch/cards_02.tif page 1"
    assert s["pages_not_in_truth"] == 1 and s["pages"] == 2
    with pytest.raises(DataError) as e:
        score_readings(extra, path, strict=True)
    assert str(e.value) == f"{path}: page 1 of 'batch/cards_02.tif' is in the truth but was not read"
    with pytest.raises(DataError, match="no page read is in the truth"):
        score_readings([rec("other.tif", 1, "meter", "1", 0.9)], path)


def test_field_differences(tmp_path):
    path = write_truth(tmp_path, TRUTH)
    r = [x for x in readings() if x["field"] != "note"] + [rec("/scans/batch/cards_01.tif", 1, "extra", "1", 0.9)]
    rep = score_readings(r, path)
    assert len(rep.truth_fields_not_read) == 2 and rep.fields_not_in_truth == [("batch/cards_01.tif", 1, "extra")]
    with pytest.raises(DataError, match="field 'note'"):
        score_readings(r, path, strict=True)


@pytest.mark.parametrize("line,fragment", [
    ("not json", "line 2: not JSON"),
    ("[1, 2]", "line 2: expected a JSON object"),
    ('{"page_number": 1, "fields": {}}', "'source'"),
    ('{"source": "a", "page_number": 0, "fields": {}}', "'page_number'"),
    ('{"source": "a", "page_number": 1, "fields": {"x": 12}}', "field 'x'"),
    ('{"source": "a", "page_number": 1, "fields": {"x": "1a"}}', "field 'x'"),
    ('{"source": "b.tif", "page_number": 1, "fields": {}}', "already given on line 1"),
])
def test_bad_truth_lines(tmp_path, line, fragment):
    p = tmp_path / "truth.jsonl"
    p.write_text('{"source": "b.tif", "page_number": 1, "fields": {}}\n' + line + "\n")
    with pytest.raises(DataError) as e:
        load_truth(p)
    assert str(e.value).startswith(f"{p} line") and fragment in str(e.value) and "\n" not in str(e.value)


def test_missing_truth_file_and_ambiguous_names(tmp_path):
    with pytest.raises(FormreadError, match="nope.jsonl: no such truth file"):
        load_truth(tmp_path / "nope.jsonl")
    path = write_truth(tmp_path, TRUTH)
    r = readings() + [rec("/elsewhere/cards_01.tif", 3, "meter", "1", 0.5)]
    with pytest.raises(DataError, match="two files read are named 'cards_01.tif'"):
        score_readings(r, path)
    with pytest.raises(DataError, match="reading record 1"):
        score_readings([{"source": "a"}], path)
    with pytest.raises(DataError, match="reading record 1: missing or bad 'name'"):
        score_readings([{"source": "a", "page_number": 1, "decision": "review"}], path)


def test_curve_and_tuning_from_a_report(tmp_path):
    rep = score_readings(readings(), write_truth(tmp_path, TRUTH))
    curve = rep.curve()
    assert curve.shape[1] == 4 and np.all(np.diff(curve[:, 1]) >= 0)
    res = rep.tune(target=0.0)
    # eligible fields: 0.99 ok, 0.97 wrong, 0.95 ok, 0.6 wrong, 0.99 ok -> accept >= 0.99 (2 fields)
    assert res.threshold == 0.99 and res.accepted == 2 and res.review_rate == pytest.approx(4 / 6)


def test_curve_png(tmp_path):
    rng = np.random.default_rng(3)
    conf = rng.uniform(0.4, 1.0, 400)
    correct = rng.uniform(size=400) < conf ** 0.2
    from formread.read.tune import choose_threshold
    res = choose_threshold(conf, correct, target=0.02)
    out = write_curve_png(tmp_path / "curve.png", res.curve, threshold=res.threshold, target=0.02)
    im = np.asarray(Image.open(out).convert("RGB"))
    assert im.shape == (480, 720, 3)
    assert (np.abs(im.astype(int) - [220, 120, 0]).sum(axis=2) < 30).sum() > 50   # the threshold mark
    assert (np.abs(im.astype(int) - [30, 70, 160]).sum(axis=2) < 30).sum() > 200  # the curve
    with pytest.raises(DataError, match="cannot write"):
        write_curve_png(tmp_path / "missing" / "curve.png", res.curve)
