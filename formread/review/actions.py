"""The ledger side of review: list flagged fields, show one, save a decision with its audit row.

Usable from Python without the web page (the server and the samples/retraining code call it).
Every function takes the output folder ``outdir`` (holding ``ledger.sqlite``) or an open
connection from :func:`connect`.  Writes happen in one ``BEGIN IMMEDIATE`` transaction each:
the field's final value, its version bump and the audit row go in together or not at all, and
the save only happens if the field's ``version`` is still the one the clerk was shown
(``UPDATE ... WHERE id = ? AND version = ?``), so two clerks never overwrite each other.
"""

from __future__ import annotations

import json
import logging
import re
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..errors import LayoutError, LedgerError, ReviewError, RuleError
from ..form.layout import load_layout
from ..form.rules import check_field, check_relations, compile_rules
from ..ledger.schema import SCHEMA_VERSION

__all__ = [
    "LEDGER_NAME", "ACTIONS", "STATUS_WORDS", "DEFAULT_MAX_DIGITS",
    "UnknownItem", "StaleSave", "InvalidValue",
    "connect", "ledger_path", "resolve_inside", "list_pending", "pending_filters",
    "field_detail", "page_detail", "image_file", "save_decision", "explain_reason", "field_limit", "field_threshold", "field_relations", "value_warnings",
    "DecidedField", "list_decided", "load_digits", "utc_now",
]

log = logging.getLogger(__name__)

LEDGER_NAME = "ledger.sqlite"
ACTIONS = ("confirm", "correct", "unreadable", "empty")
"""What a clerk can do with a field: keep the proposal, type another value, or mark it."""

STATUS_WORDS = {
    "auto": "read by machine",
    "confirmed": "proposal kept",
    "corrected": "corrected",
    "unreadable": "cannot be read",
    "empty": "blank on paper",
    None: "waiting",
}
"""Plain words for a field's final status, as the page shows them."""

DEFAULT_MAX_DIGITS = 32
"""Longest value accepted when the layout cannot tell the field's size."""

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


