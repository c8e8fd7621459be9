"""The store on SQLite (WAL) and on a real PostgreSQL: migrations, atomic steps, reads, dead letters."""

from __future__ import annotations

import socket
from collections.abc import Iterator
from pathlib import Path

import pytest
import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext

from shadow.errors import ConfigurationError
from shadow.store import schema
from shadow.store.database import current_revision, head_revision
from shadow.store.repository import Checkpoint, SqlStore, StepResults, StoreUnavailableError, split_robot_id
from tests.servers import PostgresServer

ROBOT = "northfield/line3/picker-1"


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def store(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[SqlStore]:
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'shadow.db'}"
    else:
        server: PostgresServer = request.getfixturevalue("postgres_server")
        name = f"t_{abs(hash(request.node.nodeid)) % 10**9}"
        admin = sa.create_engine(server.url(), isolation_level="AUTOCOMMIT")
        with admin.connect() as conn:
            conn.execute(sa.text(f"DROP DATABASE IF EXISTS {name}"))
            conn.execute(sa.text(f"CREATE DATABASE {name}"))
        admin.dispose()
        url = server.url(name)
    s = SqlStore(url)
    s.register_robot(ROBOT, family="delta", n_actuators=3)
    yield s
    s.close()


def step(t: float, seq: int) -> StepResults:
    return StepResults(
        robot_id=ROBOT,
        estimates=[
            {"time_s": t, "parameter": "payload_mass_kg", "value": 0.25, "std": 0.004, "identifiable": True},
            {"time_s": t, "parameter": "coulomb_nm[0]", "value": 1.9, "std": 0.05, "identifiable": False},
        ],
        residual_aggregates=[
            {"time_s": t, "actuator": a, "window_s": 1.0, "n_samples": 1000, "rms": 0.1 * a, "peak": 0.4, "nis": 3.1}
            for a in range(3)
        ],
        health=[
            {"time_s": t, "scope": "robot", "state": "steady", "reasons": [], "figures": {}},
            {"time_s": t, "scope": "actuator:0", "state": "steady", "reasons": [], "figures": {"wear_ratio": 1.0}},
        ],
        raw_batches=[
            {"seq": seq, "first_time_s": t, "last_time_s": t + 0.009, "n_samples": 10, "payload": b"\x01" * 40}
        ],
        checkpoint=Checkpoint(ROBOT, seq, t + 0.009, b"state-%d" % seq),
    )


def test_migrations_build_exactly_the_declared_schema(store: SqlStore) -> None:
    assert current_revision(store.engine) == head_revision()
    with store.engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn), schema.metadata)
    assert diff == []


def test_sqlite_runs_in_wal_mode(tmp_path: Path) -> None:
    s = SqlStore(f"sqlite:///{tmp_path / 'x.db'}")
    with s.engine.connect() as conn:
        assert conn.execute(sa.text("PRAGMA journal_mode")).scalar_one() == "wal"
        assert conn.execute(sa.text("PRAGMA foreign_keys")).scalar_one() == 1
    s.close()


def test_a_step_and_its_checkpoint_read_back(store: SqlStore) -> None:
    store.write_step(step(100.0, 7))
    store.write_step(step(101.0, 8))
    cp = store.checkpoint(ROBOT)
    assert cp == Checkpoint(ROBOT, 8, 101.009, b"state-8")
    est = store.estimates(ROBOT, start_s=100.0, end_s=102.0, parameters=["payload_mass_kg"])
    assert [(r["time_s"], r["value"]) for r in est] == [(100.0, 0.25), (101.0, 0.25)]
    agg = store.residual_aggregates(ROBOT, start_s=100.5, end_s=102.0)
    assert [(r["time_s"], r["actuator"]) for r in agg] == [(101.0, 0), (101.0, 1), (101.0, 2)]
    health = store.latest_health(ROBOT)
    assert {(h["scope"], h["time_s"]) for h in health} == {("robot", 101.0), ("actuator:0", 101.0)}
    assert [b["seq"] for b in store.raw_batches(ROBOT, start_s=0, end_s=1e12)] == [7, 8]
    assert store.prune_raw_batches(ROBOT, older_than_s=101.0) == 1
    assert [b["seq"] for b in store.raw_batches(ROBOT, start_s=0, end_s=1e12)] == [8]


