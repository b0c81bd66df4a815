"""The ledger side of review: listing, explaining, saving with the stale-save guard and audit rows."""

import contextlib
import os
import re
import sqlite3

import numpy as np
import pytest
from review_fixture import snapshot

from formread.errors import LedgerError, ReviewError
from formread.ledger.fieldfile import load_digits
from formread.ledger.store import open_ledger
from formread.review import queries, wording
from formread.review.queries import InvalidValue, StaleSave, UnknownItem


def _conn(out):
    return contextlib.closing(open_ledger(out, create=False))


def test_pending_oldest_first_and_filters(ledger):
    out, info = ledger
    with _conn(out) as conn:
        assert queries.list_pending(conn) == info["pending"]
        ids = queries.list_pending(conn, name="current_reading")
        assert ids == [info["ids"][(0, "current_reading")], info["ids"][(2, "current_reading")]]
        assert queries.list_pending(conn, reason="low_confidence") == [info["ids"][(0, "current_reading")]]
        # a kind of reason keeps every rule that failed
        assert queries.list_pending(conn, reason="rule_failed") == [info["ids"][(0, "litres_used")],
                                                                     info["ids"][(1, "reading_date")]]
        assert queries.list_pending(conn, reason="rule_failed:date") == [info["ids"][(1, "reading_date")]]
        # LIKE wildcards in a filter are taken literally
        assert queries.list_pending(conn, reason="%") == []
        assert queries.list_pending(conn, name="nope") == []
        f = queries.pending_filters(conn)
    assert f["total"] == len(info["pending"]) == 9
    assert dict(map(tuple, f["reasons"]))["rule_failed"] == 2
    assert dict(map(tuple, f["reasons"]))["page_not_registered"] == 5
    assert dict(map(tuple, f["names"]))["plot_number"] == 2


def test_field_detail_explains_in_plain_words(ledger):
    out, info = ledger
    with _conn(out) as conn:
        d = queries.field_detail(conn, info["ids"][(0, "current_reading")])
        assert d["reading"] == "03241" and d["version"] == 0 and d["final_status"] is None
        # current_reading has its own threshold 0.95 in the layout (the run's is 0.90)
        assert d["why"] == ["The reader was not sure of this reading: 62% sure, 95% needed."]
        assert d["max_digits"] == 5 and d["has_image"] and d["has_page_image"]
        assert d["alternatives"][0] == ["03241", 0.62] and len(d["digit_probs"]) == 5
        d2 = queries.field_detail(conn, info["ids"][(0, "litres_used")])
        assert d2["why"] == ["A rule failed (relation): the numbers on this page do not add up: "
                             "litres_used = current_reading - previous_reading."]
        assert d2["rules"] == {"relation": False}
        assert d2["max_digits"] == 6
        d3 = queries.field_detail(conn, info["ids"][(2, "plot_number")])
        assert d3["reading"] is None and not d3["has_image"] and "page view" in d3["why"][0]
        with pytest.raises(UnknownItem, match="no field with id 999"):
            queries.field_detail(conn, 999)


def test_explain_reason_vocabulary():
    assert wording.explain_reason(None) == []
    assert "check digit" in wording.explain_reason("rule_failed:luhn")[0]
    assert "calendar date" in wording.explain_reason("rule_failed:date")[0]
    assert "told apart" in wording.explain_reason("segmentation_doubtful")[0]
    assert "must be filled" in wording.explain_reason("missing")[0]
    assert wording.explain_reason("low_confidence; rule_failed:range")[1].startswith("A rule failed (range)")
    assert wording.explain_reason("something_new") == ["Flagged: something_new."]
    assert "do not add up" in wording.explain_reason("rule_failed:relation")[0]
    assert "must be filled" in wording.explain_reason("rule_failed:required")[0]


