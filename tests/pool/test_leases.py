"""The lease table and the fence on a real PostgreSQL: exclusive claims, expiry, release, fenced writes."""

from __future__ import annotations

import threading
from collections.abc import Iterator

import pytest
import sqlalchemy as sa

from shadow.pool.leases import LeaseTable, WorkerNameTakenError
from shadow.store import schema
from shadow.store.repository import Checkpoint, Fence, LeaseLostError, SqlStore, StepResults
from tests.pool.common import fresh_database, store_with_robots, wait_until_db_time
from tests.servers import PostgresServer

pytestmark = pytest.mark.postgres

ROBOTS = [f"kestrel/pool/r{i:02d}" for i in range(12)]


@pytest.fixture
def store(postgres_server: PostgresServer) -> Iterator[SqlStore]:
    s = store_with_robots(fresh_database(postgres_server, "leases"), ROBOTS)
    LeaseTable(s.engine, "setup", lease_s=1.0).ensure_robots(ROBOTS)
    yield s
    s.close()


def step(robot_id: str, seq: int) -> StepResults:
    return StepResults(
        robot_id,
        estimates=[
            {"time_s": 100.0 + seq, "parameter": "payload_mass_kg", "value": 0.2, "std": 0.01, "identifiable": True}
        ],  # fmt: skip
        checkpoint=Checkpoint(robot_id, seq, 100.0 + seq, b"state-%d" % seq),
    )


def checkpoint_token(store: SqlStore, robot_id: str) -> int | None:
    with store.engine.connect() as conn:
        t = schema.checkpoints
        return conn.execute(sa.select(t.c.fencing_token).where(t.c.robot_id == robot_id)).scalar_one_or_none()


def history(store: SqlStore, robot_id: str) -> list[dict[str, object]]:
    h = schema.lease_history
    with store.engine.connect() as conn:
        rows = conn.execute(sa.select(h).where(h.c.robot_id == robot_id).order_by(h.c.fencing_token))
        return [dict(r._mapping) for r in rows]


def test_workers_claiming_at_once_get_each_robot_exactly_once(store: SqlStore) -> None:
    tables = [LeaseTable(store.engine, f"w{i}", lease_s=30.0) for i in range(4)]
    got: dict[str, dict[str, int]] = {}
    barrier = threading.Barrier(len(tables))

    def claim(table: LeaseTable) -> None:
        barrier.wait()
        got[table.worker_id] = table.claim(ROBOTS, len(ROBOTS))

    threads = [threading.Thread(target=claim, args=(t,)) for t in tables]
    for th in threads:
        th.start()
    for th in threads:
        th.join(30)
    claimed = [rid for grants in got.values() for rid in grants]
    assert sorted(claimed) == ROBOTS  # every robot once, none twice (SKIP LOCKED, not a lost update)
    assert {token for grants in got.values() for token in grants.values()} == {1}
    owners = {row["robot_id"]: row["owner"] for row in tables[0].leases()}
    assert owners == {rid: w for w, grants in got.items() for rid in grants}
    assert all(len(history(store, rid)) == 1 for rid in ROBOTS)


def test_expired_lease_is_taken_over_under_a_new_token(store: SqlStore) -> None:
    a = LeaseTable(store.engine, "a", lease_s=0.6)
    b = LeaseTable(store.engine, "b", lease_s=0.6)
    assert a.claim(ROBOTS[:1], 1) == {ROBOTS[0]: 1}
    assert b.claim(ROBOTS[:1], 1) == {}  # still a's
    assert a.renew({ROBOTS[0]: 1}) == {ROBOTS[0]: 1}
    expiry = next(r["expires_at_s"] for r in a.leases() if r["robot_id"] == ROBOTS[0])
    wait_until_db_time(store, expiry)
    assert b.claim(ROBOTS[:1], 1) == {ROBOTS[0]: 2}
    assert a.renew({ROBOTS[0]: 1}) == {}  # a learns at its next renewal that the robot is gone
    old, new = history(store, ROBOTS[0])
    assert (old["owner"], old["end_cause"], old["ended_at_s"]) == ("a", "expired", expiry)
    assert new["owner"] == "b" and new["ended_at_s"] is None and new["acquired_at_s"] >= expiry


