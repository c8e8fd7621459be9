"""Pool members in one process, round by round, on a real PostgreSQL: sharing, rebalancing, losing leases.

Rounds are called by hand (``tick``) so every step of the protocol is seen; the pipelines, sessions and
broker probes are stand-ins that carry the fence and say how long they have been without a connection
(the MQTT and monitor side are covered in test_pool_processes.py).
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from shadow.api.app import create_app
from shadow.cli.serve import status_snapshot
from shadow.ingest.mqtt import MqttSettings
from shadow.pool.leases import LeaseTable
from shadow.pool.member import PoolMember
from shadow.service import RobotStatus, Service
from shadow.store.repository import Fence, LeaseLostError, SqlStore, StepResults, StoreUnavailableError
from tests.pool.common import fresh_database, store_with_robots, wait_until_db_time
from tests.servers import PostgresServer

pytestmark = pytest.mark.postgres

ROBOTS = [f"kestrel/share/r{i:02d}" for i in range(12)]


class StandInPipeline:
    """What Service and PoolMember use of a pipeline: id, status, fence, lease_lost, step.

    With a ``store``, a step writes an empty step under the fence and, refused, counts it and marks the
    pipeline ``lease_lost`` as :class:`shadow.service.RobotPipeline` does.
    """

    def __init__(self, robot_id: str, fence: Fence, store: SqlStore | None = None) -> None:
        self.robot_id = robot_id
        self.fence = fence
        self.store = store
        self.status = RobotStatus(robot_id)
        self.lease_lost = False
        self.detached = False

    def step(self) -> int:
        if self.store is not None:
            try:
                self.store.write_step(StepResults(self.robot_id), fence=self.fence)
            except LeaseLostError:
                self.status.fenced_steps += 1
                self.lease_lost = True
        return 0


class StandInSession:
    """What PoolMember and Service use of a robot's session: id, settings, stop, time without connection."""

    settings = MqttSettings(reconnect_min_delay_s=0.5, reconnect_max_delay_s=1.0)

    def __init__(self, robot_id: str) -> None:
        self.robot_id = robot_id
        self.away_s = 0.0
        self.stopped = False

    def unreachable_for_s(self) -> float:
        return self.away_s

    def stop(self) -> None:
        self.stopped = True


class StandInProbe:
    """A broker probe whose time out of reach the test sets."""

    def __init__(self) -> None:
        self.away_s = 0.0

    def start(self, *, wait_s: float = 0.0) -> bool:
        return self.away_s == 0.0

    def stop(self) -> None:
        pass

    def unreachable_for_s(self) -> float:
        return self.away_s


@pytest.fixture
def store(postgres_server: PostgresServer) -> Iterator[SqlStore]:
    s = store_with_robots(fresh_database(postgres_server, "member"), ROBOTS)
    yield s
    s.close()


def member(
    store: SqlStore,
    name: str,
    *,
    lease_s: float = 30.0,
    table: LeaseTable | None = None,
    probe: StandInProbe | None = None,
    sessions: dict[str, StandInSession] | None = None,
    writes: bool = False,
) -> PoolMember:
    """A joined member; with ``sessions`` every robot it follows gets a stand-in session, kept there by id;
    with ``writes`` its pipelines write (fenced) at every step."""

    def follow(robot_id: str, fence: Fence) -> tuple[Any, Any]:
        pipeline = StandInPipeline(robot_id, fence, store if writes else None)
        if sessions is None:
            return pipeline, None
        sessions[robot_id] = StandInSession(robot_id)
        return pipeline, sessions[robot_id]

    leases = table or LeaseTable(store.engine, name, lease_s=lease_s)
    m = PoolMember(
        leases, Service(store, []), ROBOTS, follow, heartbeat_s=leases.lease_s / 3, broker=probe, broker_grace_s=1.0
    )
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


def test_a_member_cut_off_from_the_broker_frees_its_robots_and_takes_its_share_back(store: SqlStore) -> None:
    probe = StandInProbe()
    a, b = member(store, "a", probe=probe), member(store, "b", probe=StandInProbe())
    for m in (a, b, a, b):
        m.tick()
    check_exclusive([a, b])
    probe.away_s = 0.5  # within the grace (1 s): a blip costs no hand-over
    a.tick()
    assert len(a.held) == 6 and a.in_pool and a.counters.broker_cutoffs == 0
    probe.away_s = 1.5  # past the grace: every robot freed at once, the worker row removed
    a.tick()
    assert not a.held and a.service.pipelines == [] and not a.in_pool
    assert a.counters.broker_cutoffs == 1 and a.counters.released == 6 and a.counters.lost == 0
    assert a.leases.live_workers() == ["b"]
    assert all(row["owner"] in (None, "b") for row in a.leases.leases())
    b.tick()  # alone in the pool now: claims the six a freed
    assert len(b.held) == 12
    a.tick()  # still out of reach: stays out, claims nothing
    assert not a.held and not a.in_pool and a.leases.live_workers() == ["b"]
    probe.away_s = 0.0  # the broker is back: a joins again and claims its share once b makes room
    for m in (a, b, a):
        m.tick()
    assert a.in_pool and a.leases.live_workers() == ["a", "b"]
    check_exclusive([a, b])
    assert [len(a.held), len(b.held)] == [6, 6]
    assert a.status()["broker_cutoffs"] == 1 and a.status()["robots_held"] == 6


