"""What the pool tests share: a fresh PostgreSQL database per test, registered robots, polling."""

from __future__ import annotations

import itertools
import os
import time

import sqlalchemy as sa

from shadow.store.repository import SqlStore
from tests.servers import PostgresServer

_numbers = itertools.count()


def fresh_database(server: PostgresServer, prefix: str) -> str:
    """URL of a new, empty database on the session's server (named after the test and this process)."""
    name = f"{prefix}_{os.getpid()}_{next(_numbers)}"
    admin = sa.create_engine(server.url(), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f"DROP DATABASE IF EXISTS {name}"))
        conn.execute(sa.text(f"CREATE DATABASE {name}"))
    admin.dispose()
    return server.url(name)


def store_with_robots(url: str, robot_ids: list[str]) -> SqlStore:
    """A migrated store with the robots registered (deltas, 3 actuators)."""
    store = SqlStore(url)
    for rid in robot_ids:
        store.register_robot(rid, family="delta", n_actuators=3)
    return store


def wait_until_db_time(store: SqlStore, t_s: float, *, timeout_s: float = 30.0) -> None:
    """Sleep until the database's clock has passed ``t_s``."""
    deadline = time.monotonic() + timeout_s
    with store.engine.connect() as conn:
        while conn.execute(sa.text("select extract(epoch from clock_timestamp())::float8")).scalar_one() <= t_s:
            if time.monotonic() > deadline:
                raise TimeoutError(f"database clock did not pass {t_s} within {timeout_s} s")
            time.sleep(0.05)
