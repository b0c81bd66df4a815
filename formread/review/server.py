"""The clerk's review page: a small local web server on 127.0.0.1 (standard library only).

Safety, in the order a request meets it:

* bound to 127.0.0.1 only; requests naming another Host are refused (DNS rebinding);
* every request carries the session token printed at start: in the query for the page, its
  static files and images (``?token=``), in the ``X-Formread-Token`` header for API calls;
  compared with :func:`hmac.compare_digest`;
* writes are ``POST`` with ``Content-Type: application/json`` and the token header, so no
  cross-site form can write; a foreign ``Origin`` is refused; bodies over 16 KiB get 413;
* images are found by ledger id only (no paths from the request) and must resolve inside OUTDIR;
* saves are guarded by the field's version (409 when another clerk saved it first);
* every response sends ``nosniff``, a self-only Content-Security-Policy (no inline script),
  ``Cache-Control: no-store`` and ``Referrer-Policy: no-referrer``.

A refused request writes nothing.
"""

from __future__ import annotations

import hmac
import json
import logging
import re
import secrets
import sqlite3
import threading
from collections import Counter
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from pathlib import Path
from urllib.parse import parse_qs, urlsplit

from ..errors import LedgerError
from ..ledger.store import ledger_path, open_ledger
from . import queries
from .queries import InvalidValue, StaleSave, UnknownItem

__all__ = ["HOST", "MAX_BODY", "TOKEN_HEADER", "ReviewServer", "running"]

log = logging.getLogger(__name__)

HOST = "127.0.0.1"
MAX_BODY = 16 * 1024
"""Largest request body accepted (bytes); larger ones get 413."""
TOKEN_HEADER = "X-Formread-Token"
_DRAIN_LIMIT = 1024 * 1024  # read and drop an oversized body up to this size so the client sees the 413

SECURITY_HEADERS = {
    "X-Content-Type-Options": "nosniff",
    "Content-Security-Policy": ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
                                "connect-src 'self'; base-uri 'none'; form-action 'none'; "
                                "frame-ancestors 'none'"),
    "Cache-Control": "no-store",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cross-Origin-Resource-Policy": "same-origin",
}

_STATIC = {"review.js": "text/javascript; charset=utf-8", "review.css": "text/css; charset=utf-8",
           "icon.svg": "image/svg+xml"}
_IMAGE_TYPES = {".png": "image/png", ".jpg": "image/jpeg"}
"""Stored images the page serves: field crops (PNG) and page views (JPEG; PNG in older ledgers)."""
_ROUTE_ID = re.compile(r"/(api/field|api/page|img/field|img/page)/([0-9]{1,12})\Z")


def _static_bytes(name: str) -> bytes:
    return resources.files("formread.review").joinpath("static").joinpath(name).read_bytes()


class _Refused(Exception):
    """A request refused with an HTTP status and a one-line message."""

    def __init__(self, status: int, message: str, extra: dict | None = None):
        super().__init__(message)
        self.status, self.message, self.extra = status, message, extra or {}


class ReviewServer(ThreadingHTTPServer):
    """The review page's server for the ledger in ``outdir``, on 127.0.0.1.

    ``port`` 0 picks a free port.  ``token`` defaults to a fresh random one.  ``saved`` counts the
    decisions saved through this server by action (``confirm``, ``correct``, ...).

    Raises
    ------
    LedgerError
        When ``outdir`` holds no usable ledger (checked before the port is opened).
    """

    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, outdir: str | Path, *, reviewer: str, port: int = 0, token: str | None = None):
        open_ledger(outdir, create=False).close()
        self.outdir = Path(outdir).resolve()
        self.reviewer = reviewer
        self.token = token or secrets.token_urlsafe(24)
        self.saved: Counter = Counter()
        self._lock = threading.Lock()
        self._page = _static_bytes("page.html").decode("utf-8").replace("{{TOKEN}}", self.token).encode("utf-8")
        super().__init__((HOST, port), _Handler)

    @property
    def port(self) -> int:
        return self.server_address[1]

    @property
    def url(self) -> str:
        """The address to open, with the session token."""
        return f"http://{HOST}:{self.port}/?token={self.token}"

    def handle_error(self, request, client_address) -> None:
        """A bug in a handler: log it (library code never prints), keep serving."""
        log.exception("review server: request from %s failed", client_address[0])

    def count_saved(self, action: str) -> None:
        with self._lock:
            self.saved[action] += 1


class running:
    """Context manager: a :class:`ReviewServer` serving in a background thread, always stopped.

    ``with running(outdir, reviewer="ann") as server: ... server.url ...``
    """

    def __init__(self, outdir: str | Path, *, reviewer: str, port: int = 0, token: str | None = None):
        self.server = ReviewServer(outdir, reviewer=reviewer, port=port, token=token)
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.1},
                                       name=f"formread-review-{self.server.port}", daemon=True)

    def __enter__(self) -> ReviewServer:
        self.thread.start()
        return self.server

    def __exit__(self, *exc) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=10)


