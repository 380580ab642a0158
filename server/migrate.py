"""Schema migration helpers: upgrade to head, and check that a database is at head."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy.engine import Engine

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
    cfg = alembic_config()
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")


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
            "Run `trialhouse db upgrade` (with the same TRIALHOUSE_DATABASE_URL) and start again.")
