"""The results ledger's SQLite schema and its ordered migrations (``OUTDIR/ledger.sqlite``, WAL mode).

Shared contract between the reader (writes runs, pages, fields) and the review side (writes
reviews and the final value of fields).  Times are UTC ISO 8601; paths are relative to the output
folder.

How the format grows: :data:`BASE_SCHEMA` is the schema of the first release (version 1), frozen.
Every later change is one entry of :data:`MIGRATIONS`, applied in order; ``PRAGMA user_version``
holds the version a ledger is at (version-1 ledgers, written before migrations existed, have
``user_version`` 0 and ``meta.schema_version`` 1).  A new ledger is made by the same path: the base
schema, then every migration.  Opening a ledger upgrades it in place, in one transaction, and
refuses a ledger newer than this formread (formread.ledger.store.open_ledger).  Never edit a
migration that has shipped: add one.
"""

from __future__ import annotations

__all__ = ["BASE_SCHEMA", "MIGRATIONS", "SCHEMA_VERSION"]

BASE_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS runs (
    id            INTEGER PRIMARY KEY,
    started       TEXT NOT NULL,
    finished      TEXT,
    layout_path   TEXT NOT NULL,
    layout_sha256 TEXT NOT NULL,
    model_path    TEXT NOT NULL,
    model_sha256  TEXT NOT NULL,
    threshold     REAL NOT NULL,
    command       TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS pages (
    id            INTEGER PRIMARY KEY,
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    content_hash  TEXT NOT NULL UNIQUE,      -- sha256 of the decoded page pixels
    source        TEXT NOT NULL,             -- file path as given
    page_number   INTEGER NOT NULL,          -- 1-based within the file
    status        TEXT NOT NULL,             -- 'read' | 'unregistered' | 'failed'
    error         TEXT,                      -- one-line reason when not 'read'
    residual_mm   REAL,
    rotated_180   INTEGER,
    skew_deg      REAL,
    image_path    TEXT,                      -- page PNG for the review page view
    created       TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS fields (
    id            INTEGER PRIMARY KEY,
    page_id       INTEGER NOT NULL REFERENCES pages(id),
    name          TEXT NOT NULL,
    kind          TEXT NOT NULL,             -- 'boxed' | 'open'
    reading       TEXT,                      -- chosen string of digits; '' = left empty; NULL = none
    confidence    REAL,                      -- calibrated, normalised over the strings considered
    alternatives  TEXT NOT NULL DEFAULT '[]',-- JSON [[string, probability], ...] best first
    digit_probs   TEXT NOT NULL DEFAULT '[]',-- JSON per position [[digit, probability], ...] top 3
    rules         TEXT NOT NULL DEFAULT '{}',-- JSON {rule name: true/false}
    decision      TEXT NOT NULL,             -- 'accepted' | 'review'
    reason        TEXT,                      -- why review: 'low_confidence', 'rule_failed:<rule>',
                                             --   'segmentation_doubtful', 'page_not_registered', ...
    image_path    TEXT,                      -- field crop PNG, cells outlined
    digits_path   TEXT,                      -- .npz of the chosen segmentation's digit images
    box_px        TEXT,                      -- JSON [x0, y0, x1, y1] of the field on the page image
    version       INTEGER NOT NULL DEFAULT 0,-- bumped by every review save (stale-save guard)
    final_value   TEXT,                      -- value after review (NULL until decided)
    final_status  TEXT,                      -- 'auto' | 'confirmed' | 'corrected' | 'unreadable' | 'empty'
    UNIQUE (page_id, name)
);
CREATE TABLE IF NOT EXISTS reviews (
    id            INTEGER PRIMARY KEY,
    field_id      INTEGER NOT NULL REFERENCES fields(id),
    action        TEXT NOT NULL,             -- 'confirm' | 'correct' | 'unreadable' | 'empty'
    old_value     TEXT,
    new_value     TEXT,
    reviewer      TEXT NOT NULL,
    at            TEXT NOT NULL,
    model_path    TEXT NOT NULL,
    model_sha256  TEXT NOT NULL,
    threshold     REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS fields_pending ON fields(decision, final_status);
"""
"""Version 1, as the first release wrote it (never edit)."""

MIGRATIONS: tuple[tuple[int, str, str], ...] = (
    (2, "per-field thresholds and field sizes; the layout and model bundle as read", """
ALTER TABLE fields ADD COLUMN threshold REAL;           -- the threshold this field's confidence was compared with
ALTER TABLE fields ADD COLUMN threshold_source TEXT;    -- where it came from (formread.form.thresholds.SOURCES)
ALTER TABLE fields ADD COLUMN max_digits INTEGER;       -- most digits the field holds (layout at read time)
ALTER TABLE runs ADD COLUMN layout_text TEXT;           -- the layout file's text as read (review checks against it)
ALTER TABLE runs ADD COLUMN bundle TEXT;                -- JSON: the model bundle's weights, decoder and decisions
UPDATE fields SET threshold = (SELECT r.threshold FROM runs r JOIN pages p ON p.run_id = r.id
                               WHERE p.id = fields.page_id),
                  threshold_source = 'run'
WHERE threshold IS NULL;
"""),
    (3, "audit sampling: fields sent to review as a random spot check of what would have been accepted", """
ALTER TABLE fields ADD COLUMN audit INTEGER NOT NULL DEFAULT 0;  -- 1: would have been accepted, sent as a spot check
ALTER TABLE runs ADD COLUMN audit_rate REAL NOT NULL DEFAULT 0;  -- the share of would-be-accepted fields spot-checked
"""),
    (4, "several forms in one batch: each page's form, and every layout a run read with", """
ALTER TABLE pages ADD COLUMN form TEXT;                    -- the form (layout name) the page was read as; NULL: none
ALTER TABLE pages ADD COLUMN turn_deg INTEGER;             -- quarter turn (counter-clockwise) undone to read it
CREATE TABLE IF NOT EXISTS run_forms (
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    form          TEXT NOT NULL,                           -- the layout's [form] name
    layout_path   TEXT NOT NULL,
    layout_sha256 TEXT NOT NULL,
    layout_text   TEXT NOT NULL,                           -- the layout file's text as read
    threshold     REAL NOT NULL,                           -- the threshold of its fields without their own
    audit_rate    REAL NOT NULL,
    PRIMARY KEY (run_id, form)
);
"""),
)
"""Ordered migrations: (version reached, what it adds, SQL)."""

SCHEMA_VERSION = 1 + len(MIGRATIONS)
"""The version this formread writes."""
