"""``loam review OUT``: a local page for listening to the queued clips and recording decisions.

The server (the standard library's ``http.server``) listens on 127.0.0.1 only. Every
URL starts with a random token printed once, on the first line of output; a request
without it is refused (403), as is one whose ``Host`` is not this server (a web page
rebinding a name to 127.0.0.1), whose ``Origin`` is another site, or that a browser marks
as sent from another site (``Sec-Fetch-Site``). It serves the page, the queue as JSON,
and only the clip files and pictures of clips the manifests name (an allow-list made at
start; no part of a request path reaches the file system), and writes only the decisions
file (beside the split ledger, never in RAW) and pictures under ``OUT/review/pictures``.
"""

from __future__ import annotations

import hmac
import json
import secrets
import threading
from collections.abc import Callable
from datetime import datetime, timezone
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any
from urllib.parse import unquote, urlsplit

from pipeline.commands.review_page import CSS, HTML, JS
from pipeline.commands.review_pictures import PICTURES, picture
from pipeline.commands.review_queue import Queue
from pipeline.core.errors import ParameterError
from pipeline.stages.decisions import append_decision, effective, read_decisions
from pipeline.stages.review_text import phones_problem

_MAX_BODY = 64 * 1024
_STATIC = {"": (HTML, "text/html; charset=utf-8"), "app.js": (JS, "text/javascript; charset=utf-8"),
           "app.css": (CSS, "text/css; charset=utf-8")}
_HEADERS = {
    "Content-Security-Policy": ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
                                "media-src 'self'; connect-src 'self'; form-action 'none'; frame-ancestors 'none'; "
                                "base-uri 'none'"),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",  # the token is in the URL
    "Cache-Control": "no-store",
    "Cross-Origin-Resource-Policy": "same-origin",
}
# The fields a posted decision may set; hashes, paths and language come from the queue.
_POSTED = ("decision", "clip_id", "transcript", "reason", "note", "word", "phones")


