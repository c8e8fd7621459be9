"""Reading and writing the store. The write side takes a whole step's results in one transaction.

Why one transaction: the estimator checkpoint names the last sequence number its results cover, so
results and checkpoint must land together or not at all; a restart then resumes exactly after the
checkpoint, and nothing is lost or doubled. Rows are plain dicts built by the service from the core's
outputs (words and units in the keys); the API reads them back through the same class.

Fencing (several workers on one PostgreSQL, see shadow/pool): a write of a worker that owns the robot
through a lease carries a :class:`Fence` (its worker id and the lease's fencing token). The first
statement of the transaction locks the robot's lease row (``FOR SHARE``) and checks that this worker
still owns it under that token and that the lease has not expired on the database's clock; otherwise
the transaction is rolled back and :class:`LeaseLostError` raised. The lock is held to the commit, so
no other worker can be granted the robot between the check and the commit: a stalled worker that
resumes after losing its lease writes nothing.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa
from sqlalchemy.sql.util import ClauseAdapter

from shadow.errors import ConfigurationError, ShadowError
from shadow.store import schema
from shadow.store.database import create_engine, current_revision, head_revision, migrate, normalise_url

DEAD_LETTER_HEAD_BYTES = 256  # how much of a bad payload is kept for diagnosis


class StoreUnavailableError(ShadowError, RuntimeError):
    """The database cannot be reached or refused the write; nothing of the write was kept."""


class LeaseLostError(ShadowError, RuntimeError):
    """A fenced write found that the worker no longer holds the robot's lease; nothing of it was kept."""


@dataclass(frozen=True, slots=True)
class Fence:
    """Who may write a robot's results: the owning worker and the fencing token of its lease."""

    owner: str
    token: int


DATABASE_NOW_S = "extract(epoch from clock_timestamp())::float8"  # PostgreSQL's clock, seconds since the epoch


@dataclass(frozen=True, slots=True)
class Checkpoint:
    """Estimator state and the last batch sequence number it covers."""

    robot_id: str
    last_seq: int
    last_time_s: float
    state: bytes


ROW_LISTS = ("estimates", "residual_aggregates", "events", "health", "unmonitored", "raw_batches", "dead_letters")


@dataclass(slots=True)
class StepResults:
    """Everything one processing step produced for one robot, written atomically."""

    robot_id: str
    estimates: list[dict[str, Any]] = field(default_factory=list)  # time_s, parameter, value, std, identifiable
    residual_aggregates: list[dict[str, Any]] = field(default_factory=list)
    events: list[dict[str, Any]] = field(default_factory=list)
    health: list[dict[str, Any]] = field(default_factory=list)
    unmonitored: list[dict[str, Any]] = field(default_factory=list)
    raw_batches: list[dict[str, Any]] = field(default_factory=list)
    dead_letters: list[dict[str, Any]] = field(default_factory=list)  # see SqlStore.write_dead_letters
    checkpoint: Checkpoint | None = None

    def extend(self, other: StepResults) -> None:
        """Append another step's rows (same robot); the newer checkpoint wins."""
        if other.robot_id != self.robot_id:
            raise ConfigurationError(f"cannot merge results of {other.robot_id} into {self.robot_id}")
        for name in ROW_LISTS:
            getattr(self, name).extend(getattr(other, name))
        if other.checkpoint is not None:
            self.checkpoint = other.checkpoint

    def row_count(self) -> int:
        return sum(len(getattr(self, name)) for name in ROW_LISTS)


