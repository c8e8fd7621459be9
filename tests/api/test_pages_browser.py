"""The dashboard in a real headless Chromium: the API under uvicorn on loopback, driven through chromedriver.

chromedriver is spoken to over its W3C WebDriver HTTP interface with httpx (no extra package). The pages
are checked after their JavaScript ran: robots, states, reasons, the caution, the SVG plots with their
data, the evidence window; screenshots go to the test's temporary directory. CI installs the browser with
``apt-get install -y chromium chromium-driver``; a machine without it fails these tests with that command.
"""

from __future__ import annotations

import base64
import logging
import shutil
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import uvicorn

from shadow.api.app import create_app
from shadow.api.schemas import ADVISORY_NOTICE
from shadow.api.security import GuardSettings, token_digest
from shadow.store.repository import SqlStore, StepResults
from tests.api.test_pages import DELTA, HEXA, fill_scene, with_pages
from tests.servers import free_loopback_port, wait_for_port

pytestmark = pytest.mark.browser

INSTALL = "apt-get update && apt-get install -y chromium chromium-driver"
CHROMIUM_FLAGS = [  # headless on a machine without outside network (see the field notes on browser tests)
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-dev-shm-usage",
    "--window-size=1440,1100",
]
READY_TIMEOUT_S = 30.0


def executable(name: str) -> str:
    found = shutil.which(name) or (f"/usr/bin/{name}" if Path(f"/usr/bin/{name}").exists() else None)
    if found is None:
        pytest.fail(f"{name} is not installed; run: {INSTALL}")
    return found


class WebDriverError(RuntimeError):
    pass


class Browser:
    """One W3C WebDriver session on chromedriver (which listens on 127.0.0.1 only)."""

    def __init__(self, http: httpx.Client, session_id: str, base_url: str) -> None:
        self.http = http
        self.session = session_id
        self.base_url = base_url

    def command(self, method: str, path: str, body: dict[str, Any] | None = None) -> Any:
        r = self.http.request(method, f"/session/{self.session}{path}", json=body)
        value = r.json().get("value")
        if r.status_code != 200:
            raise WebDriverError(f"{method} {path}: {r.status_code} {value}")
        return value

    def open(self, path: str) -> None:
        self.command("POST", "/url", {"url": self.base_url + path})

    def run(self, script: str, *args: Any) -> Any:
        return self.command("POST", "/execute/sync", {"script": script, "args": list(args)})

    def wait_until(self, script: str, *, timeout_s: float = READY_TIMEOUT_S, what: str) -> Any:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            value = self.run(script)
            if value:
                return value
            time.sleep(0.1)
        raise TimeoutError(
            f"{what}: not true after {timeout_s} s; page text: {self.run('return document.body.innerText')[:800]}"
        )

    def wait_ready(self) -> None:
        state = self.wait_until(
            "return document.getElementById('content').dataset.ready || ''", what="page filled by its script"
        )
        assert state == "yes", self.run("return document.body.innerText")

    def screenshot(self, path: Path) -> bytes:
        """The whole page: the window grows to the page's height first."""
        height = int(self.run("return document.documentElement.scrollHeight"))
        self.command("POST", "/window/rect", {"width": 1440, "height": min(max(height, 900), 6000)})
        png = base64.b64decode(self.command("GET", "/screenshot"))
        path.write_bytes(png)
        return png

    def console(self) -> list[dict[str, Any]]:
        return list(self.command("POST", "/se/log", {"type": "browser"}))


@pytest.fixture(scope="module")
def scene_store(tmp_path_factory: pytest.TempPathFactory) -> Iterator[SqlStore]:
    store = SqlStore(f"sqlite:///{tmp_path_factory.mktemp('pages') / 'scene.db'}")
    fill_scene(store, time.time(), np.random.default_rng(20261202))
    yield store
    store.close()


