"""The load benchmark's store builder on a tiny cell: what it writes reads back through the API, both write paths
give the same store, and a finished file is reused (benchmarks/api_load.py). No timing here."""

from __future__ import annotations

import sqlite3
import warnings
from pathlib import Path
from typing import Any

import pytest

from benchmarks.api_load import START_S, BenchmarkError, BuildSpec, build_store, endpoints
from shadow.api.app import create_app
from shadow.api.schemas import iso
from shadow.api.security import GuardSettings
from shadow.ingest.wire import decode_message
from shadow.store.repository import SqlStore

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

# 20 minutes of 2 robots; rare rows at high rates so that every kind occurs
TINY = BuildSpec(
    days=20 / 1440,
    robots=2,
    collisions_per_day=300.0,
    payload_faults_per_day=600.0,
    sequence_gaps_per_day=300.0,
    restarts_per_day=300.0,
)


def client_for(path: Path) -> TestClient:
    store = SqlStore(f"sqlite:///{path}")
    return TestClient(create_app(store, guard=GuardSettings(rate_per_s=1e9, burst=10**9)))


def all_points(c: TestClient, url: str, **params: Any) -> list[dict[str, Any]]:
    points: list[dict[str, Any]] = []
    offset: int | None = 0
    while offset is not None:
        body = c.get(url, params={**params, "limit": 10000, "offset": offset}).json()
        points += body["points"]
        offset = body["page"]["next_offset"]
    return points


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Any]:
    path = tmp_path_factory.mktemp("api_load") / "tiny.db"
    return path, build_store(path, TINY)


def test_the_tiny_store_reads_back_through_the_api_with_its_counts(built: tuple[Path, Any]) -> None:
    path, report = built
    span = {"start": iso(START_S), "end": iso(TINY.end_s)}
    c = client_for(path)
    robots = c.get("/api/v1/robots").json()["robots"]
    assert [r["robot_id"] for r in robots] == TINY.robot_ids()
    assert all(r["health"] is not None and r["n_actuators"] == 3 for r in robots)
    estimates = residuals = unmonitored = 0
    for rid in TINY.robot_ids():
        base = f"/api/v1/robots/{rid}"
        health = c.get(f"{base}/health").json()
        assert [a["scope"] for a in health["actuators"]] == ["actuator:1", "actuator:2", "actuator:3"]
        assert health["robot"]["time"] == iso(TINY.end_s - 1e-3)  # the last stored output of the span
        estimates += len(all_points(c, f"{base}/estimates", **span))
        res = all_points(c, f"{base}/residuals", **span)
        residuals += len(res)
        unmonitored += len(c.get(f"{base}/unmonitored", params=span).json()["intervals"])
        out0, out1 = TINY.outage
        assert not [p for p in res if iso(START_S + out0) <= p["time"] < iso(START_S + out1)]  # nothing in the outage
    assert report.rows["estimates"] == estimates == TINY.robots * 12 * (TINY.span_s - (out1 - out0)) // 10
    assert report.rows["residual_aggregates"] == residuals == TINY.robots * 3 * (TINY.span_s - (out1 - out0))
    assert report.rows["unmonitored"] == unmonitored
    events = c.get("/api/v1/events", params={"limit": 1000}).json()["events"]
    assert len(events) == report.rows["events"]
    assert {e["kind"] for e in events} >= {"collision", "payload_fault", "wear"}
    collision = next(e for e in events if e["kind"] == "collision")
    evidence = c.get(f"/api/v1/events/{collision['event_id']}").json()["evidence"]
    assert evidence["time"][0] == collision["evidence_start"] and len(evidence["time"]) >= 2000  # 1 kHz, >= 2 s
    assert evidence["measured_kind"] == "effort" and len(evidence["position"][0]) == 3


def test_downsampled_series_of_the_benchmark_requests_answer(built: tuple[Path, Any]) -> None:
    path, _ = built
    c = client_for(path)
    conn = sqlite3.connect(path)
    ids = [r[0] for r in conn.execute("SELECT event_id FROM events WHERE kind = 'collision'")]
    conn.close()
    for endpoint in endpoints(TINY, ids):
        for url in endpoint.urls:
            answer = c.get(url)
            assert answer.status_code == 200, (endpoint.name, url, answer.text)
            body = answer.json()
            if "points" in body:  # every = range / 300: at most one point per step and series
                assert 0 < len(body["points"]) <= 301 * 12 and body["page"]["next_offset"] is None


def test_both_write_paths_give_the_same_answers(built: tuple[Path, Any], tmp_path: Path) -> None:
    path, bulk = built
    other = tmp_path / "through-the-store.db"
    through = build_store(other, TINY, write_path="store")
    assert through.rows == bulk.rows
    a, b = client_for(path), client_for(other)
    rid = TINY.robot_ids()[1]
    span = {"start": iso(START_S), "end": iso(TINY.end_s)}
    for url, params in [
        ("/api/v1/robots", {}),
        (f"/api/v1/robots/{rid}/health", {}),
        (f"/api/v1/robots/{rid}/estimates", {**span, "every": 60}),
        (f"/api/v1/robots/{rid}/residuals", {**span, "every": 7}),
        (f"/api/v1/robots/{rid}/unmonitored", span),
        ("/api/v1/events", {"limit": 1000}),
    ]:
        assert a.get(url, params=params).json() == b.get(url, params=params).json(), url
    ids = [e["event_id"] for e in a.get("/api/v1/events", params={"kind": "collision"}).json()["events"]]
    first = a.get(f"/api/v1/events/{ids[0]}").json()
    assert first == b.get(f"/api/v1/events/{ids[0]}").json()


def test_a_finished_build_is_reused_and_a_foreign_file_refused(built: tuple[Path, Any], tmp_path: Path) -> None:
    path, first = built
    again = build_store(path, TINY)
    assert again.reused and again.rows == first.rows
    foreign = tmp_path / "real.db"
    SqlStore(f"sqlite:///{foreign}").close()
    with pytest.raises(BenchmarkError, match="was not made by this benchmark"):
        build_store(foreign, TINY)
    other = tmp_path / "other.db"
    build_store(other, TINY)
    smaller = build_store(other, BuildSpec(days=TINY.days, robots=1, collisions_per_day=300.0))
    assert not smaller.reused and smaller.rows["residual_aggregates"] == first.rows["residual_aggregates"] // 2


def test_evidence_blobs_decode_as_wire_batches(built: tuple[Path, Any]) -> None:
    path, _ = built
    conn = sqlite3.connect(path)
    blobs = [r[0] for r in conn.execute("SELECT evidence FROM events WHERE evidence IS NOT NULL")]
    conn.close()
    assert blobs
    for blob in blobs:
        batch = decode_message(blob)
        assert batch.q.shape[1] == 3 and batch.gripping is not None