class SqlStore:
    """The store on one database URL (SQLite file, or PostgreSQL)."""

    def __init__(
        self, url: str, *, migrate_schema: bool = True, session_settings: dict[str, str] | None = None
    ) -> None:
        """``session_settings``: PostgreSQL run-time settings for every connection (e.g.
        ``idle_in_transaction_session_timeout``); refused for SQLite."""
        self.url = url
        options: dict[str, Any] = {}
        if session_settings:
            if not normalise_url(url).startswith("postgresql"):
                raise ConfigurationError(f"session settings {sorted(session_settings)} need a PostgreSQL store")
            flags = " ".join(f"-c {k}={v}" for k, v in sorted(session_settings.items()))
            options["connect_args"] = {"options": flags}
        self.engine = create_engine(url, **options)
        try:
            if migrate_schema:
                migrate(self.engine)
            elif current_revision(self.engine) != head_revision():
                raise ConfigurationError(
                    f"database schema is at {current_revision(self.engine)!r}, this shadow needs {head_revision()!r}: "
                    "run the service once with migrations enabled"
                )
        except sa.exc.OperationalError as exc:
            raise StoreUnavailableError(
                f"database {self.engine.url.render_as_string()} unreachable: {exc.orig}"
            ) from exc

    def close(self) -> None:
        self.engine.dispose()

    @property
    def is_postgresql(self) -> bool:
        return self.engine.dialect.name == "postgresql"

    # --- write side -----------------------------------------------------------------------------
    def register_robot(self, robot_id: str, *, family: str, n_actuators: int, description_source: str = "") -> None:
        """Insert the robot, or update its family and size if it is known already."""
        site, cell, name = split_robot_id(robot_id)
        row = {
            "robot_id": robot_id,
            "site": site,
            "cell": cell,
            "name": name,
            "family": family,
            "n_actuators": n_actuators,
            "description_source": description_source,
            "registered_at_s": time.time(),
        }
        with self._begin() as conn:
            if self.is_postgresql:  # several workers may register the same robots at once
                from sqlalchemy.dialects.postgresql import insert

                statement = insert(schema.robots).values(row)
                conn.execute(
                    statement.on_conflict_do_update(
                        index_elements=["robot_id"],
                        set_={k: statement.excluded[k] for k in ("family", "n_actuators", "description_source")},
                    )
                )
                return
            existing = conn.execute(sa.select(schema.robots.c.robot_id).where(schema.robots.c.robot_id == robot_id))
            if existing.first() is None:
                conn.execute(schema.robots.insert(), row)
            else:
                conn.execute(
                    schema.robots.update()
                    .where(schema.robots.c.robot_id == robot_id)
                    .values(family=family, n_actuators=n_actuators, description_source=description_source)
                )

    def write_step(self, results: StepResults, *, fence: Fence | None = None) -> None:
        """Write one step's rows and its checkpoint in one transaction.

        With a ``fence`` the transaction first checks the robot's lease (module docstring) and raises
        :class:`LeaseLostError` when it is no longer this worker's.
        """
        rid = results.robot_id
        with self._begin() as conn:
            if fence is not None:
                self._check_fence(conn, rid, fence)
            for table, rows in (
                (schema.estimates, results.estimates),
                (schema.residual_aggregates, results.residual_aggregates),
                (schema.events, results.events),
                (schema.health_snapshots, results.health),
                (schema.unmonitored_intervals, results.unmonitored),
                (schema.raw_batches, results.raw_batches),
            ):
                if rows:
                    conn.execute(table.insert(), _uniform_rows(table, rid, rows))
            if results.dead_letters:
                conn.execute(schema.dead_letters.insert(), [_dead_letter_row(d) for d in results.dead_letters])
            if results.checkpoint is not None:
                self._upsert_checkpoint(conn, results.checkpoint, None if fence is None else fence.token)

    def write_dead_letters(self, letters: Iterable[dict[str, Any]]) -> int:
        """Record rejected messages: received_at_s, topic, robot_id, reason_code, reason, payload (bytes)."""
        rows = [_dead_letter_row(d) for d in letters]
        if rows:
            with self._begin() as conn:
                conn.execute(schema.dead_letters.insert(), rows)
        return len(rows)

    def prune_raw_batches(self, robot_id: str, *, older_than_s: float, fence: Fence | None = None) -> int:
        """Rolling retention of raw samples: delete the batches that ended before ``older_than_s``."""
        with self._begin() as conn:
            if fence is not None:
                self._check_fence(conn, robot_id, fence)
            result = conn.execute(
                schema.raw_batches.delete().where(
                    schema.raw_batches.c.robot_id == robot_id, schema.raw_batches.c.last_time_s < older_than_s
                )
            )
            return int(result.rowcount or 0)

    def _check_fence(self, conn: sa.Connection, robot_id: str, fence: Fence) -> None:
        """Lock the robot's lease row to the end of the transaction; raise unless ``fence`` still holds it."""
        if not self.is_postgresql:
            raise ConfigurationError("fenced writes (a worker pool) need a PostgreSQL store")
        t = schema.robot_leases
        row = conn.execute(
            sa.select(
                t.c.owner,
                t.c.fencing_token,
                (t.c.expires_at_s > sa.literal_column(DATABASE_NOW_S, sa.Float)).label("live"),
            )
            .where(t.c.robot_id == robot_id)
            .with_for_update(read=True)
        ).first()
        if row is None or row.owner != fence.owner or int(row.fencing_token) != fence.token or not row.live:
            held = "no lease" if row is None else f"owner {row.owner!r}, token {row.fencing_token}, live {row.live}"
            raise LeaseLostError(
                f"robot {robot_id}: write refused, worker {fence.owner!r} no longer holds lease {fence.token} ({held})"
            )

    def _upsert_checkpoint(self, conn: sa.Connection, cp: Checkpoint, fencing_token: int | None) -> None:
        values = {
            "last_seq": cp.last_seq,
            "last_time_s": cp.last_time_s,
            "state": cp.state,
            "written_at_s": time.time(),
            "fencing_token": fencing_token,
        }
        updated = conn.execute(
            schema.checkpoints.update().where(schema.checkpoints.c.robot_id == cp.robot_id).values(**values)
        )
        if not updated.rowcount:
            conn.execute(schema.checkpoints.insert(), {"robot_id": cp.robot_id, **values})

    def _begin(self) -> _Transaction:
        return _Transaction(self.engine)

    # --- read side ------------------------------------------------------------------------------
    def robots(self) -> list[dict[str, Any]]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(schema.robots).order_by(schema.robots.c.robot_id))
            return [dict(r._mapping) for r in rows]

    def checkpoint(self, robot_id: str) -> Checkpoint | None:
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(schema.checkpoints).where(schema.checkpoints.c.robot_id == robot_id)).first()
        if row is None:
            return None
        return Checkpoint(robot_id, int(row.last_seq), float(row.last_time_s), bytes(row.state))

    def estimates(
        self,
        robot_id: str,
        *,
        start_s: float,
        end_s: float,
        parameters: Sequence[str] | None = None,
        every_s: float | None = None,
        limit: int = 10_000,
        offset: int = 0,
    ) -> list[dict[str, Any]]:
        """Estimate rows in ``[start_s, end_s)`` ordered by time and parameter, from ``offset`` on, at most
        ``limit``. With ``every_s``: only the last row of each step per parameter (:func:`last_per_step`)."""
        t = schema.estimates
        where = [t.c.robot_id == robot_id]
        if parameters:
            where.append(t.c.parameter.in_(list(parameters)))
        series = _Series(t, t.c.parameter, where, self._parameter_keys(robot_id, parameters))
        return self._series(series, start_s, end_s, every_s, limit, offset)

    def residual_aggregates(
        self,
        robot_id: str,
        *,
        start_s: float,
        end_s: float,
        every_s: float | None = None,
        limit: int = 10_000,
        offset: int = 0,
    ) -> list[dict[str, Any]]:
        """Residual aggregates in ``[start_s, end_s)`` ordered by time and actuator, from ``offset`` on, at most
        ``limit``. With ``every_s``: only the rows of the last aggregation window of each step (every actuator's
        row of one window has the window's time; :func:`last_per_step`)."""
        t = schema.residual_aggregates
        return self._series(
            _Series(t, t.c.actuator, [t.c.robot_id == robot_id], None), start_s, end_s, every_s, limit, offset
        )

    def _parameter_keys(self, robot_id: str, parameters: Sequence[str] | None) -> sa.CTE:
        """The parameters asked for; or all the robot's, by a loose index scan of (robot_id, parameter, time_s):
        each one the smallest name above the previous, one seek each."""
        t = schema.estimates
        if parameters:
            return _literal_keys([sa.cast(sa.literal(p), t.c.parameter.type) for p in dict.fromkeys(parameters)])
        x = t.alias("x")
        first = sa.select(sa.func.min(t.c.parameter).label("key")).where(t.c.robot_id == robot_id)
        keys = first.cte("keys", recursive=True)
        following = sa.select(
            sa.select(sa.func.min(x.c.parameter)).where(x.c.robot_id == robot_id, x.c.parameter > keys.c.key)
            .scalar_subquery()
        ).where(keys.c.key.is_not(None))  # fmt: skip
        return keys.union_all(following)

    def _series(
        self, series: _Series, start_s: float, end_s: float, every_s: float | None, limit: int, offset: int
    ) -> list[dict[str, Any]]:
        t, key = series.table, series.key
        with self.engine.connect() as conn:
            if every_s is None or not math.isfinite(end_s / every_s) or abs(end_s / every_s) >= 2.0**52:
                # no downsampling, or steps finer than the clock's resolution: every row is the last of its step
                query = (
                    sa.select(t)
                    .where(*series.where, t.c.time_s >= start_s, t.c.time_s < end_s)
                    .order_by(t.c.time_s, key)
                    .limit(limit)
                    .offset(offset)
                )
                return [dict(r._mapping) for r in conn.execute(query)]
            rows = last_per_step(conn, series, start_s, end_s, every_s, want=offset + limit)
        return rows[offset : offset + limit]

    def events(
        self,
        *,
        robot_id: str | None = None,
        kind: str | None = None,
        start_s: float | None = None,
        end_s: float | None = None,
        limit: int = 1000,
    ) -> list[dict[str, Any]]:
        t = schema.events
        query = sa.select(*[c for c in t.c if c.name != "evidence"])
        if robot_id is not None:
            query = query.where(t.c.robot_id == robot_id)
        if kind is not None:
            query = query.where(t.c.kind == kind)
        if start_s is not None:
            query = query.where(t.c.start_s >= start_s)
        if end_s is not None:
            query = query.where(t.c.start_s < end_s)
        with self.engine.connect() as conn:
            rows = conn.execute(query.order_by(t.c.start_s, t.c.event_id).limit(limit))
            return [dict(r._mapping) for r in rows]

    def event(self, event_id: int) -> dict[str, Any] | None:
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(schema.events).where(schema.events.c.event_id == event_id)).first()
        return None if row is None else dict(row._mapping)

    def latest_health(self, robot_id: str) -> list[dict[str, Any]]:
        """The newest snapshot of each scope (robot and every actuator).

        A loose index scan of (robot_id, scope, time_s): the scopes are found one seek each (the smallest scope
        above the previous one), and each scope's newest row by one more, so the cost grows with the number of
        scopes and not with the robot's history.
        """
        t = schema.health_snapshots
        x, y = t.alias("x"), t.alias("y")
        first = sa.select(sa.func.min(t.c.scope).label("scope")).where(t.c.robot_id == robot_id)
        scopes = first.cte("scopes", recursive=True)
        following = sa.select(
            sa.select(sa.func.min(x.c.scope)).where(x.c.robot_id == robot_id, x.c.scope > scopes.c.scope)
            .scalar_subquery()
        ).where(scopes.c.scope.is_not(None))  # fmt: skip
        scopes = scopes.union_all(following)
        newest = (
            sa.select(sa.func.max(y.c.time_s)).where(y.c.robot_id == robot_id, y.c.scope == scopes.c.scope)
        ).scalar_subquery()
        query = (
            sa.select(t)
            .select_from(scopes)
            .join(t, sa.and_(t.c.robot_id == robot_id, t.c.scope == scopes.c.scope, t.c.time_s == newest))
            .order_by(t.c.scope)
        )
        with self.engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(query)]

    def robots_with_health(self) -> list[tuple[dict[str, Any], dict[str, Any] | None]]:
        """Every robot with its newest robot-scope health snapshot (None before its first), in one query.

        Driven from ``robots``: per robot one seek for the newest time of its ``robot`` scope and one for that row
        (index ``ix_health_snapshots_scope``), so an overview of N robots costs N pairs of seeks, whatever their
        history, instead of N calls of :meth:`latest_health` that each also fetch every actuator's row.
        """
        r, t = schema.robots, schema.health_snapshots
        y = t.alias("y")
        newest = (
            sa.select(sa.func.max(y.c.time_s)).where(y.c.robot_id == r.c.robot_id, y.c.scope == "robot")
        ).scalar_subquery()
        health_cols = [c.label(f"h_{c.name}") for c in t.c]
        query = (
            sa.select(r, *health_cols)
            .select_from(r)
            .outerjoin(t, sa.and_(t.c.robot_id == r.c.robot_id, t.c.scope == "robot", t.c.time_s == newest))
            .order_by(r.c.robot_id)
        )
        out: list[tuple[dict[str, Any], dict[str, Any] | None]] = []
        with self.engine.connect() as conn:
            for row in conn.execute(query):
                m = row._mapping
                robot = {c.name: m[c.name] for c in r.c}
                health = {c.name: m[f"h_{c.name}"] for c in t.c} if m["h_scope"] is not None else None
                out.append((robot, health))
        return out

    def unmonitored_intervals(self, robot_id: str, *, start_s: float, end_s: float) -> list[dict[str, Any]]:
        t = schema.unmonitored_intervals
        query = sa.select(t).where(t.c.robot_id == robot_id, t.c.end_s >= start_s, t.c.start_s < end_s)
        with self.engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(query.order_by(t.c.start_s))]

    def raw_batches(self, robot_id: str, *, start_s: float, end_s: float) -> list[dict[str, Any]]:
        t = schema.raw_batches
        query = sa.select(t).where(t.c.robot_id == robot_id, t.c.last_time_s >= start_s, t.c.first_time_s < end_s)
        with self.engine.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(query.order_by(t.c.seq))]

    def dead_letter_counts(self) -> dict[str, int]:
        t = schema.dead_letters
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(t.c.reason_code, sa.func.count()).group_by(t.c.reason_code))
            return {str(code): int(n) for code, n in rows}

    def dead_letters(self, *, limit: int = 100) -> list[dict[str, Any]]:
        t = schema.dead_letters
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(t).order_by(t.c.dead_letter_id.desc()).limit(limit))
            return [dict(r._mapping) for r in rows]


