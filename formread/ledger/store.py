"""The results ledger: one SQLite file per output folder, written one transaction per page.

Why this shape: a batch of thousands of pages must survive Ctrl-C, a kill or a
power cut without a half-written page.  Every page (its row, all its fields,
and the files they point at) is committed in one transaction; the page's image
files are written first (temp file + ``os.replace``) under the page id that the
transaction will use, so a kill leaves at most orphan files, which the next run
overwrites when it gives the same id to the next page.  The schema is the shared
contract in :mod:`formread.ledger.schema`.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import os
import sqlite3
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import LedgerError
from .schema import BASE_SCHEMA, MIGRATIONS, SCHEMA_VERSION

__all__ = ["LEDGER_NAME", "FieldRow", "PageRow", "Ledger", "open_ledger", "ledger_path", "check_output_folder",
           "atomic_write", "utc_now", "page_hash", "BUSY_SECONDS"]

LEDGER_NAME = "ledger.sqlite"
PAGE_STATUSES = ("read", "unregistered", "failed")
BUSY_SECONDS = 30.0
"""How long a writer waits for another writer of the same ledger (a clerk saving, a reader writing)."""


def ledger_path(outdir) -> Path:
    """``OUTDIR/ledger.sqlite``."""
    return Path(outdir) / LEDGER_NAME


def page_hash(gray) -> str:
    """The content hash of a decoded page: sha256 of its pixels, shape and dtype included, hex.

    gray : ndarray of shape (H, W), uint8
    """
    g = np.ascontiguousarray(gray)
    h = hashlib.sha256(f"{g.shape[0]}x{g.shape[1]}:{g.dtype.str}:".encode())
    h.update(g.data.cast("B"))       # the pixel bytes in place (tobytes copied the whole page)
    return h.hexdigest()


def utc_now() -> str:
    """The current UTC time, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers see the old file or the whole new one, never a part.

    The temp file sits beside the target (same file system) under a fixed name,
    so a killed writer leaves at most one stale temp file per target, which the
    next write replaces.  Writers of the same folder take turns under the
    ledger's write lock.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    try:
        f = open(tmp, "wb")
    except FileNotFoundError:
        path.parent.mkdir(parents=True, exist_ok=True)
        f = open(tmp, "wb")
    try:
        with f:
            f.write(data)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


@dataclass
class FieldRow:
    """One field's result as the ledger stores it, plus the bytes of its files.

    ``image_png`` is the field crop (PNG bytes), ``digits_npz`` its digit file
    (formread.ledger.fieldfile, ``.npz`` bytes); either may be None.
    ``box_px`` is ``[x0, y0, x1, y1]`` of the field on the stored page image.
    """

    name: str
    kind: str
    reading: str | None
    confidence: float | None
    decision: str
    reason: str | None = None
    alternatives: list = field(default_factory=list)
    digit_probs: list = field(default_factory=list)
    rules: dict = field(default_factory=dict)
    box_px: list | None = None
    image_png: bytes | None = None
    digits_npz: bytes | None = None
    threshold: float | None = None
    threshold_source: str | None = None
    max_digits: int | None = None
    audit: bool = False


@dataclass
class PageRow:
    """One page's result: its row in ``pages``, its fields and its page image (JPEG bytes; ledgers of
    an earlier formread hold PNG page images, which stay readable)."""

    content_hash: str
    source: str
    page_number: int
    status: str
    error: str | None = None
    residual_mm: float | None = None
    rotated_180: bool | None = None
    skew_deg: float | None = None
    image_jpeg: bytes | None = None
    fields: list[FieldRow] = field(default_factory=list)
    form: str | None = None
    turn_deg: int | None = None


def check_output_folder(outdir: Path) -> Path:
    """Make sure ``outdir`` is (or can be made) a writable folder; raise LedgerError otherwise.

    Checks by creating and removing a file, since permission bits say nothing
    when running as root.
    """
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise LedgerError(f"{outdir}: output folder is a file, not a folder")
    try:
        outdir.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".formread-probe.", dir=outdir)
        os.close(fd)
        os.unlink(tmp)
        os.listdir(outdir)
    except OSError as e:
        raise LedgerError(f"{outdir}: output folder cannot be used ({e.strerror or e})") from None
    return outdir


def _name(text) -> str:
    """A path or command line as the ledger stores it (UTF-8 text): bytes a name from another system's
    encoding brings (surrogate escapes from the file system or argv) become backslash escapes."""
    return os.fsencode(str(text)).decode("utf-8", "backslashreplace")


