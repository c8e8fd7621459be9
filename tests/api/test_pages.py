"""The dashboard pages over HTTP: served, read-only, kept out of OpenAPI, and self-contained (no outside URL).

The scene built here (two robots of one cell, trends, a gap, one collision with its evidence window) is
also the one the browser tests in ``test_pages_browser.py`` render.
"""

from __future__ import annotations

import re
import time
import warnings
from importlib import resources
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pytest

from shadow.api.app import create_app, openapi_document
from shadow.api.pages import STATIC_FILES, pages_router
from shadow.api.schemas import ADVISORY_NOTICE, iso
from shadow.ingest.wire import PositionUnit, SampleBatch, encode_binary
from shadow.robots.parameters import MeasuredQuantity
from shadow.store.repository import SqlStore, StepResults

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

DELTA = "riverside/cell-2/delta-a"
HEXA = "riverside/cell-2/hexa-b"
SPAN_S = 600.0  # trend history of the scene
STEP_S = 2.0
NOT_IDENTIFIABLE_S = (200.0, 260.0)  # seconds after the scene start: the motion did not excite the payload
GAP_S = (400.0, 420.0)
COLLISION_REASON = "robot: 1 collision(s) recently, the largest at 62 % of rated effort (act from 50 % or 3 collisions)"
FRICTION_REASON = "actuator 1: friction is 18 % above its baseline after temperature compensation (watch from 15 %)"
# The only URL allowed in an asset: the SVG namespace name, an identifier that is never fetched (W3C SVG 1.1, 1.2).
SVG_NAMESPACE = "http://www.w3.org/2000/svg"


def evidence_window(t_event_s: float, rng: np.random.Generator) -> bytes:
    """200 samples at 1 kHz around a collision: a smooth pick motion and an effort spike on actuator 1."""
    t = t_event_s - 0.08 + np.arange(200) * 1e-3
    phase = 2 * np.pi * (t - t[0]) / 0.4
    q = np.column_stack([0.3 + 0.1 * np.sin(phase + k) for k in range(3)])  # [rad]
    effort = np.column_stack([4.0 * np.cos(phase + k) for k in range(3)]) + 0.05 * rng.standard_normal((200, 3))
    hit = (t >= t_event_s) & (t < t_event_s + 0.012)
    effort[hit, 1] += 38.0 * np.sin(np.pi * (t[hit] - t_event_s) / 0.012)  # [N m]
    batch = SampleBatch(
        robot_id="delta-a",
        seq=901,
        position_unit=PositionUnit.RAD,
        effort_kind=MeasuredQuantity.EFFORT,
        t=t,
        q=q,
        effort=effort,
        gripping=np.arange(200) >= 50,  # the tool closes 50 ms into the window
    )
    return encode_binary(batch)