def test_save_correction_writes_value_version_and_audit_in_one_go(ledger):
    out, info = ledger
    fid = info["ids"][(0, "current_reading")]
    with _conn(out) as conn:
        d = queries.save_decision(conn, fid, action="correct", value="03247", version=0, reviewer="ann")
        assert (d["final_value"], d["final_status"], d["version"]) == ("03247", "corrected", 1)
        rows = conn.conn.execute("SELECT * FROM reviews WHERE field_id = ?", (fid,)).fetchall()
    assert len(rows) == 1
    r = dict(rows[0])
    assert (r["action"], r["old_value"], r["new_value"], r["reviewer"]) == ("correct", "03241", "03247", "ann")
    # model of the run that produced the reading, and the threshold that applied to this field (its own 0.95)
    assert (r["model_path"], r["model_sha256"], r["threshold"]) == ("models/default.npz", "c0ffee00", 0.95)
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00", r["at"])
    with _conn(out) as conn:
        assert fid not in queries.list_pending(conn)
        # a second decision on the same field (going back) records the previous final value as old
        queries.save_decision(conn, fid, action="confirm", version=1, reviewer="bob")
        last = dict(conn.conn.execute("SELECT * FROM reviews ORDER BY id DESC LIMIT 1").fetchone())
        d = queries.field_detail(conn, fid)
    assert (last["old_value"], last["new_value"], last["reviewer"]) == ("03247", "03241", "bob")
    assert (d["final_status"], d["version"], d["last_review"]["reviewer"]) == ("confirmed", 2, "bob")


@pytest.mark.parametrize("action,value,status,final", [
    ("confirm", None, "confirmed", "03241"),
    ("correct", "03241", "confirmed", "03241"),   # typing the proposal counts as keeping it
    ("correct", " 03249 ", "corrected", "03249"),
    ("unreadable", None, "unreadable", None),
    ("empty", None, "empty", ""),
])
def test_each_action(ledger, action, value, status, final):
    out, info = ledger
    fid = info["ids"][(0, "current_reading")]
    with _conn(out) as conn:
        d = queries.save_decision(conn, fid, action=action, value=value, version=0, reviewer="ann")
        rec = conn.conn.execute("SELECT action, new_value FROM reviews").fetchone()
    assert (d["final_status"], d["final_value"]) == (status, final)
    assert rec["new_value"] == final
    assert rec["action"] == {"confirmed": "confirm", "corrected": "correct"}.get(status, status)


@pytest.mark.parametrize("field,kw,message", [
    ((0, "current_reading"), dict(action="correct", value="03a41"), "digits only"),
    ((0, "current_reading"), dict(action="correct", value="０３２４１"), "digits only"),  # full-width digits
    ((0, "current_reading"), dict(action="correct", value="032411"), "at most 5 digits"),
    ((0, "plot_number"), dict(action="correct", value="12345"), "at most 4 digits"),
    ((0, "current_reading"), dict(action="correct", value=""), "no value typed"),
    ((0, "current_reading"), dict(action="correct", value=None), "no value typed|must be a string"),
    ((0, "current_reading"), dict(action="delete", value=None), "unknown action"),
    ((2, "plot_number"), dict(action="confirm", value=None), "no proposed reading"),
    ((0, "current_reading"), dict(action="confirm", value=None, reviewer=" "), "reviewer name"),
])
def test_refused_values_write_nothing(ledger, field, kw, message):
    out, info = ledger
    before = snapshot(out)
    kw = dict({"version": 0, "reviewer": "ann"}, **kw)
    with _conn(out) as conn, pytest.raises(InvalidValue, match=message) as e:
        queries.save_decision(conn, info["ids"][field], **kw)
    assert isinstance(e.value, ReviewError) and e.value.short in str(e.value)
    assert snapshot(out) == before


def test_keeping_a_blank_proposal_marks_the_field_empty(ledger):
    out, info = ledger
    fid = info["ids"][(0, "current_reading")]
    with _conn(out) as conn:
        conn.conn.execute("UPDATE fields SET reading = '', reason = 'missing' WHERE id = ?", (fid,))
        d = queries.save_decision(conn, fid, action="confirm", version=0, reviewer="ann")
        assert (d["final_value"], d["final_status"]) == ("", "empty")
        row = conn.conn.execute("SELECT action, old_value, new_value FROM reviews").fetchone()
        assert tuple(row) == ("empty", "", "")