class _Transaction:
    """``engine.begin()`` that turns a lost database into :class:`StoreUnavailableError`."""

    def __init__(self, engine: sa.Engine) -> None:
        self._engine = engine
        self._cm: Any = None

    def __enter__(self) -> sa.Connection:
        try:
            self._cm = self._engine.begin()
            return self._cm.__enter__()
        except (sa.exc.OperationalError, sa.exc.InterfaceError) as exc:
            raise StoreUnavailableError(f"database unreachable: {exc.orig}") from exc

    def __exit__(self, exc_type: Any, exc: BaseException | None, tb: Any) -> None:
        lost = (sa.exc.OperationalError, sa.exc.InterfaceError)
        try:
            self._cm.__exit__(exc_type, exc, tb)  # commits, or rolls back when the body raised
        except lost as commit_error:
            raise StoreUnavailableError(
                f"database write failed, nothing of it kept: {commit_error.orig}"
            ) from commit_error
        if isinstance(exc, lost):
            raise StoreUnavailableError(f"database write failed, nothing of it kept: {exc.orig}") from exc


def _dead_letter_row(d: dict[str, Any]) -> dict[str, Any]:
    return {
        "received_at_s": d["received_at_s"],
        "topic": d["topic"][:400],
        "robot_id": d.get("robot_id"),
        "reason_code": d["reason_code"][:32],
        "reason": d["reason"],
        "payload_size": len(d["payload"]),
        "payload_head": bytes(d["payload"][:DEAD_LETTER_HEAD_BYTES]),
    }


