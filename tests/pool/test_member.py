"""Pool members in one process, round by round, on a real PostgreSQL: sharing, rebalancing, losing leases.

Rounds are called by hand (``tick``) so every step of the protocol is seen; the pipelines are stand-ins
that only carry the fence (the MQTT and monitor side are covered in test_pool_processes.py).
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from typing import Any

import pytest

from shadow.pool.leases import LeaseTable
from shadow.pool.member import PoolMember
from shadow.service import RobotStatus, Service
from shadow.store.repository import Fence, SqlStore, StoreUnavailableError
from tests.pool.common import fresh_database, store_with_robots, wait_until_db_time
from tests.servers import PostgresServer

pytestmark = pytest.mark.postgres

ROBOTS = [f"kestrel/share/r{i:02d}" for i in range(12)]


class StandInPipeline:
    """What Service and PoolMember use of a pipeline: id, status, fence, lease_lost, step."""

    def __init__(self, robot_id: str, fence: Fence) -> None:
        self.robot_id = robot_id
        self.fence = fence
        self.status = RobotStatus(robot_id)
        self.lease_lost = False

    def step(self) -> int:
        return 0


@pytest.fixture
def store(postgres_server: PostgresServer) -> Iterator[SqlStore]:
    s = store_with_robots(fresh_database(postgres_server, "member"), ROBOTS)
    yield s
    s.close()


def member(store: SqlStore, name: str, *, lease_s: float = 30.0, table: LeaseTable | None = None) -> PoolMember:
    def follow(robot_id: str, fence: Fence) -> tuple[Any, None]:
        return StandInPipeline(robot_id, fence), None

    leases = table or LeaseTable(store.engine, name, lease_s=lease_s)
    m = PoolMember(leases, Service(store, []), ROBOTS, follow, heartbeat_s=leases.lease_s / 3)
    m.join(host="test", pid=1)
    return m


def check_exclusive(members: list[PoolMember]) -> None:
    """Held sets are disjoint, cover every robot, match the lease table and what each service follows."""
    held = [set(m.held) for m in members]
    assert sorted(r for h in held for r in h) == ROBOTS
    rows = {row["robot_id"]: (row["owner"], row["fencing_token"]) for row in members[0].leases.leases()}
    for m in members:
        assert {p.robot_id for p in m.service.pipelines} == set(m.held)
        assert all(rows[r] == (m.worker_id, token) for r, token in m.held.items())
        assert all(p.fence == Fence(m.worker_id, m.held[p.robot_id]) for p in m.service.pipelines)


def test_members_share_the_robots_as_workers_join_and_leave(store: SqlStore) -> None:
    a = member(store, "a")
    a.tick()
    assert len(a.held) == 12  # alone: everything
    b = member(store, "b")
    b.tick()  # share 6, nothing free yet
    assert not b.held
    a.tick()  # gives up its excess
    assert len(a.held) == 6
    b.tick()
    check_exclusive([a, b])
    c = member(store, "c")
    for m in (c, a, b, c):
        m.tick()
    check_exclusive([a, b, c])
    assert [len(m.held) for m in (a, b, c)] == [4, 4, 4] == [math.ceil(12 / 3)] * 3
    b.stop()  # leaves: releases its robots and its worker row
    assert not b.held and b.service.pipelines == []
    for m in (a, c):
        m.tick()
    check_exclusive([a, c])
    assert [len(m.held) for m in (a, c)] == [6, 6]
    assert a.counters.lost == c.counters.lost == 0


def test_a_member_that_stalled_past_its_lease_lets_go_of_what_was_taken(store: SqlStore) -> None:
    a = member(store, "a", lease_s=0.9)
    a.tick()
    assert len(a.held) == 12
    b = member(store, "b", lease_s=30.0)
    b.tick()  # a is live: share 6, nothing free
    assert not b.held
    # a stops renewing (stalled); its worker row and its leases expire
    wait_until_db_time(store, max(r["expires_at_s"] for r in a.leases.leases()))
    b.tick()  # alone now: takes all twelve over
    assert len(b.held) == 12 and all(token == 2 for token in b.held.values())
    a.tick()  # resumes: heartbeat revives its row, renewal finds nothing
    assert not a.held and a.service.pipelines == [] and a.counters.lost == 12
    b.tick()
    a.tick()
    check_exclusive([a, b])
    assert [len(a.held), len(b.held)] == [6, 6]


def test_a_pipeline_refused_by_the_fence_is_given_up_and_claimed_again(store: SqlStore) -> None:
    a = member(store, "a")
    a.tick()
    refused = a.service.pipelines[0]
    refused.lease_lost = True
    a.tick()  # detached and released, then (share 12) claimed again under a new token with a new pipeline
    assert a.counters.lost == 1 and a.counters.released == 1
    assert a.held[refused.robot_id] == 2 and refused not in a.service.pipelines
    check_exclusive([a])


class FlakyLeaseTable(LeaseTable):
    """A lease table whose database goes away on demand."""

    down = False

    def heartbeat(self) -> int:
        if self.down:
            raise StoreUnavailableError("database unreachable: connection refused (test)")
        return super().heartbeat()


def test_a_member_cut_from_the_database_detaches_after_a_lease_length(store: SqlStore) -> None:
    table = FlakyLeaseTable(store.engine, "a", lease_s=0.9)
    a = member(store, "a", table=table)
    a.tick()
    assert len(a.held) == 12
    table.down = True
    a.tick()  # within the lease: keeps following
    assert len(a.held) == 12 and a.counters.database_failures == 1
    time.sleep(0.9)  # past a lease length since the last renewal, by this process's clock
    a.tick()
    assert not a.held and a.service.pipelines == []
    table.down = False
    a.tick()
    assert len(a.held) == 12  # its old leases expired; claimed again under new tokens
    assert set(a.held.values()) == {2}
