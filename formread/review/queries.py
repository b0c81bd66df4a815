"""The ledger side of review: list flagged fields, show one, save a decision with its audit row.

Usable from Python without the web page (the server, bulk decisions and the learning step call
it).  Every function takes an open :class:`formread.ledger.store.Ledger` (``open_ledger(outdir,
create=False)``).  Writes happen in one ``BEGIN IMMEDIATE`` transaction each: the field's final
value, its version bump and the audit row go in together or not at all, and the save only happens
if the field's ``version`` is still the one the clerk was shown (``UPDATE ... WHERE id = ? AND
version = ?``), so two clerks never overwrite each other.

Values are checked against the layout AS IT WAS when the run read the page (``runs.layout_text``)
and the field's size recorded then (``fields.max_digits``), never against a layout file edited
or deleted since.
"""

from __future__ import annotations

import json
import logging
import re
from dataclasses import dataclass
from pathlib import Path

from ..errors import ReviewError
from ..form.layout import Layout
from ..form.rules import check_field, check_relations
from ..ledger.store import Ledger, utc_now
from ..read.runs import run_layout
from .wording import STATUS_WORDS, explain_reason

__all__ = [
    "ACTIONS", "DEFAULT_MAX_DIGITS", "UnknownItem", "StaleSave", "InvalidValue",
    "resolve_inside", "list_pending", "pending_filters", "field_detail", "page_detail", "image_file",
    "save_decision", "run_layout", "field_limit", "field_relations", "value_warnings",
    "DecidedField", "list_decided",
]

log = logging.getLogger(__name__)

ACTIONS = ("confirm", "correct", "unreadable", "empty")
"""What a clerk can do with a field: keep the proposal, type another value, or mark it."""

DEFAULT_MAX_DIGITS = 32
"""Longest value accepted when neither the ledger nor the run's layout tells the field's size
(ledgers of the first release whose layout file has changed since)."""

_DIGITS = re.compile(r"[0-9]*\Z")


class UnknownItem(ReviewError):
    """No field or page with that id in the ledger."""


class StaleSave(ReviewError):
    """The field changed since it was shown (another clerk saved it first)."""


class InvalidValue(ReviewError):
    """The value or action cannot be saved for this field (letters, too long, nothing proposed).

    ``short`` is the message without the ledger and field prefix, for the clerk's page.
    """

    def __init__(self, where: str, short: str):
        super().__init__(f"{where}: {short}")
        self.short = short


def resolve_inside(outdir: str | Path, rel: str | None) -> Path | None:
    """The file ``rel`` (a path stored in the ledger) inside ``outdir``, or None.

    None when ``rel`` is empty, points outside ``outdir`` once resolved (``..``, absolute paths,
    symbolic links), or is not a file.  Never trust a stored path further than this.
    """
    if not rel:
        return None
    root = Path(outdir).resolve()
    try:
        p = (root / rel).resolve()
    except (OSError, RuntimeError, ValueError):
        return None
    if not p.is_relative_to(root) or not p.is_file():
        return None
    return p


def _json(text: str | None, default):
    if not text:
        return default
    try:
        return json.loads(text)
    except ValueError:
        log.warning("ledger holds malformed JSON: %.60r", text)
        return default


# ----------------------------------------------------------------------------- listing

_PENDING_WHERE = "f.decision = 'review' AND f.final_status IS NULL"
_ORDER = "ORDER BY p.created, p.id, f.id"


def _filters(name: str | None, reason: str | None) -> tuple[str, list]:
    sql, args = "", []
    if name:
        sql += " AND f.name = ?"
        args.append(name)
    if reason:
        # a reason filter matches the whole reason or its kind ('rule_failed' matches 'rule_failed:range')
        sql += " AND (f.reason = ? OR f.reason LIKE ? ESCAPE '\\')"
        esc = reason.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
        args += [reason, esc + ":%"]
    return sql, args


def list_pending(ledger: Ledger, *, name: str | None = None, reason: str | None = None) -> list[int]:
    """Ids of the fields waiting for review, oldest page first, then in field order.

    ``name`` keeps one field name; ``reason`` keeps one reason (``'low_confidence'``) or a kind of
    reason (``'rule_failed'`` keeps every failed rule).
    """
    sql, args = _filters(name, reason)
    rows = ledger.conn.execute(f"SELECT f.id FROM fields f JOIN pages p ON p.id = f.page_id "
                        f"WHERE {_PENDING_WHERE}{sql} {_ORDER}", args)
    return [r[0] for r in rows]


