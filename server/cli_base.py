"""What every `trialhouse` command needs: the database it works on, and the error it exits with.

Kept apart from server/cli.py (which wires the commands together) so that each domain's commands
can use it without importing the whole command line back.
"""

from __future__ import annotations

from sqlalchemy.orm import Session, sessionmaker

from server import migrate
from server.db import make_engine, make_session_factory, session_scope
from server.settings import Settings
from server.trials import service as trials_service


class CliError(Exception):
    pass


def open_db(settings: Settings, *, auto_migrate: bool | None = None) -> sessionmaker[Session]:
    """Session factory for the configured database. The default SQLite file migrates itself."""
    settings.data_dir.mkdir(parents=True, exist_ok=True)
    engine = make_engine(settings.resolved_database_url())
    if auto_migrate is None:
        auto_migrate = settings.is_default_sqlite
    if auto_migrate:
        migrate.upgrade(engine)
    else:
        try:
            migrate.check_schema(engine)
        except migrate.SchemaOutOfDate as exc:
            raise CliError(str(exc)) from exc
    factory = make_session_factory(engine)
    with session_scope(factory) as s:
        trials_service.ensure_default_trial(s, settings.default_trial_code, settings.default_sound_classes)
    return factory