def utc_now() -> str:
    """Current time, UTC, ISO 8601 with seconds (the ledger's time format)."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


def ledger_path(outdir: str | Path) -> Path:
    """``OUTDIR/ledger.sqlite``."""
    return Path(outdir) / LEDGER_NAME


def connect(outdir: str | Path) -> sqlite3.Connection:
    """Open the ledger of ``outdir`` for review (autocommit; transactions are explicit).

    Raises
    ------
    LedgerError
        When there is no ledger, or it is not a formread ledger, or of a newer schema.
    """
    path = ledger_path(outdir)
    if not path.is_file():
        raise LedgerError(f"{path}: no ledger here (run `formread read` into this folder first)")
    try:
        conn = sqlite3.connect(path, timeout=10.0, isolation_level=None, check_same_thread=False)
        conn.row_factory = sqlite3.Row
        conn.execute("PRAGMA busy_timeout = 10000")
        names = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    except sqlite3.DatabaseError as e:
        raise LedgerError(f"{path}: not a readable ledger ({e})") from None
    missing = {"runs", "pages", "fields", "reviews"} - names
    if missing:
        conn.close()
        raise LedgerError(f"{path}: not a formread ledger (missing tables: {', '.join(sorted(missing))})")
    if "meta" in names:
        row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        if row is not None and str(row[0]).isdigit() and int(row[0]) > SCHEMA_VERSION:
            conn.close()
            raise LedgerError(f"{path}: ledger schema version {row[0]} is newer than this formread "
                              f"({SCHEMA_VERSION}); update formread")
    return conn


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


def list_pending(conn: sqlite3.Connection, *, name: str | None = None,
                 reason: str | None = None) -> list[int]:
    """Ids of the fields waiting for review, oldest page first, then in field order.

    ``name`` keeps one field name; ``reason`` keeps one reason (``'low_confidence'``) or a kind of
    reason (``'rule_failed'`` keeps every failed rule).
    """
    sql, args = _filters(name, reason)
    rows = conn.execute(f"SELECT f.id FROM fields f JOIN pages p ON p.id = f.page_id "
                        f"WHERE {_PENDING_WHERE}{sql} {_ORDER}", args)
    return [r[0] for r in rows]


def pending_filters(conn: sqlite3.Connection) -> dict:
    """What the filters can choose from, with counts of waiting fields.

    Returns ``{"names": [[name, n], ...], "reasons": [[reason, n], ...], "total": n}``;
    reasons are grouped by kind (``rule_failed:range`` counts under ``rule_failed:range`` and
    is also offered as ``rule_failed``).
    """
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


# ----------------------------------------------------------------------------- explaining

_RULE_WORDS = {
    "length": "it has a number of digits this field does not allow",
    "range": "its value is outside the range this field allows",
    "date": "it is not a real calendar date",
    "years": "its year is outside the years this field allows",
    "required": "the field must be filled but looks blank",
    "relation": "the numbers on this page do not add up (a rule linking fields fails)",
}
_CHECK_SCHEMES = ("luhn", "mod11-2", "mod97-10", "gs1", "verhoeff", "damm", "check")


def explain_reason(reason: str | None, *, confidence: float | None = None,
                   threshold: float | None = None, relations: list[str] | None = None) -> list[str]:
    """Why a field was flagged, in plain words (one sentence per reason; ``;`` separates reasons).

    ``relations``: the cross-field rules naming this field, quoted when ``relation`` failed.
    """
    if not reason:
        return []
    out = []
    for part in (p.strip() for p in reason.split(";")):
        if not part:
            continue
        if part == "low_confidence":
            s = "The reader was not sure of this reading"
            if confidence is not None and threshold is not None:
                s += f": {confidence:.0%} sure, {threshold:.0%} needed"
            out.append(s + ".")
        elif part.startswith("rule_failed:"):
            rule = part.split(":", 1)[1]
            if rule == "relation" and relations:
                out.append("A rule failed (relation): the numbers on this page do not add up: "
                           + "; ".join(relations) + ".")
            elif rule in _RULE_WORDS:
                out.append(f"A rule failed ({rule}): {_RULE_WORDS[rule]}.")
            elif rule in _CHECK_SCHEMES:
                out.append(f"A rule failed ({rule}): the check digit does not match the other digits.")
            elif any(op in rule for op in "=<>"):
                out.append(f"A cross-field rule does not hold: {rule}.")
            else:
                out.append(f"The rule '{rule}' failed for this reading.")
        elif part == "segmentation_doubtful":
            out.append("The digits could not be told apart cleanly (touching, broken or stray marks).")
        elif part == "page_not_registered":
            out.append("The page could not be matched to the form layout: read the value from the page view.")
        elif part == "missing":
            out.append("Nothing was found here, but the field must be filled.")
        else:
            out.append(f"Flagged: {part}.")
    return out


# ----------------------------------------------------------------------------- the run's layout

_layout_cache: dict[tuple[str, int], tuple | None] = {}


def _layout(outdir: str | Path, layout_path: str | None):
    """(Layout, CompiledRules) of the run's layout file, or None when it cannot be read any more.

    ``runs.layout_path`` is the path as given to ``formread read``: tried as it is, then inside
    ``outdir``.  Cached by file and modification time.
    """
    if not layout_path:
        return None
    cands = [Path(layout_path)]
    if not cands[0].is_absolute():
        cands.append(Path(outdir) / layout_path)
    for p in cands:
        try:
            key = (str(p.resolve()), p.stat().st_mtime_ns)
        except OSError:
            continue
        if key not in _layout_cache:
            try:
                layout = load_layout(p)
                _layout_cache[key] = (layout, compile_rules(layout))
            except (LayoutError, RuleError) as e:
                log.warning("%s; field sizes and rules unknown", e)
                _layout_cache[key] = None
        return _layout_cache[key]
    log.warning("%s: layout of the run not found; field sizes and rules unknown", layout_path)
    return None


def _spec(outdir, name: str, layout_path: str | None):
    lay = _layout(outdir, layout_path)
    if lay is None:
        return None, None
    spec = next((f for f in lay[0].fields if f.name == name), None)
    return spec, lay[1]


def field_limit(outdir: str | Path, name: str, layout_path: str | None) -> int:
    """Most digits field ``name`` may hold: the layout's cells (boxed) or max_digits (open),
    narrowed by its length rule; :data:`DEFAULT_MAX_DIGITS` when the layout cannot be read."""
    spec, compiled = _spec(outdir, name, layout_path)
    if spec is None:
        return DEFAULT_MAX_DIGITS
    n = spec.cells if spec.kind == "boxed" and spec.cells else spec.max_digits
    rules = compiled.fields.get(name)
    if rules is not None and rules.length is not None:
        n = min(n, rules.length[1])
    return int(n)


def field_threshold(outdir: str | Path, name: str, layout_path: str | None, run_threshold: float) -> float:
    """The acceptance threshold that applied to field ``name``: its own in the layout, else the run's."""
    spec, _ = _spec(outdir, name, layout_path)
    return float(spec.threshold) if spec is not None and spec.threshold is not None else run_threshold


def field_relations(outdir: str | Path, name: str, layout_path: str | None) -> list[str]:
    """The layout's cross-field rules that use field ``name`` (rule text as written)."""
    _, compiled = _spec(outdir, name, layout_path)
    return [] if compiled is None else [r.text for r in compiled.relations_of(name)]


