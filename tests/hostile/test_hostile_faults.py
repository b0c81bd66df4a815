"""Faults: ``formread retrain --promote-inherited`` and the review server killed (SIGKILL) at random moments.

After every kill the model store must be usable: ``formread info`` works, ``in_use.json`` names a
model file that loads and verifies (never a half-written bundle or pointer).  A review server killed
while clerks save leaves every field either saved with its audit row or not at all.
(tests/read/test_kill.py does the same for ``formread read``.)
"""

from __future__ import annotations

import json
import os
import re
import signal
import sqlite3
import subprocess
import threading
import time

import numpy as np
import pytest
from hostilekit import samples_folder, tiny_model
from readkit import formread_argv

from formread.review.server import TOKEN_HEADER


def _run(argv, env, *, kill_after=None, cwd=None):
    proc = subprocess.Popen(formread_argv(*argv), env=env, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            start_new_session=True)
    try:
        so, se = proc.communicate(timeout=kill_after if kill_after is not None else 120)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        so, se = proc.communicate(timeout=30)
    return proc.returncode, so.decode(), se.decode()


def _store_is_usable(store):
    """``formread info`` works (the listing and the card of the model in use, its checksums verified)."""
    from typer.testing import CliRunner

    from formread.cli.main import app
    from formread.read.bundle import load_bundle
    from formread.store import in_use_path

    res = CliRunner().invoke(app, ["info"])
    assert res.exit_code == 0 and res.exception is None and "unreadable" not in res.stdout, res.output
    pointer = json.loads((store / "in_use.json").read_text(encoding="utf-8"))
    assert in_use_path() == store / pointer["model"]
    load_bundle(in_use_path())
    res = CliRunner().invoke(app, ["info", str(in_use_path())])
    assert res.exit_code == 0 and "checksum:     verified" in res.stdout, res.output


def test_retrain_killed_at_random_moments_keeps_the_store_usable(tmp_path, monkeypatch):
    store = tmp_path / "home" / "models"
    store.mkdir(parents=True)
    tiny_model(store / "tiny.npz")
    (store / "in_use.json").write_text(json.dumps({"model": "tiny.npz"}), encoding="utf-8")
    samples = samples_folder(tmp_path / "samples", {d: 6 for d in range(10)})
    monkeypatch.setenv("FORMREAD_HOME", str(tmp_path / "home"))
    env = dict(os.environ)
    argv = ["retrain", "--samples", str(samples), "--epochs", "1", "--min-gain", "-0.5", "--margin", "0.5",
            "--promote-inherited", "--quiet"]

    t0 = time.monotonic()
    code, out, err = _run(argv, env)
    full = time.monotonic() - t0
    assert code == 0 and "promoted" in out, (code, out, err)
    _store_is_usable(store)
    rng = np.random.default_rng(20261203)
    for share in (0.45, 0.95):          # fine-tuning; writing and promoting
        code, out, err = _run(argv, env, kill_after=float(share * full * rng.uniform(0.9, 1.1)))
        assert code in (0, -signal.SIGKILL), (code, err)
        assert "Traceback" not in err
        _store_is_usable(store)


def _saves(port, token, field_id, stop, done):
    """Save ``field_id`` again and again (each save on the version the last one made)."""
    import http.client

    version = 0
    while not stop.is_set():
        body = json.dumps({"action": "correct", "value": f"{version % 10:05d}", "version": version})
        try:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
            conn.request("POST", f"/api/field/{field_id}", body=body,
                         headers={"Host": f"127.0.0.1:{port}", TOKEN_HEADER: token,
                                  "Content-Type": "application/json"})
            res = conn.getresponse()
            data = json.loads(res.read())
            conn.close()
        except (OSError, ValueError, http.client.HTTPException):
            return                      # the server is gone
        if res.status == 200:
            version = data["field"]["version"]
            done.append(version)
        elif res.status == 409:
            version = data["field"]["version"]


def _saved_with_audit_rows(outdir):
    conn = sqlite3.connect(outdir / "ledger.sqlite")
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        fields = conn.execute("SELECT id, version, final_value FROM fields").fetchall()
        for fid, version, final in fields:
            rows = conn.execute("SELECT new_value FROM reviews WHERE field_id = ? ORDER BY id", (fid,)).fetchall()
            assert len(rows) == version, (fid, version, len(rows))
            if rows:
                assert rows[-1][0] == final, (fid, rows[-1], final)
        return sum(v for _, v, _ in fields)
    finally:
        conn.close()


@pytest.mark.parametrize("kill_after", [0.6, 1.3])
def test_review_server_killed_mid_save(ledger, tmp_path, kill_after):
    out, info = ledger
    env = dict(os.environ, FORMREAD_HOME=str(tmp_path / "home"))
    proc = subprocess.Popen(formread_argv("review", str(out), "--reviewer", "ann"), env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, start_new_session=True)
    try:
        line = ""
        deadline = time.monotonic() + 30
        while "token=" not in line and time.monotonic() < deadline:
            line = proc.stdout.readline().decode()
        m = re.search(r"http://127\.0\.0\.1:(\d+)/\?token=(\S+)", line)
        assert m, line
        port, token = int(m.group(1)), m.group(2)
        stop, done = threading.Event(), []
        clients = [threading.Thread(target=_saves, args=(port, token, fid, stop, done)) for fid in info["pending"][:3]]
        for c in clients:
            c.start()
        time.sleep(kill_after)
        os.killpg(proc.pid, signal.SIGKILL)
        stop.set()
        for c in clients:
            c.join(timeout=10)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.communicate(timeout=10)
    assert done, "no save went through before the kill"
    assert _saved_with_audit_rows(out) >= len(done)
