"""The read-only health API on a real SQLite store: routes, errors, guards, metrics, OpenAPI."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from shadow.api.app import create_app, openapi_document
from shadow.api.security import GuardSettings, token_digest
from shadow.ingest.wire import PositionUnit, SampleBatch, encode_binary
from shadow.robots.parameters import MeasuredQuantity
from shadow.store.repository import SqlStore, StepResults

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

ROBOT = "northfield/line3/picker-1"
T0 = 1_796_000_000.0  # 2026-11-29T...Z


def evidence_batch() -> bytes:
    t = T0 + 10.0 + np.arange(5) * 1e-3
    batch = SampleBatch(
        robot_id="picker-1",
        seq=41,
        position_unit=PositionUnit.RAD,
        effort_kind=MeasuredQuantity.EFFORT,
        t=t,
        q=np.full((5, 3), 0.3),
        effort=np.arange(15.0).reshape(5, 3),
        gripping=np.array([False, True, True, True, False]),
    )
    return encode_binary(batch)


@pytest.fixture
def store(tmp_path: Path) -> SqlStore:
    s = SqlStore(f"sqlite:///{tmp_path / 'api.db'}")
    s.register_robot(ROBOT, family="delta", n_actuators=3)
    s.register_robot("northfield/line3/hexa-1", family="hexapod", n_actuators=6)
    r = StepResults(ROBOT)
    for k in range(20):
        t = T0 + k
        r.estimates += [
            {"time_s": t, "parameter": "work_piece_mass", "value": 0.2 + 0.001 * k, "std": 0.01, "identifiable": True},
            {"time_s": t, "parameter": "coulomb_2", "value": 1.5, "std": 0.1, "identifiable": k > 3},
        ]
        r.residual_aggregates += [
            {"time_s": t, "actuator": a, "window_s": 1.0, "n_samples": 1000, "rms": 0.1, "peak": 0.3, "nis": 3.0}
            for a in (1, 2, 3)
        ]
    r.health = [
        {"time_s": T0 + 19, "scope": "robot", "state": "watch", "reasons": ["actuator 2 friction up 18 %"],
         "figures": {"wear_ratio": 1.18}},
        {"time_s": T0 + 19, "scope": "actuator:2", "state": "watch", "reasons": ["friction up"], "figures": {}},
        {"time_s": T0 + 19, "scope": "actuator:1", "state": "steady", "reasons": [], "figures": {}},
    ]  # fmt: skip
    r.events = [
        {"kind": "collision", "start_s": T0 + 10.001, "end_s": T0 + 10.003, "severity": "high", "summary": "impact",
         "figures": {"peak_force_n": 40.0}, "evidence": evidence_batch(), "evidence_start_s": T0 + 10.0,
         "evidence_end_s": T0 + 10.004, "source_seq": 41},
        {"kind": "payload_fault", "start_s": T0 + 12.0, "end_s": T0 + 12.5, "severity": "low",
         "summary": "double pick", "figures": {}, "source_seq": 43},
    ]  # fmt: skip
    r.unmonitored = [{"start_s": T0 + 5, "end_s": T0 + 6, "cause": "sequence_gap", "detail": "seq 9..12"}]
    r.dead_letters = [
        {"received_at_s": T0, "topic": "x", "reason_code": "bad_unit", "reason": "deg", "payload": b"{}"},
    ]
    s.write_step(r)
    return s


def client(store: SqlStore, **kwargs: object) -> TestClient:
    status = {"robots": {ROBOT: {"messages_processed": 7, "samples_processed": 70, "last_sample_time_s": T0}}}
    return TestClient(create_app(store, status_provider=lambda: status, **kwargs))  # type: ignore[arg-type]


def iso(t: float) -> str:
    from shadow.api.schemas import iso as to_iso

    return str(to_iso(t))


def test_robots_list_carries_health_and_the_advisory_notice(store: SqlStore) -> None:
    body = client(store).get("/api/v1/robots").json()
    assert "Advisory only" in body["notice"] and "ISO 13849" in body["notice"]
    robots = {r["robot_id"]: r for r in body["robots"]}
    assert robots[ROBOT]["health"]["state"] == "watch"
    assert robots[ROBOT]["health"]["reasons"] == ["actuator 2 friction up 18 %"]
    assert robots["northfield/line3/hexa-1"]["health"] is None


def test_robot_health_per_actuator(store: SqlStore) -> None:
    body = client(store).get("/api/v1/robots/northfield/line3/picker-1/health").json()
    assert body["robot"]["state"] == "watch"
    assert [a["scope"] for a in body["actuators"]] == ["actuator:1", "actuator:2"]


def test_estimates_with_range_downsampling_and_pages(store: SqlStore) -> None:
    c = client(store)
    url = "/api/v1/robots/northfield/line3/picker-1/estimates"
    q = {"start": iso(T0), "end": iso(T0 + 20), "parameter": "work_piece_mass"}
    full = c.get(url, params=q).json()
    assert len(full["points"]) == 20 and full["page"]["next_offset"] is None
    assert full["points"][0]["time"].endswith("Z")
    down = c.get(url, params={**q, "every": 5}).json()
    assert len(down["points"]) == 4  # last point of each 5 s step
    first = c.get(url, params={**q, "limit": 8}).json()
    second = c.get(url, params={**q, "limit": 8, "offset": 8}).json()
    assert first["page"]["next_offset"] == 8
    assert [p["value"] for p in first["points"] + second["points"]] == [p["value"] for p in full["points"][:16]]
    both = c.get(url, params={"start": iso(T0), "end": iso(T0 + 20)}).json()
    assert {p["parameter"] for p in both["points"]} == {"work_piece_mass", "coulomb_2"}
    assert any(not p["identifiable"] for p in both["points"])


def test_residuals_and_unmonitored(store: SqlStore) -> None:
    c = client(store)
    base = "/api/v1/robots/northfield/line3/picker-1"
    res = c.get(f"{base}/residuals", params={"start": iso(T0), "end": iso(T0 + 2)}).json()
    assert [(p["actuator"], p["rms"]) for p in res["points"]] == [(a, 0.1) for a in (1, 2, 3)] * 2
    gaps = c.get(f"{base}/unmonitored", params={"start": iso(T0), "end": iso(T0 + 20)}).json()
    assert gaps["intervals"][0]["cause"] == "sequence_gap"


def test_events_filter_and_detail_with_evidence(store: SqlStore) -> None:
    c = client(store)
    listed = c.get("/api/v1/events", params={"kind": "collision"}).json()
    assert [e["summary"] for e in listed["events"]] == ["impact"]
    detail = c.get(f"/api/v1/events/{listed['events'][0]['event_id']}").json()
    ev = detail["evidence"]
    assert len(ev["time"]) == 5 and ev["measured"][1] == [3.0, 4.0, 5.0]
    assert ev["gripping"] == [False, True, True, True, False]
    assert c.get("/api/v1/events", params={"robot_id": ROBOT, "start": iso(T0 + 11)}).json()["events"][0]["kind"] == (
        "payload_fault"
    )


def test_status_counts(store: SqlStore) -> None:
    body = client(store).get("/api/v1/status").json()
    assert body["dead_letters_by_reason"] == {"bad_unit": 1}
    assert body["robots"][0]["messages_processed"] == 7 and body["robots"][0]["lag_s"] > 0


@pytest.mark.parametrize("method", ["POST", "PUT", "PATCH", "DELETE", "OPTIONS"])
def test_every_writing_method_is_refused(store: SqlStore, method: str) -> None:
    for path in ("/api/v1/robots", "/api/v1/events/1", "/metrics", "/nope"):
        r = client(store).request(method, path)
        assert r.status_code == 405, (method, path)
        assert r.json()["error"] == "read_only"
        assert r.headers["allow"] == "GET, HEAD"


def test_head_is_get_without_body(store: SqlStore) -> None:
    c = client(store)
    r = c.head("/api/v1/robots")
    assert r.status_code == 200 and r.content == b""
    assert int(r.headers["content-length"]) == len(c.get("/api/v1/robots").content)


def test_errors_are_consistent_json(store: SqlStore) -> None:
    c = client(store)
    cases = [
        ("/api/v1/robots/northfield/line3/nobody/health", 404, "not_found"),
        ("/api/v1/events/999", 404, "not_found"),
        ("/api/v1/robots/northfield/line3/picker-1/estimates?start=yesterday", 400, "bad_time"),
        (
            f"/api/v1/robots/northfield/line3/picker-1/estimates?start={iso(T0 + 5)}&end={iso(T0)}",
            400,
            "bad_time_range",
        ),
        ("/api/v1/robots/northfield/line3/picker-1/estimates?limit=0", 422, "bad_request"),
        ("/api/v1/events/abc", 422, "bad_request"),
        ("/no/such/route", 404, "not_found"),
    ]
    for url, status, code in cases:
        r = c.get(url)
        assert r.status_code == status, url
        assert r.json()["error"] == code and r.json()["detail"], url


def test_bearer_tokens_are_checked_against_digests(store: SqlStore) -> None:
    c = client(store, guard=GuardSettings(token_digests=(token_digest("s3cret-token"),)))
    assert c.get("/api/v1/robots").status_code == 401
    assert c.get("/api/v1/robots", headers={"Authorization": "Bearer wrong"}).status_code == 401
    assert c.get("/api/v1/robots", headers={"Authorization": "Bearer s3cret-token"}).status_code == 200
    assert c.get("/health/live").status_code == 200


def test_rate_limit_answers_429(store: SqlStore) -> None:
    c = client(store, guard=GuardSettings(rate_per_s=0.001, burst=3))
    codes = [c.get("/health/live").status_code for _ in range(5)]
    assert codes == [200, 200, 200, 429, 429]


def test_prometheus_metrics_parse_and_follow_naming(store: SqlStore, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("shadow.api.metrics.time.time", lambda: T0 + 20)
    text = client(store).get("/metrics").text
    families = {f.name: f for f in text_string_to_metric_families(text)}
    assert families["shadow_events"].type == "counter"
    counts = {(s.labels["kind"], s.value) for s in families["shadow_events"].samples if s.name == "shadow_events_total"}
    assert counts == {("collision", 1.0), ("payload_fault", 1.0)}
    mass = [s for s in families["shadow_payload_mass_kilograms"].samples]
    assert mass[0].labels == {"robot_id": ROBOT, "part": "work_piece"} and mass[0].value == pytest.approx(0.219)
    assert "shadow_friction_coulomb_newton_metres" in families
    assert {s.labels["actuator"] for s in families["shadow_residual_rms_newton_metres"].samples} == {"1", "2", "3"}
    assert "watch" in {s.labels["state"] for s in families["shadow_health_state"].samples}


def test_openapi_is_get_only_and_every_answer_has_a_schema(store: SqlStore) -> None:
    doc = openapi_document(create_app(store))
    assert doc["paths"]
    for path, ops in doc["paths"].items():
        assert set(ops) == {"get"}, path
        ok = ops["get"]["responses"]["200"]
        assert "content" in ok, path
        for status, answer in ops["get"]["responses"].items():
            if status != "200":
                assert answer["content"]["application/json"]["schema"], (path, status)