def fill_scene(store: SqlStore, now_s: float, rng: np.random.Generator) -> dict[str, float]:
    """Two robots of one cell with ten minutes of history ending at ``now_s``. Demo numbers, invented."""
    store.register_robot(DELTA, family="delta", n_actuators=3)
    store.register_robot(HEXA, family="hexapod", n_actuators=6)
    t0 = now_s - SPAN_S
    times = t0 + np.arange(0.0, SPAN_S, STEP_S)
    d = StepResults(DELTA)
    for t in times:
        rel = t - t0
        if GAP_S[0] <= rel < GAP_S[1]:
            continue
        excited = not (NOT_IDENTIFIABLE_S[0] <= rel < NOT_IDENTIFIABLE_S[1])
        std_mass = 0.01 if excited else 0.08
        d.estimates += [
            {"time_s": t, "parameter": "tool_mass", "value": 0.85 + 0.004 * rng.standard_normal(), "std": 0.005,
             "identifiable": True},
            {"time_s": t, "parameter": "work_piece_mass", "value": 0.12 + 0.01 * rng.standard_normal(),
             "std": std_mass, "identifiable": excited},
        ]  # fmt: skip
        for a in range(3):
            wear = 1.0 + (0.18 * rel / SPAN_S if a == 1 else 0.0)
            d.estimates += [
                {"time_s": t, "parameter": f"coulomb_{a + 1}", "value": 0.9 * wear, "std": 0.03, "identifiable": True},
                {"time_s": t, "parameter": f"viscous_{a + 1}", "value": 0.25 * wear, "std": 0.01, "identifiable": True},
            ]  # fmt: skip
        d.residual_aggregates += [
            {"time_s": t, "actuator": a, "window_s": STEP_S, "n_samples": 2000, "nis": 3.1,
             "rms": 0.08 + 0.02 * a + 0.01 * abs(rng.standard_normal()), "peak": 0.3}
            for a in range(3)
        ]  # fmt: skip
    d.unmonitored = [
        {"start_s": t0 + GAP_S[0], "end_s": t0 + GAP_S[1], "cause": "sequence_gap", "detail": "seq 377..388 missing"}
    ]
    t_event = now_s - 120.0
    d.events = [
        {"kind": "collision", "start_s": t_event, "end_s": t_event + 0.012, "severity": "high",
         "summary": "unexpected contact on actuator 1 during the place move",
         "figures": {"contact_force_estimate_n": 85.0, "contact_point_m": [0.12, -0.05, -0.71],
                     "peak_rated_fraction": 0.62},
         "evidence": evidence_window(t_event, rng), "evidence_start_s": t_event - 0.08,
         "evidence_end_s": t_event + 0.119, "source_seq": 901},
    ]  # fmt: skip
    d.health = [
        {"time_s": now_s - 1.0, "scope": "robot", "state": "act",
         "reasons": [COLLISION_REASON, FRICTION_REASON],
         "figures": {"collisions_count": 1.0, "collision_peak_rated_fraction": 0.62, "data_age_s": 0.4,
                     "payload_deviation_fraction": 0.03}},
        {"time_s": now_s - 1.0, "scope": "actuator:0", "state": "steady", "reasons": [],
         "figures": {"residual_rms_ratio": 1.02, "wear_indicator_ratio": 1.01, "data_age_s": 0.4}},
        {"time_s": now_s - 1.0, "scope": "actuator:1", "state": "watch",
         "reasons": [FRICTION_REASON],
         "figures": {"residual_rms_ratio": 1.21, "wear_indicator_ratio": 1.18, "days_to_limit": 23.5,
                     "data_age_s": 0.4}},
        {"time_s": now_s - 1.0, "scope": "actuator:2", "state": "steady", "reasons": [],
         "figures": {"residual_rms_ratio": 0.97, "wear_indicator_ratio": 1.0, "data_age_s": 0.4}},
    ]  # fmt: skip
    store.write_step(d)

    h = StepResults(HEXA)
    for t in times:
        h.estimates.append({"time_s": t, "parameter": "payload_m", "value": 12.0, "std": 0.2, "identifiable": True})
        h.residual_aggregates += [
            {"time_s": t, "actuator": a, "window_s": STEP_S, "n_samples": 2000, "rms": 1.5, "peak": 4.0, "nis": 6.0}
            for a in range(6)
        ]
    h.health = [
        {"time_s": now_s - 1.0, "scope": "robot", "state": "steady", "reasons": [],
         "figures": {"collisions_count": 0.0, "data_age_s": 0.2}},
    ]  # fmt: skip
    store.write_step(h)
    return {"t0_s": t0, "event_s": t_event}


def with_pages(store: SqlStore) -> object:
    """The application with the dashboard pages, whether or not ``create_app`` includes them already."""
    app = create_app(store)
    inner = app.app
    if not any(getattr(r, "path", None) == "/" for r in inner.routes):
        inner.include_router(pages_router)
    return app


@pytest.fixture
def store(tmp_path: Path, rng: np.random.Generator) -> SqlStore:
    s = SqlStore(f"sqlite:///{tmp_path / 'pages.db'}")
    fill_scene(s, time.time(), rng)
    return s


@pytest.fixture
def client(store: SqlStore) -> TestClient:
    return TestClient(with_pages(store))  # type: ignore[arg-type]


def event_id(store: SqlStore) -> int:
    return int(store.events(robot_id=DELTA, kind="collision")[0]["event_id"])


def page_urls(store: SqlStore) -> list[str]:
    return ["/", f"/robot/{DELTA}", f"/robot/{HEXA}", f"/event/{event_id(store)}"]


