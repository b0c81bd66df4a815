"""The review server without a browser: token, ids, bodies, values; refused requests write nothing."""

import http.client
import json
import signal
import socket
import subprocess
import sys
import threading

import pytest
from review_fixture import snapshot
from typer.testing import CliRunner

from formread.cli.main import app
from formread.ledger.store import open_ledger
from formread.review import queries
from formread.review.server import MAX_BODY, TOKEN_HEADER, running


@pytest.fixture
def server(ledger):
    out, info = ledger
    with running(out, reviewer="ann") as srv:
        yield srv, out, info


def call(srv, method, path, *, body=None, headers=None, token=True, raw=None):
    """(status, headers, parsed JSON or bytes) of one request to ``srv``."""
    h = {"Host": f"127.0.0.1:{srv.port}"}
    if token:
        h[TOKEN_HEADER] = srv.token
    if body is not None:
        raw = json.dumps(body).encode()
        h["Content-Type"] = "application/json"
    h.update(headers or {})
    conn = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=10)
    try:
        conn.request(method, path, body=raw, headers=h)
        res = conn.getresponse()
        data = res.read()
        hdrs = {k.lower(): v for k, v in res.getheaders()}
    finally:
        conn.close()
    if hdrs.get("content-type", "").startswith("application/json"):
        data = json.loads(data)
    return res.status, hdrs, data


def test_page_needs_the_token_and_sends_safety_headers(server):
    srv, _, _ = server
    status, h, body = call(srv, "GET", f"/?token={srv.token}", token=False)
    assert status == 200 and h["content-type"].startswith("text/html")
    assert f'content="{srv.token}"' in body.decode()
    assert h["x-content-type-options"] == "nosniff"
    assert h["cache-control"] == "no-store" and h["referrer-policy"] == "no-referrer"
    csp = h["content-security-policy"]
    assert "script-src 'self'" in csp and "unsafe-inline" not in csp and "default-src 'none'" in csp
    for path in ("/", "/?token=wrong", f"/?token={srv.token}&token={srv.token}", f"/?token={srv.token[:-1]}"):
        status, h, body = call(srv, "GET", path, token=False)
        assert status == 403 and "session token" in body["error"]
        assert h["x-content-type-options"] == "nosniff" and h["cache-control"] == "no-store"


def test_static_files_need_the_token_and_are_a_fixed_list(server):
    srv, _, _ = server
    status, h, body = call(srv, "GET", f"/static/review.js?token={srv.token}", token=False)
    assert status == 200 and h["content-type"].startswith("text/javascript") and b"X-Formread-Token" in body
    assert call(srv, "GET", f"/static/review.css?token={srv.token}", token=False)[0] == 200
    assert call(srv, "GET", "/static/review.js", token=False)[0] == 403
    assert call(srv, "GET", f"/static/page.html?token={srv.token}", token=False)[0] == 404
    assert call(srv, "GET", f"/static/../actions.py?token={srv.token}", token=False)[0] == 404


def test_api_takes_the_token_from_the_header_only(server):
    srv, _, info = server
    assert call(srv, "GET", "/api/queue")[2]["ids"] == info["pending"]
    status, _, body = call(srv, "GET", f"/api/queue?token={srv.token}", token=False)
    assert status == 403
    status, _, _ = call(srv, "GET", "/api/queue", headers={TOKEN_HEADER: "x" * len(srv.token)})
    assert status == 403


def test_queue_filters_and_field_details(server):
    srv, _, info = server
    _, _, q = call(srv, "GET", "/api/queue?name=current_reading&reason=low_confidence")
    assert q["ids"] == [info["ids"][(0, "current_reading")]] and q["reviewer"] == "ann"
    status, _, d = call(srv, "GET", f"/api/field/{q['ids'][0]}")
    assert status == 200 and d["reading"] == "03241" and d["why"]
    status, _, p = call(srv, "GET", f"/api/page/{d['page_id']}")
    assert status == 200 and len(p["fields"]) == 5