def value_warnings(conn: sqlite3.Connection, outdir: str | Path, field_id: int) -> list[str]:
    """Rules that a field's final value (or its page's values) still break, in plain words.

    Not a refusal: the clerk has the paper in front of them; the page only says so after a save.
    Page values are the final values where decided, else the readings.
    """
    row = conn.execute("SELECT f.name, f.page_id, f.final_value, f.final_status, r.layout_path FROM fields f "
                       "JOIN pages p ON p.id = f.page_id JOIN runs r ON r.id = p.run_id WHERE f.id = ?",
                       (int(field_id),)).fetchone()
    if row is None or row["final_status"] not in ("confirmed", "corrected"):
        return []
    spec, compiled = _spec(outdir, row["name"], row["layout_path"])
    if spec is None or row["name"] not in compiled.fields:
        return []
    out = [f"The value breaks the field's {rule} rule." for rule, ok in
           check_field(compiled, row["name"], row["final_value"] or "").items() if not ok]
    values = {r["name"]: (r["final_value"] if r["final_status"] is not None else r["reading"])
              for r in conn.execute("SELECT name, reading, final_value, final_status FROM fields WHERE page_id = ?",
                                    (row["page_id"],))}
    mine = set(field_relations(outdir, row["name"], row["layout_path"]))
    out += [f"The numbers on this page still do not add up: {text}." for text, ok in
            check_relations(compiled, values).items() if ok is False and text in mine]
    return out


# ----------------------------------------------------------------------------- showing

_FIELD_SQL = """
SELECT f.*, p.source, p.page_number, p.status AS page_status, p.image_path AS page_image,
       p.created AS page_created, r.id AS run, r.model_path, r.model_sha256, r.threshold, r.layout_path
FROM fields f JOIN pages p ON p.id = f.page_id JOIN runs r ON r.id = p.run_id
WHERE f.id = ?
"""


def _last_review(conn: sqlite3.Connection, field_id: int) -> dict | None:
    r = conn.execute("SELECT action, old_value, new_value, reviewer, at FROM reviews WHERE field_id = ? "
                     "ORDER BY id DESC LIMIT 1", (field_id,)).fetchone()
    return dict(r) if r else None


def field_detail(conn: sqlite3.Connection, outdir: str | Path, field_id: int) -> dict:
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
    row = conn.execute(_FIELD_SQL, (int(field_id),)).fetchone()
    if row is None:
        raise UnknownItem(f"{ledger_path(outdir)}: no field with id {field_id}")
    threshold = field_threshold(outdir, row["name"], row["layout_path"], row["threshold"])
    return {
        "id": row["id"], "page_id": row["page_id"], "name": row["name"], "kind": row["kind"],
        "reading": row["reading"], "confidence": row["confidence"],
        "alternatives": _json(row["alternatives"], []), "digit_probs": _json(row["digit_probs"], []),
        "rules": _json(row["rules"], {}), "decision": row["decision"], "reason": row["reason"],
        "why": explain_reason(row["reason"], confidence=row["confidence"], threshold=threshold,
                              relations=field_relations(outdir, row["name"], row["layout_path"])),
        "version": row["version"], "final_value": row["final_value"], "final_status": row["final_status"],
        "status_words": STATUS_WORDS.get(row["final_status"], row["final_status"]),
        "max_digits": field_limit(outdir, row["name"], row["layout_path"]),
        "has_image": resolve_inside(outdir, row["image_path"]) is not None,
        "has_page_image": resolve_inside(outdir, row["page_image"]) is not None,
        "source": row["source"], "page_number": row["page_number"], "page_status": row["page_status"],
        "threshold": threshold, "model_path": row["model_path"],
        "last_review": _last_review(conn, row["id"]),
    }


def page_detail(conn: sqlite3.Connection, outdir: str | Path, page_id: int) -> dict:
    """A page and its fields' boxes for the page view, as a JSON-ready dict.

    Keys: ``id, source, page_number, status, error, has_image, fields [{id, name, box_px
    [x0, y0, x1, y1] page px or None, decision, final_status}]``.

    Raises
    ------
    UnknownItem
        When no page has this id.
    """
    p = conn.execute("SELECT * FROM pages WHERE id = ?", (int(page_id),)).fetchone()
    if p is None:
        raise UnknownItem(f"{ledger_path(outdir)}: no page with id {page_id}")
    fields = []
    for f in conn.execute("SELECT id, name, box_px, decision, final_status, final_value, reading "
                          "FROM fields WHERE page_id = ? ORDER BY id", (p["id"],)):
        box = _json(f["box_px"], None)
        if not (isinstance(box, list) and len(box) == 4 and all(isinstance(v, (int, float)) for v in box)):
            box = None
        fields.append({"id": f["id"], "name": f["name"], "box_px": box, "decision": f["decision"],
                       "final_status": f["final_status"]})
    return {"id": p["id"], "source": p["source"], "page_number": p["page_number"], "status": p["status"],
            "error": p["error"], "has_image": resolve_inside(outdir, p["image_path"]) is not None,
            "fields": fields}


