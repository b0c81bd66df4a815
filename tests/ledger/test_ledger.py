"""The ledger: WAL mode, one transaction per page, skip by content hash, safe with bad folders."""

import hashlib
import sqlite3

import numpy as np
import pytest

from formread.errors import LedgerError
from formread.ledger.schema import SCHEMA_VERSION
from formread.ledger.store import FieldRow, PageRow, atomic_write, open_ledger, page_hash


def _run(ledger):
    return ledger.start_run(layout_path="l.toml", layout_sha256="a" * 64, model_path="m.npz",
                            model_sha256="b" * 64, threshold=0.9, command="formread read x")


def _page(h="h1", source="s.png", n=1, fields=2):
    return PageRow(content_hash=h, source=source, page_number=n, status="read", image_jpeg=b"page",
                   fields=[FieldRow(name=f"f{i}", kind="boxed", reading=str(i) * 3, confidence=0.99 - 0.5 * i,
                                    decision="accepted" if i == 0 else "review",
                                    reason=None if i == 0 else "low_confidence",
                                    alternatives=[[str(i) * 3, 0.9]], rules={"length": True},
                                    image_png=b"crop", digits_npz=b"npz", box_px=[1, 2, 3, 4])
                           for i in range(fields)])


def test_wal_mode_schema_version_and_rows(tmp_path):
    with open_ledger(tmp_path / "out") as led:
        run = _run(led)
        pid = led.write_page(run, _page())
        assert pid == 1
    conn = sqlite3.connect(tmp_path / "out" / "ledger.sqlite")
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] == str(SCHEMA_VERSION)
    rows = conn.execute("SELECT name, reading, decision, final_value, final_status, image_path, digits_path "
                        "FROM fields ORDER BY id").fetchall()
    # accepted fields are decided automatically ('auto'); review fields wait for a clerk (NULL)
    assert rows == [("f0", "000", "accepted", "000", "auto", "fields/1/f0.png", "digits/1/f0.npz"),
                    ("f1", "111", "review", None, None, "fields/1/f1.png", "digits/1/f1.npz")]
    assert (tmp_path / "out" / "pages" / "1.jpg").read_bytes() == b"page"
    assert (tmp_path / "out" / "fields" / "1" / "f1.png").read_bytes() == b"crop"


def test_failure_mid_page_leaves_no_partial_rows(tmp_path):
    with open_ledger(tmp_path) as led:
        run = _run(led)
        led.write_page(run, _page("h1"))
        bad = _page("h2", fields=3)
        bad.fields[2].alternatives = [[object(), 0.5]]       # not JSON: fails after the page row and 2 fields
        with pytest.raises(TypeError):
            led.write_page(run, bad)
        assert led.known_pages() == {"h1": "read"}
        assert led.conn.execute("SELECT count(*) FROM fields").fetchone()[0] == 2
        # the id the failed page would have had is given to the next page (orphan files are overwritten)
        assert led.write_page(run, _page("h3")) == 2


def test_same_hash_is_written_once_and_failed_pages_are_replaced(tmp_path):
    with open_ledger(tmp_path) as led:
        run = _run(led)
        a = led.write_page(run, _page("h1"))
        assert led.write_page(run, _page("h1", source="copy.png")) == a
        failed = PageRow(content_hash="h2", source="t.png", page_number=1, status="failed", error="t.png: bad")
        b = led.write_page(run, failed)
        c = led.write_page(run, _page("h2", source="t.png"))
        assert c == b                                           # the retried page keeps its place
        assert led.known_pages() == {"h1": "read", "h2": "read"}
        assert [p["source"] for p in led.page_rows()] == ["s.png", "t.png"]


def test_whole_file_failure_is_replaced_when_the_file_reads(tmp_path):
    with open_ledger(tmp_path) as led:
        run = _run(led)
        led.write_page(run, PageRow(content_hash="failed:x", source="f.tif", page_number=1, status="failed",
                                    error="f.tif: truncated"))
        led.write_page(run, _page("h9", source="f.tif"))
        assert led.known_pages() == {"h9": "read"}


def test_page_hash_is_of_the_pixels_and_shape():
    a = np.full((4, 6), 255, np.uint8)
    b = a.copy()
    b[1, 2] = 254
    assert page_hash(a) == page_hash(a.copy())
    assert page_hash(a) != page_hash(b)
    assert page_hash(a) != page_hash(a.reshape(6, 4))
    # the hash ledgers already hold (a resumed run knows its pages by it): SHA-256 (hashlib) of the
    # shape and dtype, then the pixels row by row, whatever the array's memory order
    want = hashlib.sha256(b"4x6:|u1:" + b.tobytes()).hexdigest()
    assert page_hash(b) == want and page_hash(np.asfortranarray(b)) == want


def test_unusable_output_folder_is_a_one_line_error(tmp_path):
    f = tmp_path / "file"
    f.write_text("x")
    with pytest.raises(LedgerError, match="is a file, not a folder"):
        open_ledger(f)
    with pytest.raises(LedgerError, match="cannot be used"):
        open_ledger(f / "sub")                                  # a folder below a file cannot be made


def test_not_a_ledger_is_refused_and_left_alone(tmp_path):
    (tmp_path / "ledger.sqlite").write_bytes(b"this is not a database, but somebody's file" * 100)
    with pytest.raises(LedgerError, match="not a usable ledger") as e:
        open_ledger(tmp_path)
    assert "\n" not in str(e.value)
    assert (tmp_path / "ledger.sqlite").read_bytes().startswith(b"this is not a database")
    other = tmp_path / "other"
    other.mkdir()
    conn = sqlite3.connect(other / "ledger.sqlite")
    conn.execute("CREATE TABLE t (x)")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerError, match="not a formread ledger"):
        open_ledger(other)


def test_missing_ledger_when_not_creating(tmp_path):
    with pytest.raises(LedgerError, match="no ledger here"):
        open_ledger(tmp_path, create=False)
    assert not (tmp_path / "ledger.sqlite").exists()


def test_atomic_write_replaces_whole_file(tmp_path):
    p = tmp_path / "a" / "b.bin"
    atomic_write(p, b"one")
    atomic_write(p, b"two")
    assert p.read_bytes() == b"two"
    assert [q.name for q in p.parent.iterdir()] == ["b.bin"]      # no temp file left behind
