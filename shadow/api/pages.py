"""The maintenance dashboard: three HTML pages and their static assets, read-only like the rest of the API.

Pages (GET only, kept out of the OpenAPI document):

    /                                   cell overview: every robot, its state and reason, refreshed every few seconds
    /robot/{site}/{cell}/{robot}        one robot: actuator health, residual, payload and friction trends, events
    /event/{event_id}                   one event: summary, figures and its evidence window
    /static/{name}                      the stylesheet and script shipped in the package (shadow/api/static/)

The HTML is a small shell rendered here: title, navigation, the advisory caution and a ``<main>`` that names
what it shows in ``data-*`` attributes; ``dashboard.js`` fills it from the JSON routes under ``/api/v1`` and
draws the plots as inline SVG. Nothing is fetched from outside the service (no CDN, no web fonts), and the
Content-Security-Policy header forbids it, so the dashboard works on a plant network without internet.

With bearer tokens configured (the API off loopback, :mod:`shadow.api.security`) the page shells and the
static files are served without a token - a browser cannot attach one to a navigation - and the data
routes still need one. The shells then say nothing the URL does not: no store lookup, so no robot's or
event's existence, kind or name leaks to someone without a token (an unknown robot or event is reported
by the script, from the API's 404, once signed in). ``dashboard.js`` signs in: on a 401 it draws a token
field, keeps the token in the tab's ``sessionStorage`` and sends it as ``Authorization: Bearer`` on its own
requests (the reasons for this choice are in :mod:`shadow.api.security`). Without tokens (loopback) the
shells read the store as before: an unknown robot or event answers a 404 page, an event page names its kind.

Include in the application with ``app.include_router(pages_router)``.
"""

from __future__ import annotations

import html
from importlib import resources
from typing import Any
from urllib.parse import quote

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, Response

from shadow import __version__
from shadow.api.schemas import ADVISORY_NOTICE
from shadow.errors import RejectedMessageError
from shadow.ingest.topics import RobotAddress

REFRESH_S = 5.0  # overview refresh period
STATIC_FILES = {  # the only files served under /static (no directory walking)
    "dashboard.css": "text/css; charset=utf-8",
    "dashboard.js": "text/javascript; charset=utf-8",
    "favicon.svg": "image/svg+xml",
}
CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)
PAGE_HEADERS = {
    "content-security-policy": CONTENT_SECURITY_POLICY,
    "x-content-type-options": "nosniff",
    "referrer-policy": "no-referrer",
    "cache-control": "no-store",
}

pages_router = APIRouter(include_in_schema=False)


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def render_page(*, title: str, page: str, data: dict[str, str] | None = None, heading: str, status: int = 200) -> str:
    """The HTML shell shared by every page; ``page`` and ``data`` become ``data-*`` attributes of ``<main>``."""
    crumb = "" if page == "overview" else f' <span class="crumb">{_e(heading)}</span>'
    attrs = "".join(f' data-{_e(k)}="{_e(v)}"' for k, v in {"page": page, **(data or {})}.items())
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{_e(title)} · shadow</title>
<link rel="icon" href="/static/favicon.svg" type="image/svg+xml">
<link rel="stylesheet" href="/static/dashboard.css">
<script src="/static/dashboard.js" defer></script>
</head>
<body>
<header class="topbar">
  <a class="brand" href="/"><span class="brand-mark" aria-hidden="true"></span>shadow</a>
  <nav aria-label="where you are"><a href="/">cell overview</a>{crumb}</nav>
  <span class="clock" id="updated" aria-live="polite">loading…</span>
</header>
<aside class="caution" role="note" aria-label="caution">
  <strong class="caution-title">Caution</strong>
  <span class="caution-text">{_e(ADVISORY_NOTICE)}</span>
</aside>
<main id="content"{attrs} data-refresh-s="{REFRESH_S:g}" data-status="{status}">
  <h1>{_e(heading)}</h1>
  <noscript><p class="problem">This dashboard draws its figures with JavaScript; the same data is in the
  JSON API under <code>/api/v1</code>.</p></noscript>
  <p class="loading">Reading the store…</p>
</main>
<footer class="footer">shadow {_e(__version__)} · read-only · times in UTC</footer>
</body>
</html>
"""


def _page(body: str, status: int = 200) -> HTMLResponse:
    return HTMLResponse(body, status_code=status, headers=PAGE_HEADERS)


def _not_found(what: str) -> HTMLResponse:
    return _page(render_page(title="not found", page="missing", heading=f"{what} is not known here", status=404), 404)


def _store(request: Request) -> Any:
    return request.app.state.store


def _shells_read_store(request: Request) -> bool:
    """False when the API needs a token: the shells are served without one, so they must not read the store."""
    return not getattr(request.app.state, "tokens_required", False)


@pages_router.get("/", response_class=HTMLResponse)
def overview_page() -> HTMLResponse:
    return _page(render_page(title="cell overview", page="overview", heading="Cell overview"))


@pages_router.get("/robot/{site}/{cell}/{robot}", response_class=HTMLResponse)
def robot_page(site: str, cell: str, robot: str, request: Request) -> HTMLResponse:
    try:
        rid = str(RobotAddress(site, cell, robot))
    except RejectedMessageError:
        return _not_found("this robot address")
    if _shells_read_store(request) and not any(r["robot_id"] == rid for r in _store(request).robots()):
        return _not_found(f"robot {rid}")
    api = "/api/v1/robots/" + "/".join(quote(p, safe="") for p in (site, cell, robot))
    return _page(render_page(title=rid, page="robot", data={"robot": rid, "api": api}, heading=f"Robot {rid}"))


@pages_router.get("/event/{event_id}", response_class=HTMLResponse)
def event_page(event_id: int, request: Request) -> HTMLResponse:
    heading = f"Event {event_id}"  # the script completes it from the API as "Event N: kind on robot"
    if _shells_read_store(request):
        row = _store(request).event(event_id)
        if row is None:
            return _not_found(f"event {event_id}")
        heading = f"Event {event_id}: {row['kind']} on {row['robot_id']}"
    return _page(render_page(title=f"event {event_id}", page="event", data={"event": str(event_id)}, heading=heading))


@pages_router.get("/static/{name}")
def static_file(name: str) -> Response:
    media_type = STATIC_FILES.get(name)
    if media_type is None:
        return Response(f"no static file {name[:60]!r}\n", status_code=404, media_type="text/plain; charset=utf-8")
    body = resources.files("shadow.api").joinpath("static", name).read_bytes()
    return Response(
        body,
        media_type=media_type,
        headers={"cache-control": "public, max-age=300", "x-content-type-options": "nosniff"},
    )