@pytest.fixture(scope="module")
def base_url(scene_store: SqlStore) -> Iterator[str]:
    """The full application (API + pages) under uvicorn in a background thread on a free loopback port."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(with_pages(scene_store), log_level="warning", lifespan="off"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 10.0
    while not server.started and time.monotonic() < deadline:
        time.sleep(0.02)
    assert server.started, "uvicorn did not start"
    yield f"http://127.0.0.1:{port}"
    server.should_exit = True
    thread.join(timeout=10.0)
    sock.close()


@pytest.fixture(scope="module")
def browser(base_url: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Browser]:
    chromium = executable("chromium")
    driver = executable("chromedriver")
    port = free_loopback_port()
    log = tmp_path_factory.mktemp("chromedriver") / "chromedriver.log"
    process = subprocess.Popen([driver, f"--port={port}", f"--log-path={log}"], stdout=subprocess.DEVNULL)
    try:
        wait_for_port(port, timeout_s=15.0, process=process)
        http = httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=60.0)
        profile = tmp_path_factory.mktemp("chromium-profile")
        capabilities = {
            "browserName": "chrome",
            "goog:chromeOptions": {"binary": chromium, "args": [*CHROMIUM_FLAGS, f"--user-data-dir={profile}"]},
            "goog:loggingPrefs": {"browser": "ALL"},
        }
        r = http.post("/session", json={"capabilities": {"alwaysMatch": capabilities}})
        assert r.status_code == 200, r.text
        b = Browser(http, r.json()["value"]["sessionId"], base_url)
        yield b
        http.delete(f"/session/{b.session}")
        http.close()
    finally:
        process.terminate()
        process.wait(timeout=10.0)


@pytest.fixture(scope="module")
def shots(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("screenshots")


def check_common(browser: Browser, *, answered_404: str | None = None) -> None:
    """The caution is shown, no script error was logged, and nothing was loaded from outside the service.

    ``answered_404``: the page's own path when its 404 answer is the point of the test (the browser logs it).
    """
    caution = browser.run("return document.querySelector('aside.caution').innerText")
    assert ADVISORY_NOTICE in caution.replace("\n", " ")
    own_404 = f"{browser.base_url}{answered_404} - Failed to load resource" if answered_404 else None
    severe = [
        e
        for e in browser.console()
        if e.get("level") == "SEVERE" and not (own_404 and str(e.get("message", "")).startswith(own_404))
    ]
    assert severe == [], severe
    loaded = browser.run("return performance.getEntriesByType('resource').map(e => e.name)")
    assert loaded and all(u.startswith(browser.base_url + "/") for u in loaded), loaded


def test_overview_shows_every_robot_with_its_state_and_refreshes(
    browser: Browser, scene_store: SqlStore, shots: Path
) -> None:
    browser.open("/")
    browser.wait_ready()
    cards = browser.run(
        """return [...document.querySelectorAll('article.robot-card')].map(c => ({
             robot: c.dataset.robot, state: c.dataset.state, badge: c.querySelector('.badge').innerText.trim(),
             shape: c.querySelector('.badge svg').getAttribute('class'), text: c.innerText,
             link: c.querySelector('a.open-link').getAttribute('href')}))"""
    )
    assert [c["robot"] for c in cards] == [DELTA, HEXA]  # highest concern first
    delta, hexa = cards
    assert (delta["state"], delta["badge"].lower(), delta["shape"]) == ("act", "act", "shape-diamond")
    assert (hexa["state"], hexa["badge"].lower(), hexa["shape"]) == ("steady", "steady", "shape-circle")
    assert "62 % of rated effort" in delta["text"] and "friction is 18 % above" in delta["text"]
    assert "collision peak rated\n62 %" in delta["text"]  # figure keys become words, _fraction a percentage
    assert "events in the last 24 h: 1" in delta["text"]
    assert delta["link"] == "/robot/riverside/cell-2/delta-a"
    assert "nothing to report" in hexa["text"]
    newest = browser.run("return [...document.querySelectorAll('table.events tbody tr')].map(r => r.innerText)")
    assert len(newest) == 1 and "unexpected contact" in newest[0]
    check_common(browser)
    png = browser.screenshot(shots / "overview.png")
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000

    # a new assessment reaches the open page without reloading it
    later = StepResults(HEXA)
    later.health = [
        {"time_s": time.time(), "scope": "robot", "state": "watch", "figures": {"payload_deviation_fraction": 0.12},
         "reasons": ["robot: payload looks 12 % heavier than declared (watch from 10 %)"]},
    ]  # fmt: skip
    scene_store.write_step(later)
    browser.wait_until(
        f"return document.querySelector('article[data-robot=\"{HEXA}\"]').dataset.state === 'watch'",
        what="overview refreshed with the new state",
    )
    text = browser.run(f"return document.querySelector('article[data-robot=\"{HEXA}\"]').innerText")
    assert "12 % heavier" in text and "payload deviation\n12 %" in text


def test_robot_page_shows_health_forecast_trends_and_events(
    browser: Browser, scene_store: SqlStore, shots: Path
) -> None:
    browser.open("/robot/riverside/cell-2/delta-a")
    browser.wait_ready()
    actuators = browser.run(
        "return [...document.querySelectorAll('.actuator-card')].map(c => [c.dataset.scope, c.dataset.state])"
    )
    assert actuators == [["actuator:0", "steady"], ["actuator:1", "watch"], ["actuator:2", "steady"]]
    forecast = browser.run("return document.querySelector('table.forecast').innerText")
    assert "days to limit" in forecast and "23.5 d" in forecast and "1.18 ×" in forecast and "1.00 ×" in forecast
    plots = browser.run(
        """const count = (s, css) => s.querySelectorAll(css).length;
           return [...document.querySelectorAll('figure.plot-box')].map(f => {
             const s = f.querySelector('svg.plot');
             const lines = [...s.querySelectorAll('path.series')];
             return {title: f.querySelector('figcaption').innerText, series: +s.dataset.series,
                     points: +s.dataset.points, lines: lines.length,
                     longest: Math.max(0, ...lines.map(p => p.getAttribute('d').length)),
                     bands: count(s, 'polygon.band'), hatched: count(s, 'rect.hatch'),
                     dotted: count(s, 'path.not-identifiable'), blind: count(s, 'rect.blind'),
                     events: count(s, 'rect.event-span')};
           })"""
    )
    by_title = {p["title"]: p for p in plots}
    residual = by_title["Effort residual RMS per actuator [N·m]"]
    # the default 1 h window asks for one point per 3600 s / 300 = 12 s step: the API keeps one per step and actuator
    stored = scene_store.residual_aggregates(DELTA, start_s=0.0, end_s=time.time() + 60.0)
    assert residual["points"] == len({(int(r["time_s"] // 12.0), r["actuator"]) for r in stored})
    assert residual["series"] == 3 and residual["lines"] >= 3 and residual["longest"] > 500
    assert residual["blind"] == 1 and residual["events"] == 1  # the gap and the collision are marked
    payload = by_title["Payload mass [kg]"]
    assert payload["series"] == 2 and payload["bands"] >= 2
    assert payload["hatched"] >= 1 and payload["dotted"] >= 1  # the work piece was not identifiable for a while
    assert by_title["Coulomb friction per actuator [N·m]"]["series"] == 3
    assert by_title["Viscous friction per actuator [N·m·s/rad]"]["series"] == 3
    estimates = browser.run("return document.querySelector('table.estimates').innerText")
    assert "work piece mass" in estimates and "coulomb 2" in estimates
    events = browser.run("return [...document.querySelectorAll('table.events a')].map(a => a.getAttribute('href'))")
    assert len(events) == 1 and events[0].startswith("/event/")
    check_common(browser)
    browser.screenshot(shots / "robot.png")


def test_event_page_plots_the_evidence_window(browser: Browser, scene_store: SqlStore, shots: Path) -> None:
    event_id = scene_store.events(robot_id=DELTA, kind="collision")[0]["event_id"]
    browser.open(f"/event/{event_id}")
    browser.wait_ready()
    text = browser.run("return document.getElementById('content').innerText")
    assert "unexpected contact on actuator 1" in text
    assert "contact force estimate\n85 N" in text and "peak rated\n62 %" in text
    assert "contact point\n[0.12, -0.05, -0.71] m" in text
    evidence = browser.run(
        """const s = document.querySelector('svg.plot');
           return {series: +s.dataset.series, points: +s.dataset.points,
                   tool: [...s.querySelectorAll('rect.tool-on')].map(r => +r.dataset.samples),
                   event: s.querySelectorAll('rect.event-span').length,
                   caption: s.closest('figure').querySelector('figcaption').innerText}"""
    )
    assert evidence == {"series": 3, "points": 600, "tool": [150], "event": 1,
                        "caption": "Measured effort per actuator [N·m]"}  # fmt: skip
    stats = browser.run("return [...document.querySelectorAll('table.evidence-stats tbody tr')].map(r => r.innerText)")
    assert len(stats) == 3 and float(stats[1].split("\t")[-1]) > 30.0  # the spike of actuator 1 is its peak
    check_common(browser)
    browser.screenshot(shots / "event.png")


def test_missing_robot_page_still_carries_the_caution(browser: Browser) -> None:
    browser.open("/robot/riverside/cell-2/nobody")
    browser.wait_ready()
    assert "is not known here" in browser.run("return document.querySelector('h1').innerText")
    check_common(browser, answered_404="/robot/riverside/cell-2/nobody")


def test_hexapod_page_uses_leg_force_units(browser: Browser) -> None:
    browser.open("/robot/riverside/cell-2/hexa-b")
    browser.wait_ready()
    captions = browser.run(
        """return [...document.querySelectorAll('figure.plot-box')].map(f =>
             [f.querySelector('figcaption').innerText, +f.querySelector('svg.plot').dataset.series])"""
    )
    assert ["Effort residual RMS per actuator [N]", 6] in captions and ["Payload mass [kg]", 1] in captions
    check_common(browser)


# ---------------------------------------------------------------------------------------------- with tokens

TOKEN = "plant7-maintenance-4f9c2e"  # invented; the server holds only its digest


class LogLines(logging.Handler):
    """Every formatted log line of the server, to look for the token in."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(self.format(record))


