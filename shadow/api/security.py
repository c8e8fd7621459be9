"""Guards of the read-only API: method allow-list, bearer tokens, request size and rate limits.

Read-only by construction: :class:`ReadOnlyGuard` answers every method but GET and HEAD with 405
before any route runs, so no route can ever change anything even by mistake. HEAD is served as GET
without a body.

Tokens: the service stores only SHA-256 digests of its bearer tokens (``sha256:<hex>``), compared in
constant time; a token found in a log line would still have to be guessed from its digest, and the
log never holds one (the ``Authorization`` header is never logged).

What needs a token, when tokens are configured: every data route (``/api/v1/...``, ``/metrics``, the
OpenAPI document). What does not: the liveness probe, and the dashboard's page shells and static assets
(:data:`OPEN_PATHS`, :data:`OPEN_PREFIXES`). Those carry nothing from the store in that mode
(:mod:`shadow.api.pages` renders them from the URL alone), so a person without a token sees only the
sign-in form the dashboard script draws.

How the dashboard signs in (the choice, and why): the person pastes a token into a field the page's own
script draws; the script keeps it in the tab's ``sessionStorage`` and sends it as ``Authorization: Bearer``
on its own ``fetch`` calls to the data routes. Nothing else changes on the server:

* the guard still answers every method but GET and HEAD with 405 - there is no sign-in route to POST to,
  no session to create, nothing stored on the server;
* no cookie: the browser never attaches the token to a request by itself, so another site cannot make the
  browser send an authenticated request (no CSRF surface), and a sign-out is just forgetting it;
* the token never enters a URL (no ``?token=``), so it cannot end up in an access log, the browser
  history or a ``Referer``; the input has no ``name`` and form submission is forbidden by the pages'
  Content-Security-Policy (``form-action 'none'``), so even a failed script cannot put it into one;
* ``sessionStorage`` lives as long as the tab and is not shared with other tabs or written for later
  sessions as ``localStorage`` is; a script injected into the page could read it, which the pages'
  policy (``script-src 'self'``, no inline script) and the text-only DOM updates of ``dashboard.js`` keep out.

Rejected: HTTP Basic (the browser caches and re-sends the credentials on its own, with no sign-out),
a token in the query string (logged everywhere), a cookie set by a sign-in route (needs a non-GET route
or a token in a URL, and brings CSRF back). Off loopback, put TLS in front of the API: a bearer token
travels in clear over plain HTTP (deploy/).
"""

from __future__ import annotations

import hashlib
import hmac
import json
import time
from collections.abc import Awaitable, Callable, Iterable, MutableMapping
from dataclasses import dataclass, field
from typing import Any

from shadow.errors import ConfigurationError

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

ALLOWED_METHODS = ("GET", "HEAD")
OPEN_PATHS = ("/health/live", "/")  # the liveness probe and the overview page's shell need no token
OPEN_PREFIXES = ("/static/", "/robot/", "/event/")  # dashboard assets and page shells (nothing from the store)


def is_open_path(path: str) -> bool:
    """True for the paths served without a token: :data:`OPEN_PATHS`, or under :data:`OPEN_PREFIXES`.

    A path with an empty, ``.`` or ``..`` segment is never open, whatever it starts with.

    >>> is_open_path("/static/dashboard.js"), is_open_path("/api/v1/robots"), is_open_path("/static/../api/v1/robots")
    (True, False, False)
    """
    if path in OPEN_PATHS:
        return True
    if not path.startswith(OPEN_PREFIXES):
        return False
    return all(segment not in ("", ".", "..") for segment in path[1:].split("/"))


def token_digest(token: str) -> str:
    """The stored form of a bearer token.

    >>> token_digest("abc")
    'sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad'
    """
    return "sha256:" + hashlib.sha256(token.encode()).hexdigest()


def check_digests(digests: Iterable[str]) -> tuple[str, ...]:
    out = tuple(digests)
    for d in out:
        if not d.startswith("sha256:") or len(d) != 71:
            raise ConfigurationError(
                "api.token_digests: each entry must be 'sha256:<64 hex digits>' (see token_digest)"
            )
    return out


@dataclass
class GuardSettings:
    token_digests: tuple[str, ...] = ()  # empty: no token needed (loopback only, see shadow serve)
    max_url_bytes: int = 4096
    max_body_bytes: int = 0  # read-only: no request carries a body
    rate_per_s: float = 50.0  # token bucket per client address
    burst: int = 200
    _buckets: dict[str, tuple[float, float]] = field(default_factory=dict, repr=False)


async def _json_error(send: Send, status: int, code: str, detail: str, headers: list[tuple[bytes, bytes]]) -> None:
    body = json.dumps({"error": code, "detail": detail}).encode()
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()), *headers],
        }
    )
    await send({"type": "http.response.body", "body": body})


class ReadOnlyGuard:
    """ASGI middleware in front of the whole application."""

    def __init__(self, app: ASGIApp, settings: GuardSettings) -> None:
        self.app = app
        self.settings = settings

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        s = self.settings
        method = scope["method"]
        if method not in ALLOWED_METHODS:
            await _json_error(send, 405, "read_only", f"{method} is refused: this API is read-only (GET, HEAD)",
                              [(b"allow", b"GET, HEAD")])  # fmt: skip
            return
        url_size = len(scope.get("raw_path", b"")) + len(scope.get("query_string", b""))
        if url_size > s.max_url_bytes:
            await _json_error(
                send, 414, "url_too_long", f"request URL of {url_size} bytes, limit {s.max_url_bytes}", []
            )
            return
        headers = dict(scope.get("headers", []))
        length = int(headers.get(b"content-length", b"0") or 0)
        if length > s.max_body_bytes:
            await _json_error(send, 413, "body_too_large", "requests to this API carry no body", [])
            return
        if s.token_digests and not is_open_path(str(scope.get("path", ""))):
            auth = headers.get(b"authorization", b"").decode("latin-1")
            token = auth[7:] if auth.lower().startswith("bearer ") else ""
            digest = token_digest(token)
            if not token or not any(hmac.compare_digest(digest, d) for d in s.token_digests):
                await _json_error(send, 401, "unauthorized", "a valid bearer token is required",
                                  [(b"www-authenticate", b'Bearer realm="shadow"')])  # fmt: skip
                return
        client = (scope.get("client") or ("?", 0))[0]
        if not self._take(client):
            await _json_error(send, 429, "rate_limited", f"more than {s.rate_per_s:g} requests/s from {client}",
                              [(b"retry-after", b"1")])  # fmt: skip
            return
        if method == "HEAD":
            scope = dict(scope, method="GET")

            async def send_headers_only(message: Message) -> None:
                if message["type"] == "http.response.body":
                    message = {"type": "http.response.body", "body": b"", "more_body": message.get("more_body", False)}
                await send(message)

            await self.app(scope, receive, send_headers_only)
            return
        await self.app(scope, receive, send)

    def _take(self, client: str) -> bool:
        """Token bucket: ``rate_per_s`` refill, ``burst`` capacity."""
        s = self.settings
        now = time.monotonic()
        level, last = s._buckets.get(client, (float(s.burst), now))
        level = min(float(s.burst), level + (now - last) * s.rate_per_s)
        if level < 1.0:
            s._buckets[client] = (level, now)
            return False
        s._buckets[client] = (level - 1.0, now)
        return True