def _uniform_rows(table: sa.Table, robot_id: str, rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Give every row the same keys (executemany needs them); missing optional columns become NULL."""
    keys = {k for r in rows for k in r}
    unknown = keys - set(table.c.keys())
    if unknown:
        raise ConfigurationError(f"{table.name}: unknown columns {sorted(unknown)}")
    filler = {
        c.name: (c.default.arg if c.default is not None and c.default.is_scalar else None)
        for c in table.c
        if c.name in keys and (c.nullable or c.default is not None)
    }
    return [{"robot_id": robot_id, **filler, **r} for r in rows]


def split_robot_id(robot_id: str) -> tuple[str, str, str]:
    """``"site/cell/robot"`` into its parts; every part non-empty."""
    parts = robot_id.split("/")
    if len(parts) != 3 or not all(parts):
        raise ConfigurationError(f"robot id {robot_id!r}: must be 'site/cell/robot'")
    return parts[0], parts[1], parts[2]


@dataclass(frozen=True, slots=True)
class _Series:
    """A table of series: rows keyed by (robot_id, time_s, key), the robot's rows selected by ``where``."""

    table: sa.Table
    key: sa.Column[Any]
    where: list[Any]
    keys: sa.CTE | None  # one column "key": the series, each downsampled on its own; None: whole outputs


def _literal_keys(values: list[Any]) -> sa.CTE:
    if not values:  # no series at all: a CTE without rows
        return sa.select(sa.literal(None).label("key")).where(sa.false()).cte("keys")
    return sa.union_all(*[sa.select(v.label("key")) for v in values]).cte("keys")


SEEK_BUDGET = 20_000  # (step, series) lookups per statement of last_per_step
SCAN_BATCH = 2_000  # rows per read when last_per_step scans


def step_of(time_s: float, every_s: float) -> int:
    """Index k of the step ``k every_s <= time_s < (k + 1) every_s``, with the products as the database forms them."""
    k = math.floor(time_s / every_s)
    if k * every_s > time_s:
        k -= 1
    elif (k + 1) * every_s <= time_s:
        k += 1
    return k


def last_per_step(
    conn: sa.Connection, series: _Series, start_s: float, end_s: float, every_s: float, *, want: int
) -> list[dict[str, Any]]:
    """The last row of each step ``[k every_s, (k + 1) every_s)`` within ``[start_s, end_s)`` per series (or,
    with ``series.keys`` None, all rows of the step's newest time: its last output), ordered by time and key;
    the first ``want`` of them.

    The rows are taken a stretch at a time from the next row on (one seek, so a stretch without rows costs
    nothing), each stretch one of two ways, chosen by how many rows the next two steps hold (a probe of four rows
    per series), so that the cost grows with the rows returned and not with the rows in the range:

    * seeking, when the steps hold many rows each: one statement finds, for a run of steps (at most
      :data:`SEEK_BUDGET` step and series pairs, no more than ``want`` needs), each pair's last row by one index
      seek backwards from the step's end;
    * scanning, when the steps are as fine as the rows or finer: the next :data:`SCAN_BATCH` rows in time order,
      of which each complete step's last row per series is kept.
    """
    t, key = series.table, series.key
    out: list[dict[str, Any]] = []
    keys: set[Any] | None = None
    if series.keys is not None:
        keys = {r[0] for r in conn.execute(sa.select(series.keys.c.key))}
        if not keys:
            return out
    k_last = step_of(end_s, every_s)
    if k_last * every_s == end_s:
        k_last -= 1  # end_s is not in the range
    cursor = start_s  # every step before this one is done
    while len(out) < want:
        in_range = [*series.where, t.c.time_s >= cursor, t.c.time_s < end_s]
        first = conn.execute(sa.select(sa.func.min(t.c.time_s)).where(*in_range)).scalar_one_or_none()
        if first is None:
            break
        k = step_of(first, every_s)
        if keys is not None:
            per_step = len(keys)
        else:  # the rows of one output
            per_step = conn.execute(sa.select(sa.func.count()).where(*series.where, t.c.time_s == first)).scalar_one()
        ahead = sa.select(t.c.time_s).where(*in_range).order_by(t.c.time_s).offset(4 * per_step).limit(1)
        far = conn.execute(ahead).scalar_one_or_none()
        if far is not None and far - first < 2.0 * every_s:  # more than two rows per series and step: seek
            width = max(1, min(SEEK_BUDGET // per_step, -(-(want - len(out)) // per_step)))
            k1 = min(k_last, k + width - 1)
            out.extend(_seek_steps(conn, series, k, k1, start_s, end_s, every_s))
            cursor = (k1 + 1) * every_s
            continue
        rows = conn.execute(sa.select(t).where(*in_range).order_by(t.c.time_s, key).limit(SCAN_BATCH))
        batch = [dict(r._mapping) for r in rows]
        k_open = None if len(batch) < SCAN_BATCH else step_of(batch[-1]["time_s"], every_s)  # None: to the end
        if k_open == k:  # a single step of more than SCAN_BATCH rows
            out.extend(_seek_steps(conn, series, k, k, start_s, end_s, every_s))
            cursor = (k + 1) * every_s
            continue
        done = [(step_of(r["time_s"], every_s), r) for r in batch]
        done = [(step, r) for step, r in done if step != k_open]  # the open step is read again from its start
        if keys is None:  # all rows of each step's newest time
            newest: dict[int, list[dict[str, Any]]] = {}
            for step, r in done:
                held = newest.get(step)
                if held is None or held[0]["time_s"] < r["time_s"]:
                    newest[step] = [r]
                elif held[0]["time_s"] == r["time_s"]:
                    held.append(r)
            kept = [r for rows_of_step in newest.values() for r in rows_of_step]
        else:  # the last row of each step and series
            kept = list({(step, r[key.name]): r for step, r in done if r[key.name] in keys}.values())
        out.extend(sorted(kept, key=lambda r: (r["time_s"], r[key.name])))
        if k_open is None:
            break
        cursor = k_open * every_s
    return out[:want]


def _seek_steps(
    conn: sa.Connection, series: _Series, k0: int, k1: int, start_s: float, end_s: float, every_s: float
) -> list[dict[str, Any]]:
    """The last row of each step k0..k1 per series (or all rows of its newest time): a seek backwards from each
    step's end."""
    t, key = series.table, series.key
    x = t.alias("x")
    adapt = ClauseAdapter(x).traverse
    steps = sa.select(sa.cast(sa.literal(k0), sa.BigInteger).label("k")).cte("steps", recursive=True)
    steps = steps.union_all(sa.select(steps.c.k + 1).where(steps.c.k < k1))
    every = sa.literal(every_s, sa.Float)
    lower, upper = steps.c.k * every, (steps.c.k + 1) * every
    # one bound on each side (two would make SQLite prefer the primary key's time range to the series index)
    lower = sa.case((lower < start_s, sa.literal(start_s, sa.Float)), else_=lower)
    upper = sa.case((upper > end_s, sa.literal(end_s, sa.Float)), else_=upper)
    same = [adapt(c) for c in series.where]
    if series.keys is not None:
        same.append(adapt(key) == series.keys.c.key)
    newest = (
        sa.select(x.c.time_s)
        .where(*same, x.c.time_s >= lower, x.c.time_s < upper)
        .order_by(x.c.time_s.desc())
        .limit(1)
        .scalar_subquery()
    )
    if series.keys is not None:  # the planners take the small CTEs first, and look the rows up by their key
        on = sa.and_(*series.where, key == series.keys.c.key, t.c.time_s == newest)
        query = sa.select(t).select_from(steps).join(series.keys, sa.true()).join(t, on)
    else:  # without the keys, SQLite would take the table first: look the rows up by the list of times
        times = sa.select(newest.label("time_s")).select_from(steps)
        query = sa.select(t).where(*series.where, t.c.time_s.in_(times))
    return [dict(r._mapping) for r in conn.execute(query.order_by(t.c.time_s, key))]