@pytest.fixture(scope="module")
def guarded_server(scene_store: SqlStore) -> Iterator[tuple[str, LogLines]]:
    """The application with a bearer token required, under uvicorn with its access log on, on loopback."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    app = create_app(scene_store, guard=GuardSettings(token_digests=(token_digest(TOKEN),)))
    config = uvicorn.Config(app, log_level="info", access_log=True, lifespan="off")  # configures logging now
    lines = LogLines()
    for name in ("uvicorn", "uvicorn.access", "uvicorn.error", "shadow"):
        logging.getLogger(name).addHandler(lines)
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 10.0
    while not server.started and time.monotonic() < deadline:
        time.sleep(0.02)
    assert server.started, "uvicorn did not start"
    yield f"http://127.0.0.1:{port}", lines
    server.should_exit = True
    thread.join(timeout=10.0)
    sock.close()
    for name in ("uvicorn", "uvicorn.access", "uvicorn.error", "shadow"):
        logging.getLogger(name).removeHandler(lines)


def type_into(browser: Browser, css: str, text: str) -> None:
    """Real key strokes into an element (WebDriver element send-keys), then nothing else."""
    element = browser.command("POST", "/element", {"using": "css selector", "value": css})
    key = next(iter(element))  # the W3C element reference key
    browser.command("POST", f"/element/{element[key]}/value", {"text": text})


def click(browser: Browser, css: str) -> None:
    element = browser.command("POST", "/element", {"using": "css selector", "value": css})
    browser.command("POST", f"/element/{element[next(iter(element))]}/click", {})


def test_signing_in_with_a_token_shows_the_data(
    browser: Browser, guarded_server: tuple[str, LogLines], scene_store: SqlStore, shots: Path
) -> None:
    base, server_log = guarded_server
    b = Browser(browser.http, browser.session, base)  # same browser, another origin: its own sessionStorage
    b.open("/")
    b.wait_until("return document.getElementById('content').dataset.ready === 'sign-in'", what="sign-in form drawn")
    text = b.run("return document.getElementById('content').innerText")
    assert "Sign in to read the data" in text and DELTA not in text and "hexa-b" not in text
    assert b.run("return document.querySelectorAll('article.robot-card').length") == 0
    assert b.run("return document.querySelector('#token-field').type") == "password"
    b.screenshot(shots / "sign-in.png")

    type_into(b, "#token-field", "not-the-token")
    click(b, "form.sign-in button[type=submit]")
    b.wait_until(
        "return document.querySelector('form.sign-in .problem').innerText.includes('refused')",
        what="a wrong token is refused",
    )
    assert b.run("return window.sessionStorage.length") == 0  # a refused token is not kept

    type_into(b, "#token-field", TOKEN)
    click(b, "form.sign-in button[type=submit]")
    b.wait_until("return document.getElementById('content').dataset.ready === 'yes'", what="data after signing in")
    cards = b.run(
        "return [...document.querySelectorAll('article.robot-card')].map(c => [c.dataset.robot, c.dataset.state])"
    )
    assert cards == [[DELTA, "act"], [HEXA, scene_state(scene_store, HEXA)]]
    assert b.run("return document.querySelector('button.sign-out') !== null")
    assert b.run("return window.sessionStorage.getItem('shadow.bearer-token')") == TOKEN
    assert b.run("return [window.localStorage.length, document.cookie]") == [0, ""]

    # the other pages of the tab use the kept token: no second sign-in
    event_id = scene_store.events(robot_id=DELTA, kind="collision")[0]["event_id"]
    b.open(f"/event/{event_id}")
    b.wait_ready()
    assert b.run("return document.querySelector('h1').innerText") == f"Event {event_id}: collision on {DELTA}"
    assert "unexpected contact on actuator 1" in b.run("return document.getElementById('content').innerText")
    b.open(f"/robot/{DELTA}")
    b.wait_ready()
    assert b.run("return document.querySelectorAll('figure.plot-box svg.plot').length") >= 4
    b.screenshot(shots / "robot-signed-in.png")
    b.open("/robot/riverside/cell-2/nobody")  # its shell is served as any other; the API answers 404
    b.wait_ready()
    assert b.run("return document.querySelector('h1').innerText") == "robot riverside/cell-2/nobody is not known here"
    loaded = b.run("return performance.getEntriesByType('resource').map(e => e.name)")
    assert loaded and all(u.startswith(base + "/") and TOKEN not in u for u in loaded), loaded
    assert TOKEN not in b.run("return window.location.href + document.referrer + document.documentElement.outerHTML")

    # sign out: the token is forgotten and the data is gone from the page
    click(b, "button.sign-out")
    b.wait_until("return !!document.querySelector('form.sign-in')", what="sign-in form after signing out")
    assert b.run("return window.sessionStorage.length") == 0
    assert b.run("return document.querySelectorAll('figure.plot-box').length") == 0

    errors = [e for e in browser.console() if e.get("level") == "SEVERE"]
    messages = [str(e.get("message", "")) for e in errors]  # the refusals before signing in, and the unknown robot
    assert all("status of 401" in m or ("status of 404" in m and "/nobody" in m) for m in messages), messages
    assert server_log.lines, "the server's access log must be on for this check"
    assert any("/api/v1/robots" in line for line in server_log.lines)
    assert not [line for line in server_log.lines if TOKEN in line]


def scene_state(store: SqlStore, robot_id: str) -> str:
    return next(h["state"] for h in store.latest_health(robot_id) if h["scope"] == "robot")
