"""The lease table on PostgreSQL: which worker follows which robot, for how long, under which fencing token.

One row per robot in ``robot_leases`` (owner, expiry, fencing token) and one per worker in ``workers``
(heartbeat, expiry). Every time is the database server's clock (``clock_timestamp()``), never a
worker's, so workers on machines whose clocks disagree still agree on who holds what.

* **Claim**: ``SELECT ... FOR UPDATE SKIP LOCKED`` over the free or expired rows, then one ``UPDATE``
  that sets the owner, adds 1 to the fencing token and sets the expiry; workers claiming at the same
  moment skip each other's rows instead of waiting, and a row locked by a write of its (possibly
  stalled) owner is skipped too. A new ``lease_history`` row records the grant; the row of the
  previous grant gets its end (the old expiry, cause ``expired``) in the same transaction.
* **Renew** (every heartbeat): extends the rows whose owner *and* token are still this worker's;
  a robot missing from the answer has been taken over.
* **Release** (rebalancing, shutdown): owner set to NULL, history row closed with cause ``released``.
* **Workers**: a worker is live while its row's expiry is in the future; the number of live workers
  sets each worker's share (:mod:`shadow.pool.balance`).

A worker name is one process at a time: :meth:`LeaseTable.join` waits for an earlier process of the
same name to expire (a restart after a crash), and refuses when that row is still being renewed (two
processes configured with one name). The heartbeat checks the process's random incarnation, so the
loser of a simultaneous start finds out at its first heartbeat.
"""

from __future__ import annotations

import contextlib
import logging
import secrets
import time
from collections.abc import Iterable, Iterator, Mapping
from typing import Any

import sqlalchemy as sa
from sqlalchemy.dialects.postgresql import insert

from shadow.errors import ConfigurationError, ShadowError
from shadow.store import schema
from shadow.store.repository import DATABASE_NOW_S, StoreUnavailableError

log = logging.getLogger(__name__)

_NOW = sa.literal_column(DATABASE_NOW_S, sa.Float)


class WorkerNameTakenError(ShadowError, RuntimeError):
    """Another live process uses this worker name."""


