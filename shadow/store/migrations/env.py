"""Alembic environment: runs the revisions in ``versions/`` on the connection the store hands over.

shadow calls :func:`shadow.store.database.migrate`; the ``alembic`` command line works too with
``-x url=...`` (see DEVELOPERS.md).
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import context

from shadow.store.schema import metadata

config = context.config


def run() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
        with context.begin_transaction():
            context.run_migrations()
        return
    url = context.get_x_argument(as_dictionary=True).get("url") or config.get_main_option("sqlalchemy.url")
    engine = sa.create_engine(url)
    with engine.connect() as conn:
        context.configure(connection=conn, target_metadata=metadata, render_as_batch=True)
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


run()
