"""What the service tests share: a configuration for one robot, starting a service, waiting, reading back."""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

import sqlalchemy as sa

from shadow.cli.serve import build_service
from shadow.config import RobotEntry, ServiceConfig
from shadow.ingest.mqtt import MqttSettings
from shadow.ingest.topics import RobotAddress
from shadow.service import Service
from shadow.store import schema
from shadow.store.repository import SqlStore
from tests.synthetic import EXAMPLE_DELTA


def unique_robot(prefix: str) -> str:
    """A robot id not used by an earlier test on the same (session-wide) broker."""
    return f"{prefix}{int(time.time() * 1000) % 100000}"


def config_for(host: str, port: int, database_url: str, robot: str, *, cell: str = "line4") -> ServiceConfig:
    return ServiceConfig(
        mqtt=MqttSettings(host=host, port=port),
        database_url=database_url,
        robots=(RobotEntry(RobotAddress("kestrel", cell, robot), Path(EXAMPLE_DELTA)),),
    )


def wait_until(predicate: Callable[[], bool], timeout_s: float = 60.0) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.02)
    return False


def start(config: ServiceConfig, store: SqlStore) -> Service:
    """A started service whose robot sessions are all connected."""
    service = build_service(config, store)
    service.start()
    assert wait_until(lambda: all(s.connected.is_set() for s in service.subscriptions), 10)
    return service


def raw_seqs(store: SqlStore, robot_id: str) -> list[int]:
    """Sequence numbers of the raw batches stored for a robot, in order."""
    with store.engine.connect() as conn:
        rows = conn.execute(
            sa.select(schema.raw_batches.c.seq).where(schema.raw_batches.c.robot_id == robot_id).order_by("seq")
        )
        return [int(r[0]) for r in rows]
