"""Ledgers written by an earlier formread open, upgrade in place, and keep every row.

``tests/fixtures/ledger_v1.sqlite`` was written by the first release (schema version 1): four demo
pages read, one field confirmed by "ann" and one corrected by "ben".
"""

import shutil
import sqlite3
from pathlib import Path

import pytest

from formread.errors import LedgerError
from formread.ledger import schema as schema_mod
from formread.ledger.schema import SCHEMA_VERSION
from formread.ledger.store import open_ledger
from formread.review import queries

V1 = Path(__file__).resolve().parents[1] / "fixtures" / "ledger_v1.sqlite"


def _rows(path):
    conn = sqlite3.connect(path)
    try:
        return {t: [tuple(r) for r in conn.execute(f"SELECT * FROM {t} ORDER BY id")] for t in ("runs", "pages",
                                                                                              "fields", "reviews")}
    finally:
        conn.close()


@pytest.fixture
def v1(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    shutil.copy(V1, out / "ledger.sqlite")
    return out


def test_a_first_release_ledger_upgrades_and_keeps_every_row(v1):
    before = _rows(v1 / "ledger.sqlite")
    assert (len(before["pages"]), len(before["fields"]), len(before["reviews"])) == (4, 24, 2)
    with open_ledger(v1, create=False) as led:
        assert led.conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert (led.conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0]
                == str(SCHEMA_VERSION))
        thresholds = {r[0] for r in led.conn.execute("SELECT threshold FROM fields")}
        assert thresholds == {0.8962}            # the run's threshold, which applied to every field then
        # the review side works on it: the decided fields, their audit rows, a pending field
        decided = queries.list_decided(led)
        assert [(d.final_status, d.reviewer) for d in decided] == [("confirmed", "ann"), ("corrected", "ben")]
        pending = queries.list_pending(led)
        assert len(pending) == 2 and queries.field_detail(led, pending[0])["threshold"] == 0.8962
    after = _rows(v1 / "ledger.sqlite")
    for table in ("runs", "pages", "fields", "reviews"):
        assert len(after[table]) == len(before[table])
        # every old column keeps its value; the new columns come after them
        assert [r[:len(before[table][0])] for r in after[table]] == before[table]
    # opening again changes nothing
    with open_ledger(v1, create=False):
        pass
    assert _rows(v1 / "ledger.sqlite") == after


def test_a_failed_migration_leaves_the_ledger_as_it_was(v1, monkeypatch):
    before = (v1 / "ledger.sqlite").read_bytes()
    broken = schema_mod.MIGRATIONS + ((SCHEMA_VERSION + 1, "broken", "ALTER TABLE nosuch ADD COLUMN x;"),)
    monkeypatch.setattr("formread.ledger.store.MIGRATIONS", broken)
    monkeypatch.setattr("formread.ledger.store.SCHEMA_VERSION", SCHEMA_VERSION + 1)
    with pytest.raises(LedgerError):
        open_ledger(v1, create=False)
    monkeypatch.undo()
    conn = sqlite3.connect(v1 / "ledger.sqlite")
    assert conn.execute("PRAGMA user_version").fetchone()[0] == 0       # still version 1, untouched
    assert "threshold" not in [r[1] for r in conn.execute("PRAGMA table_info(fields)")]
    conn.close()
    assert _rows(v1 / "ledger.sqlite") == _rows(V1)
    assert len(before) > 0


def test_a_newer_ledger_is_refused(v1):
    with open_ledger(v1, create=False):
        pass
    conn = sqlite3.connect(v1 / "ledger.sqlite")
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    conn.close()
    with pytest.raises(LedgerError, match="newer than this formread"):
        open_ledger(v1, create=False)


def test_a_new_ledger_is_made_by_the_same_migrations(tmp_path):
    with open_ledger(tmp_path / "new") as led:
        cols = {r[1] for r in led.conn.execute("PRAGMA table_info(fields)")}
        assert {"threshold", "threshold_source", "max_digits"} <= cols
        assert led.conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