def pending_filters(ledger: Ledger) -> dict:
    """What the filters can choose from, with counts of waiting fields.

    Returns ``{"names": [[name, n], ...], "reasons": [[reason, n], ...], "total": n}``;
    reasons are grouped by kind (``rule_failed:range`` counts under ``rule_failed:range`` and
    is also offered as ``rule_failed``).
    """
    conn = ledger.conn
    names = [[r[0], r[1]] for r in conn.execute(
        f"SELECT f.name, COUNT(*) FROM fields f WHERE {_PENDING_WHERE} GROUP BY f.name ORDER BY f.name")]
    reasons: dict[str, int] = {}
    for r in conn.execute(f"SELECT f.reason, COUNT(*) FROM fields f WHERE {_PENDING_WHERE} "
                          f"GROUP BY f.reason ORDER BY f.reason"):
        key = r[0] or ""
        if ":" in key:
            kind = key.split(":", 1)[0]
            reasons[kind] = reasons.get(kind, 0) + r[1]
        reasons[key] = reasons.get(key, 0) + r[1]
    total = conn.execute(f"SELECT COUNT(*) FROM fields f WHERE {_PENDING_WHERE}").fetchone()[0]
    return {"names": names, "reasons": [[k, v] for k, v in sorted(reasons.items()) if k], "total": total}


# ----------------------------------------------------------------------------- the run's layout

def _spec(layout: Layout | None, name: str):
    if layout is None:
        return None
    return next((f for f in layout.fields if f.name == name), None)


def field_limit(layout: Layout | None, name: str, recorded: int | None = None) -> int:
    """Most digits field ``name`` may hold: as recorded at read time, else from the run's layout
    (cells or max_digits, narrowed by the length rule), else :data:`DEFAULT_MAX_DIGITS`."""
    if recorded is not None:
        return int(recorded)
    if layout is None or _spec(layout, name) is None:
        return DEFAULT_MAX_DIGITS
    return layout.capacity(name)


def field_relations(layout: Layout | None, name: str) -> list[str]:
    """The layout's cross-field rules that use field ``name`` (rule text as written)."""
    if layout is None:
        return []
    assert layout.rules is not None  # compiled when the layout loaded
    return [r.text for r in layout.rules.relations_of(name)]


def value_warnings(ledger: Ledger, field_id: int) -> list[str]:
    """Rules that a field's final value (or its page's values) still break, in plain words.

    Not a refusal: the clerk has the paper in front of them; the page only says so after a save.
    Page values are the final values where decided, else the readings.
    """
    conn = ledger.conn
    row = conn.execute("SELECT f.name, f.page_id, f.final_value, f.final_status, p.run_id, p.form FROM fields f "
                       "JOIN pages p ON p.id = f.page_id WHERE f.id = ?", (int(field_id),)).fetchone()
    if row is None or row["final_status"] not in ("confirmed", "corrected"):
        return []
    layout = run_layout(ledger, row["run_id"], row["form"])
    if layout is None:
        return []
    compiled = layout.rules
    assert compiled is not None  # compiled when the layout loaded
    if row["name"] not in compiled.fields:
        return []
    out = [f"The value breaks the field's {rule} rule." for rule, ok in
           check_field(compiled, row["name"], row["final_value"] or "").items() if not ok]
    values = {r["name"]: (r["final_value"] if r["final_status"] is not None else r["reading"])
              for r in conn.execute("SELECT name, reading, final_value, final_status FROM fields WHERE page_id = ?",
                                    (row["page_id"],))}
    mine = set(field_relations(layout, row["name"]))
    out += [f"The numbers on this page still do not add up: {text}." for text, ok in
            check_relations(compiled, values).items() if ok is False and text in mine]
    return out


# ----------------------------------------------------------------------------- showing

_FIELD_SQL = """
SELECT f.*, p.source, p.page_number, p.status AS page_status, p.image_path AS page_image,
       p.created AS page_created, p.form AS form, r.id AS run, r.model_path, r.model_sha256,
       r.threshold AS run_threshold
FROM fields f JOIN pages p ON p.id = f.page_id JOIN runs r ON r.id = p.run_id
WHERE f.id = ?
"""


def _last_review(ledger: Ledger, field_id: int) -> dict | None:
    r = ledger.conn.execute("SELECT action, old_value, new_value, reviewer, at FROM reviews WHERE field_id = ? "
                            "ORDER BY id DESC LIMIT 1", (field_id,)).fetchone()
    return dict(r) if r else None


def _field_row(ledger: Ledger, field_id: int):
    if not 0 <= int(field_id) < 2 ** 62:
        raise UnknownItem(f"{ledger.path}: no field with id {str(field_id)[:30]}")
    row = ledger.conn.execute(_FIELD_SQL, (int(field_id),)).fetchone()
    if row is None:
        raise UnknownItem(f"{ledger.path}: no field with id {field_id}")
    return row


