"""Hostile cases of the commands that read a ledger: ``tune``, ``score``, ``report``, ``export`` and
``review`` (``--apply`` and the page's start).  The reviewed fixture ledger (tests/review/review_fixture.py)
or the two-page output folder must stay as they were whenever a case is refused."""

from __future__ import annotations

import json
import os
import sqlite3

import pytest
from hostilekit import Case, execute, params, sqlite_file, steps, truncated, write

SOURCE = "scans/cards-2026-04.tif"     # the review fixture's scan file (three pages)


def truth_line(**kw):
    rec = {"source": SOURCE, "page_number": 1, "fields": {"plot_number": "0417"}}
    rec.update(kw)
    return json.dumps(rec) + "\n"


def decision(**kw):
    rec = {"source": SOURCE, "page_number": 1, "field": "current_reading", "value": "03247"}
    rec.update(kw)
    return json.dumps(rec) + "\n"


FIXTURE_TRUTH = [("0417", "21042026", "03190", "03247", "57"), ("0233", "22042026", "11508", "11596", "88"),
                 ("0051", "23042026", "00712", "00790", "78")]
"""The values written on the review fixture's three pages (review_fixture.make_ledger's ``truth``)."""


def _fixture_truth(w):
    names = ("plot_number", "reading_date", "previous_reading", "current_reading", "litres_used")
    return write(w.path("truth.jsonl"), "".join(truth_line(page_number=i + 1, fields=dict(zip(names, values)))
                                                for i, values in enumerate(FIXTURE_TRUTH)))


def tune(*args):
    return lambda w: ["tune", str(w.reviewed), *[str(a(w)) if callable(a) else a for a in args]]


def score(truth, *args):
    return lambda w: ["score", str(w.reviewed), "--truth", str(truth(w)), *[str(a(w)) if callable(a) else a
                                                                          for a in args]]


def apply(make, name="decisions.jsonl"):
    return lambda w: ["review", str(w.reviewed), "--apply", str(write(w.path(name), make(w))), "--reviewer", "ann"]


def _garbage_ledger(w, outdir=None):
    write((outdir or w.reviewed) / "ledger.sqlite", os.urandom(4096))
    return outdir or w.reviewed


def _foreign_ledger(w):
    (w.reviewed / "ledger.sqlite").unlink()
    sqlite_file(w.reviewed / "ledger.sqlite", "CREATE TABLE orders (id INTEGER)")
    return w.reviewed


def _final(w, field_id):
    conn = sqlite3.connect(w.reviewed / "ledger.sqlite")
    try:
        return conn.execute("SELECT final_value, final_status FROM fields WHERE id = ?", (field_id,)).fetchone()
    finally:
        conn.close()


def _layout_gone(w):
    w.reviewed_layout.unlink()
    return ["review", str(w.reviewed), "--apply", str(write(w.path("d.jsonl"), decision())), "--reviewer", "ann"]


def _layout_edited(w):
    text = w.reviewed_layout.read_text(encoding="utf-8")
    w.reviewed_layout.write_text(text.replace("[[fields]]", "[[fields]]\nbroken = true", 1), encoding="utf-8")
    return ["review", str(w.reviewed), "--apply", str(write(w.path("d.jsonl"), decision())), "--reviewer", "ann"]


def _corrected(w, res):
    assert _final(w, 4) == ("03247", "corrected"), _final(w, 4)


def _export_after_layout_gone(w):
    w.reviewed_layout.unlink()
    return ["export", str(w.reviewed), "--out", str(w.path("export"))]


def _exported(w, res):
    assert (w.path("export") / "final_values.csv").exists()


R = dict(where="reviewed")

