"""Hostile requests to the review page's server (formread.review.server), over real sockets.

Each case sends one request (or raw bytes) to a server on the reviewed fixture ledger and checks the
status, the words of its one-line error, that the server still answers afterwards, and that the
ledger is unchanged (every case here must be refused; concurrent saves are checked on their own).
"""

from __future__ import annotations

import http.client
import json
import re
import socket
import threading
from collections.abc import Callable
from dataclasses import dataclass

import pytest
from hostilekit import ledger_snapshot

from formread.review.server import TOKEN_HEADER, running

FIELD = 4          # a pending field of the review fixture (page 1, current_reading)


@dataclass(frozen=True)
class Req:
    """One request: ``method path`` with ``headers`` and ``body``; ``token``/``host`` add the right ones;
    ``raw`` (bytes, given the server) replaces the whole request."""

    method: str = "GET"
    path: str = "/api/queue"
    body: bytes | None = None
    headers: tuple = ()
    token: bool = True
    host: bool = True
    json_body: bool = False
    raw: Callable | None = None


def post(body, **kw):
    data = body if isinstance(body, bytes) else json.dumps(body).encode()
    return Req("POST", f"/api/field/{FIELD}", data, json_body=True, **kw)


GOOD = {"action": "correct", "value": "03247", "version": 0}


def send(srv, req: Req) -> tuple[int, bytes]:
    """(status, body) of ``req``; status 0 when the server closed the connection without an answer."""
    if req.raw is not None:
        with socket.create_connection(("127.0.0.1", srv.port), timeout=10) as s:
            s.sendall(req.raw(srv))
            s.shutdown(socket.SHUT_WR)
            data = b""
            while chunk := s.recv(65536):
                data += chunk
        if not data:
            return 0, b""
        if not data.startswith(b"HTTP/"):     # an HTTP/0.9-style answer: the error page without headers
            m = re.search(rb"Error code: (\d+)", data)
            return (int(m.group(1)) if m else -1), data
        return int(data.split(b" ", 2)[1]), data.split(b"\r\n\r\n", 1)[-1]
    h = {}
    if req.host:
        h["Host"] = f"127.0.0.1:{srv.port}"
    if req.token:
        h[TOKEN_HEADER] = srv.token
    if req.json_body:
        h["Content-Type"] = "application/json"
    h.update(dict(req.headers))
    conn = http.client.HTTPConnection("127.0.0.1", srv.port, timeout=10)
    try:
        conn.putrequest(req.method, req.path.replace("{token}", srv.token), skip_host=True,
                        skip_accept_encoding=True)
        for k, v in h.items():
            conn.putheader(k, v)
        if req.body is not None and "Content-Length" not in h:
            conn.putheader("Content-Length", str(len(req.body)))
        conn.endheaders(req.body)
        res = conn.getresponse()
        return res.status, res.read()
    finally:
        conn.close()


T = "?token={token}"
TRAVERSAL = ["../../../../etc/passwd", "..%2F..%2F..%2Fetc%2Fpasswd", "%2e%2e%2f%2e%2e%2fledger.sqlite",
             "....//....//etc/passwd", "%252e%252e%252f"]