def _threshold(row) -> float:
    """The threshold the field's confidence was compared with (per field since schema version 2)."""
    return float(row["threshold"] if row["threshold"] is not None else row["run_threshold"])


def field_detail(ledger: Ledger, field_id: int) -> dict:
    """Everything the page shows about one field, as a JSON-ready dict.

    Keys: ``id, page_id, name, kind, reading, confidence, alternatives [[str, p]], digit_probs
    [[[digit, p], ...] per position], rules {name: bool}, decision, reason, why [sentences],
    version, final_value, final_status, status_words, max_digits, has_image, has_page_image,
    source, page_number, page_status, threshold, model_path, last_review``.

    Raises
    ------
    UnknownItem
        When no field has this id.
    """
    row = _field_row(ledger, field_id)
    layout = run_layout(ledger, row["run"], row["form"])
    threshold = _threshold(row)
    outdir = ledger.outdir
    return {
        "id": row["id"], "page_id": row["page_id"], "name": row["name"], "kind": row["kind"],
        "reading": row["reading"], "confidence": row["confidence"],
        "alternatives": _json(row["alternatives"], []), "digit_probs": _json(row["digit_probs"], []),
        "rules": _json(row["rules"], {}), "decision": row["decision"], "reason": row["reason"],
        "why": explain_reason(row["reason"], confidence=row["confidence"], threshold=threshold,
                              relations=field_relations(layout, row["name"])),
        "version": row["version"], "final_value": row["final_value"], "final_status": row["final_status"],
        "status_words": STATUS_WORDS.get(row["final_status"], row["final_status"]),
        "max_digits": field_limit(layout, row["name"], row["max_digits"]),
        "has_image": resolve_inside(outdir, row["image_path"]) is not None,
        "has_page_image": resolve_inside(outdir, row["page_image"]) is not None,
        "source": row["source"], "page_number": row["page_number"], "page_status": row["page_status"],
        "threshold": threshold, "model_path": row["model_path"],
        "last_review": _last_review(ledger, row["id"]),
    }


def page_detail(ledger: Ledger, page_id: int) -> dict:
    """A page and its fields' boxes for the page view, as a JSON-ready dict.

    Keys: ``id, source, page_number, status, error, has_image, fields [{id, name, box_px
    [x0, y0, x1, y1] page px or None, decision, final_status}]``.

    Raises
    ------
    UnknownItem
        When no page has this id.
    """
    conn = ledger.conn
    p = conn.execute("SELECT * FROM pages WHERE id = ?", (int(page_id),)).fetchone()
    if p is None:
        raise UnknownItem(f"{ledger.path}: no page with id {page_id}")
    fields = []
    for f in conn.execute("SELECT id, name, box_px, decision, final_status FROM fields WHERE page_id = ? "
                          "ORDER BY id", (p["id"],)):
        box = _json(f["box_px"], None)
        if not (isinstance(box, list) and len(box) == 4 and all(isinstance(v, (int, float)) for v in box)):
            box = None
        fields.append({"id": f["id"], "name": f["name"], "box_px": box, "decision": f["decision"],
                       "final_status": f["final_status"]})
    return {"id": p["id"], "source": p["source"], "page_number": p["page_number"], "status": p["status"],
            "error": p["error"], "has_image": resolve_inside(ledger.outdir, p["image_path"]) is not None,
            "fields": fields}


def image_file(ledger: Ledger, kind: str, item_id: int) -> Path:
    """The PNG of a field (``kind='field'``) or page (``kind='page'``) by ledger id, inside the output folder.

    Raises
    ------
    UnknownItem
        When the id is unknown, or the ledger names no image, or the image is missing or outside.
    """
    table = {"field": "fields", "page": "pages"}.get(kind)
    if table is None:
        raise UnknownItem(f"no such image kind {kind!r}")
    row = ledger.conn.execute(f"SELECT image_path FROM {table} WHERE id = ?", (int(item_id),)).fetchone()
    if row is None:
        raise UnknownItem(f"{ledger.path}: no {kind} with id {item_id}")
    path = resolve_inside(ledger.outdir, row[0])
    if path is None:
        raise UnknownItem(f"{ledger.path}: {kind} {item_id} has no image in {ledger.outdir}")
    return path


# ----------------------------------------------------------------------------- saving