class ReviewState:
    """What the handler needs: the queue, OUT, the decisions file, the token and the port."""

    def __init__(self, queue: Queue, *, out: Path, decisions: Path, token: str,
                 backend_of: Callable[[str], str] = lambda language: "") -> None:
        self.queue = queue
        # The pronunciation backend of a language, to check reviewed phones.
        self.backend_of = backend_of
        self.items = {it["clip_id"]: it for it in queue.items}
        self.out = out
        self.decisions = decisions
        self.token = token
        self.port = 0
        self.lock = threading.Lock()

    def decided(self) -> dict[str, str]:
        """clip_id -> the decision in force for it (its verdict, else ``pronunciation``)."""
        verdicts, words, _ = effective(read_decisions(self.decisions)[0])
        found = {d.clip_id: "pronunciation" for d in words.values() if d.clip_id}
        found.update({cid: d.decision for cid, d in verdicts.items()})
        return found

    def record(self, posted: dict[str, Any]) -> None:
        """Append one decision from the page, its clip's hashes and names taken from the queue."""
        item = self.items.get(posted.get("clip_id"))  # type: ignore[arg-type]
        if item is None:
            raise ParameterError(f"clip_id {str(posted.get('clip_id'))[:80]!r} is not in the review queue")
        record = {k: posted[k] for k in _POSTED if k in posted}
        record.update(source_sha256=item["source_sha256"], audio_sha256=item["audio_sha256"],
                      source_path=item["source_path"], at=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"))
        if record.get("decision") == "pronunciation":
            record["language"] = item["language"]
            if record.get("word") not in {o["word"] for o in item["oov"]}:
                raise ParameterError(f"word {str(record.get('word'))[:80]!r} is not an out-of-vocabulary word of "
                                     f"clip {item['clip_id']}")
            phones = record.get("phones")
            if isinstance(phones, list) and all(isinstance(p, str) for p in phones):
                problem = phones_problem(phones, backend=self.backend_of(item["language"]))
                if problem:
                    raise ParameterError(f"pronunciation of {record['word']!r}: {problem}")
        if record.get("decision") == "fix_transcript" and not item["whole_file"]:
            raise ParameterError(f"clip {item['clip_id']} is a segment of a long recording; transcripts belong "
                                 "to whole files")
        with self.lock:
            append_decision(self.decisions, record)


class Handler(BaseHTTPRequestHandler):
    server_version = "loam-review"
    sys_version = ""
    state: ReviewState

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - the base class's name
        pass  # requests carry the token: keep them out of the terminal

    def _send(self, status: int, body: bytes, content_type: str, extra: dict[str, str] | None = None) -> None:
        self.send_response(status)
        for key, value in {**_HEADERS, "Content-Type": content_type, "Content-Length": str(len(body)),
                           **(extra or {})}.items():
            self.send_header(key, value)
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _json(self, status: int, data: Any) -> None:
        self._send(status, json.dumps(data, ensure_ascii=False).encode("utf-8"), "application/json; charset=utf-8")

    def _refuse(self, status: int, why: str) -> None:
        self._json(status, {"error": why})

    def _route(self) -> str | None:
        """The path after the token, or None when the request is refused (already answered)."""
        host = self.headers.get("Host", "")
        allowed = {f"127.0.0.1:{self.state.port}", f"localhost:{self.state.port}"}
        if host not in allowed:
            self._refuse(HTTPStatus.FORBIDDEN, "unexpected Host")
            return None
        origin = self.headers.get("Origin")
        if origin is not None and origin != f"http://{host}":
            self._refuse(HTTPStatus.FORBIDDEN, "cross-origin request")
            return None
        if self.headers.get("Sec-Fetch-Site", "none") not in ("same-origin", "none"):
            self._refuse(HTTPStatus.FORBIDDEN, "cross-site request")
            return None
        parts = urlsplit(self.path).path.split("/", 2)
        if len(parts) < 3 or not hmac.compare_digest(parts[1].encode(), self.state.token.encode()):
            self._refuse(HTTPStatus.FORBIDDEN, "missing or wrong token")
            return None
        return unquote(parts[2])

    def do_GET(self) -> None:  # noqa: N802 - http.server's name
        rest = self._route()
        if rest is None:
            return
        if rest in _STATIC:
            body, kind = _STATIC[rest]
            self._send(HTTPStatus.OK, body.encode("utf-8"), kind)
        elif rest == "api/queue":
            self._json(HTTPStatus.OK, {"items": self.state.queue.items, "decided": self.state.decided()})
        elif rest.startswith("audio/") and rest[6:] in self.state.queue.audio:
            self._file(self.state.queue.audio[rest[6:]])
        elif rest.startswith("picture/") and rest[8:] in self.state.items:
            self._picture(rest[8:])
        else:
            self._refuse(HTTPStatus.NOT_FOUND, "not found")

    do_HEAD = do_GET  # noqa: N815

    def _picture(self, clip_id: str) -> None:
        item = self.state.items[clip_id]
        try:
            path = picture(self.state.queue.audio[clip_id], self.state.out / PICTURES,
                           name=f"{clip_id}-{item['audio_sha256'][:12]}")
        except (OSError, RuntimeError, ValueError) as exc:
            self._refuse(HTTPStatus.INTERNAL_SERVER_ERROR, f"no picture: {type(exc).__name__}")
            return
        self._send(HTTPStatus.OK, path.read_bytes(), "image/png")

    def _file(self, path: Path) -> None:
        """A clip, whole or the one byte range asked for (media elements seek with ranges)."""
        kind = "audio/flac" if path.suffix == ".flac" else "audio/wav"
        try:
            data = path.read_bytes()
        except OSError:
            self._refuse(HTTPStatus.NOT_FOUND, "clip file missing")
            return
        wanted = self.headers.get("Range", "")
        if wanted.startswith("bytes=") and "," not in wanted:
            first, _, last = wanted[6:].partition("-")
            try:
                start = int(first) if first else max(0, len(data) - int(last))
                end = min(int(last), len(data) - 1) if first and last else len(data) - 1
            except ValueError:
                start, end = 0, -1
            if 0 <= start <= end:
                self._send(HTTPStatus.PARTIAL_CONTENT, data[start:end + 1], kind,
                           {"Content-Range": f"bytes {start}-{end}/{len(data)}", "Accept-Ranges": "bytes"})
                return
        self._send(HTTPStatus.OK, data, kind, {"Accept-Ranges": "bytes"})

    def do_POST(self) -> None:  # noqa: N802 - http.server's name
        rest = self._route()
        if rest is None:
            return
        if rest != "api/decide":
            self._refuse(HTTPStatus.NOT_FOUND, "not found")
            return
        if self.headers.get("Origin") is None:
            self._refuse(HTTPStatus.FORBIDDEN, "a decision must come from the review page (no Origin)")
            return
        if self.headers.get("Content-Type", "").split(";")[0].strip() != "application/json":
            self._refuse(HTTPStatus.UNSUPPORTED_MEDIA_TYPE, "expected application/json")
            return
        length = int(self.headers.get("Content-Length") or 0)
        if not 0 < length <= _MAX_BODY:
            self._refuse(HTTPStatus.REQUEST_ENTITY_TOO_LARGE, f"expected a body of 1 to {_MAX_BODY} bytes")
            return
        try:
            posted = json.loads(self.rfile.read(length))
            if not isinstance(posted, dict):
                raise ValueError("not an object")
            self.state.record(posted)
        except (ValueError, ParameterError) as exc:
            self._refuse(HTTPStatus.BAD_REQUEST, str(exc))
            return
        self._json(HTTPStatus.OK, {"ok": True, "decided": self.state.decided()})


def make_server(state: ReviewState, *, port: int) -> ThreadingHTTPServer:
    """A server bound to 127.0.0.1 (``port`` 0 picks a free port) answering with ``state``."""
    handler = type("ReviewHandler", (Handler,), {"state": state})
    server = ThreadingHTTPServer(("127.0.0.1", port), handler)
    server.daemon_threads = True
    state.port = server.server_address[1]
    return server


def new_token() -> str:
    """A random URL-safe token (192 bits)."""
    return secrets.token_urlsafe(24)
