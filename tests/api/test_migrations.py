"""Migrations on both backends: a fresh database upgrades to head, autogenerate finds no difference
from the models, and downgrade to base followed by upgrade works.
"""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import inspect
from sqlalchemy.engine import Engine

from server import migrate
from server.db import make_engine
from server.models import metadata
from tests.conftest import Backend, _pg_create


@pytest.fixture
def empty_engine(backend: Backend, tmp_path) -> Iterator[Engine]:  # type: ignore[no-untyped-def]
    """A database with nothing in it, on the current backend."""
    if backend.name == "sqlite":
        url = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    else:
        assert backend.pg_admin
        url = _pg_create(backend.pg_admin, f"trialhouse_mig_{os.getpid()}")
    engine = make_engine(url)
    yield engine
    engine.dispose()


def _alembic(engine: Engine, fn, target: str) -> None:  # type: ignore[no-untyped-def]
    cfg = migrate.alembic_config()
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        fn(cfg, target)


def _diff(engine: Engine) -> list[object]:
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True, "render_as_batch": True})
        return list(compare_metadata(ctx, metadata))


def _tables(engine: Engine) -> set[str]:
    return set(inspect(engine).get_table_names()) - {"alembic_version"}


def test_fresh_database_upgrades_to_head_matching_the_models(empty_engine: Engine) -> None:
    assert migrate.current_revision(empty_engine) is None
    migrate.upgrade(empty_engine)
    assert migrate.current_revision(empty_engine) == migrate.head_revision()
    migrate.check_schema(empty_engine)
    assert _tables(empty_engine) == set(metadata.tables)
    assert _diff(empty_engine) == []


def test_downgrade_to_base_then_upgrade_again(empty_engine: Engine) -> None:
    migrate.upgrade(empty_engine)
    _alembic(empty_engine, command.downgrade, "base")
    assert migrate.current_revision(empty_engine) is None
    assert _tables(empty_engine) == set()
    with pytest.raises(migrate.SchemaOutOfDate, match="trialhouse db upgrade"):
        migrate.check_schema(empty_engine)
    migrate.upgrade(empty_engine)
    assert migrate.current_revision(empty_engine) == migrate.head_revision()
    assert _diff(empty_engine) == []


def test_each_revision_steps_down_and_up(empty_engine: Engine) -> None:
    """Every single step has a working downgrade, not only the full round trip."""
    migrate.upgrade(empty_engine)
    script = ScriptDirectory.from_config(migrate.alembic_config())
    revisions = [r.revision for r in script.walk_revisions()]  # head first
    for rev in revisions:
        _alembic(empty_engine, command.downgrade, "-1")
        assert migrate.current_revision(empty_engine) != rev
    assert migrate.current_revision(empty_engine) is None
    for rev in reversed(revisions):
        _alembic(empty_engine, command.upgrade, "+1")
        assert migrate.current_revision(empty_engine) == rev
    assert _diff(empty_engine) == []


def test_upgrade_at_head_is_a_no_op(empty_engine: Engine) -> None:
    migrate.upgrade(empty_engine)
    before = _tables(empty_engine)
    migrate.upgrade(empty_engine)
    assert _tables(empty_engine) == before
    assert migrate.current_revision(empty_engine) == migrate.head_revision()