def test_a_member_claims_nothing_while_its_probe_is_not_connected(store: SqlStore) -> None:
    probe = StandInProbe()
    probe.away_s = 0.2
    a = member(store, "a", probe=probe)
    a.tick()
    assert not a.held and a.in_pool  # still renewing its row: it may only be a blip
    probe.away_s = 0.0
    a.tick()
    assert len(a.held) == 12


def test_a_robot_whose_session_cannot_connect_goes_to_another_worker(store: SqlStore) -> None:
    sessions: dict[str, StandInSession] = {}
    a = member(store, "a", probe=StandInProbe(), sessions=sessions)
    a.tick()
    assert len(a.held) == 12
    stuck = ROBOTS[3]
    # the grace (1 s) plus the session's longest reconnect delay (1 s) without a connection, broker reachable
    sessions[stuck].away_s = 2.1
    a.tick()
    assert stuck not in a.held and sessions[stuck].stopped and a.counters.unreadable == 1
    a.tick()  # below its share (12) but does not take the robot straight back
    assert stuck not in a.held and len(a.held) == 11
    b = member(store, "b", probe=StandInProbe(), sessions={})
    b.tick()  # share 6, one robot free: the one a could not read
    assert set(b.held) == {stuck}


def test_the_status_route_and_the_metrics_carry_the_pool_counters(store: SqlStore) -> None:
    a = member(store, "a", probe=StandInProbe(), writes=True)
    a.tick()  # claims all twelve
    a.tick()  # renews them
    a.service.run_once()  # every pipeline writes under its fence
    victim = sorted(a.held)[0]
    a.leases.release(victim, a.held[victim])  # the lease moves on behind the pipeline's back
    a.service.run_once()  # that write is refused
    assert a.service.status.fenced_writes_refused == 1
    a.tick()  # gives the refused robot up and claims it again under a new token
    app = create_app(store, status_provider=lambda: status_snapshot(a.service, a))
    client = TestClient(app)
    pool = client.get("/api/v1/status").json()["pool"]
    expected = {
        "worker_id": "a",
        "in_pool": True,
        "broker_reachable": True,
        "live_workers": 1,
        "robots_held": 12,
        "lease_renewals": 12 + 11,  # second round, third round without the lease that moved on
        "robots_claimed": 13,
        "robots_released": 0,  # the refused robot's lease was no longer a's to release
        "leases_lost": 1,
        "robots_unreadable": 0,
        "broker_cutoffs": 0,
        "database_failures": 0,
        "fenced_writes_refused": 1,
    }
    assert pool == expected
    families = {f.name: f for f in text_string_to_metric_families(client.get("/metrics").text)}
    pool_families = {name: f for name, f in families.items() if name.startswith("shadow_pool_")}
    for name, family in pool_families.items():
        # Prometheus naming (prometheus.io/docs/practices/naming): snake case; counters are exposed as *_total
        assert re.fullmatch(r"shadow_pool_[a-z]+(_[a-z]+)*", name), name
        assert [s.labels for s in family.samples] == [{"worker_id": "a"}], name
        if family.type == "counter":
            assert [s.name for s in family.samples] == [f"{name}_total"], name
    values = {name: f.samples[0].value for name, f in pool_families.items()}
    assert (
        values["shadow_pool_fenced_writes_refused"] == 1.0
        and families["shadow_pool_fenced_writes_refused"].type == "counter"
    )
    assert values["shadow_pool_robots_held"] == 12.0 and families["shadow_pool_robots_held"].type == "gauge"
    assert values["shadow_pool_lease_renewals"] == 23.0 and values["shadow_pool_leases_lost"] == 1.0
    assert values["shadow_pool_broker_reachable"] == 1.0


def test_a_single_service_has_no_pool_status(store: SqlStore) -> None:
    client = TestClient(create_app(store, status_provider=lambda: status_snapshot(Service(store, []))))
    assert client.get("/api/v1/status").json()["pool"] is None
    assert "shadow_pool_" not in client.get("/metrics").text