def test_unknown_ids_and_routes(server):
    srv, out, info = server
    for path in ("/api/field/999", "/api/page/999", "/api/field/abc", "/api/nothing"):
        status, _, body = call(srv, "GET", path)
        assert status == 404, path
        assert body["error"] and str(out) not in body["error"]
    t = f"?token={srv.token}"
    assert call(srv, "GET", f"/img/field/12/../1{t}", token=False)[0] == 404
    assert call(srv, "GET", f"/img/field/-1{t}", token=False)[0] == 404
    assert call(srv, "GET", f"/img/field/999{t}", token=False)[0] == 404
    # a field of an unregistered page has no crop
    assert call(srv, "GET", f"/img/field/{info['ids'][(2, 'plot_number')]}{t}", token=False)[0] == 404
    status, h, png = call(srv, "GET", f"/img/page/{info['pages'][0]}{t}", token=False)
    assert status == 200 and h["content-type"] == "image/png" and png[:4] == b"\x89PNG"
    # page views are JPEG since 2026-12-04 (the fixture's PNG pages are an older ledger's): both served
    import sqlite3

    from PIL import Image
    with sqlite3.connect(out / "ledger.sqlite") as conn:
        conn.execute("UPDATE pages SET image_path = ? WHERE id = ?", ("pages/new.jpg", info["pages"][1]))
    Image.new("L", (40, 50), 200).save(out / "pages" / "new.jpg", format="JPEG")
    status, h, jpg = call(srv, "GET", f"/img/page/{info['pages'][1]}{t}", token=False)
    assert status == 200 and h["content-type"] == "image/jpeg" and jpg[:3] == b"\xff\xd8\xff"
    status, h, png = call(srv, "GET", f"/img/field/{info['ids'][(0, 'plot_number')]}{t}", token=False)
    assert status == 200 and png[:4] == b"\x89PNG"
    assert call(srv, "GET", f"/img/page/{info['pages'][0]}", token=False)[0] == 403


def test_image_paths_come_from_the_ledger_and_stay_inside(server, tmp_path):
    srv, out, info = server
    secret = tmp_path / "secret.png"
    secret.write_bytes(b"\x89PNG secret")
    with open_ledger(out, create=False) as conn:
        conn.conn.execute("UPDATE pages SET image_path = ? WHERE id = ?", (str(secret), info["pages"][0]))
        conn.conn.execute("UPDATE pages SET image_path = '../secret.png' WHERE id = ?", (info["pages"][1],))
    conn.close()
    for pid in info["pages"][:2]:
        status, _, body = call(srv, "GET", f"/img/page/{pid}?token={srv.token}", token=False)
        assert status == 404 and b"secret" not in json.dumps(body).encode()


def _valid(info):
    return info["ids"][(0, "current_reading")], {"action": "correct", "value": "03247", "version": 0}


@pytest.mark.parametrize("case,status,message", [
    ("no token", 403, "session token"),
    ("wrong token", 403, "session token"),
    ("form post", 415, "application/json"),
    ("text/plain", 415, "application/json"),
    ("foreign origin", 403, "other sites"),
    ("bad host", 403, "local address"),
    ("malformed json", 400, "not valid JSON"),
    ("json list", 400, "JSON object"),
    ("no version", 400, "version"),
    ("version as text", 400, "version"),
    ("value as number", 400, "'value'"),
    ("oversized", 413, "over"),
    ("letters", 422, "digits only"),
    ("too long", 422, "at most 5 digits"),
    ("nothing typed", 422, "no value typed"),
    ("unknown action", 422, "unknown action"),
    ("unknown id", 404, "no field with id"),
    ("not a field route", 404, "nothing to post"),
])
def test_refused_posts_write_nothing(server, case, status, message):
    srv, out, info = server
    fid, body = _valid(info)
    path, kw = f"/api/field/{fid}", {"body": body}
    if case == "no token":
        kw["token"] = False
    elif case == "wrong token":
        kw["headers"] = {TOKEN_HEADER: srv.token.upper() if srv.token.upper() != srv.token else "z" + srv.token}
    elif case == "form post":
        kw = {"raw": b"action=correct&value=1&version=0",
              "headers": {"Content-Type": "application/x-www-form-urlencoded"}}
    elif case == "text/plain":
        kw = {"raw": json.dumps(body).encode(), "headers": {"Content-Type": "text/plain"}}
    elif case == "foreign origin":
        kw["headers"] = {"Origin": "http://evil.example"}
    elif case == "bad host":
        kw["headers"] = {"Host": "attacker.example:80"}
    elif case == "malformed json":
        kw = {"raw": b'{"action": "correct", ', "headers": {"Content-Type": "application/json"}}
    elif case == "json list":
        kw = {"body": [1, 2]}
    elif case == "no version":
        kw = {"body": {"action": "correct", "value": "03247"}}
    elif case == "version as text":
        kw = {"body": dict(body, version="0")}
    elif case == "value as number":
        kw = {"body": dict(body, value=3247)}
    elif case == "oversized":
        kw = {"body": dict(body, pad="0" * (MAX_BODY + 100))}
    elif case == "letters":
        kw = {"body": dict(body, value="032A7")}
    elif case == "too long":
        kw = {"body": dict(body, value="032470")}
    elif case == "nothing typed":
        kw = {"body": dict(body, value="")}
    elif case == "unknown action":
        kw = {"body": dict(body, action="approve")}
    elif case == "unknown id":
        path = "/api/field/999"
    elif case == "not a field route":
        path = f"/api/page/{info['pages'][0]}"
    before = snapshot(out)
    got, h, data = call(srv, "POST", path, **kw)
    assert got == status, data
    assert message in data["error"]
    assert h["x-content-type-options"] == "nosniff"
    assert snapshot(out) == before
    assert sum(srv.saved.values()) == 0


