"""Schema migration helpers: upgrade to head, and check that a database is at head."""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy.engine import Connection, Engine

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"


class SchemaOutOfDate(RuntimeError):
    pass


def alembic_config(url: str | None = None) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    if url:
        cfg.attributes["url"] = url
    return cfg


def upgrade(engine: Engine) -> None:
    run(engine, command.upgrade, "head")


def run(engine: Engine, step: Callable[[Config, str], None], target: str) -> None:
    """Run one Alembic command (upgrade or downgrade to `target`) in one transaction."""
    cfg = alembic_config()
    with engine.connect() as conn, foreign_keys_off(conn), conn.begin():
        cfg.attributes["connection"] = conn
        step(cfg, target)
        check_references(conn)


@contextlib.contextmanager
def foreign_keys_off(conn: Connection) -> Iterator[None]:
    """SQLite only: foreign keys unenforced while the migration runs (no effect elsewhere).

    SQLite alters a table by rebuilding it (batch mode: copy, drop the old, rename). With foreign
    keys enforced, dropping a table that other rows reference fails, so a database with data could
    not be migrated. SQLite's documented procedure: foreign keys off for the migration (the pragma
    only takes effect outside a transaction), then `check_references` inside it before the commit,
    so a migration that broke a reference rolls back whole.
    """
    raw = conn.connection.driver_connection if conn.dialect.name == "sqlite" else None
    if raw is not None:
        raw.execute("PRAGMA foreign_keys=OFF")
    try:
        yield
    finally:
        if raw is not None:
            raw.execute("PRAGMA foreign_keys=ON")


def check_references(conn: Connection) -> None:
    """Refuse (and so roll back) a migration that left a row pointing at nothing (SQLite)."""
    if conn.dialect.name != "sqlite":
        return
    broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
    if broken:
        raise RuntimeError(f"the migration left {len(broken)} broken reference(s): {broken[:5]}")


def head_revision() -> str | None:
    return ScriptDirectory.from_config(alembic_config()).get_current_head()


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def check_schema(engine: Engine) -> None:
    """Raise SchemaOutOfDate with the command that fixes it unless the database is at head."""
    current, head = current_revision(engine), head_revision()
    if current != head:
        state = "has no Trialhouse schema" if current is None else f"is at schema revision {current}"
        raise SchemaOutOfDate(
            f"The database {state}; this version needs revision {head}. "
            "Run `trialhouse db upgrade` (with the same TRIALHOUSE_DATABASE_URL) and start again."
        )
