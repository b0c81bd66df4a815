"""The output files regenerated from the ledger: ``readings.csv`` and ``fields.jsonl``.

A ledger of a mixed batch (pages of several forms) gets one table per form,
``readings-<form>.csv``, and ``readings.csv`` lists every page with its form and status
(its fields are in its form's table and in ``fields.jsonl``).

Both are rebuilt from the ledger as a whole at the end of every run (and may be
rebuilt at any time), each written atomically, so they always agree with the
ledger, whatever happened to earlier runs.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from types import EllipsisType

from ..fileio import form_slug, spreadsheet_cell
from ..ledger.store import Ledger, atomic_write

__all__ = ["READINGS_CSV", "FIELDS_JSONL", "field_value", "field_status", "write_outputs"]

READINGS_CSV = "readings.csv"
FIELDS_JSONL = "fields.jsonl"


def field_value(row: dict) -> str | None:
    """The field's current value: the clerk's final value once decided, else the machine's reading."""
    if row.get("final_status") is not None:
        return row.get("final_value")
    return row.get("reading")


def field_status(row: dict) -> str:
    """The field's current status: 'accepted', 'review' (waiting for a clerk) or the clerk's final status."""
    fs = row.get("final_status")
    if fs is None:
        return "review" if row["decision"] == "review" else row["decision"]
    return "accepted" if fs == "auto" else fs


def _field_names(rows: list[dict]) -> list[str]:
    seen: dict[str, None] = {}
    for r in sorted(rows, key=lambda r: r["id"]):
        seen.setdefault(r["name"], None)
    return list(seen)


def readings_csv(ledger: Ledger, form: str | None | EllipsisType = ..., pages=None, fields=None) -> str:
    """``readings.csv`` text: one row per page, a value and a status column per field (cells a
    spreadsheet would run as a formula are quoted, see formread.fileio.spreadsheet_cell).

    ``form``: only the pages read as that form (one table per form of a mixed batch); the default
    ``...`` takes every page."""
    pages = ledger.page_rows() if pages is None else pages
    fields = ledger.field_rows() if fields is None else fields
    if form is not ...:
        pages = [p for p in pages if p["form"] == form]
        fields = [f for f in fields if f["form"] == form]
    names = _field_names(fields)
    by_page: dict[int, dict[str, dict]] = {}
    for f in fields:
        by_page.setdefault(f["page_id"], {})[f["name"]] = f
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["page_id", "source", "page_number", "page_status", "page_error", "form"]
               + [c for n in names for c in (n, f"{n}_status")])
    for p in pages:
        row = [p["id"], spreadsheet_cell(p["source"]), p["page_number"], p["status"], spreadsheet_cell(p["error"]),
               spreadsheet_cell(p["form"])]
        mine = by_page.get(p["id"], {})
        for n in names:
            f = mine.get(n)
            if f is None:
                row += ["", ""]
            else:
                v = field_value(f)
                row += [spreadsheet_cell(v), field_status(f)]
        w.writerow(row)
    return buf.getvalue()


def fields_jsonl(ledger: Ledger) -> str:
    """``fields.jsonl`` text: one JSON record per field, with its top alternatives and their probabilities."""
    lines = []
    for f in ledger.field_rows():
        rec = {
            "page_id": f["page_id"], "source": f["source"], "page_number": f["page_number"],
            "form": f["form"], "field": f["name"], "kind": f["kind"], "reading": f["reading"],
            "confidence": f["confidence"], "decision": f["decision"], "reason": f["reason"], "rules": f["rules"],
            "alternatives": f["alternatives"], "value": field_value(f), "status": field_status(f),
            "image": f["image_path"],
        }
        lines.append(json.dumps(rec, ensure_ascii=False))
    return "".join(line + "\n" for line in lines)


def write_outputs(ledger: Ledger) -> dict[str, Path]:
    """Rebuild ``readings.csv`` and ``fields.jsonl`` in the ledger's folder (each atomically).

    Returns
    -------
    dict
        ``{"readings": path, "fields": path}``.
    """
    out = {"readings": ledger.outdir / READINGS_CSV, "fields": ledger.outdir / FIELDS_JSONL}
    with ledger.write_lock():          # one consistent snapshot; writers of this folder take turns
        pages, fields = ledger.page_rows(), ledger.field_rows()
        forms = sorted({p["form"] for p in pages if p["form"] is not None})
        if len(forms) > 1:             # a mixed batch: a table per form, and every page in readings.csv
            for form in forms:
                path = ledger.outdir / f"readings-{form_slug(form)}.csv"
                atomic_write(path, readings_csv(ledger, form, pages, fields).encode("utf-8"))
                out[f"readings:{form}"] = path
            atomic_write(out["readings"], readings_csv(ledger, ..., pages, []).encode("utf-8"))
        else:
            atomic_write(out["readings"], readings_csv(ledger, ..., pages, fields).encode("utf-8"))
        atomic_write(out["fields"], fields_jsonl(ledger).encode("utf-8"))
    return out
