"""Export of final values: CSV per page, JSON Lines per field, how each value came about, atomic."""

import csv
import json
import os

import pytest
from typer.testing import CliRunner

from formread.cli.main import app
from formread.errors import LedgerError
from formread.fileio import atomic_write
from formread.ledger.store import open_ledger
from formread.review import queries
from formread.review.export import CSV_NAME, JSONL_NAME, export_final, final_records


def _decide(out, info):
    conn = open_ledger(out, create=False)
    try:
        ids = info["ids"]
        queries.save_decision(conn, ids[(0, "current_reading")], action="correct", value="03247", version=0,
                              reviewer="ann", at="2026-04-24T10:00:00+00:00")
        queries.save_decision(conn, ids[(0, "litres_used")], action="confirm", version=0, reviewer="ann")
        queries.save_decision(conn, ids[(1, "plot_number")], action="unreadable", version=0, reviewer="bob")
        queries.save_decision(conn, ids[(1, "reading_date")], action="empty", version=0, reviewer="bob")
    finally:
        conn.close()


def test_export_holds_final_values_and_how(ledger, tmp_path):
    out, info = ledger
    _decide(out, info)
    res = export_final(out, tmp_path / "exp")
    assert (res.pages, res.fields) == (3, 15)
    assert res.counts == {"auto": 6, "confirmed": 1, "corrected": 1, "unreadable": 1, "empty": 1, "pending": 5}
    with open(res.csv_path, newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["page_number"] for r in rows] == ["1", "2", "3"]
    assert list(rows[0])[:7] == ["page_id", "source", "page_number", "page_status", "form", "plot_number",
                                 "plot_number_how"]
    r0, r1, r2 = rows
    assert (r0["current_reading"], r0["current_reading_how"]) == ("03247", "corrected")
    assert (r0["litres_used"], r0["litres_used_how"]) == ("57", "confirmed")
    assert (r0["plot_number"], r0["plot_number_how"]) == ("0417", "auto")
    assert (r1["plot_number"], r1["plot_number_how"]) == ("", "unreadable")
    assert (r1["reading_date"], r1["reading_date_how"]) == ("", "empty")
    assert (r2["page_status"], r2["plot_number"], r2["plot_number_how"]) == ("unregistered", "", "pending")
    recs = [json.loads(line) for line in res.jsonl_path.read_text().splitlines()]
    assert len(recs) == 15
    cur = next(r for r in recs if r["page_id"] == info["pages"][0] and r["field"] == "current_reading")
    assert (cur["value"], cur["how"], cur["reading"], cur["reviewer"]) == ("03247", "corrected", "03241", "ann")
    assert cur["reviewed_at"] == "2026-04-24T10:00:00+00:00"
    assert (cur["model_sha256"], cur["threshold"]) == ("c0ffee00", 0.95)        # current_reading has its own threshold
    assert final_records(out) == recs
    assert sorted(os.listdir(tmp_path / "exp")) == sorted([CSV_NAME, JSONL_NAME])  # no temp files left


def test_export_defaults_to_outdir_and_replaces_old_files(ledger):
    out, info = ledger
    export_final(out)
    first = (out / CSV_NAME).read_text()
    _decide(out, info)
    export_final(out)
    assert (out / CSV_NAME).read_text() != first and "corrected" in (out / CSV_NAME).read_text()


def test_export_guards_spreadsheet_formulas_in_sources(ledger):
    out, _ = ledger
    conn = open_ledger(out, create=False)
    conn.conn.execute("UPDATE pages SET source = '=cmd|x' WHERE id = 1")
    conn.close()
    res = export_final(out)
    with open(res.csv_path, newline="") as f:
        assert next(csv.DictReader(f))["source"] == "'=cmd|x"


def test_atomic_write_keeps_the_old_file_when_writing_fails(tmp_path):
    p = tmp_path / "a.csv"
    p.write_text("old")


    with pytest.raises(TypeError):
        atomic_write(p, 123)  # not text: fails while writing the temp file
    assert p.read_text() == "old" and os.listdir(tmp_path) == ["a.csv"]
    atomic_write(p, "new")
    assert p.read_text() == "new"


def test_export_errors(tmp_path, ledger):
    with pytest.raises(LedgerError, match="no ledger here"):
        export_final(tmp_path / "none")
    out, _ = ledger
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(LedgerError, match="cannot create the export folder"):
        export_final(out, blocker / "sub")


def test_cli_export(ledger, tmp_path):
    out, info = ledger
    _decide(out, info)
    res = CliRunner().invoke(app, ["export", str(out), "--out", str(tmp_path / "e")])
    assert res.exit_code == 0, res.output
    assert "3 pages" in res.output and "15 fields" in res.output and "pending 5" in res.output
    assert (tmp_path / "e" / CSV_NAME).is_file() and (tmp_path / "e" / JSONL_NAME).is_file()
    res = CliRunner().invoke(app, ["export", str(tmp_path / "nothing")])
    assert res.exit_code == 1 and "no ledger here" in res.output
