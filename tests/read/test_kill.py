"""Kill the reader at random moments of a 100-page run: a rerun ends with every page once, read as if never stopped.

The reader runs as its own process group (the CLI with its two imaging workers),
killed with SIGKILL (and once interrupted with SIGINT, as Ctrl-C does) at random
moments, then run again with the same command until it finishes.  The ledger
must then hold every page exactly once, every read page with all its fields, and
the same readings as one uninterrupted run; readings.csv must agree with it.
"""

import csv
import os
import signal
import sqlite3
import subprocess
import time

import numpy as np
import pytest
from readkit import demo_layout, formread_argv, readings, tiny_model, write_copies

N_PAGES = 100


def _read(scans, out, model, *, kill_after=None, sig=signal.SIGKILL):
    """Run ``formread read`` on the folder; optionally send ``sig`` to its process group after some seconds."""
    argv = formread_argv("read", str(scans), "--layout", str(demo_layout()), "--model", str(model),
                         "--out", str(out), "--quiet")
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
    if kill_after is None:
        so, se = proc.communicate(timeout=300)
        return proc.returncode, so.decode(), se.decode()
    try:
        so, se = proc.communicate(timeout=kill_after)
        return proc.returncode, so.decode(), se.decode()      # finished before the kill
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, sig)
        so, se = proc.communicate(timeout=60)
        return proc.returncode, so.decode(), se.decode()


def _check_ledger(out):
    conn = sqlite3.connect(out / "ledger.sqlite")
    try:
        pages = conn.execute("SELECT source, page_number, status FROM pages").fetchall()
        per_page = conn.execute("SELECT p.id, count(f.id) FROM pages p LEFT JOIN fields f ON f.page_id = p.id "
                                "GROUP BY p.id").fetchall()
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        conn.close()
    assert len(pages) == N_PAGES
    assert len({(s, n) for s, n, _ in pages}) == N_PAGES
    assert {st for _, _, st in pages} == {"read"}
    assert {n for _, n in per_page} == {6}                     # never a half-written page
    rows = list(csv.DictReader((out / "readings.csv").read_text().splitlines()))
    assert len(rows) == N_PAGES


@pytest.mark.slow
def test_killed_runs_resume_to_the_same_readings(tmp_path):
    model = tiny_model(tmp_path / "tiny.npz")
    scans = tmp_path / "scans"
    write_copies(scans, N_PAGES)

    t0 = time.monotonic()
    code, _, err = _read(scans, tmp_path / "ref", model)
    full = time.monotonic() - t0
    assert code == 0, err
    _check_ledger(tmp_path / "ref")
    reference = readings(tmp_path / "ref")

    rng = np.random.default_rng(20261202)
    trials = [signal.SIGKILL, signal.SIGKILL, signal.SIGINT]
    for k, sig in enumerate(trials):
        out = tmp_path / f"trial{k}"
        code, _, err = _read(scans, out, model, kill_after=float(rng.uniform(0.1, 0.8) * full), sig=sig)
        if sig == signal.SIGINT and code == 130:
            assert "interrupted" in err                         # Ctrl-C: "work saved so far is kept"
        else:                                                   # done first, or stopped before the CLI started
            assert code in (0, -signal.SIGINT, -signal.SIGKILL), err
        code, _, err = _read(scans, out, model)
        assert code == 0, err
        _check_ledger(out)
        assert readings(out) == reference
