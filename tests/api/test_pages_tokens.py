"""The dashboard when the API requires bearer tokens: open shells and assets, closed data, nothing leaked.

The browser half (a token typed into the sign-in field, the data shown) is in ``test_pages_browser.py``.
"""

from __future__ import annotations

import asyncio
import logging
import re
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from shadow.api.app import create_app
from shadow.api.pages import STATIC_FILES
from shadow.api.schemas import ADVISORY_NOTICE
from shadow.api.security import GuardSettings, is_open_path, token_digest
from shadow.store.repository import SqlStore
from tests.api.test_pages import DELTA, HEXA, fill_scene

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

TOKEN = "plant7-maintenance-4f9c2e"  # an invented token; only its digest goes into the guard
BEARER = {"Authorization": f"Bearer {TOKEN}"}


@pytest.fixture
def store(tmp_path: Path, rng: np.random.Generator) -> SqlStore:
    s = SqlStore(f"sqlite:///{tmp_path / 'pages.db'}")
    fill_scene(s, time.time(), rng)
    return s


@pytest.fixture
def guarded(store: SqlStore) -> Any:
    return create_app(store, guard=GuardSettings(token_digests=(token_digest(TOKEN),)))


@pytest.fixture
def client(guarded: Any) -> TestClient:
    return TestClient(guarded)


def event_id(store: SqlStore) -> int:
    return int(store.events(robot_id=DELTA, kind="collision")[0]["event_id"])


def data_urls(store: SqlStore) -> list[str]:
    """Every data route the dashboard script reads, plus the other token-only routes."""
    base = f"/api/v1/robots/{DELTA}"
    return [
        "/api/v1/robots",
        f"{base}/health",
        f"{base}/estimates?every=12&limit=10000&offset=0",
        f"{base}/residuals?every=12&limit=10000&offset=0",
        f"{base}/unmonitored",
        f"/api/v1/events?robot_id={DELTA}&limit=1000",
        f"/api/v1/events/{event_id(store)}",
        "/api/v1/status",
        "/metrics",
        "/openapi.json",
        "/docs",
    ]


def test_static_assets_and_page_shells_load_without_a_token(client: TestClient, store: SqlStore) -> None:
    for name, media_type in STATIC_FILES.items():
        r = client.get(f"/static/{name}")
        assert r.status_code == 200 and r.headers["content-type"] == media_type, name
    for url in ("/", f"/robot/{DELTA}", f"/robot/{HEXA}", f"/event/{event_id(store)}"):
        r = client.get(url)
        assert r.status_code == 200, url
        assert ADVISORY_NOTICE in r.text and '<script src="/static/dashboard.js" defer></script>' in r.text, url
        assert "form-action 'none'" in r.headers["content-security-policy"], url  # a form can never submit


def test_data_routes_refuse_without_the_token_and_answer_with_it(client: TestClient, store: SqlStore) -> None:
    for url in data_urls(store):
        for headers in ({}, {"Authorization": "Bearer not-the-token"}, {"Authorization": TOKEN}):
            r = client.get(url, headers=headers)
            assert r.status_code == 401, (url, headers)
            assert r.json()["error"] == "unauthorized" and r.headers["www-authenticate"] == 'Bearer realm="shadow"'
        r = client.get(url, headers=BEARER)
        assert r.status_code == 200, (url, r.text[:200])
    assert client.get("/api/v1/robots", headers=BEARER).json()["robots"][0]["robot_id"] in (DELTA, HEXA)
    assert client.post("/api/v1/robots", headers=BEARER).status_code == 405  # still read-only with a token


def test_page_shells_tell_nothing_from_the_store(client: TestClient, store: SqlStore, guarded: Any) -> None:
    # an unknown robot's or event's shell is the known one's with the address swapped: existence does not show
    known = client.get(f"/robot/{DELTA}").text
    unknown = client.get("/robot/riverside/cell-2/nobody")
    assert unknown.status_code == 200 and unknown.text.replace("nobody", "delta-a") == known
    eid = event_id(store)
    event = client.get(f"/event/{eid}").text
    missing = client.get("/event/99999")
    assert missing.status_code == 200 and missing.text.replace("99999", str(eid)) == event
    assert "collision" not in event and "delta-a" not in event  # kind and robot come from the API, with a token
    for url in ("/", f"/robot/{DELTA}", f"/event/{eid}"):
        text = client.get(url).text
        assert "unexpected contact" not in text and "hexa-b" not in text, url
    # the same store without tokens (loopback): shells read it, an unknown robot answers a 404 page
    open_client = TestClient(create_app(store))  # type: ignore[arg-type]
    assert open_client.get("/robot/riverside/cell-2/nobody").status_code == 404
    assert "collision on riverside/cell-2/delta-a" in open_client.get(f"/event/{eid}").text


def raw_status(app: Any, path: str) -> int:
    """Status of a request whose path reaches the application exactly as written (no client normalises it)."""
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": b"", "more_body": False}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "GET", "scheme": "http",
             "path": path, "raw_path": path.encode(), "query_string": b"", "root_path": "", "headers": [],
             "client": ("127.0.0.1", 50000), "server": ("127.0.0.1", 8470)}  # fmt: skip
    asyncio.run(app(scope, receive, send))
    return int(next(m for m in sent if m["type"] == "http.response.start")["status"])


def test_open_prefixes_do_not_open_anything_else(guarded: Any) -> None:
    for path in ("/static/../api/v1/robots", "/robot/../api/v1/robots", "/event/..", "/static//api/v1/robots",
                 "/robot/./../metrics", "/staticx/dashboard.js", "/api/v1/robots", "/docs"):  # fmt: skip
        assert not is_open_path(path), path
        assert raw_status(guarded, path) == 401, path
    assert raw_status(guarded, "/static/dashboard.js") == 200
    assert is_open_path("/") and is_open_path("/health/live") and is_open_path(f"/robot/{DELTA}")


def test_the_token_reaches_no_log_line_and_no_answer(
    client: TestClient, store: SqlStore, caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.DEBUG):
        for url in data_urls(store):
            body = (
                client.get(url, headers=BEARER).content + client.get(url, headers={"Authorization": "Bearer x"}).content
            )
            assert TOKEN.encode() not in body, url
    assert caplog.records, "the check needs log records to look at"  # httpx logs each request at INFO
    assert all(TOKEN not in r.getMessage() for r in caplog.records)


def test_script_keeps_the_token_in_session_storage_and_sends_it_only_as_a_header(client: TestClient) -> None:
    script = client.get("/static/dashboard.js").text
    assert "window.sessionStorage.setItem(TOKEN_KEY, token)" in script
    assert "headers.authorization = `Bearer ${token}`" in script
    # nowhere else: not in a URL, a cookie, localStorage or the console
    for risky in (r"localStorage\.", r"document\.cookie", r"console\.", r"[?&]token=", r"\bname:\s*\"token"):
        assert not re.search(risky, script), risky
    assert 'credentials: "omit"' in script and 'referrerPolicy: "no-referrer"' in script