def test_release_frees_the_robot_at_once_and_closes_its_history(store: SqlStore) -> None:
    a = LeaseTable(store.engine, "a", lease_s=30.0)
    b = LeaseTable(store.engine, "b", lease_s=30.0)
    assert a.claim(ROBOTS[:2], 2) == {ROBOTS[0]: 1, ROBOTS[1]: 1}
    assert not a.release(ROBOTS[0], 7)  # not under that token
    assert not b.release(ROBOTS[0], 1)  # not b's
    assert a.release(ROBOTS[0], 1)
    assert b.claim(ROBOTS[:2], 2) == {ROBOTS[0]: 2}
    first, second = history(store, ROBOTS[0])
    assert first["end_cause"] == "released" and second["acquired_at_s"] >= first["ended_at_s"]


def test_fenced_write_is_refused_after_a_takeover_and_keeps_nothing(store: SqlStore) -> None:
    rid = ROBOTS[3]
    a = LeaseTable(store.engine, "a", lease_s=0.6)
    b = LeaseTable(store.engine, "b", lease_s=30.0)
    (token_a,) = a.claim([rid], 1).values()
    store.write_step(step(rid, 1), fence=Fence("a", token_a))
    assert checkpoint_token(store, rid) == token_a
    wait_until_db_time(store, next(r["expires_at_s"] for r in a.leases() if r["robot_id"] == rid))
    (token_b,) = b.claim([rid], 1).values()
    with pytest.raises(LeaseLostError, match=f"robot {rid}: write refused, worker 'a' no longer holds lease 1"):
        store.write_step(step(rid, 2), fence=Fence("a", token_a))
    assert store.checkpoint(rid) == Checkpoint(rid, 1, 101.0, b"state-1")  # rolled back entirely
    assert store.estimates(rid, start_s=101.5, end_s=200.0) == []
    with pytest.raises(LeaseLostError):
        store.prune_raw_batches(rid, older_than_s=1e12, fence=Fence("a", token_a))
    store.write_step(step(rid, 2), fence=Fence("b", token_b))
    assert checkpoint_token(store, rid) == token_b == 2
    with pytest.raises(LeaseLostError, match="no lease"):
        store.write_step(step("kestrel/pool/unleased", 1), fence=Fence("b", 1))


def test_fenced_write_is_refused_once_the_lease_expired_even_unclaimed(store: SqlStore) -> None:
    rid = ROBOTS[4]
    a = LeaseTable(store.engine, "a", lease_s=0.6)
    (token,) = a.claim([rid], 1).values()
    wait_until_db_time(store, next(r["expires_at_s"] for r in a.leases() if r["robot_id"] == rid))
    with pytest.raises(LeaseLostError, match="live False"):
        store.write_step(step(rid, 1), fence=Fence("a", token))
    assert a.renew({rid: token}) == {rid: token}  # nobody took it: renewing it is safe
    store.write_step(step(rid, 1), fence=Fence("a", token))
    assert store.checkpoint(rid) is not None


def test_claim_skips_a_lease_row_locked_by_a_stalled_write(store: SqlStore) -> None:
    rid = ROBOTS[5]
    a = LeaseTable(store.engine, "a", lease_s=0.6)
    b = LeaseTable(store.engine, "b", lease_s=30.0)
    a.claim([rid], 1)
    t = schema.robot_leases
    with store.engine.connect() as stalled:
        stalled.begin()
        stalled.execute(sa.select(t.c.owner).where(t.c.robot_id == rid).with_for_update(read=True))  # like a write
        wait_until_db_time(store, next(r["expires_at_s"] for r in a.leases() if r["robot_id"] == rid))
        assert b.claim([rid], 1) == {}  # skipped, not waited for
        stalled.rollback()
    assert b.claim([rid], 1) == {rid: 2}


def test_a_worker_name_is_one_process_at_a_time(store: SqlStore) -> None:
    first = LeaseTable(store.engine, "cell3-a", lease_s=1.0)
    first.join(host="alpha", pid=11)
    stop = threading.Event()

    def keep_beating() -> None:
        while not stop.wait(0.2):
            first.heartbeat()

    beating = threading.Thread(target=keep_beating)
    beating.start()
    try:
        second = LeaseTable(store.engine, "cell3-a", lease_s=1.0)
        with pytest.raises(WorkerNameTakenError, match="'cell3-a' is in use by a live process on alpha"):
            second.join(host="beta", pid=22)
    finally:
        stop.set()
        beating.join()
    second.join(host="beta", pid=22)  # the first stopped beating: its row expires and the name is free
    with pytest.raises(WorkerNameTakenError, match="taken over by another process"):
        first.heartbeat()
    assert second.heartbeat() == 1 and second.live_workers() == ["cell3-a"]
    second.leave()
    assert second.live_workers() == []
