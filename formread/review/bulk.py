"""Decisions from a file: for offices that key flagged fields in another system, or key them twice.

``formread review OUTDIR --apply FILE --reviewer NAME`` reads one decision per line, JSON Lines::

    {"source": "scan_012.jpg", "page_number": 1, "field": "donor_number", "value": "138959"}

(``"value": ""`` = blank on paper; an optional ``"action": "unreadable"``), or a CSV file with the
same column names and a header row.  Each decision goes through the same audited save as the
review page (formread.review.queries.save_decision: reviewer, time, old and new value, model,
threshold; one transaction each).  A line that cannot be applied (unknown page or field, letters
in a digits field, a field no longer waiting for a decision, a malformed line) is refused with one
line saying why, and nothing of it is written; the others are applied.

Pages are matched by their file name as the ledger holds it, or by its base name when that is
unique in the ledger (the truth files of formread's demo sets name files that way).
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass, field
from pathlib import Path, PurePath

from ..errors import DataError, ReviewError
from ..ledger.store import Ledger
from .queries import save_decision

__all__ = ["Refusal", "ApplyReport", "apply_decisions", "read_decisions"]

MAX_LINES = 1_000_000


@dataclass
class Refusal:
    """A line that was not applied: where it is and why."""

    line: int
    why: str


@dataclass
class ApplyReport:
    """What :func:`apply_decisions` did."""

    applied: int = 0
    by_action: dict = field(default_factory=dict)
    refused: list = field(default_factory=list)


def read_decisions(path) -> list[tuple[int, dict | str]]:
    """The decisions of a JSON Lines or CSV file: ``(line number, record)``, or ``(line, why)`` for a
    line that is not a decision record.

    Raises
    ------
    DataError
        The file cannot be read at all (missing, not UTF-8 text).
    """
    p = Path(path)
    try:
        text = p.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise DataError(f"{p}: no such decisions file") from None
    except UnicodeDecodeError as e:
        raise DataError(f"{p}: not UTF-8 text (byte {e.start})") from None
    except OSError as e:
        raise DataError(f"{p}: cannot be read ({e.strerror or e})") from None
    out: list[tuple[int, dict | str]] = []
    if p.suffix.lower() == ".csv":
        reader = csv.DictReader(io.StringIO(text))
        missing = {"source", "page_number", "field"} - set(reader.fieldnames or ())
        if missing:
            raise DataError(f"{p}: a decisions CSV needs the columns source, page_number, field, value "
                            f"(missing: {', '.join(sorted(missing))})")
        for row in reader:
            out.append((reader.line_num, {k: v for k, v in row.items() if k is not None}))
            if len(out) > MAX_LINES:
                raise DataError(f"{p}: more than {MAX_LINES} decisions")
        return out
    for n, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except (ValueError, RecursionError):
            out.append((n, "not a JSON object"))
            continue
        out.append((n, rec if isinstance(rec, dict) else "not a JSON object"))
        if len(out) > MAX_LINES:
            raise DataError(f"{p}: more than {MAX_LINES} decisions")
    return out


def _page_index(ledger: Ledger) -> tuple[dict, dict]:
    exact: dict[tuple[str, int], int] = {}
    base: dict[tuple[str, int], set[int]] = {}   # (file's base name, page) -> page ids
    for r in ledger.conn.execute("SELECT id, source, page_number FROM pages"):
        exact[(r["source"], int(r["page_number"]))] = int(r["id"])
        b = (PurePath(r["source"]).name, int(r["page_number"]))
        base.setdefault(b, set()).add(int(r["id"]))
    return exact, base


def _decision(rec: dict) -> tuple[str, int, str, str, str | None] | str:
    """(source, page number, field, action, value) of a record, or why it is not one."""
    src, page, name = rec.get("source"), rec.get("page_number"), rec.get("field")
    if not isinstance(src, str) or not src:
        return "'source' must be the scan's file name"
    if isinstance(page, str) and page.strip().isdigit():
        page = int(page)
    if isinstance(page, bool) or not isinstance(page, int) or page < 1:
        return "'page_number' must be a whole number >= 1"
    if not isinstance(name, str) or not name:
        return "'field' must be a field name"
    action = rec.get("action") or None
    value = rec.get("value")
    if action is not None and action not in ("unreadable", "empty", "confirm", "correct"):
        return f"'action' must be 'unreadable' (or left out); got {str(action)[:20]!r}"
    if action == "unreadable":
        return src, page, name, "unreadable", None
    if value is None:
        return "'value' is missing (digits, or \"\" for a field blank on paper)"
    if not isinstance(value, str):
        value = str(value) if isinstance(value, int) and not isinstance(value, bool) else None
        if value is None:
            return "'value' must be a string of digits"
    if value.strip() == "" or action == "empty":
        return src, page, name, "empty", ""
    return src, page, name, "correct", value


def apply_decisions(ledger: Ledger, records, *, reviewer: str) -> ApplyReport:
    """Apply decision records (from :func:`read_decisions`) to the fields waiting for them.

    Returns
    -------
    ApplyReport: how many were applied (by recorded action) and every refused line with why.
    """
    rep = ApplyReport()
    exact, base = _page_index(ledger)
    for line, rec in records:
        if isinstance(rec, str):
            rep.refused.append(Refusal(line, rec))
            continue
        d = _decision(rec)
        if isinstance(d, str):
            rep.refused.append(Refusal(line, d))
            continue
        src, page, name, action, value = d
        page_id = exact.get((src, page))
        if page_id is None:
            ids = base.get((PurePath(src).name, page), set())
            if len(ids) > 1:
                rep.refused.append(Refusal(line, f"{src!r} names several files of the ledger; give the path"))
                continue
            page_id = next(iter(ids), None)
        if page_id is None:
            rep.refused.append(Refusal(line, f"no page {page} of {src!r} in the ledger"))
            continue
        row = ledger.conn.execute("SELECT id, version, decision, final_status, reading FROM fields "
                                  "WHERE page_id = ? AND name = ?", (page_id, name)).fetchone()
        if row is None:
            rep.refused.append(Refusal(line, f"page {page} of {src!r} has no field {name!r}"))
            continue
        if row["final_status"] is not None:
            why = "accepted by the reader" if row["final_status"] == "auto" else f"already {row['final_status']}"
            rep.refused.append(Refusal(line, f"field {name!r} of {src!r} page {page} is not waiting for a "
                                             f"decision ({why})"))
            continue
        if action == "correct" and value is not None and value.strip() == (row["reading"] or None):
            action = "confirm"
        try:
            detail = save_decision(ledger, int(row["id"]), action=action, version=int(row["version"]),
                                   reviewer=reviewer, value=value)
        except ReviewError as e:
            rep.refused.append(Refusal(line, getattr(e, "short", None) or str(e)))
            continue
        done = (detail.get("last_review") or {}).get("action", action)
        rep.applied += 1
        rep.by_action[done] = rep.by_action.get(done, 0) + 1
    return rep
