"""Decisions from a file (`formread review OUTDIR --apply FILE`): the same audited save, line by line."""

import json
import sqlite3

from review_fixture import snapshot
from typer.testing import CliRunner

from formread.cli.main import app
from formread.ledger.store import open_ledger
from formread.review.bulk import apply_decisions, read_decisions

SRC = "cards-2026-04.tif"      # the fixture's pages are scans/cards-2026-04.tif pages 1-3


def _lines(path, records):
    path.write_text("".join((r if isinstance(r, str) else json.dumps(r)) + "\n" for r in records))
    return path


def test_every_kind_of_bad_line_is_refused_alone_and_the_rest_applied(ledger, tmp_path):
    out, info = ledger
    good = [
        {"source": SRC, "page_number": 1, "field": "current_reading", "value": "03247"},          # correction
        {"source": "scans/" + SRC, "page_number": 1, "field": "litres_used", "value": "57"},       # confirm
        {"source": SRC, "page_number": 2, "field": "plot_number", "action": "unreadable"},
        {"source": SRC, "page_number": 2, "field": "reading_date", "value": ""},                  # blank on paper
    ]
    bad = [
        ({"source": "other.tif", "page_number": 1, "field": "plot_number", "value": "1"}, "no page 1 of 'other.tif'"),
        ({"source": SRC, "page_number": 9, "field": "plot_number", "value": "1"}, "no page 9"),
        ({"source": SRC, "page_number": 3, "field": "meter_id", "value": "1"}, "has no field 'meter_id'"),
        ({"source": SRC, "page_number": 3, "field": "plot_number", "value": "00A1"}, "digits only"),
        ({"source": SRC, "page_number": 3, "field": "plot_number", "value": "123456789"}, "at most 4 digits"),
        ({"source": SRC, "page_number": 1, "field": "plot_number", "value": "0417"}, "accepted by the reader"),
        ({"source": SRC, "page_number": 3, "field": "plot_number"}, "'value' is missing"),
        ({"source": SRC, "page_number": "x", "field": "plot_number", "value": "1"}, "'page_number'"),
        ({"source": SRC, "page_number": 3, "field": "plot_number", "value": "1", "action": "erase"}, "'action'"),
        ("{not json", "not a JSON object"),
        ("[1, 2]", "not a JSON object"),
    ]
    f = _lines(tmp_path / "decisions.jsonl", good + [b for b, _ in bad]
               + [{"source": SRC, "page_number": 1, "field": "current_reading", "value": "03240"}])  # decided above
    with open_ledger(out, create=False) as led:
        rep = apply_decisions(led, read_decisions(f), reviewer="ines")
    assert rep.applied == 4 and rep.by_action == {"correct": 1, "confirm": 1, "unreadable": 1, "empty": 1}
    whys = [r.why for r in rep.refused]
    assert len(whys) == len(bad) + 1
    for (_, words), why in zip(bad, whys):
        assert words in why, why
    assert "already corrected" in whys[-1]
    assert [r.line for r in rep.refused] == list(range(5, 5 + len(bad) + 1))
    # the audit trail of the applied ones is complete, as from the review page
    conn = sqlite3.connect(out / "ledger.sqlite")
    rows = conn.execute("SELECT action, old_value, new_value, reviewer, at, model_sha256, threshold FROM reviews "
                        "ORDER BY id").fetchall()
    conn.close()
    assert [r[:4] for r in rows] == [("correct", "03241", "03247", "ines"), ("confirm", "57", "57", "ines"),
                                     ("unreadable", "0283", None, "ines"), ("empty", "32042026", "", "ines")]
    assert all(r[4].endswith("+00:00") and r[5] == "c0ffee00" and r[6] in (0.9, 0.95) for r in rows)


def test_a_refused_line_writes_nothing(ledger, tmp_path):
    out, _ = ledger
    before = snapshot(out)
    f = _lines(tmp_path / "d.jsonl", [{"source": SRC, "page_number": 1, "field": "current_reading", "value": "3x"}])
    res = CliRunner().invoke(app, ["review", str(out), "--apply", str(f), "--reviewer", "ines"])
    assert res.exit_code == 3
    assert "line 1: field 'current_reading' holds digits only" in res.stderr
    assert "0 decisions applied, 1 refused" in res.stdout
    assert snapshot(out) == before


def test_a_csv_file_with_the_same_columns(ledger, tmp_path):
    out, _ = ledger
    f = tmp_path / "keyed.csv"
    f.write_text("source,page_number,field,value,action\n"
                 f"{SRC},1,current_reading,03247,\n{SRC},2,plot_number,,unreadable\n")
    res = CliRunner().invoke(app, ["review", str(out), "--apply", str(f), "--reviewer", "ines"])
    assert res.exit_code == 0, res.output
    assert "2 decisions applied (correct 1, unreadable 1), 0 refused" in res.stdout
    bad = tmp_path / "bad.csv"
    bad.write_text("file,page,value\nx,1,2\n")
    res = CliRunner().invoke(app, ["review", str(out), "--apply", str(bad)])
    assert res.exit_code == 1 and "needs the columns" in res.stderr and len(res.stderr.strip().splitlines()) == 1
