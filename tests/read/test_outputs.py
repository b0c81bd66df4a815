"""readings.csv and fields.jsonl are rebuilt from the ledger and agree with it."""

import csv
import json

from formread.ledger.store import FieldRow, PageRow, open_ledger
from formread.read.outputs import write_outputs


def _fill(led):
    run = led.start_run(layout_path="l.toml", layout_sha256="a", model_path="m.npz", model_sha256="b",
                        threshold=0.9, command="formread read")
    led.write_page(run, PageRow("h1", "a.png", 1, "read", fields=[
        FieldRow("plot", "open", "17", 0.99, "accepted", alternatives=[["17", 0.99], ["11", 0.01]]),
        FieldRow("member", "boxed", "1234", 0.4, "review", "low_confidence",
                 alternatives=[["1234", 0.4], ["1284", 0.3]], rules={"length": True, "luhn": True})]))
    led.write_page(run, PageRow("h2", "b.pdf", 2, "unregistered", error="b.pdf page 2: marks not found", fields=[
        FieldRow("plot", "open", None, 0.0, "review", "page_not_registered"),
        FieldRow("member", "boxed", None, 0.0, "review", "page_not_registered")]))
    led.write_page(run, PageRow("failed:x", "notes.txt", 1, "failed", error="notes.txt: not a scan"))


def test_csv_has_a_value_and_status_column_per_field(tmp_path):
    with open_ledger(tmp_path) as led:
        _fill(led)
        paths = write_outputs(led)
    rows = list(csv.DictReader(paths["readings"].read_text().splitlines()))
    assert list(rows[0])[:5] == ["page_id", "source", "page_number", "page_status", "page_error"]
    assert list(rows[0])[5:] == ["form", "plot", "plot_status", "member", "member_status"]
    assert [(r["source"], r["page_status"]) for r in rows] == [
        ("a.png", "read"), ("b.pdf", "unregistered"), ("notes.txt", "failed")]
    assert (rows[0]["plot"], rows[0]["plot_status"], rows[0]["member"], rows[0]["member_status"]) == \
        ("17", "accepted", "1234", "review")
    assert rows[1]["member_status"] == "review" and rows[1]["member"] == ""
    assert rows[2]["page_error"] == "notes.txt: not a scan" and rows[2]["plot"] == ""


def test_jsonl_has_alternatives_and_follows_review_decisions(tmp_path):
    with open_ledger(tmp_path) as led:
        _fill(led)
        write_outputs(led)
        recs = [json.loads(line) for line in (tmp_path / "fields.jsonl").read_text().splitlines()]
        assert len(recs) == 4
        assert recs[1]["alternatives"] == [["1234", 0.4], ["1284", 0.3]]
        assert recs[1]["rules"] == {"length": True, "luhn": True}
        # a clerk corrects the field (as the review page does); the outputs follow the ledger
        led.conn.execute("UPDATE fields SET final_value='1284', final_status='corrected' WHERE name='member'"
                         " AND page_id=1")
        write_outputs(led)
    recs = [json.loads(line) for line in (tmp_path / "fields.jsonl").read_text().splitlines()]
    assert (recs[1]["reading"], recs[1]["value"], recs[1]["status"]) == ("1234", "1284", "corrected")
    rows = list(csv.DictReader((tmp_path / "readings.csv").read_text().splitlines()))
    assert (rows[0]["member"], rows[0]["member_status"]) == ("1284", "corrected")