def test_a_failing_step_leaves_nothing_behind(store: SqlStore) -> None:
    store.write_step(step(100.0, 7))
    bad = step(101.0, 8)
    bad.estimates.append(dict(bad.estimates[0]))  # duplicate primary key: the whole step must roll back
    with pytest.raises(sa.exc.IntegrityError):
        store.write_step(bad)
    assert store.checkpoint(ROBOT) == Checkpoint(ROBOT, 7, 100.009, b"state-7")
    assert store.estimates(ROBOT, start_s=100.5, end_s=200.0) == []
    assert store.residual_aggregates(ROBOT, start_s=100.5, end_s=200.0) == []


def test_events_filter_and_keep_their_evidence(store: SqlStore) -> None:
    base = {"end_s": 0.0, "severity": "high", "figures": {"peak_force_n": 120.0}, "source_seq": 3}
    r = step(50.0, 3)
    r.events = [
        {
            **base,
            "kind": "collision",
            "start_s": 10.0,
            "summary": "impact",
            "evidence": b"raw",
            "evidence_start_s": 9.0,
        },
        {**base, "kind": "payload_fault", "start_s": 20.0, "summary": "double pick"},
    ]
    store.write_step(r)
    listed = store.events(robot_id=ROBOT, kind="collision")
    assert [e["start_s"] for e in listed] == [10.0]
    assert "evidence" not in listed[0]
    one = store.event(listed[0]["event_id"])
    assert one is not None and one["evidence"] == b"raw" and one["figures"] == {"peak_force_n": 120.0}
    assert [e["kind"] for e in store.events(start_s=15.0)] == ["payload_fault"]
    assert store.event(999_999) is None


def test_dead_letters_keep_reason_and_first_bytes(store: SqlStore) -> None:
    n = store.write_dead_letters(
        [
            {"received_at_s": 1.0, "topic": "t/a", "reason_code": "bad_json", "reason": "x", "payload": b"{" * 1000},
            {"received_at_s": 2.0, "topic": "t/b", "reason_code": "bad_json", "reason": "y", "payload": b"["},
            {
                "received_at_s": 3.0,
                "topic": "t/c",
                "robot_id": ROBOT,
                "reason_code": "bad_shape",
                "reason": "z",
                "payload": b"\x00\x01",
            },
        ]  # fmt: skip
    )
    assert n == 3
    assert store.dead_letter_counts() == {"bad_json": 2, "bad_shape": 1}
    newest = store.dead_letters(limit=3)
    assert newest[-1]["payload_size"] == 1000 and len(newest[-1]["payload_head"]) == 256


def test_unmonitored_intervals_overlap_query(store: SqlStore) -> None:
    r = StepResults(
        robot_id=ROBOT,
        unmonitored=[
            {"start_s": 10.0, "end_s": 12.0, "cause": "sequence_gap", "detail": "seq 5-9 missing"},
            {"start_s": 30.0, "end_s": 31.0, "cause": "service_down"},
        ],
    )
    store.write_step(r)
    got = store.unmonitored_intervals(ROBOT, start_s=11.0, end_s=20.0)
    assert [(g["start_s"], g["cause"]) for g in got] == [(10.0, "sequence_gap")]


def test_unreachable_postgres_is_named() -> None:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
        with pytest.raises(StoreUnavailableError, match=rf"127.0.0.1:{port}.* unreachable"):
            SqlStore(f"postgresql://shadow@127.0.0.1:{port}/x")


def test_bad_urls_and_ids_are_named() -> None:
    with pytest.raises(ConfigurationError, match="only sqlite and postgresql"):
        SqlStore("mysql://a@b/c")
    with pytest.raises(ConfigurationError, match="must be 'site/cell/robot'"):
        split_robot_id("a/b")