def image_file(conn: sqlite3.Connection, outdir: str | Path, kind: str, item_id: int) -> Path:
    """The PNG of a field (``kind='field'``) or page (``kind='page'``) by ledger id, inside ``outdir``.

    Raises
    ------
    UnknownItem
        When the id is unknown, or the ledger names no image, or the image is missing or outside.
    """
    table = {"field": "fields", "page": "pages"}.get(kind)
    if table is None:
        raise UnknownItem(f"no such image kind {kind!r}")
    row = conn.execute(f"SELECT image_path FROM {table} WHERE id = ?", (int(item_id),)).fetchone()
    if row is None:
        raise UnknownItem(f"{ledger_path(outdir)}: no {kind} with id {item_id}")
    path = resolve_inside(outdir, row[0])
    if path is None:
        raise UnknownItem(f"{ledger_path(outdir)}: {kind} {item_id} has no image in {outdir}")
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


def save_decision(conn: sqlite3.Connection, outdir: str | Path, field_id: int, *, action: str,
                  version: int, reviewer: str, value: str | None = None, at: str | None = None) -> dict:
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
    """
    where = f"{ledger_path(outdir)}: field {field_id}"
    if not isinstance(reviewer, str) or not reviewer.strip():
        raise InvalidValue(where, "a reviewer name is needed for the audit trail")
    if isinstance(version, bool) or not isinstance(version, int):
        raise InvalidValue(where, f"version must be an integer; got {version!r}")
    at = at or utc_now()
    conn.execute("BEGIN IMMEDIATE")
    try:
        row = conn.execute(_FIELD_SQL, (int(field_id),)).fetchone()
        if row is None:
            raise UnknownItem(f"{ledger_path(outdir)}: no field with id {field_id}")
        where = f"{ledger_path(outdir)}: page {row['page_id']} field {row['name']!r}"
        limit = field_limit(outdir, row["name"], row["layout_path"])
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
                      row["model_sha256"], row["threshold"]))
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    return field_detail(conn, outdir, field_id)


# ----------------------------------------------------------------------------- for samples / retraining

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


def list_decided(conn: sqlite3.Connection, outdir: str | Path, *,
                 statuses: tuple[str, ...] = ("confirmed", "corrected")) -> list[DecidedField]:
    """Fields decided by a clerk with one of ``statuses``, in ledger order, with their last reviewer."""
    marks = ",".join("?" * len(statuses))
    rows = conn.execute(
        f"SELECT f.id, f.page_id, f.name, f.reading, f.final_value, f.final_status, f.digits_path, "
        f"(SELECT reviewer FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS reviewer, "
        f"(SELECT at FROM reviews v WHERE v.field_id = f.id ORDER BY v.id DESC LIMIT 1) AS at "
        f"FROM fields f WHERE f.final_status IN ({marks}) ORDER BY f.page_id, f.id", tuple(statuses))
    return [DecidedField(r["id"], r["page_id"], r["name"], r["reading"], r["final_value"], r["final_status"],
                         r["reviewer"], r["at"], resolve_inside(outdir, r["digits_path"])) for r in rows]


def load_digits(path: str | Path) -> np.ndarray:
    """Digit images of a field's chosen segmentation.

    Returns
    -------
    ndarray of shape (K, 1, 28, 28), float32
        The array stored under ``digits`` (or the file's only array).

    Raises
    ------
    LedgerError
        When the file is missing, not an .npz, or holds no (K, 1, 28, 28) array.
    """
    try:
        with np.load(path, allow_pickle=False) as z:
            key = "digits" if "digits" in z.files else (z.files[0] if len(z.files) == 1 else None)
            if key is None:
                raise LedgerError(f"{path}: no 'digits' array (has {', '.join(z.files)})")
            x = z[key]
    except (OSError, ValueError) as e:
        raise LedgerError(f"{path}: digit images cannot be read ({e})") from None
    if x.ndim == 3:
        x = x[:, None]
    if x.ndim != 4 or x.shape[1:] != (1, 28, 28):
        raise LedgerError(f"{path}: digit images have shape {x.shape}, expected (K, 1, 28, 28)")
    return x.astype(np.float32, copy=False)