class Ledger:
    """An open ledger (``OUTDIR/ledger.sqlite``) in WAL mode, autocommit outside explicit transactions."""

    def __init__(self, outdir: Path, conn: sqlite3.Connection):
        self.outdir = Path(outdir)
        self.path = self.outdir / LEDGER_NAME
        self.conn = conn

    # --- runs -------------------------------------------------------------------------------
    def start_run(self, *, layout_path: str, layout_sha256: str, model_path: str, model_sha256: str,
                  threshold: float, command: str, layout_text: str | None = None,
                  bundle: dict | None = None, audit_rate: float = 0.0) -> int:
        """Record a new run; returns its id.

        ``layout_text`` is the layout file as read (review checks values against it, not against
        the file as it may be later); ``bundle`` a JSON-ready summary of the model bundle
        (weights, decoder status, decisions) that read the run's pages.
        """
        with self.transaction():
            cur = self.conn.execute(
                "INSERT INTO runs (started, layout_path, layout_sha256, model_path, model_sha256, threshold,"
                " command, layout_text, bundle, audit_rate) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (utc_now(), _name(layout_path), layout_sha256, _name(model_path), model_sha256, float(threshold),
                 _name(command), layout_text, None if bundle is None else json.dumps(bundle, sort_keys=True),
                 float(audit_rate)))
            assert cur.lastrowid is not None  # set by the INSERT
            return int(cur.lastrowid)

    def add_run_form(self, run_id: int, *, form: str, layout_path: str, layout_sha256: str, layout_text: str,
                     threshold: float, audit_rate: float) -> None:
        """Record one of the layouts a run reads with (several for a mixed batch)."""
        with self.transaction():
            self.conn.execute("INSERT INTO run_forms (run_id, form, layout_path, layout_sha256, layout_text, "
                              "threshold, audit_rate) VALUES (?, ?, ?, ?, ?, ?, ?)",
                              (run_id, form, _name(layout_path), layout_sha256, layout_text, float(threshold),
                               float(audit_rate)))

    def finish_run(self, run_id: int) -> None:
        """Stamp the run's finishing time."""
        with self.transaction():
            self.conn.execute("UPDATE runs SET finished = ? WHERE id = ?", (utc_now(), run_id))

    def last_run(self) -> dict | None:
        """The latest run as a dict, or None when the ledger has none."""
        row = self.conn.execute("SELECT * FROM runs ORDER BY id DESC LIMIT 1").fetchone()
        return None if row is None else dict(row)

    # --- pages ------------------------------------------------------------------------------
    def known_pages(self) -> dict[str, str]:
        """``{content_hash: status}`` of every page in the ledger."""
        return dict(self.conn.execute("SELECT content_hash, status FROM pages"))

    def page_error(self, content_hash: str) -> str | None:
        """The recorded reason of a page that was not read (None when there is none)."""
        row = self.conn.execute("SELECT error FROM pages WHERE content_hash = ?", (content_hash,)).fetchone()
        return None if row is None else row[0]

    def write_page(self, run_id: int, page: PageRow) -> int:
        """Store one page, its fields and their files in ONE transaction; returns the page id.

        A page whose hash is already stored is not written again (its id is
        returned), except a 'failed' page, which is replaced by the new result.
        Files are written before the commit under the id the rows will get.
        """
        if page.status not in PAGE_STATUSES:
            raise LedgerError(f"{self.path}: page status must be one of {PAGE_STATUSES}; got {page.status!r}")
        with self.transaction():
            c = self.conn
            old = c.execute("SELECT id, status FROM pages WHERE content_hash = ?", (page.content_hash,)).fetchone()
            page_id = None
            if old is not None:
                if old[1] != "failed":
                    return int(old[0])
                # a failed page is tried again; its new result takes its place (and its id)
                page_id = int(old[0])
                c.execute("DELETE FROM fields WHERE page_id = ?", (page_id,))
                c.execute("DELETE FROM pages WHERE id = ?", (page_id,))
            # a whole file that could not be read is one row keyed 'failed:...'; any new row of that file replaces it
            c.execute("DELETE FROM pages WHERE source = ? AND status = 'failed' AND content_hash LIKE 'failed:%'"
                      " AND content_hash != ?", (page.source, page.content_hash))
            if page_id is None:
                page_id = int(c.execute("SELECT coalesce(max(id), 0) + 1 FROM pages").fetchone()[0])
            image_path = None
            if page.image_jpeg is not None:
                image_path = f"pages/{page_id}.jpg"
                atomic_write(self.outdir / image_path, page.image_jpeg)
            c.execute(
                "INSERT INTO pages (id, run_id, content_hash, source, page_number, status, error, residual_mm,"
                " rotated_180, skew_deg, image_path, created, form, turn_deg)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (page_id, run_id, page.content_hash, page.source, int(page.page_number), page.status, page.error,
                 _opt_float(page.residual_mm), None if page.rotated_180 is None else int(bool(page.rotated_180)),
                 _opt_float(page.skew_deg), image_path, utc_now(), page.form,
                 None if page.turn_deg is None else int(page.turn_deg)))
            for f in page.fields:
                self._insert_field(page_id, f)
            return page_id

    def _insert_field(self, page_id: int, f: FieldRow) -> None:
        image_path = digits_path = None
        if f.image_png is not None:
            image_path = f"fields/{page_id}/{f.name}.png"
            atomic_write(self.outdir / image_path, f.image_png)
        if f.digits_npz is not None:
            digits_path = f"digits/{page_id}/{f.name}.npz"
            atomic_write(self.outdir / digits_path, f.digits_npz)
        accepted = f.decision == "accepted"
        self.conn.execute(
            "INSERT INTO fields (page_id, name, kind, reading, confidence, alternatives, digit_probs, rules,"
            " decision, reason, image_path, digits_path, box_px, final_value, final_status, threshold,"
            " threshold_source, max_digits, audit)"
            " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (page_id, f.name, f.kind, f.reading, _opt_float(f.confidence), json.dumps(f.alternatives),
             json.dumps(f.digit_probs), json.dumps(f.rules), f.decision, f.reason, image_path, digits_path,
             None if f.box_px is None else json.dumps([round(float(v), 1) for v in f.box_px]),
             f.reading if accepted else None, "auto" if accepted else None, _opt_float(f.threshold),
             f.threshold_source, None if f.max_digits is None else int(f.max_digits), int(bool(f.audit))))

    # --- reading back -----------------------------------------------------------------------
    def page_rows(self) -> list[dict]:
        """Every page as a dict (columns of ``pages``), in id order."""
        return self._dicts("SELECT * FROM pages ORDER BY id")

    def field_rows(self) -> list[dict]:
        """Every field joined with its page's source, page number and status, in page then field order.

        JSON columns (alternatives, digit_probs, rules, box_px) are decoded.
        """
        rows = self._dicts(
            "SELECT f.*, p.source AS source, p.page_number AS page_number, p.status AS page_status,"
            " p.run_id AS run_id, p.form AS form"
            " FROM fields f JOIN pages p ON p.id = f.page_id ORDER BY f.page_id, f.id")
        for r in rows:
            for k in ("alternatives", "digit_probs", "rules", "box_px"):
                if r.get(k) is not None:
                    r[k] = json.loads(r[k])
        return rows

    def counts(self) -> dict:
        """Page and field counts by status / decision."""
        pages = dict(self.conn.execute("SELECT status, count(*) FROM pages GROUP BY status"))
        fields = dict(self.conn.execute("SELECT decision, count(*) FROM fields GROUP BY decision"))
        return {"pages": pages, "fields": fields}

    def _dicts(self, sql: str, args=()) -> list[dict]:
        return [dict(row) for row in self.conn.execute(sql, args).fetchall()]

    # --- plumbing ---------------------------------------------------------------------------
    def transaction(self):
        """``with ledger.transaction():`` one ``BEGIN IMMEDIATE`` ... ``COMMIT``, rolled back on any
        exception; an SQLite error inside becomes a one-line LedgerError naming the ledger."""
        return _Transaction(self.conn, self.path)

    def write_lock(self):
        """Hold the ledger's write lock (``BEGIN IMMEDIATE``) for a block; nothing is written by it."""
        return _Transaction(self.conn, self.path)

    def close(self) -> None:
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class _Transaction:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``, rolled back on any exception (including KeyboardInterrupt)."""

    def __init__(self, conn: sqlite3.Connection, path: Path):
        self.conn, self.path = conn, path

    def __enter__(self):
        try:
            self.conn.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as e:
            raise LedgerError(f"{self.path}: cannot write the ledger ({_sqlite_problem(e)})") from None
        return self.conn

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            try:
                self.conn.execute("COMMIT")
            except sqlite3.Error as e:
                with contextlib.suppress(sqlite3.Error):
                    self.conn.execute("ROLLBACK")
                raise LedgerError(f"{self.path}: cannot write the ledger ({_sqlite_problem(e)})") from None
            return False
        with contextlib.suppress(sqlite3.Error):
            self.conn.execute("ROLLBACK")
        if isinstance(exc, sqlite3.Error):
            raise LedgerError(f"{self.path}: cannot write the ledger ({_sqlite_problem(exc)})") from None
        if isinstance(exc, OSError) and not isinstance(exc, LedgerError):
            raise LedgerError(f"{self.path}: cannot write the output folder "
                              f"({exc.strerror or exc}{': ' + str(exc.filename) if exc.filename else ''})") from None
        return False


def _sqlite_problem(e: sqlite3.Error) -> str:
    """Plain words for the SQLite errors a clerk can meet."""
    text = str(e)
    if "readonly" in text or "read-only" in text:
        return "the ledger or its folder is read-only"
    if "locked" in text or "busy" in text:
        return f"busy: another formread is writing it (waited {BUSY_SECONDS:.0f} s)"
    if "disk" in text and "full" in text:
        return "the disk is full"
    if "malformed" in text or "not a database" in text:
        return "the ledger file is damaged"
    return text


def _opt_float(v):
    return None if v is None else float(v)


def open_ledger(outdir, *, create: bool = True) -> Ledger:
    """Open (and when ``create``, make) the ledger of an output folder; the one way to open it.

    A ledger written by an earlier formread is upgraded in place by the ordered migrations of
    :mod:`formread.ledger.schema` (one transaction: all of them or none); a newer one is refused.

    Parameters
    ----------
    outdir : path of the output folder
    create : bool
        Make the folder and the ledger when missing; else a missing ledger is an error.

    Raises
    ------
    LedgerError
        The folder cannot be used, the file is not a formread ledger, or it is of a newer schema.
    """
    outdir = Path(outdir)
    path = outdir / LEDGER_NAME
    if create:
        check_output_folder(outdir)
    elif not path.is_file():
        raise LedgerError(f"{path}: no ledger here (run 'formread read' into this folder first)")
    try:
        conn = sqlite3.connect(path, isolation_level=None, timeout=BUSY_SECONDS, check_same_thread=False)
    except sqlite3.Error as e:
        raise LedgerError(f"{path}: cannot open the ledger ({_sqlite_problem(e)})") from None
    conn.row_factory = sqlite3.Row
    try:
        conn.execute(f"PRAGMA busy_timeout={int(BUSY_SECONDS * 1000)}")
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if tables and "meta" not in tables:
            raise LedgerError(f"{path}: not a formread ledger (no meta table)")
        version = _version(conn, path) if tables else 0
        if version > SCHEMA_VERSION:
            raise LedgerError(f"{path}: ledger schema version {version} is newer than this formread "
                              f"(version {SCHEMA_VERSION}); update formread")
        mode = conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise LedgerError(f"{path}: cannot switch the ledger to WAL mode (got {mode})")
        conn.execute("PRAGMA synchronous=NORMAL")
        conn.execute("PRAGMA foreign_keys=ON")
        if version < SCHEMA_VERSION:
            _upgrade(conn, version)
    except sqlite3.DatabaseError as e:
        conn.close()
        raise LedgerError(f"{path}: not a usable ledger ({_sqlite_problem(e)})") from None
    except BaseException:
        conn.close()
        raise
    return Ledger(outdir, conn)


def _version(conn: sqlite3.Connection, path: Path) -> int:
    """The schema version of an existing ledger: ``user_version`` (since version 2) and
    ``meta.schema_version`` (every version); a ledger either calls newer is newer."""
    v = int(conn.execute("PRAGMA user_version").fetchone()[0])
    row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
    if row is None or not str(row[0]).isdigit():
        raise LedgerError(f"{path}: not a formread ledger (no schema version)")
    return max(v, int(row[0]))


def _upgrade(conn: sqlite3.Connection, version: int) -> None:
    """From ``version`` (0 = a new, empty file) to SCHEMA_VERSION, in one transaction."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        if version == 0:
            for stmt in _statements(BASE_SCHEMA):
                conn.execute(stmt)
            version = 1
        for target, _what, sql in MIGRATIONS:
            if target > version:
                for stmt in _statements(sql):
                    conn.execute(stmt)
                version = target
        conn.execute("INSERT OR REPLACE INTO meta (key, value) VALUES ('schema_version', ?)", (str(version),))
        conn.execute(f"PRAGMA user_version = {int(version)}")
        conn.execute("COMMIT")
    except BaseException:
        with contextlib.suppress(sqlite3.Error):
            conn.execute("ROLLBACK")
        raise


def _statements(script: str) -> list[str]:
    """Split the schema script into single statements (comments kept inside statements are fine)."""
    out, buf = [], []
    for line in script.splitlines():
        buf.append(line)
        if sqlite3.complete_statement("\n".join(buf)):
            out.append("\n".join(buf).strip())
            buf = []
    return [s for s in out if s]