class _Handler(BaseHTTPRequestHandler):
    server: ReviewServer
    server_version = "formread-review"
    sys_version = ""
    protocol_version = "HTTP/1.0"
    timeout = 30  # seconds; an idle connection (a browser's spare socket) does not hold a thread forever

    # ------------------------------------------------------------------ plumbing

    def log_request(self, code="-", size="-") -> None:
        # never log the query string: it holds the session token; a garbage request line leaves
        # command and path unset (the standard library answers it with 400, 414 or 505 itself)
        path = getattr(self, "path", None)
        log.info("%s %s -> %s", getattr(self, "command", None) or "-",
                 urlsplit(path).path[:200] if isinstance(path, str) else "-", code)

    def log_message(self, format, *args) -> None:  # noqa: A002 - BaseHTTPRequestHandler's name
        log.debug("review server: " + format, *args)

    def _send(self, status: int, body: bytes, ctype: str) -> None:
        self.send_response(status)
        for k, v in SECURITY_HEADERS.items():
            self.send_header(k, v)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _json(self, status: int, obj: dict) -> None:
        self._send(status, json.dumps(obj).encode("utf-8"), "application/json; charset=utf-8")

    def _refuse(self, r: _Refused) -> None:
        self._json(r.status, {"error": r.message, **r.extra})

    def _check_host(self) -> None:
        host = (self.headers.get("Host") or "").strip().lower()
        if host not in (f"{HOST}:{self.server.port}", f"localhost:{self.server.port}"):
            raise _Refused(HTTPStatus.FORBIDDEN, "this server answers only to its own local address")

    def _check_token(self, given: str | None) -> None:
        if not given or not hmac.compare_digest(given.encode("utf-8", "replace"),
                                                self.server.token.encode("utf-8")):
            raise _Refused(HTTPStatus.FORBIDDEN,
                           "missing or wrong session token: open the address printed by `formread review`")

    def _query_token(self, query: dict) -> None:
        vals = query.get("token", [])
        self._check_token(vals[0] if len(vals) == 1 else None)

    def _header_token(self) -> None:
        self._check_token(self.headers.get(TOKEN_HEADER))

    def _dispatch(self, method) -> None:
        try:
            try:
                method()
            except UnknownItem as e:
                raise _Refused(HTTPStatus.NOT_FOUND, self._short(e)) from None
            except sqlite3.OperationalError as e:
                log.warning("ledger busy: %s", e)
                raise _Refused(HTTPStatus.SERVICE_UNAVAILABLE, f"the ledger is busy ({e}); try again") from None
            except LedgerError as e:
                raise _Refused(HTTPStatus.SERVICE_UNAVAILABLE, str(e)) from None
            except (OSError, ValueError) as e:  # e.g. an image file vanished while being read
                log.exception("review server: %s %s failed", self.command, urlsplit(self.path).path)
                raise _Refused(HTTPStatus.INTERNAL_SERVER_ERROR, f"the request failed: {e}") from None
        except _Refused as r:
            self._refuse(r)

    def _short(self, e: Exception) -> str:
        """The message without the ledger's path (the page needs no file names)."""
        prefix = f"{ledger_path(self.server.outdir)}: "
        msg = str(e)
        return msg[len(prefix):] if msg.startswith(prefix) else msg

    def do_GET(self) -> None:  # noqa: N802 - http.server's name
        self._dispatch(self._get)

    def do_HEAD(self) -> None:  # noqa: N802
        self._dispatch(self._get)

    def do_POST(self) -> None:  # noqa: N802
        self._dispatch(self._post)

    def _not_allowed(self) -> None:
        self._dispatch(self._refuse_method)

    def _refuse_method(self) -> None:
        self._check_host()
        raise _Refused(HTTPStatus.METHOD_NOT_ALLOWED, f"{self.command} is not used here")

    do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _not_allowed

    # ------------------------------------------------------------------ GET

    def _get(self) -> None:
        self._check_host()
        parts = urlsplit(self.path)
        path, query = parts.path, parse_qs(parts.query, keep_blank_values=True)
        if path.startswith("/api/"):
            self._header_token()
        else:
            self._query_token(query)
        if path in ("/", "/index.html"):
            return self._send(HTTPStatus.OK, self.server._page, "text/html; charset=utf-8")
        if path.startswith("/static/"):
            name = path[len("/static/"):]
            if name not in _STATIC:
                raise _Refused(HTTPStatus.NOT_FOUND, "no such file")
            return self._send(HTTPStatus.OK, _static_bytes(name), _STATIC[name])
        if path == "/api/queue":
            want_name = (query.get("name") or [""])[0] or None
            reason = (query.get("reason") or [""])[0] or None
            return self._with_ledger(lambda led: self._json(HTTPStatus.OK, {
                "ids": queries.list_pending(led, name=want_name, reason=reason),
                "filters": queries.pending_filters(led),
                "reviewer": self.server.reviewer,
                "outdir": str(self.server.outdir),
                "saved": sum(self.server.saved.values()),
            }))
        m = _ROUTE_ID.match(path)
        if not m:
            raise _Refused(HTTPStatus.NOT_FOUND, f"nothing at {path}")
        kind, item = m.group(1), int(m.group(2))
        if kind == "api/field":
            return self._with_ledger(lambda led: self._json(HTTPStatus.OK, queries.field_detail(led, item)))
        if kind == "api/page":
            return self._with_ledger(lambda led: self._json(HTTPStatus.OK, queries.page_detail(led, item)))
        file = self._with_ledger(lambda led: queries.image_file(led, kind.split("/")[1], item))
        kind_of = _IMAGE_TYPES.get(file.suffix.lower())
        if kind_of is None:
            raise _Refused(HTTPStatus.NOT_FOUND, "no image for this id")
        return self._send(HTTPStatus.OK, file.read_bytes(), kind_of)

    def _with_ledger(self, fn):
        with open_ledger(self.server.outdir, create=False) as led:
            return fn(led)

    # ------------------------------------------------------------------ POST

    def _read_body(self) -> bytes:
        """The request body (read first, so a refusal never leaves unread bytes on the socket)."""
        length = self.headers.get("Content-Length")
        if length is None or not length.isdigit():
            raise _Refused(HTTPStatus.LENGTH_REQUIRED, "a Content-Length header is needed")
        n = int(length)
        if n > MAX_BODY:
            if n <= _DRAIN_LIMIT:
                self.rfile.read(n)
            raise _Refused(HTTPStatus.REQUEST_ENTITY_TOO_LARGE, f"request body over {MAX_BODY} bytes")
        return self.rfile.read(n)

    def _parse_json(self, body: bytes) -> dict:
        ctype = (self.headers.get("Content-Type") or "").split(";")[0].strip().lower()
        if ctype != "application/json":
            raise _Refused(HTTPStatus.UNSUPPORTED_MEDIA_TYPE, "send JSON with Content-Type: application/json")
        try:
            data = json.loads(body.decode("utf-8"))
        except (UnicodeDecodeError, ValueError, RecursionError):
            raise _Refused(HTTPStatus.BAD_REQUEST, "the body is not valid JSON") from None
        if not isinstance(data, dict):
            raise _Refused(HTTPStatus.BAD_REQUEST, "the body must be a JSON object")
        return data

    def _post(self) -> None:
        body = self._read_body()
        self._check_host()
        path = urlsplit(self.path).path
        origin = self.headers.get("Origin")
        if origin is not None and origin.rstrip("/") not in (f"http://{HOST}:{self.server.port}",
                                                              f"http://localhost:{self.server.port}"):
            raise _Refused(HTTPStatus.FORBIDDEN, "requests from other sites are refused")
        self._header_token()
        m = _ROUTE_ID.match(path)
        if not m or m.group(1) != "api/field":
            raise _Refused(HTTPStatus.NOT_FOUND, f"nothing to post at {path}")
        field_id = int(m.group(2))
        data = self._parse_json(body)
        action, value, version = data.get("action"), data.get("value"), data.get("version")
        if not isinstance(action, str):
            raise _Refused(HTTPStatus.BAD_REQUEST, "'action' must be a string")
        if isinstance(version, bool) or not isinstance(version, int) or not 0 <= version < 2 ** 62:
            raise _Refused(HTTPStatus.BAD_REQUEST, "'version' must be the integer version shown")
        if value is not None and not isinstance(value, str):
            raise _Refused(HTTPStatus.BAD_REQUEST, "'value' must be a string")
        with open_ledger(self.server.outdir, create=False) as led:
            try:
                detail = queries.save_decision(led, field_id, action=action, value=value, version=version,
                                               reviewer=self.server.reviewer)
                warnings = queries.value_warnings(led, field_id)
            except InvalidValue as e:
                raise _Refused(HTTPStatus.UNPROCESSABLE_ENTITY, e.short) from None
            except StaleSave:
                current = queries.field_detail(led, field_id)
                raise _Refused(HTTPStatus.CONFLICT, "another reviewer saved this field after it was shown; "
                                                    "it has been reloaded", {"field": current}) from None
        self.server.count_saved(detail["last_review"]["action"] if detail["last_review"] else action)
        self._json(HTTPStatus.OK, {"field": detail, "warnings": warnings})