def test_every_page_is_html_with_the_caution_and_the_local_assets(client: TestClient, store: SqlStore) -> None:
    for url in page_urls(store):
        r = client.get(url)
        assert r.status_code == 200, url
        assert r.headers["content-type"].startswith("text/html"), url
        text = r.text
        assert ADVISORY_NOTICE in text, url  # the caution is in the HTML itself, JavaScript or not
        for must in ("never sends anything to a robot controller", "ISO 10218-1/-2", "ISO 13849", "qualified people"):
            assert must in text, (url, must)
        assert '<link rel="stylesheet" href="/static/dashboard.css">' in text
        assert '<script src="/static/dashboard.js" defer></script>' in text
        csp = r.headers["content-security-policy"]
        assert "default-src 'none'" in csp and "connect-src 'self'" in csp and "script-src 'self'" in csp


def test_pages_name_what_they_show(client: TestClient, store: SqlStore) -> None:
    assert 'data-page="overview"' in client.get("/").text
    robot = client.get(f"/robot/{DELTA}").text
    assert 'data-page="robot"' in robot and f'data-robot="{DELTA}"' in robot
    assert 'data-api="/api/v1/robots/riverside/cell-2/delta-a"' in robot
    ev = client.get(f"/event/{event_id(store)}").text
    assert f'data-event="{event_id(store)}"' in ev and "collision on riverside/cell-2/delta-a" in ev


def test_unknown_robot_and_event_answer_404_pages_with_the_caution(client: TestClient) -> None:
    for url in ("/robot/riverside/cell-2/nobody", "/robot/riverside/cell+2/delta-a", "/event/99999"):
        r = client.get(url)
        assert r.status_code == 404, url
        assert r.headers["content-type"].startswith("text/html")
        assert ADVISORY_NOTICE in r.text and "is not known here" in r.text
    assert client.get("/event/abc").status_code == 422  # the API's own validation answer


def test_text_from_the_store_is_escaped(tmp_path: Path) -> None:
    s = SqlStore(f"sqlite:///{tmp_path / 'x.db'}")
    s.register_robot("site/cell/r1", family="delta", n_actuators=3)
    r = StepResults("site/cell/r1")
    r.events = [{"kind": "<script>x</script>", "start_s": 1.0, "end_s": 2.0, "severity": "low", "summary": "s",
                 "figures": {}, "source_seq": 1}]  # fmt: skip
    s.write_step(r)
    c = TestClient(with_pages(s))  # type: ignore[arg-type]
    text = c.get(f"/event/{s.events()[0]['event_id']}").text
    assert "<script>x</script>" not in text and "&lt;script&gt;x&lt;/script&gt;" in text


@pytest.mark.parametrize(("name", "media_type"), sorted(STATIC_FILES.items()))
def test_static_assets_are_served_from_the_package(client: TestClient, name: str, media_type: str) -> None:
    r = client.get(f"/static/{name}")
    assert r.status_code == 200
    assert r.headers["content-type"] == media_type
    assert r.headers["x-content-type-options"] == "nosniff"
    assert r.content == resources.files("shadow.api").joinpath("static", name).read_bytes()


def test_only_listed_static_files_are_served(client: TestClient) -> None:
    for url in ("/static/nope.js", "/static/..%2Fapp.py", "/static/%2E%2E%2Fapp.py", "/static/../app.py"):
        r = client.get(url)
        assert r.status_code == 404, url
        assert b"import" not in r.content, url
    shipped = {p.name for p in resources.files("shadow.api").joinpath("static").iterdir()}
    assert shipped == set(STATIC_FILES), "every shipped asset is listed, and every listed one is shipped"


URL = re.compile(r"(?i)\b[a-z][a-z0-9+.-]*://[^\s\"'<>)]*")


def outside_references(text: str) -> list[str]:
    """Every absolute URL, protocol-relative URL, CSS import or non-fragment url() in a text."""
    found = [u for u in URL.findall(text) if u != SVG_NAMESPACE]
    found += re.findall(r"""["'(=\s]//[a-z0-9]""", text, flags=re.I)  # protocol-relative, e.g. //cdn...
    found += re.findall(r"@import", text)
    found += re.findall(r"url\((?!#)[^)]*\)", text)  # url(#id) names a fragment of the same document
    return found


