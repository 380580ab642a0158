"""Alembic environment: the URL comes from Settings (or a connection handed in by the caller)."""

from __future__ import annotations

from alembic import context

from server import migrate
from server.db import make_engine
from server.models import metadata
from server.settings import Settings

config = context.config


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    # The `alembic` command itself (no connection handed in): the same path as `trialhouse db upgrade`.
    url = config.attributes.get("url") or Settings().resolved_database_url()
    engine = make_engine(url)
    try:
        with engine.connect() as conn, migrate.foreign_keys_off(conn), conn.begin():
            _run(conn)
            migrate.check_references(conn)  # inside the transaction: a broken reference rolls back
    finally:
        engine.dispose()


def _run(connection) -> None:  # type: ignore[no-untyped-def]
    context.configure(
        connection=connection,
        target_metadata=metadata,
        render_as_batch=True,
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


if context.is_offline_mode():
    context.configure(
        url=Settings().resolved_database_url(),
        target_metadata=metadata,
        literal_binds=True,
        render_as_batch=True,
    )
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations_online()
