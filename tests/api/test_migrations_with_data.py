"""Migrations on a database that holds a pilot's rows, on both backends.

SQLite rebuilds a table to alter it; with foreign keys enforced that failed as soon as other rows
referenced the rebuilt table (clips referenced by alerts), which an empty database never shows.
"""

from __future__ import annotations

import datetime as dt

from alembic import command
from sqlalchemy import func, select

from server import migrate
from server.db import make_engine
from server.devices.clipstore import ClipStore
from server.devices.models import Alert, Clip
from server.installations.models import Installation
from tests import factories
from tests.conftest import committed_session


def _counts(url: str) -> dict[str, int]:
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            return {
                t.__tablename__: int(conn.scalar(select(func.count()).select_from(t)) or 0)
                for t in (Alert, Clip, Installation)
            }
    finally:
        engine.dispose()


def test_a_populated_database_steps_down_and_back_up_with_every_row(fresh_settings) -> None:  # type: ignore[no-untyped-def]
    store = ClipStore(fresh_settings.data_dir / "clips")
    store.ensure()
    now = dt.datetime.now(dt.UTC)
    with committed_session(fresh_settings) as s:
        trial = factories.make_trial(s)
        for n in range(3):
            device, _ = factories.make_device(s, trial)
            home = factories.make_home(s, trial)
            factories.make_installation(s, device, home, installed_at=now - dt.timedelta(days=3))
            for k in range(2):
                factories.make_alert(
                    s, store, fresh_settings, device, detected_at=now - dt.timedelta(hours=n * 3 + k + 1)
                )
    url = fresh_settings.resolved_database_url()
    before = _counts(url)
    assert before == {"alert": 6, "clip": 6, "installation": 3}

    engine = make_engine(url)
    try:
        migrate.run(engine, command.downgrade, "0005")  # through every step added since
        assert migrate.current_revision(engine) == "0005"
        migrate.upgrade(engine)
        assert migrate.current_revision(engine) == migrate.head_revision()
    finally:
        engine.dispose()
    assert _counts(url) == before