CASES = [
    # ------------------------------------------------------------------ tune
    Case("tune-no-ledger", lambda w: ["tune", str(w.samples)], 1, ("samples", "ledger")),
    Case("tune-truth-missing", tune("--truth", lambda w: w.path("nowhere.jsonl")), 1, ("nowhere.jsonl",),
         ledger="same", **R),
    Case("tune-truth-garbage", tune("--truth", lambda w: write(w.path("t.jsonl"), "{not json\n")), 1,
         ("t.jsonl",), ledger="same", **R),
    Case("tune-truth-non-utf8", tune("--truth", lambda w: write(w.path("t.jsonl"), b'{"source": "caf\xe9"}\n')), 1,
         ("t.jsonl", "UTF-8"), ledger="same", **R),
    Case("tune-truth-deep-json", tune("--truth", lambda w: write(w.path("t.jsonl"), "[" * 5000 + "]" * 5000 + "\n")),
         1, ("t.jsonl",), ledger="same", **R),
    Case("tune-truth-400-digit-page", tune("--truth", lambda w: write(w.path("t.jsonl"), truth_line(
        page_number=10 ** 400))), 1, ("t.jsonl", "page_number"), ledger="same", **R),
    Case("tune-target-nan", tune("--target", "nan"), 1, ("target", "nan"), ledger="same", **R),
    Case("tune-target-negative", tune("--target", "-0.5"), 1, ("target", "-0.5"), ledger="same", **R),
    Case("tune-write-layout-missing", tune("--truth", _fixture_truth, "--target", "0.4", "--write-layout",
                                           lambda w: w.path("gone.toml")), 1, ("gone.toml",), ledger="same", **R),
    Case("tune-write-layout-read-only", tune("--truth", _fixture_truth, "--target", "0.4", "--write-layout",
                                             lambda w: w.freeze(w.layout)), 1, ("layout.toml",), ledger="same",
         **R),
    Case("tune-ledger-garbage", lambda w: ["tune", str(_garbage_ledger(w))], 1, ("ledger.sqlite",), ledger="same",
         **R),
    # ------------------------------------------------------------------ score
    Case("score-truth-truncated", score(lambda w: write(w.path("t.jsonl"), truth_line() + truth_line()[:30])), 1,
         ("t.jsonl", "line 2"), ledger="same", **R),
    Case("score-truth-is-a-folder", score(lambda w: w.samples), 1, ("samples", "folder"), ledger="same", **R),
    Case("score-truth-missing", score(lambda w: w.path("none.jsonl")), 1, ("none.jsonl", "no such"), ledger="same",
         **R),
    Case("score-truth-empty", score(lambda w: write(w.path("t.jsonl"), "")), 1, ("t.jsonl",), ledger="same", **R),
    Case("score-truth-not-objects", score(lambda w: write(w.path("t.jsonl"), "[1, 2]\n")), 1, ("t.jsonl",),
         ledger="same", **R),
    Case("score-truth-huge-fields", score(lambda w: write(w.path("t.jsonl"), truth_line(
        fields={"plot_number": "9" * 100_000}))), (0, 1), ledger="same", **R),
    Case("score-curve-under-a-file", score(lambda w: write(w.path("t.jsonl"), truth_line()), "--curve",
                                           lambda w: w.layout / "c.png"), 1, ("layout.toml",), ledger="same", **R),
    Case("score-ledger-truncated", steps(lambda w: truncated(w.out / "ledger.sqlite", w.out / "ledger.sqlite", 0.3),
                                         lambda w: ["score", str(w.out), "--truth",
                                                    str(write(w.path("t.jsonl"), truth_line()))]), 1,
         ("ledger.sqlite", "damaged"), ledger="same"),
    # ------------------------------------------------------------------ report
    Case("report-no-ledger", lambda w: ["report", str(w.samples)], 1, ("samples", "ledger")),
    Case("report-ledger-foreign", lambda w: ["report", str(_foreign_ledger(w))], 1, ("ledger.sqlite",),
         ledger="same", **R),
    Case("report-one-good-one-garbage", lambda w: ["report", str(w.reviewed), str(_garbage_ledger(w, w.out))], 1,
         ("ledger.sqlite",), ledger="same"),
    Case("report-same-folder-twice", lambda w: ["report", str(w.reviewed), str(w.reviewed)], (0, 1), ledger="same",
         **R),
    # ------------------------------------------------------------------ export
    Case("export-out-is-a-file", lambda w: ["export", str(w.reviewed), "--out", str(write(w.path("f"), "x"))], 1,
         ("f", "a file is in its place"), ledger="same", **R),
    Case("export-out-read-only", lambda w: ["export", str(w.reviewed), "--out", str(w.freeze(w.samples))], 1,
         ("samples",), ledger="same", **R),
    Case("export-no-ledger", lambda w: ["export", str(w.path("nothing"))], 1, ("nothing",)),
    Case("export-ledger-garbage", lambda w: ["export", str(_garbage_ledger(w))], 1, ("ledger.sqlite",),
         ledger="same", **R),
    Case("export-after-layout-deleted", _export_after_layout_gone, 0, ledger="same", after=_exported, **R),
    # ------------------------------------------------------------------ review --apply
    Case("review-apply-missing-file", lambda w: ["review", str(w.reviewed), "--apply", str(w.path("no.jsonl"))], 1,
         ("no.jsonl",), ledger="same", **R),
    Case("review-apply-non-utf8", apply(lambda w: b'{"source": "caf\xe9"}\n'), 1, ("decisions.jsonl", "UTF-8"),
         ledger="same", **R),
    Case("review-apply-csv-without-columns", apply(lambda w: "a,b\n1,2\n", "d.csv"), 1, ("d.csv", "columns"),
         ledger="same", **R),
    Case("review-apply-garbage-line", apply(lambda w: "{oops\n"), 3, ("decisions.jsonl", "line 1"), ledger="same",
         **R),
    Case("review-apply-unknown-field", apply(lambda w: decision(field="meter_size")), 3, ("line 1", "meter_size"),
         ledger="same", **R),
    Case("review-apply-letters-in-digits", apply(lambda w: decision(value="03z47")), 3, ("line 1",), ledger="same",
         **R),
    Case("review-apply-too-many-digits", apply(lambda w: decision(value="9" * 400)), 3, ("line 1",), ledger="same",
         **R),
    Case("review-apply-path-traversal", apply(lambda w: decision(source="../../outside/victim.txt")), 3,
         ("line 1",), ledger="same", **R),
    Case("review-apply-unknown-page", apply(lambda w: decision(page_number=99)), 3, ("line 1",), ledger="same",
         **R),
    Case("review-apply-huge-page-number", apply(lambda w: decision(page_number=10 ** 30)), 3, ("line 1",),
         ledger="same", **R),
    Case("review-apply-deep-json", apply(lambda w: "[" * 8000 + "]" * 8000 + "\n"), (1, 3), ("decisions.jsonl",),
         ledger="same", **R),
    Case("review-apply-unknown-action", apply(lambda w: decision(action="erase", value=None)), 3, ("line 1",),
         ledger="same", **R),
    Case("review-apply-accepted-field", apply(lambda w: decision(field="plot_number", value="9999")), (0, 3),
         ledger="kept", **R),
    Case("review-apply-layout-deleted-since", _layout_gone, 0, after=_corrected),
    Case("review-apply-layout-edited-since", _layout_edited, 0, after=_corrected),
    # ------------------------------------------------------------------ review (the page)
    Case("review-no-ledger", lambda w: ["review", str(w.samples)], 1, ("samples",)),
    Case("review-ledger-garbage", lambda w: ["review", str(_garbage_ledger(w))], 1, ("ledger.sqlite",),
         ledger="same", **R),
    Case("review-ledger-newer-schema", steps(lambda w: sqlite_file(w.reviewed / "ledger.sqlite",
                                                                   "PRAGMA user_version = 77"),
                                             lambda w: ["review", str(w.reviewed)]), 1, ("ledger.sqlite", "77"),
         ledger="same", **R),
]


@pytest.mark.parametrize("case", params(CASES))
def test_case(case, world):
    execute(case, world)