def test_outside_reference_finder_finds_them() -> None:
    # the finder itself must catch what it is there for, or the next test could never fail
    for bad in ('<script src="https://cdn.example/x.js">', "@import 'x.css';", "src='//cdn.example/a.js'",
                "background: url(/img/a.png)", "fetch('http://10.0.0.1/api')"):  # fmt: skip
        assert outside_references(bad), bad
    assert outside_references(f'createElementNS("{SVG_NAMESPACE}", "svg")') == []


def test_no_asset_or_page_refers_to_anything_outside_the_service(client: TestClient, store: SqlStore) -> None:
    texts = {name: client.get(f"/static/{name}").text for name in STATIC_FILES}
    texts |= {url: client.get(url).text for url in page_urls(store)}
    for name, text in texts.items():
        assert outside_references(text) == [], name
        assert "//cdn" not in text.lower() and "fonts.g" not in text.lower(), name
    for url in page_urls(store):  # every src/href of a page is a path on this service
        refs = re.findall(r'(?:src|href)="([^"]*)"', client.get(url).text)
        assert refs and all(ref.startswith("/") and not ref.startswith("//") for ref in refs), (url, refs)


def test_pages_stay_out_of_the_openapi_document(store: SqlStore) -> None:
    doc = openapi_document(with_pages(store))
    assert doc["paths"] and all(p.startswith(("/api/", "/metrics")) for p in doc["paths"]), sorted(doc["paths"])


@pytest.mark.parametrize("method", ["POST", "PUT", "PATCH", "DELETE"])
def test_pages_are_read_only(client: TestClient, store: SqlStore, method: str) -> None:
    for url in [*page_urls(store), "/static/dashboard.js"]:
        r = client.request(method, url)
        assert r.status_code == 405 and r.json()["error"] == "read_only", (method, url)


def test_head_of_a_page_has_no_body(client: TestClient) -> None:
    r = client.head("/")
    assert r.status_code == 200 and r.content == b""
    assert int(r.headers["content-length"]) == len(client.get("/").content)


def test_every_api_call_the_script_makes_is_answered(client: TestClient, store: SqlStore) -> None:
    """The JSON requests dashboard.js builds (same routes, same parameters) all succeed on the scene."""
    script = client.get("/static/dashboard.js").text
    now = time.time()
    start, end = quote(iso(now - 3600.0) or ""), quote(iso(now) or "")
    base = "/api/v1/robots/riverside/cell-2/delta-a"
    series = f"start={start}&end={end}&every=12&limit=10000"
    calls = {
        "`${API}/robots`": "/api/v1/robots",
        "`${api}/health`": f"{base}/health",
        "/estimates?${range}&every=${every}&limit=10000": f"{base}/estimates?{series}",
        "/residuals?${range}&every=${every}&limit=10000": f"{base}/residuals?{series}",
        "/unmonitored?${range}": f"{base}/unmonitored?start={start}&end={end}",
        "events?robot_id=${encodeURIComponent(rid)}&start=": f"/api/v1/events?robot_id={quote(DELTA, safe='')}"
        f"&start={start}&limit=1000",
        "`${API}/events/${encodeURIComponent(id)}`": f"/api/v1/events/{event_id(store)}",
    }  # fmt: skip
    for in_script, url in calls.items():
        assert in_script in script, in_script
        r = client.get(url + ("&offset=0" if "limit=10000" in url else ""))
        assert r.status_code == 200, (url, r.text)
    points = client.get(calls["/estimates?${range}&every=${every}&limit=10000"] + "&offset=0").json()["points"]
    assert {p["parameter"] for p in points} >= {"tool_mass", "work_piece_mass", "coulomb_2", "viscous_3"}
    assert any(not p["identifiable"] for p in points)


def test_script_puts_data_into_the_page_as_text_only(client: TestClient) -> None:
    # store text (reasons, summaries) reaches the page through textContent, never parsed as HTML or code
    script = client.get("/static/dashboard.js").text
    for risky in ("innerHTML", "outerHTML", "insertAdjacentHTML", "document.write", "eval(", "new Function"):
        assert risky not in script, risky
    assert "textContent" in script
