"""The store's tables (SQLAlchemy Core). One schema for SQLite and PostgreSQL.

Times are float seconds since the Unix epoch, UTC (``*_s`` columns), the same clock as the wire
format; the API turns them into ISO 8601. Per-actuator values are one row per actuator, so a
dashboard can select one actuator's series without decoding anything. Raw samples are kept per
batch, as the wire format's binary encoding in one blob per message (row-per-sample inserts cannot
follow 1 kHz streams: FIELD-NOTES, "Storage").

Changing a table means a new Alembic revision in ``shadow/store/migrations/versions``; a test
checks that the migrations produce exactly this metadata.
"""

from __future__ import annotations

import sqlalchemy as sa

metadata = sa.MetaData(
    naming_convention={
        "ix": "ix_%(column_0_label)s",
        "uq": "uq_%(table_name)s_%(column_0_name)s",
        "ck": "ck_%(table_name)s_%(constraint_name)s",
        "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
        "pk": "pk_%(table_name)s",
    }
)

robots = sa.Table(
    "robots",
    metadata,
    sa.Column("robot_id", sa.String(200), primary_key=True),  # "<site>/<cell>/<robot>"
    sa.Column("site", sa.String(64), nullable=False),
    sa.Column("cell", sa.String(64), nullable=False),
    sa.Column("name", sa.String(64), nullable=False),
    sa.Column("family", sa.String(16), nullable=False),  # "delta" | "hexapod"
    sa.Column("n_actuators", sa.Integer, nullable=False),
    sa.Column("description_source", sa.Text, nullable=False, server_default=""),
    sa.Column("registered_at_s", sa.Float, nullable=False),
)

estimates = sa.Table(
    "estimates",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("time_s", sa.Float, primary_key=True),
    sa.Column("parameter", sa.String(64), primary_key=True),  # e.g. "payload_mass_kg", "coulomb_nm[2]"
    sa.Column("value", sa.Float, nullable=False),
    sa.Column("std", sa.Float, nullable=False),  # one standard deviation, same unit as value
    sa.Column("identifiable", sa.Boolean, nullable=False),  # False: the motion did not excite it
    sa.Index("ix_estimates_series", "robot_id", "parameter", "time_s"),  # one parameter's series, its names
)

residual_aggregates = sa.Table(
    "residual_aggregates",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("time_s", sa.Float, primary_key=True),  # start of the aggregation window
    sa.Column("actuator", sa.Integer, primary_key=True),  # 1-based
    sa.Column("window_s", sa.Float, nullable=False),
    sa.Column("n_samples", sa.Integer, nullable=False),
    sa.Column("rms", sa.Float, nullable=False),  # N m or N
    sa.Column("peak", sa.Float, nullable=False),  # largest |residual| in the window, N m or N
    sa.Column("nis", sa.Float, nullable=True),  # normalised innovation squared of the window, robot-wide
)

