"""The results ledger's SQLite schema (one file, ``OUTDIR/ledger.sqlite``, WAL mode).

Shared contract between the reader (writes runs, pages, fields) and the review
page (writes reviews and the final value of fields).  Times are UTC ISO 8601.
Paths are relative to the output folder.
"""

SCHEMA_VERSION = 1

SCHEMA = """
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
