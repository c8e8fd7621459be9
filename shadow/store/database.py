"""Engines and migrations: SQLite (WAL) by default, PostgreSQL by URL.

SQLite: every connection gets ``journal_mode=WAL`` (readers never block the writer),
``synchronous=NORMAL`` (durable at checkpoints, safe with WAL), ``foreign_keys=ON`` and a busy
timeout, so the API process can read while the service writes.
PostgreSQL: the ``postgresql+psycopg://`` driver (psycopg 3; FIELD-NOTES: about twice the rows/s of
psycopg2 through SQLAlchemy Core).
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import sqlalchemy as sa
from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

from shadow.errors import ConfigurationError

log = logging.getLogger(__name__)

MIGRATIONS_DIR = Path(__file__).with_name("migrations")
SQLITE_BUSY_TIMEOUT_MS = 10_000


def normalise_url(url: str) -> str:
    """Accept the plain ``postgresql://`` form and pick the psycopg 3 driver for it."""
    if url.startswith("postgresql://") or url.startswith("postgres://"):
        return "postgresql+psycopg://" + url.split("://", 1)[1]
    return url


def create_engine(url: str, **kwargs: Any) -> sa.Engine:
    """An engine for the store's URL, with the SQLite pragmas above; a bad URL names itself."""
    url = normalise_url(url)
    try:
        parsed = sa.make_url(url)
    except sa.exc.ArgumentError as exc:
        raise ConfigurationError(f"database url {url!r} is not a valid SQLAlchemy URL: {exc}") from exc
    if parsed.get_backend_name() not in ("sqlite", "postgresql"):
        raise ConfigurationError(f"database url: only sqlite and postgresql are supported, got {parsed.drivername}")
    if parsed.get_backend_name() == "sqlite":
        if parsed.database and parsed.database != ":memory:":
            Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
        engine = sa.create_engine(url, **kwargs)

        @sa.event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_connection: Any, connection_record: Any) -> None:
            cursor = dbapi_connection.cursor()
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA synchronous=NORMAL")
            cursor.execute("PRAGMA foreign_keys=ON")
            cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
            cursor.close()

        return engine
    return sa.create_engine(url, pool_pre_ping=True, **kwargs)


def alembic_config() -> Config:
    """Alembic configuration pointing at the packaged migrations."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    return config


def migrate(engine: sa.Engine, revision: str = "head") -> None:
    """Bring the database schema to ``revision`` (default: the newest)."""
    config = alembic_config()
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, revision)


def current_revision(engine: sa.Engine) -> str | None:
    """The schema revision the database is at (None: never migrated)."""
    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def head_revision() -> str:
    """The newest revision shipped with this version of shadow."""
    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    if head is None:
        raise ConfigurationError("no schema migrations are shipped")
    return head
