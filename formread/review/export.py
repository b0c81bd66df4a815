"""Write the final values of a ledger: a CSV (one row per page) and JSON Lines (one record per field).

Each field says how its value came about (``how``):

* ``auto``        accepted by the reader and not touched by a clerk
* ``confirmed``   flagged, and a clerk kept the proposed reading
* ``corrected``   flagged, and a clerk typed another value
* ``unreadable``  a clerk could not read it (value empty)
* ``empty``       a clerk saw the field blank on paper (value empty)
* ``pending``     still waiting for review (value empty)

Files are written atomically (a temporary file in the same folder, then ``os.replace``), so a
reader of the export never sees half a file and an interrupted export leaves the old one intact.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import LedgerError
from ..fileio import atomic_write, form_slug, spreadsheet_cell
from ..ledger.store import open_ledger

__all__ = ["HOW", "CSV_NAME", "JSONL_NAME", "ExportResult", "final_records", "export_final"]

HOW = ("auto", "confirmed", "corrected", "unreadable", "empty", "pending")
CSV_NAME = "final_values.csv"
JSONL_NAME = "final_values.jsonl"


@dataclass
class ExportResult:
    """Where the export went and what it holds (``counts``: fields per ``how``)."""

    csv_path: Path
    jsonl_path: Path
    pages: int
    fields: int
    counts: dict
    csv_paths: list = field(default_factory=list)   # one table per form of a mixed batch


def _how(decision: str, final_status: str | None) -> str:
    if final_status in ("confirmed", "corrected", "unreadable", "empty"):
        return final_status
    if decision == "accepted":
        return "auto"
    return "pending"


def _value(how: str, reading: str | None, final_value: str | None) -> str:
    if how == "auto":
        return final_value if final_value is not None else (reading or "")
    if how in ("confirmed", "corrected"):
        return final_value or ""
    return ""


_RECORDS_SQL = (
    "SELECT f.id, f.page_id, f.name, f.reading, f.confidence, f.reason, f.decision, f.final_value, "
    "f.final_status, p.source, p.page_number, p.status AS page_status, p.form, r.model_sha256, "
    "coalesce(f.threshold, r.threshold) AS threshold, "
    "(SELECT v.reviewer FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS reviewer, "
    "(SELECT v.at FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS reviewed_at "
    "FROM fields f JOIN pages p ON p.id = f.page_id JOIN runs r ON r.id = p.run_id "
    "ORDER BY p.id, f.id")


def _snapshot(outdir: str | Path) -> tuple[list[dict], list[dict]]:
    """(pages, field records) read in one transaction, so they agree with each other."""
    with open_ledger(outdir, create=False) as led:
        conn = led.conn
        conn.execute("BEGIN")
        pages = [dict(r) for r in conn.execute(
            "SELECT id AS page_id, source, page_number, status AS page_status, form FROM pages ORDER BY id")]
        rows = conn.execute(_RECORDS_SQL).fetchall()
        conn.execute("COMMIT")
    records = []
    for r in rows:
        how = _how(r["decision"], r["final_status"])
        records.append({
            "page_id": r["page_id"], "source": r["source"], "page_number": r["page_number"],
            "page_status": r["page_status"], "form": r["form"], "field": r["name"],
            "value": _value(how, r["reading"], r["final_value"]),
            "how": how, "reading": r["reading"], "confidence": r["confidence"], "reason": r["reason"],
            "reviewer": r["reviewer"], "reviewed_at": r["reviewed_at"],
            "model_sha256": r["model_sha256"], "threshold": r["threshold"],
        })
    return pages, records


def final_records(outdir: str | Path) -> list[dict]:
    """One dict per field, in page then field order (the JSON Lines records).

    Keys: ``page_id, source, page_number, page_status, field, value, how, reading, confidence,
    reason, reviewer, reviewed_at, model_sha256, threshold`` (reviewer/reviewed_at from the last
    review, None when untouched; model and threshold from the run that read the page).
    """
    return _snapshot(outdir)[1]




def export_final(outdir: str | Path, out_dir: str | Path | None = None) -> ExportResult:
    """Write ``final_values.csv`` and ``final_values.jsonl`` into ``out_dir`` (default: ``outdir``).

    The CSV has one row per page (failed pages too, with no values): ``page_id, source, page_number,
    page_status, form``, then for each field name (in the order first met) a value column ``<name>``
    and a ``<name>_how`` column.  A mixed batch gets one table per form, ``final_values-<form>.csv``;
    the JSON Lines file holds every field.

    Raises
    ------
    LedgerError
        No ledger in ``outdir``, or ``out_dir`` cannot be created or written.
    """
    page_rows, records = _snapshot(outdir)
    out = Path(out_dir) if out_dir is not None else Path(outdir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        why = "a file is in its place" if out.exists() and not out.is_dir() else (e.strerror or str(e))
        raise LedgerError(f"{out}: cannot create the export folder ({why})") from None

    counts = {h: 0 for h in HOW}
    for rec in records:
        counts[rec["how"]] += 1
    forms = sorted({p["form"] for p in page_rows if p["form"] is not None})
    tables = {CSV_NAME: _table(page_rows, records)} if len(forms) <= 1 else \
        {f"final_values-{form_slug(form)}.csv": _table([p for p in page_rows if p["form"] == form],
                                                        [r for r in records if r["form"] == form]) for form in forms}
    lines = "".join(json.dumps(rec, ensure_ascii=False) + "\n" for rec in records)
    try:
        for name, text in tables.items():
            atomic_write(out / name, text)
        atomic_write(out / JSONL_NAME, lines)
    except OSError as e:
        raise LedgerError(f"{out}: cannot write the export ({e.strerror or e})") from None
    return ExportResult(out / next(iter(tables)), out / JSONL_NAME, len(page_rows), len(records), counts,
                        [out / n for n in tables])


def _table(page_rows: list[dict], records: list[dict]) -> str:
    """One CSV table: a row per page, a value and a ``_how`` column per field (in the order first met)."""
    names: list[str] = []
    pages = {p["page_id"]: dict(p, source=spreadsheet_cell(p["source"])) for p in page_rows}
    for rec in records:
        if rec["field"] not in names:
            names.append(rec["field"])
        page = pages[rec["page_id"]]
        page[rec["field"]] = spreadsheet_cell(rec["value"])
        page[rec["field"] + "_how"] = rec["how"]
    buf = io.StringIO()
    header = ["page_id", "source", "page_number", "page_status", "form"]
    for n in names:
        header += [n, n + "_how"]
    w = csv.DictWriter(buf, fieldnames=header, restval="", lineterminator="\n")
    w.writeheader()
    for page in pages.values():
        w.writerow(page)
    return buf.getvalue()