CASES = [
    ("no-token", Req(token=False), 403, "session token"),
    ("wrong-token", Req(headers=((TOKEN_HEADER, "x" * 32),), token=False), 403, "session token"),
    ("token-in-query-for-api", Req(path="/api/queue" + T, token=False), 403, "session token"),
    ("page-without-token", Req(path="/", token=False), 403, "session token"),
    ("page-non-ascii-token", Req(path="/?token=%C3%A9%00", token=False), 403, "session token"),
    ("two-tokens", Req(path="/?token={token}&token={token}", token=False), 403, "session token"),
    ("get-on-write-route-method", Req("PUT", f"/api/field/{FIELD}"), 405, "not used"),
    ("delete-field", Req("DELETE", f"/api/field/{FIELD}"), 405, "not used"),
    ("post-on-read-route", Req("POST", "/api/queue", b"{}", json_body=True), 404, "nothing to post"),
    ("post-on-page-image", Req("POST", "/img/page/1", b"{}", json_body=True), 404, "nothing to post"),
    ("oversized-body", post(b"{" + b" " * 20_000 + b"}"), 413, "over"),
    ("content-length-huge", post(b"{}", headers=(("Content-Length", str(10 ** 30)),)), 413, "over"),
    ("content-length-negative", post(b"{}", headers=(("Content-Length", "-5"),)), 411, "Content-Length"),
    ("malformed-json", post(b"{'action': 'correct'"), 400, "not valid JSON"),
    ("non-utf8-body", post(b'{"action": "correct\xff"}'), 400, "not valid JSON"),
    ("deep-json-body", post(b"[" * 8000 + b"]" * 8000), 400, "not valid JSON"),
    ("version-1e30", post({**GOOD, "version": 10 ** 30}), 400, "version"),
    ("version-negative", post({**GOOD, "version": -1}), 400, "version"),
    ("version-float", post({**GOOD, "version": 0.0}), 400, "version"),
    ("version-bool", post({**GOOD, "version": False}), 400, "version"),
    ("action-as-list", post({**GOOD, "action": ["correct"]}), 400, "action"),
    ("letters-in-digits", post({**GOOD, "value": "03z47"}), 422, "digits only"),
    ("unicode-digits", post({**GOOD, "value": "０３２４７"}), 422, "digits"),
    ("value-400-digits", post({**GOOD, "value": "9" * 400}), 422, "at most"),
    ("value-with-newline", post({**GOOD, "value": "032\n47"}), 422, "digits"),
    ("unknown-field-id", Req(path="/api/field/999999"), 404, "no field"),
    ("unknown-field-post", Req("POST", "/api/field/999999", json.dumps(GOOD).encode(), json_body=True), 404,
     "no field"),
    ("huge-field-id", Req(path="/api/field/" + "9" * 40), 404, "nothing at"),
    ("unknown-page-image", Req(path="/img/page/424242" + T, token=False), 404, ""),
    ("cross-origin-post", post(GOOD, headers=(("Origin", "http://evil.example"),)), 403, "other sites"),
    ("null-origin-post", post(GOOD, headers=(("Origin", "null"),)), 403, "other sites"),
    ("foreign-host", Req(headers=(("Host", "evil.example"),), host=False), 403, "local address"),
    ("no-host", Req(host=False), 403, "local address"),
    ("rebinding-host", Req(headers=(("Host", "127.0.0.1.evil.example:80"),), host=False), 403, "local address"),
    ("form-post", post(GOOD, headers=(("Content-Type", "application/x-www-form-urlencoded"),)), 415, "JSON"),
    *[(f"traversal-static-{i}", Req(path=f"/static/{p}" + T, token=False), 404, "") for i, p in enumerate(TRAVERSAL)],
    *[(f"traversal-image-{i}", Req(path=f"/img/field/{p}" + T, token=False), 404, "") for i, p in enumerate(TRAVERSAL)],
    *[(f"traversal-api-{i}", Req(path=f"/api/page/{p}"), 404, "") for i, p in enumerate(TRAVERSAL[:3])],
    ("traversal-queue-name", Req(path="/api/queue?name=../../etc/passwd&reason=%2e%2e%2f"), 200, ""),
    ("garbage-request-line", Req(raw=lambda srv: b"\x16\x03\x01\x02\x00 garbage\r\n\r\n"), (0, 400), ""),
    ("http-9-9", Req(raw=lambda srv: b"GET / HTTP/9.9\r\nHost: 127.0.0.1\r\n\r\n"), (0, 505), ""),
    ("url-over-64k", Req(raw=lambda srv: b"GET /" + b"a" * 70_000 + b" HTTP/1.0\r\n\r\n"), (0, 414), ""),
    ("header-flood", Req(raw=lambda srv: b"GET / HTTP/1.0\r\n" + b"X: y\r\n" * 200 + b"\r\n"), (0, 403, 431), ""),
    ("empty-request", Req(raw=lambda srv: b""), (0,), ""),
]


def _alive(srv) -> None:
    status, body = send(srv, Req())
    assert status == 200 and b"ids" in body, (status, body[:200])


@pytest.mark.parametrize("name,req,status,words", [pytest.param(*c, id="server-" + c[0]) for c in CASES])
def test_case(world, name, req, status, words):
    before = ledger_snapshot(world.reviewed)
    with running(world.reviewed, reviewer="ann") as srv:
        got, body = send(srv, req)
        codes = status if isinstance(status, tuple) else (status,)
        assert got in codes, (name, got, body[:300])
        assert b"Traceback" not in body
        if words:
            err = json.loads(body)["error"]
            assert words in err and "\n" not in err, err
            assert str(world.reviewed) not in err                 # the page needs no file names
        if got == 200 and body[:1] == b"{":
            assert "ids" in json.loads(body) or "id" in json.loads(body)
        _alive(srv)
    assert ledger_snapshot(world.reviewed) == before


def test_server_concurrent_saves_one_wins(world):
    """Eight clients save the same field version at once: one save wins, the rest get 409, one audit row."""
    with running(world.reviewed, reviewer="ann") as srv:
        results = []

        def save(v):
            results.append(send(srv, post({**GOOD, "value": f"0324{v}"}))[0])

        threads = [threading.Thread(target=save, args=(i,)) for i in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=30)
        _alive(srv)
    assert sorted(results) == [200] + [409] * 7, results
    snap = ledger_snapshot(world.reviewed)
    assert len([r for r in snap["reviews"] if r.startswith(f"(1, {FIELD},") or f", {FIELD}, " in r]) >= 1
    assert len(snap["reviews"]) == 1