def test_stale_save_refused_between_two_reviewers(ledger):
    out, info = ledger
    fid = info["ids"][(1, "reading_date")]
    a, b = open_ledger(out, create=False), open_ledger(out, create=False)
    try:
        shown_a = queries.field_detail(a, fid)["version"]
        shown_b = queries.field_detail(b, fid)["version"]
        queries.save_decision(b, fid, action="correct", value="22042026", version=shown_b, reviewer="bob")
        after_b = snapshot(out)
        with pytest.raises(StaleSave, match="changed since it was shown"):
            queries.save_decision(a, fid, action="correct", value="12042026", version=shown_a, reviewer="ann")
        assert snapshot(out) == after_b
        assert queries.field_detail(a, fid)["final_value"] == "22042026"
    finally:
        a.close()
        b.close()


def test_unknown_field_and_bad_version(ledger):
    out, _ = ledger
    before = snapshot(out)
    with _conn(out) as conn:
        with pytest.raises(UnknownItem):
            queries.save_decision(conn, 12345, action="confirm", version=0, reviewer="ann")
        with pytest.raises(InvalidValue, match="version must be an integer"):
            queries.save_decision(conn, 1, action="confirm", version="0", reviewer="ann")
    assert snapshot(out) == before


def test_field_relations_match_whole_names(ledger):
    out, info = ledger
    with _conn(out) as conn:
        layout = queries.run_layout(conn, 1)
    assert queries.field_relations(layout, "previous_reading") == ["litres_used = current_reading - previous_reading"]
    assert queries.field_relations(layout, "reading") == []
    assert queries.field_relations(layout, "plot_number") == []
    assert queries.field_relations(None, "litres_used") == []


def test_values_are_checked_against_the_layout_as_read_not_as_edited_or_deleted(ledger):
    out, info = ledger
    fid = info["ids"][(1, "plot_number")]
    # the clerk's layout file is edited (plot numbers now 2 cells) and then deleted after the run
    info["layout"].write_text(info["layout"].read_text().replace("cells = 4", "cells = 2"))
    with _conn(out) as conn:
        assert queries.field_detail(conn, fid)["max_digits"] == 4
    os.unlink(info["layout"])
    with _conn(out) as conn:
        assert queries.field_detail(conn, fid)["max_digits"] == 4
        with pytest.raises(InvalidValue, match="at most 4 digits"):
            queries.save_decision(conn, fid, action="correct", value="1" * 28, version=0, reviewer="ann")
        queries.save_decision(conn, fid, action="correct", value="0017", version=0, reviewer="ann")
    assert queries.field_limit(None, "plot_number") == queries.DEFAULT_MAX_DIGITS
    assert queries.field_limit(None, "plot_number", 6) == 6


def test_resolve_inside_refuses_paths_leaving_outdir(ledger, tmp_path):
    out, _ = ledger
    outside = tmp_path / "secret.png"
    outside.write_bytes(b"x")
    assert queries.resolve_inside(out, "pages/1.png") == (out / "pages" / "1.png").resolve()
    assert queries.resolve_inside(out, "../secret.png") is None
    assert queries.resolve_inside(out, str(outside)) is None
    assert queries.resolve_inside(out, "") is None and queries.resolve_inside(out, None) is None
    assert queries.resolve_inside(out, "pages") is None  # a folder, not a file
    (out / "link.png").symlink_to(outside)
    assert queries.resolve_inside(out, "link.png") is None


def test_image_file_by_id_only(ledger):
    out, info = ledger
    with _conn(out) as conn:
        p = queries.image_file(conn, "field", info["ids"][(0, "current_reading")])
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert queries.image_file(conn, "page", info["pages"][2]).is_file()
        with pytest.raises(UnknownItem, match="has no image"):
            queries.image_file(conn, "field", info["ids"][(2, "plot_number")])
        with pytest.raises(UnknownItem):
            queries.image_file(conn, "page", 99)
        conn.conn.execute("UPDATE pages SET image_path = '../../etc/passwd' WHERE id = ?", (info["pages"][0],))
        with pytest.raises(UnknownItem, match="has no image"):
            queries.image_file(conn, "page", info["pages"][0])