events = sa.Table(
    "events",
    metadata,
    sa.Column("event_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), nullable=False, index=True),
    sa.Column("kind", sa.String(32), nullable=False, index=True),  # collision, payload_fault, wear, drift, ...
    sa.Column("start_s", sa.Float, nullable=False, index=True),
    sa.Column("end_s", sa.Float, nullable=False),
    sa.Column("severity", sa.String(16), nullable=False),
    sa.Column("summary", sa.Text, nullable=False),  # one sentence in words
    sa.Column("figures", sa.JSON, nullable=False),  # the numbers behind it, units in the keys
    sa.Column("evidence_start_s", sa.Float, nullable=True),
    sa.Column("evidence_end_s", sa.Float, nullable=True),
    sa.Column("evidence", sa.LargeBinary, nullable=True),  # raw samples around it, wire-format binary
    sa.Column("source_seq", sa.BigInteger, nullable=False),  # sequence number of the batch that closed it
    sa.UniqueConstraint("robot_id", "kind", "start_s", name="one_event_per_start"),
)

health_snapshots = sa.Table(
    "health_snapshots",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("time_s", sa.Float, primary_key=True),
    sa.Column("scope", sa.String(32), primary_key=True),  # "robot" or "actuator:<1-based number>"
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("reasons", sa.JSON, nullable=False),  # list of sentences
    sa.Column("figures", sa.JSON, nullable=False),
    sa.Index("ix_health_snapshots_scope", "robot_id", "scope", "time_s"),  # newest of each scope in a few seeks
)

dead_letters = sa.Table(
    "dead_letters",
    metadata,
    sa.Column("dead_letter_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("received_at_s", sa.Float, nullable=False, index=True),
    sa.Column("topic", sa.String(400), nullable=False),
    sa.Column("robot_id", sa.String(200), nullable=True, index=True),  # when the topic names a known robot
    sa.Column("reason_code", sa.String(32), nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("payload_size", sa.Integer, nullable=False),
    sa.Column("payload_head", sa.LargeBinary, nullable=False),  # the first bytes, for diagnosis
)

unmonitored_intervals = sa.Table(
    "unmonitored_intervals",
    metadata,
    sa.Column("interval_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), nullable=False, index=True),
    sa.Column("start_s", sa.Float, nullable=False),
    sa.Column("end_s", sa.Float, nullable=False),
    sa.Column("cause", sa.String(32), nullable=False),  # sequence_gap, service_down, overflow, conditioning_restart
    sa.Column("detail", sa.Text, nullable=False, default="", server_default=""),
)

raw_batches = sa.Table(
    "raw_batches",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("seq", sa.BigInteger, primary_key=True),
    sa.Column("first_time_s", sa.Float, nullable=False, index=True),
    sa.Column("last_time_s", sa.Float, nullable=False),
    sa.Column("n_samples", sa.Integer, nullable=False),
    sa.Column("payload", sa.LargeBinary, nullable=False),  # wire-format binary encoding
)

checkpoints = sa.Table(
    "checkpoints",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("last_seq", sa.BigInteger, nullable=False),  # every batch up to this one is in the results
    sa.Column("last_time_s", sa.Float, nullable=False),
    sa.Column("state", sa.LargeBinary, nullable=False),  # estimator state, versioned by the estimator
    sa.Column("written_at_s", sa.Float, nullable=False),
    sa.Column("fencing_token", sa.BigInteger, nullable=True),  # lease it was written under (NULL: single worker)
)

# --- worker pool (PostgreSQL only; see shadow/pool). Times here are the database's clock, not a worker's. ---

workers = sa.Table(
    "workers",
    metadata,
    sa.Column("worker_id", sa.String(100), primary_key=True),  # the name given with --worker or [pool] worker
    sa.Column("incarnation", sa.String(32), nullable=False),  # random per process start: tells restarts apart
    sa.Column("host", sa.String(200), nullable=False),
    sa.Column("pid", sa.Integer, nullable=False),
    sa.Column("started_at_s", sa.Float, nullable=False),
    sa.Column("heartbeat_at_s", sa.Float, nullable=False),
    sa.Column("expires_at_s", sa.Float, nullable=False),  # live while this is in the future
)

robot_leases = sa.Table(
    "robot_leases",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("owner", sa.String(100), nullable=True),  # worker_id; NULL: free
    sa.Column("fencing_token", sa.BigInteger, nullable=False),  # +1 at every grant, never reused
    sa.Column("acquired_at_s", sa.Float, nullable=True),
    sa.Column("expires_at_s", sa.Float, nullable=False),  # the owner must renew before this
)

lease_history = sa.Table(
    "lease_history",
    metadata,
    sa.Column("robot_id", sa.String(200), sa.ForeignKey("robots.robot_id"), primary_key=True),
    sa.Column("fencing_token", sa.BigInteger, primary_key=True),
    sa.Column("owner", sa.String(100), nullable=False),
    sa.Column("acquired_at_s", sa.Float, nullable=False),
    sa.Column("ended_at_s", sa.Float, nullable=True),  # NULL: still held
    sa.Column("end_cause", sa.String(16), nullable=True),  # "released" or "expired"
)