class LeaseTable:
    """The pool's rows, seen by one worker (``worker_id``), on the store's PostgreSQL engine."""

    def __init__(self, engine: sa.Engine, worker_id: str, *, lease_s: float) -> None:
        if engine.dialect.name != "postgresql":
            raise ConfigurationError(f"a worker pool needs PostgreSQL, the store is {engine.dialect.name}")
        if not lease_s > 0:
            raise ConfigurationError(f"pool.lease_s: must be > 0, got {lease_s}")
        self.engine = engine
        self.worker_id = worker_id
        self.lease_s = float(lease_s)
        self.incarnation = secrets.token_hex(8)

    @contextlib.contextmanager
    def _begin(self) -> Iterator[sa.Connection]:
        try:
            with self.engine.begin() as conn:
                yield conn
        except (sa.exc.OperationalError, sa.exc.InterfaceError) as exc:
            raise StoreUnavailableError(f"lease table: database unreachable: {exc.orig}") from exc

    def now_s(self) -> float:
        """The database's clock [s since the epoch]."""
        with self._begin() as conn:
            return float(conn.execute(sa.select(_NOW)).scalar_one())

    # --- workers ------------------------------------------------------------------------------
    def join(self, *, host: str, pid: int, wait_s: float | None = None) -> None:
        """Register this process under its worker name (see the module docstring for a name in use)."""
        w = schema.workers
        deadline = time.monotonic() + (2.0 * self.lease_s if wait_s is None else wait_s)
        first_beat: float | None = None
        while True:
            with self._begin() as conn:
                row = conn.execute(
                    sa.select(w.c.host, w.c.pid, w.c.heartbeat_at_s, (w.c.expires_at_s > _NOW).label("live")).where(
                        w.c.worker_id == self.worker_id
                    )
                ).first()
                if row is None or not row.live:
                    now = float(conn.execute(sa.select(_NOW)).scalar_one())
                    values = {
                        "worker_id": self.worker_id,
                        "incarnation": self.incarnation,
                        "host": host[:200],
                        "pid": pid,
                        "started_at_s": now,
                        "heartbeat_at_s": now,
                        "expires_at_s": now + self.lease_s,
                    }
                    statement = insert(w).values(values)
                    conn.execute(
                        statement.on_conflict_do_update(
                            index_elements=["worker_id"], set_={k: v for k, v in values.items() if k != "worker_id"}
                        )
                    )
                    return
            if first_beat is None:
                first_beat = float(row.heartbeat_at_s)
                log.warning("worker name %r: an earlier process (%s pid %s) is still live; waiting for it to expire",
                            self.worker_id, row.host, row.pid)  # fmt: skip
            elif float(row.heartbeat_at_s) != first_beat or time.monotonic() > deadline:
                raise WorkerNameTakenError(
                    f"worker name {self.worker_id!r} is in use by a live process on {row.host} (pid {row.pid}); "
                    "give every worker its own name (--worker NAME or [pool] worker)"
                )
            time.sleep(min(0.25, self.lease_s / 4))

    def heartbeat(self) -> int:
        """Extend this worker's row; returns the number of live workers (this one included)."""
        w = schema.workers
        with self._begin() as conn:
            updated = conn.execute(
                w.update()
                .where(w.c.worker_id == self.worker_id, w.c.incarnation == self.incarnation)
                .values(heartbeat_at_s=_NOW, expires_at_s=_NOW + self.lease_s)
            )
            if not updated.rowcount:
                raise WorkerNameTakenError(f"worker name {self.worker_id!r} was taken over by another process")
            return int(conn.execute(sa.select(sa.func.count()).where(w.c.expires_at_s > _NOW)).scalar_one())

    def leave(self) -> None:
        """Remove this worker's row, so the others take up its share at their next heartbeat."""
        w = schema.workers
        with self._begin() as conn:
            conn.execute(w.delete().where(w.c.worker_id == self.worker_id, w.c.incarnation == self.incarnation))

    def live_workers(self) -> list[str]:
        w = schema.workers
        with self._begin() as conn:
            rows = conn.execute(sa.select(w.c.worker_id).where(w.c.expires_at_s > _NOW).order_by(w.c.worker_id))
            return [str(r[0]) for r in rows]

    # --- leases -------------------------------------------------------------------------------
    def ensure_robots(self, robot_ids: Iterable[str]) -> None:
        """A free lease row for every robot that has none (the robots must be registered)."""
        rows = [{"robot_id": r, "owner": None, "fencing_token": 0, "expires_at_s": 0.0} for r in robot_ids]
        if rows:
            with self._begin() as conn:
                conn.execute(insert(schema.robot_leases).on_conflict_do_nothing(index_elements=["robot_id"]), rows)

    def claim(self, robot_ids: Iterable[str], n: int) -> dict[str, int]:
        """Take up to ``n`` free or expired robots among ``robot_ids``; returns robot -> new fencing token."""
        ids = sorted(set(robot_ids))
        if n <= 0 or not ids:
            return {}
        t, h = schema.robot_leases, schema.lease_history
        with self._begin() as conn:
            now = float(conn.execute(sa.select(_NOW)).scalar_one())
            free = conn.execute(
                sa.select(t.c.robot_id, t.c.owner, t.c.fencing_token, t.c.expires_at_s)
                .where(t.c.robot_id.in_(ids), sa.or_(t.c.owner.is_(None), t.c.expires_at_s <= now))
                .order_by(t.c.robot_id)
                .limit(n)
                .with_for_update(skip_locked=True)
            ).all()
            granted: dict[str, int] = {}
            for row in free:
                token = int(row.fencing_token) + 1
                conn.execute(
                    t.update()
                    .where(t.c.robot_id == row.robot_id)
                    .values(
                        owner=self.worker_id, fencing_token=token, acquired_at_s=now, expires_at_s=now + self.lease_s
                    )
                )
                if row.owner is not None:  # taken over after expiry: the old grant ended at its expiry
                    conn.execute(
                        h.update()
                        .where(
                            h.c.robot_id == row.robot_id,
                            h.c.fencing_token == row.fencing_token,
                            h.c.ended_at_s.is_(None),
                        )  # fmt: skip
                        .values(ended_at_s=float(row.expires_at_s), end_cause="expired")
                    )
                    log.warning("robot %s: lease %d of %s expired; taken over as lease %d",
                                row.robot_id, row.fencing_token, row.owner, token)  # fmt: skip
                conn.execute(
                    h.insert(),
                    {"robot_id": row.robot_id, "fencing_token": token, "owner": self.worker_id, "acquired_at_s": now},
                )
                granted[str(row.robot_id)] = token
            return granted

    def renew(self, held: Mapping[str, int]) -> dict[str, int]:
        """Extend the leases still this worker's under the same token; returns those (robot -> token)."""
        if not held:
            return {}
        t = schema.robot_leases
        pairs = [(rid, token) for rid, token in held.items()]
        with self._begin() as conn:
            rows = conn.execute(
                t.update()
                .where(t.c.owner == self.worker_id, sa.tuple_(t.c.robot_id, t.c.fencing_token).in_(pairs))
                .values(expires_at_s=_NOW + self.lease_s)
                .returning(t.c.robot_id, t.c.fencing_token)
            ).all()
        return {str(r.robot_id): int(r.fencing_token) for r in rows}

    def release(self, robot_id: str, token: int) -> bool:
        """Give a robot up (it is free at once); False when it was not this worker's under ``token``."""
        t, h = schema.robot_leases, schema.lease_history
        with self._begin() as conn:
            now = float(conn.execute(sa.select(_NOW)).scalar_one())
            updated = conn.execute(
                t.update()
                .where(t.c.robot_id == robot_id, t.c.owner == self.worker_id, t.c.fencing_token == token)
                .values(owner=None, expires_at_s=now)
            )
            if not updated.rowcount:
                return False
            conn.execute(
                h.update()
                .where(h.c.robot_id == robot_id, h.c.fencing_token == token)
                .values(ended_at_s=now, end_cause="released")
            )
            return True

    def leases(self) -> list[dict[str, Any]]:
        """Every lease row with ``live`` (unexpired on the database's clock), for status and tests."""
        t = schema.robot_leases
        with self._begin() as conn:
            rows = conn.execute(sa.select(t, (t.c.expires_at_s > _NOW).label("live")).order_by(t.c.robot_id))
            return [dict(r._mapping) for r in rows]