def test_page_detail_lists_boxes(ledger):
    out, info = ledger
    with _conn(out) as conn:
        p = queries.page_detail(conn, info["pages"][0])
        assert p["has_image"] and [f["name"] for f in p["fields"]][:2] == ["plot_number", "reading_date"]
        assert all(len(f["box_px"]) == 4 for f in p["fields"])
        assert all(f["box_px"] is None for f in queries.page_detail(conn, info["pages"][2])["fields"])
        with pytest.raises(UnknownItem):
            queries.page_detail(conn, 77)


def test_decided_fields_with_digit_arrays_for_retraining(ledger):
    out, info = ledger
    with _conn(out) as conn:
        fid = info["ids"][(0, "current_reading")]
        queries.save_decision(conn, fid, action="correct", value="03247", version=0, reviewer="ann")
        queries.save_decision(conn, info["ids"][(1, "plot_number")], action="unreadable", version=0,
                              reviewer="ann")
        decided = queries.list_decided(conn)
        assert [(d.field_id, d.final_value, d.reviewer) for d in decided] == [(fid, "03247", "ann")]
        assert len(queries.list_decided(conn, statuses=("unreadable",))) == 1
    x = load_digits(decided[0].digits_path)
    assert x.shape == (5, 1, 28, 28) and x.dtype == np.float32


def test_load_digits_refuses_bad_files(tmp_path):
    np.savez(tmp_path / "a.npz", other=np.zeros((2, 5)), more=np.zeros(1))
    with pytest.raises(LedgerError, match="no 'digits' array"):
        load_digits(tmp_path / "a.npz")
    np.savez(tmp_path / "b.npz", digits=np.zeros((2, 5)))
    with pytest.raises(LedgerError, match="expected"):
        load_digits(tmp_path / "b.npz")
    with pytest.raises(LedgerError, match="cannot be read"):
        load_digits(tmp_path / "missing.npz")


def test_connect_refuses_what_is_not_a_ledger(tmp_path):
    with pytest.raises(LedgerError, match="no ledger here"):
        open_ledger(tmp_path, create=False)
    (tmp_path / "ledger.sqlite").write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(LedgerError, match="not a"):
        open_ledger(tmp_path, create=False)
    other = tmp_path / "o"
    other.mkdir()
    sqlite3.connect(other / "ledger.sqlite").execute("CREATE TABLE x (a)").connection.close()
    with pytest.raises(LedgerError, match="not a formread ledger"):
        open_ledger(other, create=False)


def test_connect_refuses_a_newer_schema(ledger):
    out, _ = ledger
    c = sqlite3.connect(out / "ledger.sqlite", isolation_level=None)
    c.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    c.close()
    with pytest.raises(LedgerError, match="newer"):
        open_ledger(out, create=False)


def test_value_warnings_after_a_save(ledger):
    out, info = ledger
    ids = info["ids"]
    with _conn(out) as conn:
        # litres_used kept at 57 while current_reading still reads 03241: 03241 - 03190 != 57
        queries.save_decision(conn, ids[(0, "litres_used")], action="confirm", version=0, reviewer="ann")
        assert queries.value_warnings(conn, ids[(0, "litres_used")]) == [
            "The numbers on this page still do not add up: litres_used = current_reading - previous_reading."]
        # correcting current_reading to what the paper says makes the page add up
        queries.save_decision(conn, ids[(0, "current_reading")], action="correct", value="03247", version=0,
                              reviewer="ann")
        assert queries.value_warnings(conn, ids[(0, "current_reading")]) == []
        # a date that does not exist, kept by the clerk: said, not refused
        queries.save_decision(conn, ids[(1, "reading_date")], action="confirm", version=0, reviewer="ann")
        assert queries.value_warnings(conn, ids[(1, "reading_date")]) == ["The value breaks the field's date rule."]
        # nothing to say about unreadable fields, pending fields, unknown ids
        queries.save_decision(conn, ids[(1, "plot_number")], action="unreadable", version=0, reviewer="ann")
        assert queries.value_warnings(conn, ids[(1, "plot_number")]) == []
        assert queries.value_warnings(conn, ids[(2, "plot_number")]) == []
        assert queries.value_warnings(conn, 999) == []