def test_a_very_large_body_is_refused_too(server):
    srv, out, info = server
    fid, _ = _valid(info)
    before = snapshot(out)
    status, _, data = call(srv, "POST", f"/api/field/{fid}", raw=b"{" + b" " * 200_000 + b"}",
                           headers={"Content-Type": "application/json"})
    assert status == 413 and snapshot(out) == before


def test_stale_save_gets_409_with_the_current_field(server):
    srv, out, info = server
    fid, body = _valid(info)
    conn = open_ledger(out, create=False)
    try:  # a second reviewer saves first, through the library
        queries.save_decision(conn, fid, action="correct", value="03249", version=0, reviewer="bob")
    finally:
        conn.close()
    before = snapshot(out)
    status, _, data = call(srv, "POST", f"/api/field/{fid}", body=body)
    assert status == 409 and "another reviewer" in data["error"]
    assert data["field"]["final_value"] == "03249" and data["field"]["version"] == 1
    assert snapshot(out) == before


def test_a_good_save_and_other_methods(server):
    srv, out, info = server
    fid, body = _valid(info)
    status, _, data = call(srv, "POST", f"/api/field/{fid}", body=body)
    assert status == 200 and data["field"]["final_status"] == "corrected" and data["field"]["version"] == 1
    assert data["warnings"] == []
    assert srv.saved == {"correct": 1}
    with open_ledger(out, create=False) as conn:
        assert conn.conn.execute("SELECT reviewer FROM reviews").fetchone()[0] == "ann"
    conn.close()
    status, _, data = call(srv, "PUT", f"/api/field/{fid}", body=body)
    assert status == 405
    assert call(srv, "GET", "/api/queue")[2]["saved"] == 1


def test_server_stops_cleanly(ledger):
    out, _ = ledger
    with running(out, reviewer="ann") as srv:
        port = srv.port
        assert call(srv, "GET", "/api/queue")[0] == 200
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", port), timeout=2).close()
    assert not [t for t in threading.enumerate() if t.name.startswith("formread-review")]


def test_server_binds_to_localhost_only(ledger):
    out, _ = ledger
    with running(out, reviewer="ann") as srv:
        assert srv.server_address[0] == "127.0.0.1" and srv.url.startswith(f"http://127.0.0.1:{srv.port}/?token=")


def test_cli_review_refuses_a_folder_without_ledger(tmp_path):
    res = CliRunner().invoke(app, ["review", str(tmp_path)])
    assert res.exit_code == 1
    assert "no ledger here" in res.output and len(res.output.strip().splitlines()) == 1


def test_cli_review_prints_the_address_and_stops_on_ctrl_c(ledger):
    out, _ = ledger
    proc = subprocess.Popen([sys.executable, "-c", "from formread.cli.main import main; main()", "review",
                             str(out), "--port", "0", "--reviewer", "cara"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        head = [proc.stdout.readline() for _ in range(2)]
        url = head[1].strip()
        assert url.startswith("http://127.0.0.1:") and "/?token=" in url and "cara" in head[0]
        port = int(url.split(":")[2].split("/")[0])
        token = url.split("token=")[1]
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
        conn.request("POST", "/api/field/4", body=json.dumps({"action": "confirm", "version": 0}),
                     headers={"Content-Type": "application/json", TOKEN_HEADER: token})
        assert conn.getresponse().status == 200
        conn.close()
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, stderr
    assert "Stopped. 1 decision saved in the ledger (confirm 1)." in stdout