def _final(action: str, value: str | None, reading: str | None, name: str, limit: int,
           where: str) -> tuple[str, str | None, str]:
    """(action as recorded, final value, final status) after checking the value."""
    if action not in ACTIONS:
        raise InvalidValue(where, f"unknown action {action!r}; one of {', '.join(ACTIONS)}")
    if action == "unreadable":
        return "unreadable", None, "unreadable"
    if action == "empty":
        return "empty", "", "empty"
    if action == "confirm":
        if reading is None:
            raise InvalidValue(where, "there is no proposed reading to keep; type the value or mark the field")
        if reading == "":  # keeping a proposal of 'left empty' is saying the paper is blank
            return "empty", "", "empty"
        value = reading
    if not isinstance(value, str):
        raise InvalidValue(where, "the value must be a string of digits")
    value = value.strip()
    if value == "":
        raise InvalidValue(where, "no value typed; type the digits, or mark the field blank or unreadable")
    if not _DIGITS.match(value):
        raise InvalidValue(where, f"field {name!r} holds digits only; got {value[:40]!r}")
    if len(value) > limit:
        raise InvalidValue(where, f"field {name!r} holds at most {limit} digits; got {len(value)}")
    if value == reading:
        return "confirm", value, "confirmed"
    return "correct", value, "corrected"


def save_decision(ledger: Ledger, field_id: int, *, action: str, version: int, reviewer: str,
                  value: str | None = None, at: str | None = None) -> dict:
    """Record a clerk's decision on a field, with its audit row, in one transaction.

    ``action`` is one of :data:`ACTIONS`; ``value`` (digits) is needed for ``'correct'``.  Typing
    the proposed reading counts as ``'confirm'``.  ``version`` is the field version the clerk was
    shown: the save happens only if it is still current.

    Returns the field's new :func:`field_detail`.

    Raises
    ------
    UnknownItem
        No field with this id.
    InvalidValue
        Letters in the value, too many digits, nothing typed, nothing proposed to keep, bad action.
    StaleSave
        The field was saved by someone else since ``version`` (nothing written).
    LedgerError
        The ledger cannot be written (nothing written).
    """
    where = f"{ledger.path}: field {field_id}"
    if not isinstance(reviewer, str) or not reviewer.strip():
        raise InvalidValue(where, "a reviewer name is needed for the audit trail")
    if isinstance(version, bool) or not isinstance(version, int) or not 0 <= version < 2 ** 62:
        raise InvalidValue(where, f"version must be an integer; got {str(version)[:30]}")
    at = at or utc_now()
    with ledger.transaction() as conn:
        row = _field_row(ledger, field_id)
        where = f"{ledger.path}: page {row['page_id']} field {row['name']!r}"
        limit = field_limit(run_layout(ledger, row["run"], row["form"]), row["name"], row["max_digits"])
        recorded, final_value, final_status = _final(action, value, row["reading"], row["name"], limit, where)
        old = row["final_value"] if row["final_status"] is not None else row["reading"]
        cur = conn.execute("UPDATE fields SET final_value = ?, final_status = ?, version = version + 1 "
                           "WHERE id = ? AND version = ?", (final_value, final_status, row["id"], version))
        if cur.rowcount != 1:
            raise StaleSave(f"{where}: changed since it was shown (version {version}, now {row['version']}); "
                            f"reload it")
        conn.execute("INSERT INTO reviews (field_id, action, old_value, new_value, reviewer, at, model_path, "
                     "model_sha256, threshold) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                     (row["id"], recorded, old, final_value, reviewer.strip(), at, row["model_path"],
                      row["model_sha256"], _threshold(row)))
    return field_detail(ledger, field_id)


# ----------------------------------------------------------------------------- for samples / learning

@dataclass
class DecidedField:
    """A field a clerk decided, with what the network saw.

    ``digits_path`` is absolute (inside the output folder) or None when missing.
    """

    field_id: int
    page_id: int
    name: str
    reading: str | None
    final_value: str | None
    final_status: str
    reviewer: str | None
    at: str | None
    digits_path: Path | None


def list_decided(ledger: Ledger, *, statuses: tuple[str, ...] = ("confirmed", "corrected")) -> list[DecidedField]:
    """Fields decided by a clerk with one of ``statuses``, in ledger order, with their last reviewer."""
    marks = ",".join("?" * len(statuses))
    rows = ledger.conn.execute(
        f"SELECT f.id, f.page_id, f.name, f.reading, f.final_value, f.final_status, f.digits_path, "
        f"(SELECT reviewer FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS reviewer, "
        f"(SELECT at FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS at "
        f"FROM fields f WHERE f.final_status IN ({marks}) ORDER BY f.page_id, f.id", tuple(statuses))
    return [DecidedField(r["id"], r["page_id"], r["name"], r["reading"], r["final_value"], r["final_status"],
                         r["reviewer"], r["at"], resolve_inside(ledger.outdir, r["digits_path"])) for r in rows]
